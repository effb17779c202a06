"""Loss functions against published tables, numerical integration and direct summation of scipy pmfs."""

import numpy as np
import pytest
from scipy import integrate, stats

from models.demand import NEGBIN, NORMAL, POISSON
from models.loss import cdf, loss, loss2, normal_loss, normal_loss2, normal_losses, pmf, sf


def test_normal_loss_published_table_row():
    # Silver, Pyke & Peterson (1998), Inventory Management and Production Planning and Scheduling, 3rd ed.,
    # Appendix B, table of G_u(k): row k = 2.42 -> 0.0026 (4 decimals) [read]
    assert round(float(normal_loss(2.42)), 4) == 0.0026


@pytest.mark.parametrize("z", [-6.0, -2.5, -1.0, -0.3, 0.0, 0.4, 1.0, 2.0, 3.0, 4.5, 6.0, 8.0])
def test_normal_loss_matches_quad(z):
    # reference: scipy.integrate.quad of the defining integrals
    g, _ = integrate.quad(lambda x: (x - z) * stats.norm.pdf(x), z, np.inf, epsabs=0, epsrel=1e-13)
    g2, _ = integrate.quad(lambda x: 0.5 * (x - z) ** 2 * stats.norm.pdf(x), z, np.inf,
                           epsabs=0, epsrel=1e-13)
    assert normal_loss(z) == pytest.approx(g, rel=1e-9)
    assert normal_loss2(z) == pytest.approx(g2, rel=1e-9)


def test_normal_loss_reflection_identity():
    # G(-z) = G(z) + z (follows from E[Z - z] = -z); common textbook identity
    z = np.linspace(-9, 9, 181)
    np.testing.assert_allclose(normal_loss(-z), normal_loss(z) + z, rtol=1e-13, atol=1e-15)


def test_normal_second_order_is_integral_of_first_order():
    # d/dz G2(z) = -G(z): central differences
    z = np.linspace(-5, 5, 41)
    h = 1e-5
    deriv = (normal_loss2(z + h) - normal_loss2(z - h)) / (2 * h)
    np.testing.assert_allclose(deriv, -normal_loss(z), rtol=1e-6, atol=1e-10)


def test_normal_loss_upper_tail_keeps_relative_precision():
    # asymptotic expansion G(z) ~ phi(z)/z^2 (1 - 3/z^2 + 15/z^4 - 105/z^6 + 945/z^8) (Abramowitz & Stegun
    # 26.2.12 for the Mills ratio); 1 - cdf would give exactly 0 or noise here
    z = np.array([12.0, 20.0, 30.0])
    u = 1 / z**2
    approx = stats.norm.pdf(z) * u * (1 - 3 * u + 15 * u**2 - 105 * u**3 + 945 * u**4 - 10395 * u**5)
    np.testing.assert_allclose(normal_loss(z), approx, rtol=1e-6)
    assert np.all(normal_loss(z) > 0)


def test_normal_loss_huge_arguments_are_finite():
    z = np.array([-1e300, -1e8, 1e8, 1e300, np.inf])
    g = normal_loss(z[:-1])
    assert np.all(np.isfinite(g))
    np.testing.assert_allclose(g[:2], -z[:2], rtol=1e-15)
    assert g[2] == 0 and g[3] == 0
    assert np.all(np.isfinite(normal_loss2(np.array([-1e8, 1e8]))))


def _direct(mu, var, dist, y, kmax=4000):
    k = np.arange(kmax)
    if dist == POISSON or var <= mu:
        p = stats.poisson.pmf(k, mu)
    else:
        r = mu * mu / (var - mu)
        p = stats.nbinom.pmf(k, r, mu / var)
    x = np.maximum(k - y, 0)
    return (x * p).sum(), 0.5 * (x * (x - 1) * p).sum(), p[k <= y].sum(), p[k > y].sum(), p


def test_count_losses_match_direct_summation():
    rng = np.random.default_rng(11)
    cases = []
    for _ in range(60):
        dist = POISSON if rng.random() < 0.5 else NEGBIN
        mu = float(rng.uniform(0.05, 60))
        var = mu * float(rng.uniform(1.2, 6.0)) if dist == NEGBIN else mu
        for y in rng.integers(-3, int(mu + 6 * np.sqrt(var)) + 4, size=4):
            cases.append((dist, mu, var, int(y)))
    dist, mu, var, y = (np.array(c) for c in zip(*cases, strict=True))
    got = (loss(y, mu, np.sqrt(var), dist), loss2(y, mu, np.sqrt(var), dist), cdf(y, mu, np.sqrt(var), dist),
           sf(y, mu, np.sqrt(var), dist))
    for i, (d, m, v, yy) in enumerate(cases):
        n1, n2, c, s, p = _direct(m, v, d, yy)
        assert got[0][i] == pytest.approx(n1, rel=1e-10, abs=1e-300)
        assert got[1][i] == pytest.approx(n2, rel=1e-9, abs=1e-300)
        assert got[2][i] == pytest.approx(c, rel=1e-10, abs=1e-15)
        assert got[3][i] == pytest.approx(s, rel=1e-9, abs=1e-15)
        assert pmf(yy, m, np.sqrt(v), d) == pytest.approx(p[yy] if yy >= 0 else 0.0, rel=1e-10, abs=1e-300)


def test_count_loss_upper_tail_relative_precision():
    # far in the upper tail the value is tiny but must keep its relative precision (direct summation)
    n1, n2, _, _, _ = _direct(3.0, 3.0, POISSON, 25)
    assert loss(25, 3.0, np.sqrt(3.0), POISSON) == pytest.approx(n1, rel=1e-10)
    assert loss2(25, 3.0, np.sqrt(3.0), POISSON) == pytest.approx(n2, rel=1e-8)


def test_negbin_falls_back_to_poisson_when_not_overdispersed():
    y = np.arange(-2, 15)
    np.testing.assert_allclose(loss(y, 4.0, 1.5, NEGBIN), loss(y, 4.0, 2.0, POISSON), rtol=1e-14)


def test_normal_scaling_and_point_mass():
    y = np.array([80.0, 100.0, 130.0])
    np.testing.assert_allclose(loss(y, 100.0, 20.0, NORMAL), 20.0 * normal_loss((y - 100) / 20), rtol=1e-15)
    np.testing.assert_allclose(loss(y, 100.0, 0.0, NORMAL), [20.0, 0.0, 0.0])
    np.testing.assert_allclose(loss2(y, 100.0, 0.0, NORMAL), [200.0, 0.0, 0.0])
    np.testing.assert_allclose(cdf(y, 100.0, 0.0, NORMAL), [0.0, 1.0, 1.0])
    np.testing.assert_allclose(sf(130.0, 100.0, 20.0, NORMAL), stats.norm.sf(1.5), rtol=1e-14)


def test_bad_distribution_code_is_rejected():
    with pytest.raises(ValueError, match="distribution codes"):
        loss(1.0, 1.0, 1.0, 7)


def test_combined_normal_losses_match_separate_functions():
    z = np.concatenate([np.linspace(-40, 40, 801), [np.inf, -1e6]])
    g, g2 = normal_losses(z)
    np.testing.assert_array_equal(g, normal_loss(z))
    np.testing.assert_array_equal(g2, normal_loss2(z))
