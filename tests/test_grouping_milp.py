"""Tests of models/grouping_milp.py: exact cyclic optimum, brute force, scipy integration, constraints."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm

from models import grouping_milp as gm
from models import joint

# Snyder & Shen, Fundamentals of Supply Chain Theory (2nd ed. 2019): Silver's heuristic gives cost 837.8544
SNYDER = dict(major_cost=600.0, minor_cost=[120.0, 840.0, 300.0], holding_cost=[160.0, 20.0, 50.0],
              annual_demand=[1.0, 1.0, 1.0])


def brute(fam: gm.Family, T_grid: np.ndarray, kmax: int) -> tuple[float, float, np.ndarray]:
    """Exhaustive search over T on a grid and every k in {1..kmax}^n, with the constraints checked."""
    n = fam.minor_cost.size
    ks = np.array(list(itertools.product(range(1, kmax + 1), repeat=n)))
    best = (math.inf, math.nan, None)
    for T in T_grid:
        tau = T * ks
        det = (fam.minor_cost / tau + 0.5 * tau * fam.holding_cost * fam.annual_demand)
        ssc, _, _ = gm.periodic_review_cost(
            tau, fam.annual_demand, fam.demand_var, fam.lead_time, fam.lead_time_sd, fam.holding_cost,
            fam.backorder_cost, backorder_basis=fam.backorder_basis, mode=fam.mode, target=fam.target)
        cost = fam.major_cost / T + (det + ssc).sum(axis=1)
        ok = np.ones(len(ks), dtype=bool)
        if math.isfinite(fam.capacity_volume):
            ok &= (ks @ (fam.annual_demand * fam.volume)) * T <= fam.capacity_volume * (1 + 1e-12)
        if fam.min_order_value > 0:
            ok &= ((ks == 1) @ (fam.annual_demand * fam.unit_value)) * T >= fam.min_order_value * (1 - 1e-12)
        ok &= np.all(tau <= fam.max_interval * (1 + 1e-12), axis=1)
        if np.any(ok):
            j = int(np.argmin(np.where(ok, cost, np.inf)))
            if cost[j] < best[0]:
                best = (float(cost[j]), float(T), ks[j])
    return best


def test_snyder_instance_no_higher_than_silver():
    r = gm.solve_family(gm.make_family(**SNYDER))
    assert r.status == "optimal" and r.feasible
    assert r.total_cost <= 837.8544 + 1e-4
    assert r.multiples.tolist() == [1, 3, 1]


@pytest.mark.parametrize("seed", range(12))
def test_unconstrained_model_equals_exact_cyclic_optimum(seed):
    # deterministic demand (no safety stock): the model's optimum must equal the exact cyclic optimum
    # (Wildeman, Frenk & Dekker 1997) - the exact cycle is one of the candidates, so to rounding
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 9))
    S = float(rng.uniform(1, 1000))
    s = rng.uniform(0, 500, n)
    h = np.exp(rng.uniform(-1, 3, n))
    D = np.exp(rng.uniform(0, 6, n))
    ex = joint.exact_cyclic(S, s, h * D)
    r = gm.solve_family(gm.make_family(S, s, h, D), k_max=max(8, int(ex.multiples.max())))
    assert r.status == "optimal"
    assert r.total_cost == pytest.approx(ex.cost, rel=1e-9)
    # and never better than the Roundy (1985) lower bound
    assert joint.roundy_bound(S, s, h * D).cost <= r.total_cost * (1 + 1e-12)


@pytest.mark.parametrize("constraint", ["none", "capacity", "min_value", "stochastic"])
def test_grid_tolerance_without_the_special_points(monkeypatch, constraint):
    # the module's proven claim: with only the geometric grid (ratio rho) and no re-optimisation of T the
    # cost is within rho of the best policy (here found by brute force over k and a very fine T grid)
    rng = np.random.default_rng(17)
    n = 3
    S, s, h, D = 300.0, rng.uniform(5, 80, n), rng.uniform(1, 9, n), rng.uniform(50, 900, n)
    ex = joint.exact_cyclic(S, s, h * D)
    kw: dict = {}
    if constraint == "capacity":
        kw = dict(volume=1.0, capacity_volume=0.5 * float(D @ ex.multiples) * ex.cycle)
    elif constraint == "min_value":
        kw = dict(unit_value=1.0, min_order_value=2.0 * float(D[ex.multiples == 1].sum()) * ex.cycle)
    elif constraint == "stochastic":
        kw = dict(demand_var=3 * D, lead_time=0.03, backorder_cost=5 * h)
    fam = gm.make_family(S, s, h, D, **kw)
    monkeypatch.setattr(gm, "_SPECIAL_POINTS", False)
    monkeypatch.setattr(gm, "_polish", lambda fam, T0, k, cap: T0)
    rho = 1.05
    r = gm.solve_family(fam, grid_ratio=rho, k_max=8)
    best, T_best, _ = brute(fam, np.geomspace(ex.cycle / 5, ex.cycle * 5, 6000), 8)
    assert r.tolerance_proven
    assert r.total_cost <= rho * best * (1 + 1e-12)
    assert r.total_cost >= best * (1 - 1e-3)  # the brute force grid is itself within 0.1%


def _capacity_family(factor: float, stochastic: bool) -> gm.Family:
    rng = np.random.default_rng(11)
    n = 3
    S = 400.0
    s = rng.uniform(10, 60, n)
    h = rng.uniform(2, 20, n)
    D = rng.uniform(200, 3000, n)
    vol = rng.uniform(0.01, 0.05, n)
    ex = joint.exact_cyclic(S, s, h * D)
    load = float((D * vol * ex.multiples).sum() * ex.cycle)
    extra = {}
    if stochastic:
        extra = dict(demand_var=D * 2.0, lead_time=rng.uniform(0.01, 0.05, n), lead_time_sd=0.005,
                     backorder_cost=10 * h)
    return gm.make_family(S, s, h, D, volume=vol, capacity_volume=factor * load, **extra)


@pytest.mark.parametrize("stochastic", [False, True])
def test_capacity_binding_sits_on_breakpoint_and_beats_fine_grid(stochastic):
    fam = _capacity_family(0.45, stochastic)
    r = gm.solve_family(fam, k_max=8)
    assert r.status == "optimal" and r.feasible
    assert "capacity_volume" in r.binding
    bp = fam.capacity_volume / float(np.sum(fam.annual_demand * fam.volume * r.multiples))
    assert r.cycle == pytest.approx(bp, rel=1e-9)  # on the capacity breakpoint C / sum D k v
    grid = np.geomspace(r.cycle / 4, r.cycle * 4, 1500)
    bf_cost, _, _ = brute(fam, grid, 8)
    assert r.total_cost <= bf_cost * (1 + 1e-9)


def test_min_order_value_respected_and_beats_brute_force():
    rng = np.random.default_rng(3)
    n = 3
    S, s, h, D = 100.0, rng.uniform(20, 90, n), rng.uniform(2, 10, n), rng.uniform(10, 200, n)
    u = h / 0.25
    ex = joint.exact_cyclic(S, s, h * D)
    val = float((D * u)[ex.multiples == 1].sum() * ex.cycle)
    fam = gm.make_family(S, s, h, D, unit_value=u, min_order_value=2.5 * val)
    r = gm.solve_family(fam, k_max=8)
    assert r.status == "optimal" and r.feasible
    smallest = float(np.sum((D * u)[r.multiples == 1]) * r.cycle)
    assert smallest >= fam.min_order_value * (1 - 1e-9)
    assert "min_order_value" in r.binding
    bf_cost, _, _ = brute(fam, np.geomspace(r.cycle / 4, r.cycle * 4, 1500), 8)
    assert r.total_cost <= bf_cost * (1 + 1e-9)
    assert r.total_cost > ex.cost  # the minimum binds, so it costs something


def test_shelf_life_respected():
    rng = np.random.default_rng(5)
    n = 3
    S, s, h, D = 500.0, rng.uniform(50, 200, n), rng.uniform(1, 3, n), rng.uniform(5, 30, n)
    ex = joint.exact_cyclic(S, s, h * D)
    L = 0.5 * ex.cycle * ex.multiples  # every item must be ordered twice as often as it would like
    fam = gm.make_family(S, s, h, D, max_interval=L)
    r = gm.solve_family(fam, k_max=8)
    assert r.status == "optimal" and r.feasible
    assert np.all(r.cycle * r.multiples <= L * (1 + 1e-9))
    assert "shelf_life" in r.binding
    bf_cost, _, _ = brute(fam, np.geomspace(r.cycle / 4, r.cycle * 4, 1500), 8)
    assert r.total_cost <= bf_cost * (1 + 1e-9)


def test_minimum_value_out_of_reach_is_reported_infeasible():
    fam = gm.make_family(100.0, [5.0, 5.0], [1.0, 1.0], [100.0, 100.0], unit_value=1.0, volume=1.0,
                         capacity_volume=10.0, min_order_value=1000.0)
    # capacity allows T <= 10/200 = 0.05; the minimum needs T >= 1000/200 = 5
    r = gm.solve_family(fam)
    assert r.status == "infeasible"
    assert "min_order_value" in r.message and "capacity_volume" in r.message
    assert not r.feasible


def test_solver_failure_falls_back_to_rand_and_says_so():
    fam = _capacity_family(0.45, False)
    r = gm.solve_family(fam, solver="no-such-solver")
    assert r.status == "fallback"
    assert "RAND" in r.message and "not proven optimal" in r.message
    assert r.feasible  # the fallback is pulled into the constraints
    assert math.isnan(r.bound)


def test_time_limit_reports_gap_not_optimal(monkeypatch):
    real = gm._solve

    def stopped(m, time_limit, mip_gap, solver, warm=False):
        tc, obj, bound, has = real(m, time_limit, mip_gap, solver, warm)
        return "maxTimeLimit", obj, 0.9 * obj, has

    monkeypatch.setattr(gm, "_solve", stopped)
    r = gm.solve_family(_capacity_family(0.45, False))
    assert r.status == "time_limit"
    assert r.gap == pytest.approx(0.1, rel=1e-9)
    assert "not proven optimal" in r.message


def test_no_solution_from_solver_falls_back(monkeypatch):
    monkeypatch.setattr(gm, "_solve", lambda *a, **k: ("maxTimeLimit", None, math.nan, False))
    r = gm.solve_family(_capacity_family(0.45, False))
    assert r.status == "fallback" and "RAND" in r.message


def test_powers_of_two_option():
    rng = np.random.default_rng(9)
    S, s, h, D = 800.0, rng.uniform(1, 300, 8), rng.uniform(1, 9, 8), rng.uniform(10, 900, 8)
    free = gm.solve_family(gm.make_family(S, s, h, D))
    p2 = gm.solve_family(gm.make_family(S, s, h, D), powers_of_two=True)
    m = p2.multiples
    assert np.all((m & (m - 1)) == 0)
    assert free.total_cost <= p2.total_cost * (1 + 1e-12)
    # Roundy (1985): the best power-of-two policy is within 1/(sqrt2 ln2) of the lower bound
    lb = joint.roundy_bound(S, s, h * D).cost
    assert p2.total_cost <= lb / (math.sqrt(2) * math.log(2)) * (1 + 1e-9)


# ------------------------------------------------------------------------- periodic-review cost vs scipy
def _normal_expectations(mu: float, sd: float, S: float) -> tuple[float, float]:
    """E[(S - X)^+], E[(X - S)^+] for X ~ N(mu, sd^2) by numerical integration (scipy)."""
    on = integrate.quad(lambda x: (S - x) * norm.pdf(x, mu, sd), mu - 12 * sd, S)[0]
    short = integrate.quad(lambda x: (x - S) * norm.pdf(x, mu, sd), S, mu + 12 * sd)[0]
    return on, short


def test_periodic_review_cost_mode_is_newsvendor_and_matches_integration():
    tau, D, V, L, sL, h, b = 0.05, 1200.0, 3000.0, 0.02, 0.004, 4.0, 9.0
    cost, z, sig = gm.periodic_review_cost(tau, D, V, L, sL, h, b)
    assert float(sig) == pytest.approx(math.sqrt((tau + L) * V + D**2 * sL**2))
    assert float(z) == pytest.approx(norm.ppf(b / (b + h * tau)), rel=1e-10)  # critical ratio
    mu = D * (tau + L)
    on, short = _normal_expectations(mu, float(sig), mu + float(z) * float(sig))
    assert float(cost) == pytest.approx(h * on + b / tau * short, rel=1e-8)
    # and it is the minimum over the order-up-to level (scipy, dense scan)
    levels = mu + float(sig) * np.linspace(-1, 4, 2001)
    pairs = [_normal_expectations(mu, float(sig), x) for x in levels[::50]]
    vals = [h * on_ + b / tau * short_ for on_, short_ in pairs]
    assert float(cost) <= min(vals) * (1 + 1e-9)


def test_periodic_review_fill_rate_target_met():
    tau, D, V, L = 0.04, 500.0, 800.0, 0.03
    cost, z, sig = gm.periodic_review_cost(tau, D, V, L, 0.0, 2.0, np.nan, mode="fill_rate", target=0.97)
    mu = D * (tau + L)
    _, short = _normal_expectations(mu, float(sig), mu + float(z) * float(sig))
    assert 1 - short / (D * tau) == pytest.approx(0.97, abs=1e-9)


def test_zero_variance_has_no_safety_cost():
    cost, z, sig = gm.periodic_review_cost(0.1, 100.0, 0.0, 0.1, 0.0, 2.0, 5.0)
    assert float(sig) == 0.0 and float(cost) == 0.0


def test_make_family_validation_names_parameter():
    with pytest.raises(ValueError, match="annual_demand"):
        gm.make_family(10.0, [1.0, 1.0], [1.0, 1.0], [1.0, 0.0])
    with pytest.raises(ValueError, match="capacity_volume"):
        gm.make_family(10.0, [1.0], [1.0], [1.0], capacity_volume=0.0)
    with pytest.raises(ValueError, match="target"):
        gm.make_family(10.0, [1.0], [1.0], [1.0], mode="fill_rate")


def test_check_policy_flags_violations():
    fam = gm.make_family(10.0, [1.0, 1.0], [1.0, 1.0], [10.0, 10.0], volume=1.0, capacity_volume=25.0,
                         unit_value=1.0, min_order_value=15.0, max_interval=[1.0, 3.0])
    ok, bind, viol = gm.check_policy(fam, 1.0, np.array([1, 2]))  # load 30 > 25, value 10 < 15
    assert not ok and len(viol) == 2
    ok, bind, viol = gm.check_policy(fam, 1.0, np.array([1, 1]))  # load 20, value 20, interval 1 = L_0
    assert ok and bind == ("shelf_life",)


# ------------------------------------------------------------------------- shared runs vs enumeration
def _run_families() -> list[gm.Family]:
    rng = np.random.default_rng(21)
    fams = []
    for j in range(3):
        n = 3
        D = rng.uniform(100, 800, n)
        h = rng.uniform(2, 10, n)
        fams.append(gm.make_family(150.0 + 30 * j, rng.uniform(5, 30, n), h, D,
                                   volume=rng.uniform(0.01, 0.03, n), demand_var=2 * D, lead_time=0.02,
                                   backorder_cost=10 * h))
    return fams


def _merged(fams: list[gm.Family], members: list[int], run: gm.SharedRun) -> gm.Family:
    """The members riding the run as one family: major = run cost + join costs, capacity = the run's."""
    cat = {name: np.concatenate([getattr(fams[f], name) for f in members])
           for name in ("minor_cost", "holding_cost", "annual_demand", "demand_var", "lead_time",
                        "lead_time_sd", "backorder_cost", "unit_value", "volume", "weight", "max_interval")}
    major = run.fixed_cost + sum((run.join_cost or (0.0,) * len(run.members))[run.members.index(f)]
                                 for f in members)
    return gm.make_family(major, cat.pop("minor_cost"), cat.pop("holding_cost"), cat.pop("annual_demand"),
                          capacity_volume=run.capacity_volume, **cat)


def _enumerate(fams: list[gm.Family], run: gm.SharedRun) -> dict[tuple, float]:
    """Brute force over which members ride the run (each option solved exactly by solve_family)."""
    alone = [gm.solve_family(f).total_cost for f in fams]
    out = {(): sum(alone)}
    for size in range(1, len(run.members) + 1):
        for sub in itertools.combinations(run.members, size):
            g = gm.solve_family(_merged(fams, list(sub), run))
            if g.status == "optimal":
                out[sub] = g.total_cost + sum(alone[f] for f in range(len(fams)) if f not in sub)
    return out


@pytest.mark.parametrize("fixed_cost, capacity", [(200.0, math.inf), (2000.0, math.inf), (220.0, 9.0)])
def test_shared_run_matches_enumeration_of_who_joins(fixed_cost, capacity):
    fams = _run_families()
    run = gm.SharedRun(fixed_cost=fixed_cost, members=(0, 1, 2), capacity_volume=capacity,
                       join_cost=(10.0, 10.0, 10.0))
    res = gm.solve_shared_runs(fams, [run], grid_ratio=1.002)
    assert res.status == "optimal" and res.feasible
    options = _enumerate(fams, run)
    best = min(options, key=options.get)
    chosen = tuple(f for f in range(3) if res.joined[f] == 0)
    assert res.total_cost <= options[best] * (1 + 2e-3)
    assert res.total_cost >= options[best] * (1 - 1e-6)
    second = sorted(options.values())[1]
    if second > options[best] * 1.01:  # a clear winner must be found
        assert chosen == best
    assert res.total_cost <= res.standalone_cost * (1 + 1e-12)
    if math.isfinite(capacity) and chosen:
        load = sum(float(np.sum(fams[f].annual_demand * fams[f].volume * res.multiples[f])) for f in chosen)
        assert load * res.run_cycle[0] <= capacity * (1 + 1e-9)


def test_shared_run_validation():
    fams = _run_families()
    with pytest.raises(ValueError, match="members"):
        gm.solve_shared_runs(fams, [gm.SharedRun(fixed_cost=10.0, members=(0, 5))])


def test_answer_failing_the_check_is_not_passed_on(monkeypatch):
    # an answer the independent check rejects (simulated once the solver has answered) is replaced by the
    # RAND fallback, and said so
    real_check, real_solve = gm.check_policy, gm._solve
    solved: list[bool] = []

    def solve(*args, **kw):
        out = real_solve(*args, **kw)
        solved.append(True)
        return out

    def strict(fam, T, k):
        ok, bind, viol = real_check(fam, T, k)
        if solved and len(solved) == 1:
            solved.append(True)  # reject the solver's answer only
            return False, bind, [*viol, "capacity_volume: rejected by the test"]
        return ok, bind, viol

    monkeypatch.setattr(gm, "_solve", solve)
    monkeypatch.setattr(gm, "check_policy", strict)
    r = gm.solve_family(_capacity_family(0.45, False), k_max=8)
    assert r.status == "fallback"
    assert "independent check" in r.message and "not proven optimal" in r.message
    assert r.feasible  # the fallback itself meets the limits


def test_huge_and_tiny_values_and_the_multiple_limit():
    # demand of a billion units a year next to a slow item; the cost must still match the exact optimum
    S, s, h, D = 5e3, np.array([1.0, 4e3]), np.array([1e-3, 50.0]), np.array([1e9, 0.5])
    ex = joint.exact_cyclic(S, s, h * D)
    r = gm.solve_family(gm.make_family(S, s, h, D), k_max=max(8, int(ex.multiples.max())))
    assert r.status == "optimal" and np.isfinite(r.total_cost)
    assert r.total_cost == pytest.approx(ex.cost, rel=1e-9)
    # with the multiples capped below what the slow item wants, the limit is named as binding
    capped = gm.solve_family(gm.make_family(S, s, h, D), k_max=2)
    assert "max_multiple" in capped.binding and capped.total_cost >= ex.cost


@pytest.mark.parametrize("seed", range(16))
def test_random_mixed_limits_against_brute_force(seed):
    # random families with random combinations of capacity, minimum value, shelf life and safety stock:
    # the model is never worse than exhaustive search (k <= 6, 1500 cycles), says infeasible exactly when
    # the search finds nothing, and its answer meets every limit
    rng = np.random.default_rng(1000 + seed)
    n = 3
    S, s = float(rng.uniform(50, 500)), rng.uniform(1, 80, n)
    h, D = rng.uniform(1, 10, n), rng.uniform(20, 900, n)
    ex = joint.exact_cyclic(S, s, h * D)
    kw: dict = {}
    if rng.random() < 0.7:
        vol = rng.uniform(0.01, 0.05, n)
        largest = float((D * vol * ex.multiples).sum()) * ex.cycle
        kw.update(volume=vol, capacity_volume=rng.uniform(0.3, 1.2) * largest)
    if rng.random() < 0.6:
        u = rng.uniform(1, 20, n)
        smallest = float((D * u)[ex.multiples == 1].sum()) * ex.cycle
        kw.update(unit_value=u, min_order_value=rng.uniform(0.5, 2.5) * smallest)
    if rng.random() < 0.4:
        kw.update(max_interval=ex.cycle * ex.multiples * rng.uniform(0.4, 1.5, n))
    if rng.random() < 0.5:
        kw.update(demand_var=D * rng.uniform(0.5, 3, n), lead_time=0.03, backorder_cost=10 * h)
    fam = gm.make_family(S, s, h, D, **kw)
    r = gm.solve_family(fam, k_max=6)
    best, _, _ = brute(fam, np.geomspace(ex.cycle / 6, ex.cycle * 6, 1500), 6)
    if r.status == "infeasible":
        assert not math.isfinite(best)
    else:
        assert r.status == "optimal" and r.feasible
        assert r.total_cost <= best * (1 + 1e-9)


# --------------------------------------------------------------------------- slow movers
def _slow_family(order_model):
    return gm.make_family(40.0, [6.0, 4.0, 9.0, 3.0], [3.0, 8.0, 2.0, 5.0], [6.0, 20.0, 3.0, 120.0],
                          demand_var=[6.0, 20.0, 9.0, 120.0], lead_time=0.02, backorder_cost=30.0,
                          order_model=order_model)


def test_every_review_orders_reproduces_the_classical_model():
    """order_model NORMAL (p = 1) gives the same cycle, multiples and cost as no order model, bit for bit;
    the expected shared cost equals S/T when some item comes every cycle (common practice)."""
    a = gm.solve_family(_slow_family(None))
    b = gm.solve_family(_slow_family([0, 0, 0, 0]))
    assert (a.cycle, a.multiples.tolist(), a.total_cost) == (b.cycle, b.multiples.tolist(), b.total_cost)
    assert np.array_equal(a.item_cost, b.item_cost)
    assert np.all(b.order_probability == 1.0)
    assert 1 in b.multiples.tolist()
    assert b.expected_total_cost == pytest.approx(b.total_cost, rel=1e-14)


def test_slow_movers_line_cost_and_brute_force():
    """With Poisson slow movers the line cost is s p(tau)/tau, p = 1 - exp(-lambda tau); the MILP's cost is
    no higher than brute force over a fine T grid and k <= 6 of S/T + the items' costs (exhaustive search),
    and below the classical model's cost of the same policy."""
    fam = _slow_family([1, 1, 2, 1])
    sol = gm.solve_family(fam, k_max=6)
    assert sol.status == "optimal"
    classic = _slow_family(None)
    c_old, _, _ = gm.policy_costs(classic, sol.cycle, sol.multiples)
    c_new, _, _ = gm.policy_costs(fam, sol.cycle, sol.multiples)
    tau = sol.cycle * sol.multiples
    p = np.array([1 - math.exp(-6.0 * tau[0]), 1 - math.exp(-20.0 * tau[1]), 0.0,
                  1 - math.exp(-120.0 * tau[3])])
    # item 2: negative binomial, mean 3 tau, variance 9 tau: P(0) = (1/3)^(3 tau / 2)
    p[2] = 1 - (1 / 3) ** (1.5 * tau[2])
    assert c_old - c_new == pytest.approx(fam.minor_cost * (1 - p) / tau, rel=1e-9)
    assert sol.order_probability == pytest.approx(p, rel=1e-12)
    best = math.inf
    for T in np.geomspace(0.005, 0.5, 1500):
        costs = np.array([gm.policy_costs(fam, T, np.full(4, k))[0] for k in range(1, 7)])
        best = min(best, fam.major_cost / T + float(costs.min(axis=0).sum()))
    assert sol.total_cost <= best * (1 + 1e-9)
    assert sol.total_cost == pytest.approx(best, rel=5e-3)
    # the expected shared cost is at most S/T and the shared upper bound is what the model minimised
    assert sol.expected_major_cost_rate <= sol.major_cost_rate * (1 + 1e-12)
    assert sol.expected_total_cost == pytest.approx(sol.expected_major_cost_rate + sol.item_cost.sum())
