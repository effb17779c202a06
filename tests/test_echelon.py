"""Checks of models.echelon against brute force, scipy, exact results and published tables.

Sources of check values:

* Axsäter, S. (1993), "Exact and approximate evaluation of batch-ordering policies for two-level inventory
  systems", Operations Research 41(4), 777-785: exact costs of two policies for each of his problems 1-8
  (values as transcribed from his tables via a secondary source).
* Graves, S. C. (1985), Management Science 31(10); Axsäter, S. (1990), Operations Research 38(1): the exact
  one-for-one evaluation by binomial disaggregation (implemented in ``exact_one_for_one``, checked here
  against the Axsäter (1993) rows with ``Q_r = 1``).
* scipy.stats / scipy.integrate as general-purpose references; brute-force enumeration.
* The project's network simulator (``optimiser.simulate``) as the yardstick for the optimiser.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from models import echelon as ech
from models import single_site as ss

# Axsäter (1993), Operations Research 41(4), problems 1-8: Poisson rate per store, stores N, backorder cost b
# per unit and time at the stores, store batch Q_r (units), warehouse batch Q_w (store batches); two policies
# each: (R_w in store batches, R_r in units, exact cost per time unit).
AXSATER_1993 = [
    # lam, N, b, Q_r, Q_w, policy A, policy B
    (0.1, 4, 20, 1, 1, (-1, 1, 7.30), (-1, 0, 4.77)),
    (0.1, 4, 20, 1, 4, (-2, 1, 7.85), (-1, 0, 5.45)),
    (0.1, 4, 20, 4, 1, (0, 0, 13.32), (-1, 0, 9.62)),
    (0.1, 4, 20, 4, 4, (-2, 1, 17.07), (-1, -1, 14.03)),
    (0.1, 4, 5, 1, 1, (0, 0, 4.37), (0, -1, 3.02)),
    (0.1, 4, 5, 1, 4, (-1, 0, 4.91), (-1, -1, 3.82)),
    (0.1, 4, 5, 4, 1, (-1, 0, 9.32), (-1, -1, 6.52)),
    (0.1, 4, 5, 4, 4, (-3, 1, 13.52), (-2, -1, 11.03)),
]
# acceptance limits set by the issue (not sources)
AXSATER_MAX_ERROR = 0.08
AXSATER_MEAN_ERROR = 0.03


def axsater_inputs(problems=AXSATER_1993) -> ech.TwoLevelInputs:
    """Axsäter's setting: all lead times 1, h0 = h = 1, no order costs; time unit = one 'day', 'year' = 1."""
    n = len(problems)
    m = max(p[1] for p in problems)
    active = np.array([[j < p[1] for j in range(m)] for p in problems])

    def grid(v):
        return np.full((n, m), v, dtype=float)

    def vec(v):
        return np.full(n, v, dtype=float)

    lam = np.array([p[0] for p in problems])[:, None] * np.ones((1, m))
    return ech.TwoLevelInputs(
        store_active=active,
        store_mean=np.where(active, lam, 0.0),
        store_sd=np.sqrt(lam),
        store_lead=grid(1.0),
        store_lead_sd=grid(0.0),
        store_count=np.ones((n, m), dtype=bool),
        store_order_cost=grid(0.0),
        store_holding_cost=grid(1.0),
        store_backorder_cost=np.array([p[2] for p in problems], dtype=float)[:, None] * np.ones((1, m)),
        store_target=grid(np.nan),
        store_fixed_q=np.array([p[3] for p in problems], dtype=float)[:, None] * np.ones((1, m)),
        store_pack=grid(1.0),
        warehouse_lead=vec(1.0),
        warehouse_lead_sd=vec(0.0),
        warehouse_own_mean=vec(0.0),
        warehouse_own_sd=vec(0.0),
        warehouse_count=np.ones(n, dtype=bool),
        warehouse_order_cost=vec(0.0),
        warehouse_holding_cost=vec(1.0),
        warehouse_backorder_cost=vec(0.0),
        warehouse_target=vec(np.nan),
        warehouse_fixed_q=np.array([p[3] * p[4] for p in problems], dtype=float),
        warehouse_pack=vec(1.0),
        days_per_year=1.0,
        mode="cost",
        backorder_basis="per_unit_year",
    )


def axsater_policy(which: int, problems=AXSATER_1993):
    """(store R, store Q, warehouse R0, Q0, exact cost) arrays for policy A (which=5) or B (which=6)."""
    inp = axsater_inputs(problems)
    sr = np.array([p[which][1] for p in problems], dtype=float)[:, None] * np.ones_like(inp.store_mean)
    r0 = np.array([p[which][0] * p[3] for p in problems], dtype=float)
    exact = np.array([p[which][2] for p in problems])
    return inp, sr, inp.store_fixed_q, r0, inp.warehouse_fixed_q, exact


# ------------------------------------------------------------------------------------------ building blocks
def test_count_pmf_matches_scipy():
    mean = np.array([0.0, 0.3, 4.0, 4.0, 25.0])
    var = np.array([0.0, 0.3, 4.0, 9.0, 60.0])
    pmf, tail = ech.count_pmf(mean, var, 200)
    k = np.arange(200)
    assert pmf[0, 0] == 1.0 and tail[0] == 0.0
    np.testing.assert_allclose(pmf[1], stats.poisson.pmf(k, 0.3), rtol=1e-10, atol=1e-300)
    np.testing.assert_allclose(pmf[2], stats.poisson.pmf(k, 4.0), rtol=1e-10, atol=1e-300)
    for row in (3, 4):
        r = mean[row] ** 2 / (var[row] - mean[row])
        np.testing.assert_allclose(
            pmf[row], stats.nbinom.pmf(k, r, mean[row] / var[row]), rtol=1e-9, atol=1e-300
        )
    assert np.all(tail < 1e-12)


def test_order_stream_pmf_brute_force():
    """Q * floor((D + V) / Q), V uniform on 0..Q-1, enumerated directly (brute force)."""
    width = 80
    mean = np.array([0.7, 3.0, 6.5])
    q = np.array([3, 1, 5])
    dp, _ = ech.count_pmf(mean, mean * 1.8, width)
    got = ech.order_stream_pmf(dp, q)
    for row in range(3):
        want = np.zeros(width + 10)
        for d in range(width):
            for v in range(q[row]):
                want[q[row] * ((d + v) // q[row])] += dp[row, d] / q[row]
        np.testing.assert_allclose(got[row], want[:width], atol=1e-14)
        # the mean of the order stream equals the mean demand
        assert abs(got[row] @ np.arange(width) - mean[row]) < 1e-9


@pytest.mark.parametrize(
    "mean, sd, q", [(3.0, 0.4, 10.0), (7.3, 2.0, 4.0), (50.0, 30.0, 6.0), (2.0, 1e-6, 5.0)]
)
def test_order_stream_variance_against_integration(mean, sd, q):
    """Var(Q floor((D + V)/Q)), normal D, V uniform on [0, Q): numerical integration (scipy.integrate)."""

    def cond_var(d):
        r = np.mod(d, q)
        return r * (q - r)

    lo, hi = mean - 12 * sd, mean + 12 * sd
    pts = np.arange(np.floor(lo / q) * q, hi + q, q)
    extra = sum(
        integrate.quad(
            lambda d: cond_var(d) * stats.norm.pdf(d, mean, sd), max(a, lo), min(b, hi), limit=200
        )[0]
        for a, b in zip(pts[:-1], pts[1:], strict=True)
        if min(b, hi) > max(a, lo)
    )
    want = sd**2 + extra
    got = ech.order_stream_variance(np.array(mean), np.array(sd**2), np.array(q))
    assert abs(float(got) - want) < 1e-6 * max(1.0, want)


def test_normal_loss_moments_against_quad():
    for z in (-3.0, -0.5, 0.0, 1.2, 4.0):
        h = ech.normal_loss_moments(np.array(z))
        for k in (1, 2, 3):
            want = integrate.quad(lambda t, k=k, z=z: (t - z) ** k * stats.norm.pdf(t), z, np.inf)[0]
            assert abs(float(h[k - 1]) - want) < 1e-9


def test_warehouse_moments_discrete_brute_force():
    """Lattice averages of E(X - y)^+ and E((X - y)^+)^2, negative reorder points included (brute force)."""
    lam = np.array([[0.3, 0.5, 0.2], [0.3, 0.5, 0.2]])
    q = np.array([[2, 4, 2], [1, 3, 2]])
    wd = ech.warehouse_demand(
        lam, np.sqrt(lam), q, np.ones_like(q, dtype=bool), np.array([4.0, 4.0]), np.zeros(2)
    )
    assert list(wd.step) == [2, 1]
    for r0 in (-9, -4, -1, 0, 3, 8):
        q0 = np.array([8.0, 5.0])
        st = ech.warehouse_moments(wd, np.array([r0, r0], dtype=float), q0)
        for row in range(2):
            g = wd.step[row]
            ys = r0 + g * np.arange(1, int(q0[row]) // g + 1)
            p = wd.pmf_of(row)
            x = np.arange(p.size)
            eb = np.mean([p @ np.maximum(x - y, 0) for y in ys])
            eb2 = np.mean([p @ np.maximum(x - y, 0) ** 2 for y in ys])
            eoh = np.mean([p @ np.maximum(y - x, 0) for y in ys])
            assert abs(st.expected_backorders[row] - eb) < 1e-10
            assert abs(st.backorders_second_moment[row] - eb2) < 1e-9
            assert abs(st.expected_on_hand[row] - eoh) < 1e-9


def test_warehouse_moments_normal_against_integration():
    mean, var = 40.0, 90.0
    wd = ech.WarehouseDemand(
        mean=np.array([mean]),
        var=np.array([var]),
        discrete=np.array([False]),
        blocks=(),
        step=np.array([1]),
        rate=np.array([10.0]),
        variance_rate=np.array([22.5]),
        tail=np.zeros(1),
        method=np.zeros(1, np.int8),
        lead_sd=np.zeros(1),
    )
    sd = np.sqrt(var)
    for r0, q0 in ((30.0, 25.0), (-10.0, 15.0), (55.0, 0.5)):
        st = ech.warehouse_moments(wd, np.array([r0]), np.array([q0]))

        def b1(y):
            return integrate.quad(lambda t: (t - y) * stats.norm.pdf(t, mean, sd), y, np.inf)[0]

        def b2(y):
            return integrate.quad(lambda t: (t - y) ** 2 * stats.norm.pdf(t, mean, sd), y, np.inf)[0]

        eb = integrate.quad(b1, r0, r0 + q0)[0] / q0
        eb2 = integrate.quad(b2, r0, r0 + q0)[0] / q0
        assert abs(st.expected_backorders[0] - eb) < 1e-7 * max(1, eb)
        assert abs(st.backorders_second_moment[0] - eb2) < 1e-6 * max(1, eb2)
        assert abs(st.expected_on_hand[0] - (r0 + q0 / 2 - mean + eb)) < 1e-9


def test_poisson_base_stock_delay_is_exact():
    """One-for-one Poisson warehouse, S0 >= 0: W = (L0 - Erlang(S0))^+ (exact; Svoronos & Zipkin 1988)."""
    lam0, l0 = 0.8, 2.5
    for s0 in (0, 1, 3):
        wd = ech.warehouse_demand(
            np.array([[lam0 / 2, lam0 / 2]]),
            np.sqrt([[lam0 / 2, lam0 / 2]]),
            np.array([[1, 1]]),
            np.ones((1, 2), dtype=bool),
            np.array([l0]),
            np.zeros(1),
        )
        st = ech.warehouse_moments(wd, np.array([s0 - 1.0]), np.array([1.0]))
        ew, vw = ech.delay_moments(st, wd)
        if s0 == 0:
            m1, m2 = l0, l0**2
        else:
            dist = stats.gamma(s0, scale=1 / lam0)
            m1 = integrate.quad(lambda t, dist=dist: (l0 - t) * dist.pdf(t), 0, l0)[0]
            m2 = integrate.quad(lambda t, dist=dist: (l0 - t) ** 2 * dist.pdf(t), 0, l0)[0]
        assert abs(ew[0] - m1) < 1e-9
        assert abs(vw[0] - (m2 - m1**2)) < 1e-9


# ------------------------------------------------------------------------------------------ exact reference
@pytest.mark.parametrize("which", [5, 6])
def test_exact_one_for_one_reproduces_axsater_unit_batches(which):
    """The binomial disaggregation reproduces Axsäter's (1993) exact costs where Q_r = 1 (to 2 decimals)."""
    rows = [p for p in AXSATER_1993 if p[3] == 1]
    for lam, n_st, b, _qr, qw, *pols in rows:
        rw, rr, exact = pols[which - 5]
        out = ech.exact_one_for_one(
            np.full((1, n_st), lam),
            np.ones((1, n_st)),
            np.full((1, n_st), rr + 1),
            np.array([1.0]),
            np.array([rw]),
            np.array([qw]),
        )
        cost = out["warehouse_on_hand"][0] + (out["store_on_hand"][0] + b * out["store_backorders"][0]).sum()
        assert abs(cost - exact) <= 0.005 + 1e-9


def test_metric_against_exact_one_for_one():
    """One-for-one Poisson stores: the METRIC-type evaluation against the exact binomial disaggregation.

    Tolerance (ours): store expected backorders and on hand within 2.5% relative or 0.003 absolute, fill rate
    within 1 percentage point (reached on this grid: 1.2%, 1.8%, 0.65 points); with Q_r = 1 the store
    lead-time demand moments are exact and the negative binomial shape is the only approximation.
    """
    rng = np.random.default_rng(11)
    n, m = 12, 5
    lam = rng.uniform(0.05, 1.5, (n, m))
    lead = rng.uniform(0.5, 3.0, (n, m))
    l0 = rng.uniform(1.0, 6.0, n)
    lam0 = lam.sum(axis=1)
    q0 = rng.integers(1, 12, n)
    r0 = np.floor(lam0 * l0 + rng.uniform(-1.5, 1.0, n) * np.sqrt(lam0 * l0)).astype(int)
    s = np.maximum(np.floor(lam * lead + rng.uniform(-0.5, 1.5, (n, m)) * np.sqrt(lam * lead)), 0).astype(int)
    exact = ech.exact_one_for_one(lam, lead, s, l0, r0, q0)
    wd = ech.warehouse_demand(
        lam, np.sqrt(lam), np.ones((n, m)), np.ones((n, m), dtype=bool), l0, np.zeros(n)
    )
    st = ech.warehouse_moments(wd, r0.astype(float), q0.astype(float))
    ew, vw = ech.delay_moments(st, wd)
    mean, sd = ech.store_ltd_moments(lam, np.sqrt(lam), lead, 0.0, ew[:, None], vw[:, None])
    from models.demand import NEGBIN, POISSON

    code = np.where(sd**2 > mean * (1 + 1e-9), NEGBIN, POISSON)
    pol = ss.evaluate_policy(
        (lam * 365).ravel(),
        mean.ravel(),
        sd.ravel(),
        0.0,
        1.0,
        (s - 1).ravel().astype(float),
        np.ones(n * m),
        distribution=code.ravel(),
        backorder_cost=0.0,
        backorder_basis="per_unit_year",
    )
    eb = pol.expected_backorders.reshape(n, m)
    eoh = pol.expected_on_hand.reshape(n, m)
    fr = pol.fill_rate.reshape(n, m)
    np.testing.assert_allclose(st.expected_backorders, exact["warehouse_backorders"], rtol=1e-9, atol=1e-12)
    assert np.all(
        np.abs(eb - exact["store_backorders"]) <= np.maximum(0.025 * exact["store_backorders"], 0.003)
    )
    assert np.all(np.abs(eoh - exact["store_on_hand"]) <= np.maximum(0.025 * exact["store_on_hand"], 0.003))
    assert np.all(np.abs(fr - exact["store_fill"]) <= 0.01)


def test_huge_warehouse_stock_reduces_to_single_site():
    """With a warehouse that never runs out, stores are exactly the single-site model on their transit."""
    inp, sr, sq, r0, q0, _ = axsater_policy(5)
    res = ech.evaluate_two_level(inp, sr, sq, np.full_like(r0, 200.0), q0)
    assert np.all(res.mean_delay < 1e-12) and np.all(res.var_delay < 1e-12)
    act = inp.store_active
    from models.demand import POISSON

    single = ss.evaluate_policy(
        inp.store_mean[act],
        inp.store_mean[act] * 1.0,
        np.sqrt(inp.store_mean[act]),
        0.0,
        1.0,
        sr[act],
        sq[act],
        distribution=np.full(act.sum(), POISSON),
        backorder_cost=inp.store_backorder_cost[act],
        backorder_basis="per_unit_year",
    )
    # (unit-level backlog figures: the same numbers by another route, to rounding)
    assert np.all(res.store_method[act] == 1)
    np.testing.assert_allclose(res.store_policy.expected_backorders, single.expected_backorders, rtol=1e-8)
    np.testing.assert_allclose(res.store_policy.total_cost, single.total_cost, rtol=1e-8)
    mom = ech.evaluate_two_level(inp, sr, sq, np.full_like(r0, 200.0), q0, store_method="moments")
    np.testing.assert_allclose(mom.store_policy.expected_backorders, single.expected_backorders, rtol=1e-12)
    np.testing.assert_allclose(mom.store_policy.total_cost, single.total_cost, rtol=1e-12)
    # and the exact model agrees: one-for-one rows
    unit = np.array([p[3] == 1 for p in AXSATER_1993])
    out = ech.exact_one_for_one(
        inp.store_mean[unit],
        np.ones((unit.sum(), 4)),
        (sr[unit] + 1).astype(int),
        np.ones(unit.sum()),
        np.full(unit.sum(), 200),
        np.ones(unit.sum(), dtype=int),
    )
    eb = single.expected_backorders.reshape(-1, 4)[unit]
    np.testing.assert_allclose(out["store_backorders"], eb, rtol=1e-9, atol=1e-14)


# ------------------------------------------------------------------------------------------ Axsäter (1993)
def test_axsater_1993_policies_evaluated():
    """The 16 published policies: each within 8% of its exact cost, mean absolute error within 3%."""
    errors = []
    for which in (5, 6):
        inp, sr, sq, r0, q0, exact = axsater_policy(which)
        res = ech.evaluate_two_level(inp, sr, sq, r0, q0)
        errors.append((res.network_cost - exact) / exact)
    err = np.concatenate(errors)
    print("\nAxsäter (1993) relative errors, policy A then B, problems 1-8 (%):")
    print(" ".join(f"{100 * e:+.2f}" for e in err), f"| mean |e| {100 * np.mean(np.abs(err)):.2f}%")
    assert np.max(np.abs(err)) <= AXSATER_MAX_ERROR
    assert np.mean(np.abs(err)) <= AXSATER_MEAN_ERROR


def test_axsater_1993_optimiser_by_simulation():
    """The optimiser's policy costs, by the project's simulator, at most the better published policy + 2%.

    Both policies are simulated with the same seeds (common random numbers); the better published policy's
    exact cost (Axsäter 1993) is printed beside them.
    """
    from optimiser.simulate import simulate_network_arrays

    inp = axsater_inputs()
    res, _ = ech.optimise_two_level(inp)
    n = len(AXSATER_1993)
    best_pub = [min((p[5], p[6]), key=lambda x: x[2]) for p in AXSATER_1993]

    def simulate(r0, q0, rr, qr):
        r = np.column_stack([r0, rr])
        q = np.column_stack([q0, qr])
        dm = np.column_stack([np.zeros(n), inp.store_mean])
        sim = simulate_network_arrays(
            [-1, 0, 0, 0, 0],
            r,
            q,
            demand_mean=dm,
            lead_mean=1.0,
            horizon_days=60000.0,
            warmup_days=100.0,
            replications=6,
            seed=1993,
        )
        oh, bo = sim.mean("on_hand"), sim.mean("backorders")
        b = np.array([p[2] for p in AXSATER_1993], dtype=float)
        return oh[:, 0] + oh[:, 1:].sum(axis=1) + b * bo[:, 1:].sum(axis=1)

    ours = simulate(
        res.warehouse_reorder_point,
        res.warehouse_order_quantity,
        res.store_reorder_point,
        res.store_order_quantity,
    )
    q_r = np.array([p[3] for p in AXSATER_1993], dtype=float)
    pub = simulate(
        np.array([b[0] for b in best_pub]) * q_r,
        inp.warehouse_fixed_q,
        np.array([b[1] for b in best_pub], dtype=float)[:, None] * np.ones((1, 4)),
        inp.store_fixed_q,
    )
    exact = np.array([b[2] for b in best_pub])
    print("\nproblem: ours (R_w, R_r) simulated | better published simulated | published exact")
    for i in range(n):
        print(
            f"{i + 1}: ({res.warehouse_reorder_point[i] / q_r[i]:+.0f}, "
            f"{res.store_reorder_point[i, 0]:+.0f}) "
            f"{ours[i]:.3f} | {pub[i]:.3f} | {exact[i]:.2f}"
        )
    assert np.all(ours <= 1.02 * pub)


def test_inputs_are_validated():
    inp = axsater_inputs()
    from dataclasses import replace

    with pytest.raises(ValueError, match="store_lead must be finite and >= 0; element 3 has"):
        bad = inp.store_lead.copy()
        bad.ravel()[3] = -1.0
        replace(inp, store_lead=bad)
    with pytest.raises(ValueError, match=r"warehouse_lead must have shape \(8,\)"):
        replace(inp, warehouse_lead=np.ones(7))
    with pytest.raises(ValueError, match="mode must be one of"):
        replace(inp, mode="cheapest")
