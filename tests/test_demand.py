"""Lead-time demand moments, the auto distribution rule and demand classification."""

import numpy as np
import pytest

from models.demand import (
    ERRATIC,
    INTERMITTENT,
    LUMPY,
    NEGBIN,
    NO_DEMAND,
    NORMAL,
    POISSON,
    SMOOTH,
    choose_distribution,
    estimate_demand,
    lead_time_demand,
)


def test_lead_time_demand_check_value():
    # Hadley & Whitin (1963), Analysis of Inventory Systems: Var = L·sd² + d²·sd_L²; d = 20, sd = 5, L = 10,
    # sd_L = 2 -> var 1850 (computed by hand: 10·25 + 400·4)
    m, s = lead_time_demand(20.0, 5.0, 10.0, 2.0)
    assert m == 200.0
    assert s == pytest.approx(np.sqrt(1850.0), rel=1e-15)
    assert round(float(s), 4) == 43.0116


def test_lead_time_demand_against_simulation():
    # seeded Monte Carlo: lead time in whole days (8, 10 or 12), daily demand normal(20, 5), independent days
    rng = np.random.default_rng(5)
    n = 100_000
    lead = rng.choice([8, 10, 12], size=n)
    total = rng.normal(20.0 * lead, 5.0 * np.sqrt(lead))
    m, s = lead_time_demand(20.0, 5.0, 10.0, np.sqrt(8.0 / 3.0))
    se_mean = total.std() / np.sqrt(n)
    assert abs(total.mean() - m) < 4 * se_mean
    assert total.std() == pytest.approx(float(s), rel=0.01)


def test_lead_time_demand_vectorised_and_validated():
    m, s = lead_time_demand([1.0, 2.0], [0.0, 1.0], 4.0, 0.0)
    np.testing.assert_allclose(m, [4.0, 8.0])
    np.testing.assert_allclose(s, [0.0, 2.0])
    with pytest.raises(ValueError, match="daily_sd"):
        lead_time_demand(1.0, -1.0, 1.0, 0.0)


def test_choose_distribution_auto_rule():
    # common practice: normal for large lead-time demand, counts for small or intermittent demand,
    # negative binomial when over-dispersed
    codes = choose_distribution([50.0, 2.0, 2.0, 9.0, 50.0], [100.0, 2.1, 8.0, 30.0, 52.0], "auto",
                                demand_class=[SMOOTH, SMOOTH, SMOOTH, SMOOTH, LUMPY])
    assert codes.tolist() == [NORMAL, POISSON, NEGBIN, NEGBIN, POISSON]
    assert codes.dtype == np.int8
    assert choose_distribution([1.0, 100.0], [1.0, 4.0], "poisson").tolist() == [POISSON, POISSON]
    assert choose_distribution([1.0], [9.0], NORMAL).tolist() == [NORMAL]
    with pytest.raises(ValueError, match="default"):
        choose_distribution([1.0], [1.0], "gamma")


def test_estimate_demand_moments_and_classes():
    hist = np.array([
        [5, 6, 5, 4, 5, 6, 5, 4],          # sells every day, steady -> smooth
        [1, 9, 1, 12, 1, 8, 1, 10],        # every day, sizes vary -> erratic
        [0, 3, 0, 0, 3, 0, 0, 3],          # gaps, steady sizes -> intermittent
        [0, 1, 0, 0, 14, 0, 0, 2],         # gaps, sizes vary -> lumpy
        [0, 0, 0, 0, 0, 0, 0, 0],          # nothing sold
    ], dtype=float)
    est = estimate_demand(hist)
    assert est.demand_class.tolist() == [SMOOTH, ERRATIC, INTERMITTENT, LUMPY, NO_DEMAND]
    np.testing.assert_allclose(est.daily_mean, hist.mean(axis=1))
    np.testing.assert_allclose(est.daily_sd, hist.std(axis=1, ddof=1))
    # ADI = days / selling days; CV² of the non-zero sizes (ddof = 1), computed here by numpy directly
    assert est.adi[2] == pytest.approx(8 / 3)
    sizes = np.array([1.0, 14.0, 2.0])
    assert est.cv2[3] == pytest.approx(sizes.var(ddof=1) / sizes.mean() ** 2)
    assert np.isinf(est.adi[4]) and est.nonzero_days.tolist() == [8, 8, 3, 3, 0]


def test_estimate_demand_cutoffs_syntetos_boylan():
    # Syntetos & Boylan (2005) cut-offs ADI 1.32 and CV² 0.49 [from memory]: ADI exactly 4/3 > 1.32
    hist = np.array([[0, 2, 2, 2] * 3], dtype=float)
    assert estimate_demand(hist).demand_class[0] == INTERMITTENT
    hist = np.array([[0, 2, 2, 2, 2, 2, 2, 2]], dtype=float)   # ADI 8/7 < 1.32
    assert estimate_demand(hist).demand_class[0] == SMOOTH


@pytest.mark.parametrize("bad, word", [([[1.0, np.nan]], "finite"), ([[1.0, -2.0]], ">= 0"),
                                       ([[1.0]], "at least 2")])
def test_estimate_demand_rejects_bad_history(bad, word):
    with pytest.raises(ValueError, match=word):
        estimate_demand(bad)


@pytest.mark.parametrize("mean, sd", [(10.0, 3.0), (9.0, 2.0), (35.0, 8.0), (35.0, 0.5), (4.0, 4.0)])
def test_lead_points_match_gamma_moments(mean, sd):
    """Gauss quadrature nodes reproduce the gamma's moments (scipy.stats.gamma as the reference)."""
    from scipy import stats

    from models.demand import lead_points

    x, w = lead_points(mean, sd)
    g = stats.gamma(a=(mean / sd) ** 2, scale=sd * sd / mean)
    assert np.all(w > 0) and w.sum() == pytest.approx(1.0)
    for k in (1, 2, 3, 4):
        # Laguerre nodes are exact to degree 9; the Hermite fallback (shape > 100) to the normal's moments
        rel = 1e-9 if (mean / sd) ** 2 <= 100 else 2e-3
        assert w @ x**k == pytest.approx(g.moment(k), rel=rel)
    # an expectation that is not a polynomial: P(L > mean + sd) smoothed by a Poisson count
    f = lambda lead: stats.poisson.sf(int(mean), lead)  # noqa: E731
    from scipy import integrate

    ref = integrate.quad(lambda t: f(t) * g.pdf(t), 0, g.ppf(1 - 1e-12), limit=200)[0]
    assert w @ np.array([f(t) for t in x]) == pytest.approx(ref, abs=0.02)


def test_lead_points_fixed_lead_time():
    from models.demand import lead_points

    x, w = lead_points(7.0, 0.0)
    assert x.tolist() == [7.0] and w.tolist() == [1.0]
