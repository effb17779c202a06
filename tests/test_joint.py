"""Tests of models/joint.py: published instance, brute force, Roundy's (1985) bounds as properties."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from models import joint

# Snyder, L. V. & Shen, Z.-J. M., Fundamentals of Supply Chain Theory (Wiley, 2nd ed. 2019), joint
# replenishment example worked with Silver's (1976) heuristic: S = 600, s = (120, 840, 300),
# h = (160, 20, 50), D = (1, 1, 1) -> k = (1, 3, 1), T = 3.103164, cost 837.8544.
SNYDER_S = 600.0
SNYDER_s = np.array([120.0, 840.0, 300.0])
SNYDER_H = np.array([160.0, 20.0, 50.0]) * np.array([1.0, 1.0, 1.0])

# Roundy, R. (1985), Management Science 31(11): worst-case ratios of power-of-two policies to the lower bound
ROUNDY_OPT_BASE = 1.0 / (math.sqrt(2.0) * math.log(2.0))  # ~1.0201
ROUNDY_FIXED_BASE = 3.0 / (2.0 * math.sqrt(2.0))  # ~1.0607


def brute_force(S: float, s: np.ndarray, H: np.ndarray, kmax: int) -> tuple[float, np.ndarray]:
    """Best TC over all k in {1..kmax}^n with T = T*(k) (exhaustive)."""
    ks = np.array(list(itertools.product(range(1, kmax + 1), repeat=s.size)), dtype=float)
    A = S + (s / ks).sum(axis=1)
    B = (ks * H).sum(axis=1)
    cost = np.sqrt(2.0 * A * B)  # TC at T*(k)
    j = int(np.argmin(cost))
    return float(cost[j]), ks[j]


def test_silver_reproduces_published_instance():
    p = joint.silver(SNYDER_S, SNYDER_s, SNYDER_H)
    assert p.multiples.tolist() == [1, 3, 1]
    assert p.cycle == pytest.approx(3.103164, abs=5e-7)
    assert p.cost == pytest.approx(837.8544, abs=5e-5)


def test_exact_optimum_no_higher_than_silver_on_published_instance():
    ex = joint.exact_cyclic(SNYDER_S, SNYDER_s, SNYDER_H)
    assert ex.converged
    assert ex.cost <= 837.8544 + 1e-4
    # brute force over k up to 20 (the optimum of this instance has k <= 3)
    bf, _ = brute_force(SNYDER_S, SNYDER_s, SNYDER_H, 20)
    assert ex.cost == pytest.approx(bf, rel=1e-12)


def test_cost_formula_by_hand():
    # TC(T, k) = (S + sum s/k)/T + T/2 sum k H: (10 + 1 + 1)/2 + 2/2 * (1 + 1) = 8 (worked by hand)
    assert float(joint.joint_cost(2.0, [1, 1], 10.0, [1.0, 1.0], [1.0, 1.0])) == pytest.approx(8.0)
    # T*(k) = sqrt(2 * 12 / 2) = sqrt(12)
    assert float(joint.optimal_cycle([1, 1], 10.0, [1.0, 1.0], [1.0, 1.0])) == pytest.approx(math.sqrt(12.0))


@pytest.mark.parametrize("seed", range(6))
def test_optimal_multiples_match_per_item_brute_force(seed):
    rng = np.random.default_rng(seed)
    s = rng.uniform(0.0, 300.0, 40)
    H = np.exp(rng.uniform(-2.0, 5.0, 40))
    T = rng.uniform(0.01, 3.0)
    k = joint.optimal_multiples(T, s, H)
    grid = np.arange(1, 5000)[:, None]
    per_item = s[None, :] / (grid * T) + grid * T * H[None, :] / 2.0
    best = per_item.min(axis=0)
    got = s / (k * T) + k * T * H / 2.0
    np.testing.assert_allclose(got, best, rtol=1e-12)


@pytest.mark.parametrize("seed", range(25))
def test_exact_cyclic_equals_brute_force_small_families(seed):
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(1, 5))
    S = float(rng.uniform(1.0, 1000.0))
    s = rng.uniform(0.0, 500.0, n) * (rng.random(n) > 0.15)
    H = np.exp(rng.uniform(-1.0, 5.0, n))
    ex = joint.exact_cyclic(S, s, H)
    kmax = 14
    bf, kbf = brute_force(S, s, H, kmax)
    assert ex.converged
    assert ex.cost <= bf * (1 + 1e-12)
    if ex.multiples.max() < kmax:  # the brute force covered the optimum
        assert ex.cost == pytest.approx(bf, rel=1e-11)
    # and no T on a fine grid does better with its best k(T)
    Tg = np.geomspace(ex.cycle / 20, ex.cycle * 20, 4001)
    kg = joint.optimal_multiples(Tg, s, H)
    g = joint.joint_cost(Tg, kg, S, s, H)
    assert ex.cost <= g.min() * (1 + 1e-12)
    assert g.min() <= ex.cost * (1 + 1e-5)


families = st.integers(min_value=1, max_value=30).flatmap(
    lambda n: st.tuples(
        st.floats(0.5, 5000.0),
        st.lists(st.floats(0.0, 2000.0), min_size=n, max_size=n),
        st.lists(st.floats(0.01, 5000.0), min_size=n, max_size=n),
        st.floats(1e-3, 10.0),
    )
)


@settings(max_examples=150, deadline=None, derandomize=True)
@given(families)
def test_roundy_bounds_hold(fam):
    S, s, H, base = fam
    s = np.array(s)
    H = np.array(H)
    lb = joint.roundy_bound(S, s, H)
    p2 = joint.power_of_two(S, s, H)
    pf = joint.power_of_two(S, s, H, base_period=base)
    ex = joint.exact_cyclic(S, s, H)
    assert lb.cost <= ex.cost * (1 + 1e-9)  # a lower bound on every policy, the cyclic optimum included
    assert lb.cost <= p2.cost * (1 + 1e-9)
    assert p2.cost <= ROUNDY_OPT_BASE * lb.cost * (1 + 1e-9)
    assert pf.cost <= ROUNDY_FIXED_BASE * lb.cost * (1 + 1e-9)
    # power-of-two multiples are powers of two and the cost is that of the reported policy
    m = p2.multiples
    assert np.all((m & (m - 1)) == 0) and m.min() == 1
    assert p2.cost == pytest.approx(float(joint.joint_cost(p2.cycle, m, S, s, H)), rel=1e-12)
    assert np.all(lb.item_cycles >= lb.base_cycle * (1 - 1e-12))


def test_roundy_bound_single_item_is_eoq():
    # one item: the bound is the EOQ cost sqrt(2 (S + s) H) (common practice, EOQ formula)
    lb = joint.roundy_bound(50.0, [10.0], [30.0])
    assert lb.cost == pytest.approx(math.sqrt(2 * 60.0 * 30.0), rel=1e-12)


@pytest.mark.parametrize("seed", range(5))
def test_rand_is_feasible_upper_bound_and_converges(seed):
    rng = np.random.default_rng(seed)
    n = 60
    S = 200.0
    s = rng.uniform(1, 100, n)
    H = np.exp(rng.uniform(0, 6, n))
    r = joint.rand(S, s, H)
    ex = joint.exact_cyclic(S, s, H)
    assert r.converged
    assert ex.cost <= r.cost * (1 + 1e-12)
    assert r.cost <= 1.01 * ex.cost  # RAND is reported within ~1% of optimal (Kaspi & Rosenblatt 1991)


def test_validation_names_the_parameter():
    with pytest.raises(ValueError, match="major_cost"):
        joint.exact_cyclic(0.0, [1.0], [1.0])
    with pytest.raises(ValueError, match="holding_demand"):
        joint.rand(10.0, [1.0, 2.0], [1.0, 0.0])
    with pytest.raises(ValueError, match="minor_cost"):
        joint.silver(10.0, [-1.0], [1.0])
    with pytest.raises(ValueError, match="multiples"):
        joint.joint_cost(1.0, [0, 1], 10.0, [1.0, 1.0], [1.0, 1.0])


def test_huge_and_tiny_values():
    s = np.array([1e-9, 1e6, 0.0])
    H = np.array([1e6, 1e-3, 5.0])
    ex = joint.exact_cyclic(1e3, s, H)
    assert np.isfinite(ex.cost) and ex.converged
    # the cost cannot beat the lower bound
    assert joint.roundy_bound(1e3, s, H).cost <= ex.cost * (1 + 1e-9)


# --------------------------------------------------------------------------- slow movers
def test_order_probability_matches_scipy_zero_probabilities():
    """P(a review orders) = 1 - P(no demand over tau): Poisson pmf(0; lambda tau) and the negative binomial
    pmf(0) with mean lambda tau and variance sigma^2 tau (scipy.stats reference; parameterisation
    r = m^2/(v - m), p = m/v, Johnson, Kemp & Kotz, Univariate Discrete Distributions, 2005)."""
    from scipy import stats

    rng = np.random.default_rng(5)
    lam = rng.uniform(0.5, 60.0, 40)
    disp = rng.uniform(1.05, 6.0, 40)
    tau = rng.uniform(0.002, 0.3, 40)
    p_pois = joint.order_probability(tau, lam, lam, 1)
    assert p_pois == pytest.approx(1.0 - stats.poisson.pmf(0, lam * tau), rel=1e-12, abs=1e-15)
    m, v = lam * tau, lam * disp * tau
    p_nb = joint.order_probability(tau, lam, lam * disp, 2)
    assert p_nb == pytest.approx(1.0 - stats.nbinom.pmf(0, m * m / (v - m), m / v), rel=1e-10, abs=1e-14)
    # normal items order at every review; NB without overdispersion is Poisson; no demand never orders
    assert np.all(joint.order_probability(tau, lam, lam * disp, 0) == 1.0)
    assert joint.order_probability(0.1, 4.0, 3.0, 2) == pytest.approx(1.0 - math.exp(-0.4), rel=1e-12)
    assert joint.order_probability(0.1, 0.0, 0.0, 1) == 0.0
    with pytest.raises(ValueError, match="model"):
        joint.no_demand_rate(1.0, 1.0, 3)


def test_expected_joint_share_two_items():
    """Items at multiples 1 and 2: odd cycles order with p_a, even ones with 1 - (1 - p_a)(1 - p_b)
    (independent Poisson streams; Feller, An Introduction to Probability Theory and Its Applications I,
    1968). Rates 0.1 and 0.05 a day, T = 5 days (the simulator test's case)."""
    p_a, p_b = 1 - math.exp(-0.5), 1 - math.exp(-0.5)
    want = (p_a + (1 - (1 - p_a) * (1 - p_b))) / 2
    assert joint.expected_joint_share([1, 2], [p_a, p_b]) == pytest.approx(want, rel=1e-14)
    # p = 1: the share of base cycles with an item due (k = 2, 3: cycles 2, 3, 4, 6 of every 6)
    assert joint.expected_joint_share([2, 3], [1.0, 1.0]) == pytest.approx(4 / 6, rel=1e-14)
    assert joint.expected_joint_share([1, 5], [1.0, 0.3]) == 1.0
