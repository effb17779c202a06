"""Speed of the grouping model (joint replenishment MILP, pyomo + HiGHS).

Run: ``python -m tests.benchmarks.bench_grouping [--items N] [--families F] [--family-items M] [--seed S]``

Scenario (invented): families whose items have annual demand log-uniform in [20, 3000], holding cost 2-30 per
unit-year (unit value 4 x holding), line costs 5-60, shared order cost 500, lead times 5-30 days (sd 20%),
demand variance 0.5-3 x the mean, backorder cost 20 x holding per unit short. Capacity (volume) = 50% of the
largest order of the unconstrained deterministic optimum; minimum order value = 50% of that optimum's
smallest order. Both limits are active in the runs below.

Printed per run: wall time, status, the solver's gap over the candidate set, candidates generated and kept,
the Lagrangian lower bound over the candidates and the gap to it, and the same family solved by the RAND
baseline (Kaspi & Rosenblatt 1991; unconstrained alternation, then pulled into the constraints) in the same
run, with the cost ratio. A deterministic family without constraints is also compared with the exact cyclic
optimum and Roundy's (1985) lower bound. Targets: the 500-item family under 30 s, 200 families of 50 items
under 120 s, on 2 cores.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from models import grouping_milp as gm
from models import joint

TARGET_BIG = 30.0
TARGET_MANY = 120.0


def make_family(rng: np.random.Generator, n: int, constrained: bool = True, stochastic: bool = True):
    S = 500.0
    s = rng.uniform(5, 60, n)
    h = rng.uniform(2, 30, n)
    D = np.exp(rng.uniform(np.log(20), np.log(3000), n))
    vol = rng.uniform(0.001, 0.05, n)
    val = 4 * h
    ex = joint.exact_cyclic(S, s, h * D)
    kw = {}
    if stochastic:
        L = rng.uniform(5, 30, n) / 365
        kw.update(demand_var=D * rng.uniform(0.5, 3, n), lead_time=L, lead_time_sd=0.2 * L,
                  backorder_cost=20 * h)
    if constrained:
        load = float((D * vol * ex.multiples).sum() * ex.cycle)
        smallest = float((D * val)[ex.multiples == 1].sum() * ex.cycle)
        kw.update(volume=vol, unit_value=val, capacity_volume=0.5 * load, min_order_value=0.5 * smallest)
    return gm.make_family(S, s, h, D, **kw), ex


def baseline(fam) -> tuple[float, float]:
    """RAND baseline: the deterministic RAND policy, pulled into the feasible cycle range and repaired to meet
    capacity and minimum value (the model's own fallback rule), costed on the same stochastic basis."""
    t = time.perf_counter()
    H = fam.holding_cost * fam.annual_demand
    r = joint.rand(fam.major_cost, fam.minor_cost, H)
    lo, hi, _ = gm._feasible_range(fam)
    T = min(max(r.cycle, lo), hi)
    k = np.minimum(r.multiples, gm.K_MAX)
    k = gm._repair(fam, np.array([T]), k[None, :], np.arange(1, gm.K_MAX + 1))[0]
    c, _, _ = gm._policy_cost(fam, T, k)
    assert gm.check_policy(fam, T, k)[0]
    return fam.major_cost / T + float(c.sum()), time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--items", type=int, default=500)
    ap.add_argument("--families", type=int, default=200)
    ap.add_argument("--family-items", type=int, default=50)
    ap.add_argument("--seed", type=int, default=2026)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)

    # warm-up (imports, pyomo/HiGHS loading) outside the timings
    gm.solve_family(make_family(np.random.default_rng(0), 5)[0])

    print(f"== one family of {args.items} items, capacity and minimum order value, stochastic costs")
    fam, _ = make_family(rng, args.items)
    t = time.perf_counter()
    r = gm.solve_family(fam, time_limit=TARGET_BIG * 2)
    wall = time.perf_counter() - t
    lag = r.extra.get("lagrange_bound", float("nan"))
    b_cost, b_time = baseline(fam)
    print(f"wall {wall:.2f} s (target < {TARGET_BIG:.0f} s: {'met' if wall < TARGET_BIG else 'MISSED'}); "
          f"status {r.status}; binding {','.join(r.binding) or 'none'}")
    print(f"candidates {r.candidates}, kept {r.candidates_kept}, model variables {r.variables}; "
          f"solver gap over the candidates {r.gap:.2e}")
    print(f"cost {r.total_cost:,.2f}; Lagrangian lower bound over the candidates {lag:,.2f} "
          f"(gap {(r.total_cost - lag) / r.total_cost:.3%})")
    print(f"RAND baseline: cost {b_cost:,.2f} in {b_time:.3f} s -> the model saves "
          f"{(b_cost - r.total_cost) / b_cost:.2%} (cost ratio baseline/model {b_cost / r.total_cost:.4f})")

    print(f"\n== one family of {args.items} items, deterministic, no constraints (exact and Roundy checks)")
    fam_d, ex = make_family(rng, args.items, constrained=False, stochastic=False)
    t = time.perf_counter()
    rd = gm.solve_family(fam_d, k_max=max(gm.K_MAX, int(ex.multiples.max())))
    wall_d = time.perf_counter() - t
    t = time.perf_counter()
    ex = joint.exact_cyclic(fam_d.major_cost, fam_d.minor_cost, fam_d.holding_cost * fam_d.annual_demand)
    t_ex = time.perf_counter() - t
    lb = joint.roundy_bound(fam_d.major_cost, fam_d.minor_cost, fam_d.holding_cost * fam_d.annual_demand).cost
    rr = joint.rand(fam_d.major_cost, fam_d.minor_cost, fam_d.holding_cost * fam_d.annual_demand)
    print(f"model {rd.total_cost:,.4f} in {wall_d:.2f} s ({rd.status}); exact cyclic {ex.cost:,.4f} in "
          f"{t_ex:.3f} s; rel. difference {(rd.total_cost - ex.cost) / ex.cost:.2e}")
    print(f"Roundy lower bound {lb:,.4f}: gap of the model {(rd.total_cost - lb) / lb:.3%}; "
          f"RAND {rr.cost:,.4f} (gap {(rr.cost - lb) / lb:.3%})")

    print(f"\n== {args.families} families of {args.family_items} items, capacity and minimum order value")
    fams = [make_family(rng, args.family_items)[0] for _ in range(args.families)]
    t = time.perf_counter()
    sols = [gm.solve_family(f, time_limit=30.0) for f in fams]
    wall_m = time.perf_counter() - t
    statuses = {}
    for s in sols:
        statuses[s.status] = statuses.get(s.status, 0) + 1
    gaps = np.array([s.gap for s in sols if np.isfinite(s.gap)])
    lagg = np.array([(s.total_cost - s.extra["lagrange_bound"]) / s.total_cost for s in sols
                     if "lagrange_bound" in s.extra])
    t = time.perf_counter()
    base = np.array([baseline(f)[0] for f in fams])
    wall_b = time.perf_counter() - t
    cost = np.array([s.total_cost for s in sols])
    met = "met" if wall_m < TARGET_MANY else "MISSED"
    per = wall_m / args.families * 1000
    print(f"wall {wall_m:.2f} s (target < {TARGET_MANY:.0f} s: {met}); {per:.0f} ms per family; "
          f"statuses {statuses}")
    print(f"solver gap over the candidates: max {gaps.max() if gaps.size else float('nan'):.2e}; gap to the "
          f"Lagrangian bound: mean {lagg.mean():.3%}, max {lagg.max():.3%}")
    print(f"RAND baseline {wall_b:.2f} s in all; model saves on average {np.mean((base - cost) / base):.2%} "
          f"(min {np.min((base - cost) / base):.2%}, max {np.max((base - cost) / base):.2%})")


if __name__ == "__main__":
    main()
