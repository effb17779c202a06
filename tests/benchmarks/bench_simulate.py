"""Speed of the network simulator.

Run: ``python -m tests.benchmarks.bench_simulate [--items N] [--replications K] [--years Y]``

Scenario (invented): one warehouse and 20 stores, 1,000 items, 2 simulated years after a warm-up of 0.25
years, 10 replications. Store demand per item and store is log-normal around 0.6 units a day (slow and fast
movers), 60% Poisson and 40% compound Poisson (variance 2-4 x mean); supplier lead time 14 days (sd 3,
gamma), transit 1-3 days (sd 0.5). Policies are simple rules of thumb (about two weeks of demand per order
at the stores, a month at the warehouse, reorder points covering lead-time demand plus 1.5 sd).

Printed: wall time and simulated customer demand events per second of the compiled kernel on all cores and
on one thread, the first-call (compile or cache load) time, and the same event loop run as plain Python
(numba's JIT switched off in a subprocess, ``NUMBA_DISABLE_JIT=1``) on a small sample, with the ratio.
Target: the full run under 60 s on 2 cores.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np

N_STORES = 20
TARGET_SECONDS = 60.0
PY_SAMPLE_ITEMS = 3  # items in the plain-Python sample (1 replication)


def scenario(n_items: int, seed: int = 2026) -> dict:
    """Arrays for :func:`optimiser.simulate.simulate_network_arrays` (invented data)."""
    rng = np.random.default_rng(seed)
    s = N_STORES + 1
    parent = np.array([-1] + [0] * N_STORES)
    daily = np.zeros((n_items, s))
    daily[:, 1:] = rng.lognormal(np.log(0.6), 1.0, size=(n_items, N_STORES))
    ratio = np.where(rng.random((n_items, 1)) < 0.4, rng.uniform(2.0, 4.0, (n_items, 1)), 1.0)
    sd = np.sqrt(daily * ratio)
    model = np.where(ratio > 1.0, 1, 0) * np.ones((1, s), dtype=np.int64)
    lead = np.empty((n_items, s))
    lead[:, 0] = 14.0
    lead[:, 1:] = rng.integers(1, 4, size=(1, N_STORES)).astype(float)
    lead_sd = np.full((n_items, s), 0.5)
    lead_sd[:, 0] = 3.0
    total = daily[:, 1:].sum(axis=1)
    q = np.empty((n_items, s))
    r = np.empty((n_items, s))
    q[:, 1:] = np.maximum(1, np.round(14 * daily[:, 1:]))
    ltd = daily[:, 1:] * lead[:, 1:]
    r[:, 1:] = np.round(ltd + 1.5 * np.sqrt(ltd * ratio))
    q[:, 0] = np.maximum(q[:, 1:].max(axis=1), np.round(30 * total))
    ltd0 = total * lead[:, 0]
    r[:, 0] = np.round(ltd0 + 1.5 * np.sqrt(ltd0 * ratio[:, 0]))
    return dict(parent=parent, reorder_point=r, order_quantity=q, demand_mean=daily, demand_sd=sd,
                demand_model=model, lead_mean=lead, lead_sd=lead_sd)


def run(n_items: int, replications: int, years: float, parallel: bool, days: float = 365.0):
    from optimiser.simulate import simulate_network_arrays

    arrays = scenario(n_items)
    warm = 0.25 * days
    t0 = time.perf_counter()
    sim = simulate_network_arrays(**arrays, horizon_days=warm + years * days, warmup_days=warm,
                                  replications=replications, seed=7, parallel=parallel)
    seconds = time.perf_counter() - t0
    # events over the whole horizon: the kernel counts after the warm-up; scale up by the horizon share
    events = sim.demand_events * (warm + years * days) / (years * days)
    return seconds, events, sim


def _python_sample(years: float) -> dict:
    """Run in a subprocess with NUMBA_DISABLE_JIT=1: the same event loop, interpreted."""
    code = (
        "import json, time, sys\n"
        "sys.path.insert(0, '.')\n"
        "from tests.benchmarks.bench_simulate import run\n"
        f"s, e, _ = run({PY_SAMPLE_ITEMS}, 1, {years}, False)\n"
        "print(json.dumps({'seconds': s, 'events': e}))\n"
    )
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    res = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True,
                         cwd=os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
    return json.loads(res.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--items", type=int, default=1000)
    ap.add_argument("--replications", type=int, default=10)
    ap.add_argument("--years", type=float, default=2.0)
    args = ap.parse_args(argv)

    import numba

    print(f"network simulator benchmark: 1 warehouse + {N_STORES} stores, {args.items} items, "
          f"{args.years:g} years after 0.25 warm-up, {args.replications} replications; "
          f"{numba.config.NUMBA_NUM_THREADS} numba threads; load average before the run "
          f"{os.getloadavg()[0]:.2f} (other processes share the cores)")
    t0 = time.perf_counter()
    run(2, 2, 0.1, True)
    run(2, 2, 0.1, False)
    print(f"first calls (compile or load from cache): {time.perf_counter() - t0:.1f} s")

    sec_par, ev_par, sim = run(args.items, args.replications, args.years, True)
    print(f"compiled, parallel : {sec_par:7.2f} s, {ev_par / 1e6:8.1f} M demand events, "
          f"{ev_par / sec_par / 1e6:6.2f} M events/s  "
          f"[{'PASS' if sec_par < TARGET_SECONDS else 'FAIL'}: target < {TARGET_SECONDS:g} s]")
    small = max(10, args.items // 10)
    sec_ser, ev_ser, _ = run(small, args.replications, args.years, False)
    rate_ser = ev_ser / sec_ser
    print(f"compiled, 1 thread : {sec_ser:7.2f} s for {small} items, {rate_ser / 1e6:6.2f} M events/s; "
          f"parallel speed-up {ev_par / sec_par / (ev_ser / sec_ser):.2f}x")
    py = _python_sample(args.years)
    py_rate = py["events"] / py["seconds"]
    print(f"plain Python (same loop, NUMBA_DISABLE_JIT=1, {PY_SAMPLE_ITEMS} items x 1 replication): "
          f"{py['seconds']:.2f} s, {py_rate / 1e3:.1f} k events/s")
    print(f"ratio compiled 1 thread / plain Python: {ev_ser / sec_ser / py_rate:,.0f}x; "
          f"compiled parallel / plain Python: {ev_par / sec_par / py_rate:,.0f}x")
    oh = sim.mean("on_hand")
    print(f"sanity: mean store fill rate {np.nanmean(sim.mean('fill_rate')[:, 1:]):.3f}, "
          f"warehouse fill rate {np.nanmean(sim.mean('fill_rate')[:, 0]):.3f}, "
          f"mean on hand per item-site {np.nanmean(oh):.1f}")
    return 0 if sec_par < TARGET_SECONDS else 1


if __name__ == "__main__":
    sys.exit(main())
