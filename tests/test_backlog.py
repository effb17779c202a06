"""Checks of models.backlog: store figures from the units each store has unshipped at the warehouse.

Sources: Graves (1985), "A multi-echelon inventory model for a repairable item with one-for-one
replenishment", Management Science 31(10) - for one-for-one Poisson stores the warehouse backorders are the
last ``B0`` units and each belongs to store ``i`` independently with probability ``lambda_i / lambda0``
(computed here with scipy, independently of the project's code); Axsäter (1993), "Exact and approximate
evaluation of batch-ordering policies for two-level inventory systems", Operations Research 41(4) - published
exact costs of 16 policies; Little's law (common practice) for the mean units owed; scipy.stats as the
reference for distributions.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from models import backlog as bl
from models import echelon as ech
from tests.test_echelon import AXSATER_1993, axsater_policy


def graves_reference(lam, lead, base, l0, r0, q0):
    """Store fill, backorders, on hand by binomial disaggregation (Graves 1985), straight from scipy."""
    lam = np.asarray(lam, dtype=float)
    lam0 = lam.sum()
    x = np.arange(int(lam0 * l0 + 40 * np.sqrt(lam0 * l0 + 1) + 60 + abs(min(r0, 0))))
    p_d0 = stats.poisson.pmf(x, lam0 * l0)
    # B0 = (D0(L0) - S0)^+ with S0 uniform on R0 + 1 .. R0 + Q0
    b_max = x.size + abs(min(r0, 0)) + 2
    p_b0 = np.zeros(b_max)
    for s0 in range(r0 + 1, r0 + q0 + 1):
        b = np.maximum(x - s0, 0)
        np.add.at(p_b0, b, p_d0 / q0)
    out = []
    for i in range(lam.size):
        u = np.arange(b_max)
        # U_i = Binomial(B0, p_i): pmf over u
        p_u = np.array([(p_b0 * stats.binom.pmf(k, u, lam[i] / lam0)).sum() for k in range(b_max)])
        d = stats.poisson.pmf(np.arange(b_max), lam[i] * lead[i])
        v = np.convolve(d, p_u)[:b_max]  # outstanding = D_i(L_i) + U_i
        y = np.arange(b_max)
        fill = v[: max(base[i], 0)].sum()  # P(outstanding <= S - 1)
        eb = (np.maximum(y - base[i], 0) * v).sum()
        oh = (np.maximum(base[i] - y, 0) * v).sum()
        out.append((fill, eb, oh))
    return np.array(out)


@pytest.mark.parametrize("r0, q0", [(3, 4), (0, 2), (-1, 5), (-4, 3), (-9, 2)])
def test_one_for_one_matches_binomial_disaggregation(r0, q0):
    lam = np.array([0.4, 0.25, 0.1])
    lead = np.array([2.0, 1.0, 3.0])
    base = np.array([2, 1, 1])  # S_i = R_i + 1
    l0 = 5.0
    ref = graves_reference(lam, lead, base, l0, r0, q0)
    t = bl.backlog_tables(lam, lam, np.ones(3, dtype=int), l0, lowest_reorder_point=r0)
    sh = bl.store_shortfall(t, r0, q0)
    for i in range(3):
        f = bl.store_figures(sh[i], stats.poisson.pmf(np.arange(80), lam[i] * lead[i]), 1)
        k = base[i] - 1 - f.low
        assert abs(f.fill_rate[k] - ref[i, 0]) <= 0.0015  # 0.15 points: the age integrals' cells
        assert abs(f.backorders[k] - ref[i, 1]) <= max(0.005 * ref[i, 1], 1e-3)
        assert abs(f.on_hand[k] - ref[i, 2]) <= max(0.005 * ref[i, 2], 1e-3)


def test_units_owed_follow_littles_law():
    """Sum over stores of E[U_i] = E[B0], the warehouse backorders (FCFS; Little's law, common practice)."""
    rng = np.random.default_rng(5)
    lam = rng.uniform(0.1, 0.6, 4)
    q = np.array([3, 1, 5, 2])
    l0, r0, q0 = 6.0, -2, 12
    t = bl.backlog_tables(lam, lam, q, l0, lowest_reorder_point=r0)
    owed = sum(float(np.asarray(p) @ (off + np.arange(len(p)))) + (qi + 1) / 2
               for (off, p), qi in zip(bl.store_shortfall(t, r0, q0), q, strict=True))
    wd = ech.warehouse_demand(lam[None], np.sqrt(lam)[None], q[None], np.ones((1, 4), dtype=bool),
                              np.array([l0]), np.array([0.0]))
    st = ech.warehouse_moments(wd, np.array([float(r0)]), np.array([float(q0)]))
    assert owed == pytest.approx(float(st.expected_backorders[0]), rel=0.004)


def test_no_backlog_is_the_single_site_store():
    """A warehouse that never runs out: Z = -K and the store is the (R, Q) model with uniform position."""
    t = bl.backlog_tables(np.array([2.0]), np.array([2.0]), np.array([3]), 1.0)
    off, p = bl.store_shortfall(t, 10_000, 3)[0]
    assert off == -3 and np.allclose(p[:3], 1 / 3) and p[3:].sum() < 1e-12
    d = stats.poisson.pmf(np.arange(60), 4.0)
    f = bl.store_figures((off, p), d, 3)
    r = 5
    # common practice: Poisson arrivals see time averages, inventory position uniform on R + 1 .. R + Q
    fill = np.mean([stats.poisson.cdf(r + k - 1, 4.0) for k in (1, 2, 3)])
    assert f.fill_rate[r - f.low] == pytest.approx(fill, abs=1e-9)


def test_axsater_1993_published_costs_closely():
    """All 16 published policies: largest error 1%, mean 0.2% (published costs are rounded to 0.01)."""
    errors = []
    for which in (5, 6):
        inp, sr, sq, r0, q0, exact = axsater_policy(which)
        res = ech.evaluate_two_level(inp, sr, sq, r0, q0, store_method="backlog")
        assert np.all(res.store_method[inp.store_active] == 1)
        errors.append((res.network_cost - exact) / exact)
    err = np.concatenate(errors)
    assert len(err) == 2 * len(AXSATER_1993)
    assert np.max(np.abs(err)) <= 0.01
    assert np.mean(np.abs(err)) <= 0.002


def test_method_choice_and_fallback():
    """Normal-demand stores keep the moment model; 'moments' forces it; an unknown name is an error."""
    inp, sr, sq, r0, q0, _ = axsater_policy(5)
    from dataclasses import replace

    normal = replace(inp, store_count=np.zeros_like(inp.store_count))
    res = ech.evaluate_two_level(normal, sr, sq, r0, q0)
    assert np.all(res.store_method[inp.store_active] == 0)
    mom = ech.evaluate_two_level(inp, sr, sq, r0, q0, store_method="moments")
    unit = ech.evaluate_two_level(inp, sr, sq, r0, q0)
    assert np.all(mom.store_method[inp.store_active] == 0)
    assert np.all(unit.store_method[inp.store_active] == 1)
    assert not np.allclose(mom.network_cost, unit.network_cost)
    with pytest.raises(ValueError, match="store_method"):
        ech.evaluate_two_level(inp, sr, sq, r0, q0, store_method="exact")


def test_optimiser_never_worse_than_moment_choice():
    """The unit-level search keeps the moment model's warehouse reorder point as a candidate."""
    inp = axsater_policy(5)[0]
    best, _ = ech.optimise_two_level(inp)
    mom, _ = ech.optimise_two_level(inp, store_method="moments")
    again = ech.evaluate_two_level(
        inp, mom.store_reorder_point, mom.store_order_quantity, mom.warehouse_reorder_point,
        mom.warehouse_order_quantity, store_method="backlog",
    )
    # (the age integrals' cells depend on the bracket searched: equal to 0.1%)
    assert np.all(best.network_cost <= again.network_cost * (1 + 1e-3))


def test_random_warehouse_lead_time_backorders_against_integration():
    """One-for-one Poisson stores, gamma warehouse lead time: E[B0] = E_L E[(D0(L) - S0)^+] (scipy quad)."""
    from scipy import integrate

    lam = np.array([[0.3, 0.5]])
    l0, sd0, r0, q0 = 6.0, 2.0, 1, 3
    wd = ech.warehouse_demand(lam, np.sqrt(lam), np.ones((1, 2)), np.ones((1, 2), dtype=bool),
                              np.array([l0]), np.array([sd0]))
    st = ech.warehouse_moments(wd, np.array([float(r0)]), np.array([float(q0)]))
    g = stats.gamma(a=(l0 / sd0) ** 2, scale=sd0 * sd0 / l0)
    x = np.arange(200)

    def eb(t):
        p = stats.poisson.pmf(x, 0.8 * t)
        return np.mean([(np.maximum(x - s, 0) * p).sum() for s in range(r0 + 1, r0 + q0 + 1)])

    ref = integrate.quad(lambda t: eb(t) * g.pdf(t), 0, g.ppf(1 - 1e-12), limit=200)[0]
    assert float(st.expected_backorders[0]) == pytest.approx(ref, rel=0.01)


def test_random_lead_time_normal_warehouse_against_integration():
    """Normal demand, gamma lead time: E[B0] against a double integral over the lead time and the uniform
    position (scipy quad; normal loss E(X - y)^+ = s phi(z) - (y - m)(1 - Phi(z)), common practice)."""
    from scipy import integrate

    d = np.array([[40.0, 25.0]])
    sdd = np.array([[12.0, 9.0]])
    q = np.array([[200.0, 150.0]])
    l0, sd0, r0, q0 = 10.0, 3.0, 700.0, 1200.0
    wd = ech.warehouse_demand(d, sdd, q, np.zeros((1, 2), dtype=bool), np.array([l0]), np.array([sd0]))
    assert not wd.discrete[0]
    st = ech.warehouse_moments(wd, np.array([r0]), np.array([q0]))
    g = stats.gamma(a=(l0 / sd0) ** 2, scale=sd0 * sd0 / l0)

    def eb_given(t):
        # the order stream's variance at lead time t, from the project's batching correction
        v = float(ech.order_stream_variance(d * t, sdd**2 * t, q).sum())
        m, s = 65.0 * t, np.sqrt(v)

        def loss(y):
            z = (y - m) / s
            return s * stats.norm.pdf(z) - (y - m) * stats.norm.sf(z)

        return integrate.quad(loss, r0, r0 + q0)[0] / q0

    ref = integrate.quad(lambda t: eb_given(t) * g.pdf(t), g.ppf(1e-10), g.ppf(1 - 1e-10), limit=200)[0]
    assert float(st.expected_backorders[0]) == pytest.approx(ref, rel=0.01)


def test_units_method_takes_normal_stores_as_counts():
    """store_method="units": normal-demand stores evaluated unit by unit with the same mean and variance;
    with Poisson-like variance it equals the count evaluation of the same items."""
    from dataclasses import replace

    inp, sr, sq, r0, q0, _ = axsater_policy(6)
    normal = replace(inp, store_count=np.zeros_like(inp.store_count))
    units = ech.evaluate_two_level(normal, sr, sq, r0, q0, store_method="units")
    counts = ech.evaluate_two_level(inp, sr, sq, r0, q0, store_method="backlog")
    assert np.all(units.store_method[inp.store_active] == 1)
    np.testing.assert_allclose(units.store_policy.fill_rate, counts.store_policy.fill_rate, atol=1e-9)
    # (the warehouse itself stays on its normal model: only the stores are compared)
    np.testing.assert_allclose(units.store_policy.total_cost, counts.store_policy.total_cost, rtol=1e-6)
