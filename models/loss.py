"""Loss functions and distribution helpers for lead-time demand X.

First-order loss n(y) = E[(X − y)⁺] (expected units short when stock y faces demand X).
Second-order loss:

* continuous (normal): n2(y) = ∫_y^∞ n(t) dt = ½·E[((X − y)⁺)²];
* counts (Poisson, negative binomial): n2(y) = Σ_{j > y} n(j) = ½·E[(X − y)⁺·((X − y)⁺ − 1)].

Both give the average backorders of an (R, Q) policy as E[B] = [n2(R) − n2(R + Q)] / Q (inventory position
uniform on (R, R + Q], or on R+1..R+Q for counts).

All functions are vectorised: every element has its own y, mean, standard deviation and distribution code.
Counts take y as an integer (it is floored). The negative binomial is parametrised by mean μ and variance
v > μ (r = μ²/(v − μ), success probability p = μ/v); where v ≤ μ it falls back to Poisson.
Tails are computed directly (``ndtr``/``erfcx``, regularised incomplete gamma and beta functions), never as
1 − cdf, so both tails keep their relative precision.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from models.demand import NEGBIN, NORMAL, POISSON

_SQRT2 = np.sqrt(2.0)
_INV_SQRT2PI = 1.0 / np.sqrt(2.0 * np.pi)
#: A negative binomial needs variance > mean·(1 + NEGBIN_MIN_EXCESS); otherwise Poisson is used.
NEGBIN_MIN_EXCESS = 1e-9


# ----------------------------------------------------------------------------------------------- normal
def normal_loss(z) -> np.ndarray:
    """Standard normal first-order loss G(z) = E[(Z − z)⁺].

    Parameters
    ----------
    z : array_like
        Standardised stock level.

    Returns
    -------
    ndarray
        G(z) >= 0.

    Notes
    -----
    G(z) = φ(z) − z·(1 − Φ(z)). For z >= 0 it is evaluated as exp(−z²/2)·[1/√(2π) − z·erfcx(z/√2)/2]
    (no 1 − Φ, no underflow before exp(−z²/2) itself underflows); for z < 0 through G(z) = G(−z) − z.

    References
    ----------
    Silver, E. A., Pyke, D. F. & Peterson, R. (1998). Inventory Management and Production Planning and
    Scheduling, 3rd ed., Wiley, Appendix B.

    Examples
    --------
    >>> round(float(normal_loss(0.0)), 6)
    0.398942
    """
    z = np.asarray(z, dtype=float)
    a = np.abs(z)
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        g = np.exp(-0.5 * a * a) * (_INV_SQRT2PI - 0.5 * a * special.erfcx(a / _SQRT2))
    g = np.where(np.isinf(a), 0.0, np.maximum(g, 0.0))
    return np.where(z < 0, g + a, g)


def normal_loss2(z) -> np.ndarray:
    """Standard normal second-order loss G2(z) = ½·E[((Z − z)⁺)²] = ∫_z^∞ G(t) dt.

    Parameters
    ----------
    z : array_like

    Returns
    -------
    ndarray

    Notes
    -----
    G2(z) = ½[(z² + 1)(1 − Φ(z)) − z·φ(z)]; for z >= 0 evaluated with ``erfcx``, for z < 0 by the
    reflection G2(z) = (1 + z²)/2 − G2(−z) (from (Z − z)² = ((Z − z)⁺)² + ((z − Z)⁺)²).

    References
    ----------
    Hopp, W. J. & Spearman, M. L. (2000). Factory Physics, 2nd ed., McGraw-Hill.

    Examples
    --------
    >>> float(normal_loss2(0.0))
    0.25
    """
    z = np.asarray(z, dtype=float)
    a = np.abs(z)
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        g2 = 0.5 * np.exp(-0.5 * a * a) * ((a * a + 1.0) * 0.5 * special.erfcx(a / _SQRT2) - a * _INV_SQRT2PI)
    g2 = np.where(np.isinf(a), 0.0, np.maximum(g2, 0.0))
    return np.where(z < 0, 0.5 * (1.0 + a * a) - g2, g2)


def normal_losses(z) -> tuple[np.ndarray, np.ndarray]:
    """Standard normal first- and second-order loss together (one exp and one erfcx for both).

    Parameters
    ----------
    z : array_like

    Returns
    -------
    G, G2 : ndarray
        As :func:`normal_loss` and :func:`normal_loss2` (same formulas, bit-for-bit equal).

    References
    ----------
    Silver, E. A., Pyke, D. F. & Peterson, R. (1998). Inventory Management and Production Planning and
    Scheduling, 3rd ed., Wiley, Appendix B.

    Examples
    --------
    >>> [round(float(v), 6) for v in normal_losses(0.0)]
    [0.398942, 0.25]
    """
    z = np.asarray(z, dtype=float)
    a = np.abs(z)
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        e = np.exp(-0.5 * a * a)
        m = 0.5 * special.erfcx(a / _SQRT2)
        g = e * (_INV_SQRT2PI - a * m)
        g2 = 0.5 * e * ((a * a + 1.0) * m - a * _INV_SQRT2PI)
    inf = np.isinf(a)
    g = np.where(inf, 0.0, np.maximum(g, 0.0))
    g2 = np.where(inf, 0.0, np.maximum(g2, 0.0))
    neg = z < 0
    return np.where(neg, g + a, g), np.where(neg, 0.5 * (1.0 + a * a) - g2, g2)


def normal_sf(z) -> np.ndarray:
    """Standard normal survival function P(Z > z), computed as Φ(−z) (accurate in the upper tail).

    Parameters
    ----------
    z : array_like

    Returns
    -------
    ndarray

    References
    ----------
    Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions, 26.2.

    Examples
    --------
    >>> float(normal_sf(30.0)) > 0  # 1 - cdf would give 0
    True
    """
    return special.ndtr(-np.asarray(z, dtype=float))


def normal_cdf(z) -> np.ndarray:
    """Standard normal distribution function P(Z <= z) (accurate in the lower tail).

    Parameters
    ----------
    z : array_like

    Returns
    -------
    ndarray

    References
    ----------
    Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions, 26.2.

    Examples
    --------
    >>> float(normal_cdf(0.0))
    0.5
    """
    return special.ndtr(np.asarray(z, dtype=float))


# ----------------------------------------------------------------------------------------------- counts
def _count_params(mean, sd, distribution):
    """Return (mu, r, q, is_nb): negative binomial size r and failure probability q = 1 − p."""
    mu = np.asarray(mean, dtype=float)
    var = np.asarray(sd, dtype=float) ** 2
    is_nb = (np.asarray(distribution) == NEGBIN) & (var > mu * (1.0 + NEGBIN_MIN_EXCESS)) & (mu > 0)
    safe_var = np.where(is_nb, var, 3.0)
    safe_mu = np.where(is_nb, mu, 1.0)
    r = np.where(is_nb, safe_mu * safe_mu / (safe_var - safe_mu), np.inf)
    q = np.where(is_nb, 1.0 - safe_mu / safe_var, 0.0)
    return mu, r, q, is_nb


def _tail_ge(m, mu, r, q, is_nb):
    """P(X >= m) for integer m (Poisson where not is_nb, NB(r, 1 − q) where is_nb)."""
    m = np.asarray(m, dtype=float)
    pos = m >= 1
    mm = np.where(pos, m, 1.0)
    pois = special.gammainc(mm, mu)
    if np.any(is_nb):
        rr = np.where(is_nb, r, 1.0)
        qq = np.where(is_nb, q, 0.5)
        nb = special.betainc(mm, rr, qq)
        val = np.where(is_nb, nb, pois)
    else:
        val = pois
    return np.where(pos, val, 1.0)


def _count_loss(y, mu, r, q, is_nb):
    y = np.floor(np.asarray(y, dtype=float))
    r1 = np.where(is_nb, r + 1.0, np.inf)
    s1 = _tail_ge(y, mu, r1, q, is_nb)
    s0 = _tail_ge(y + 1.0, mu, r, q, is_nb)
    n = mu * s1 - y * s0
    n = np.where(y < 0, mu - y, n)
    return np.maximum(n, 0.0)


def _count_loss2(y, mu, r, q, is_nb):
    y = np.floor(np.asarray(y, dtype=float))
    r1 = np.where(is_nb, r + 1.0, np.inf)
    r2 = np.where(is_nb, r + 2.0, np.inf)
    nu2 = np.where(is_nb, mu * mu * (np.where(is_nb, r, 1.0) + 1.0) / np.where(is_nb, r, 1.0), mu * mu)
    s2 = _tail_ge(y - 1.0, mu, r2, q, is_nb)
    s1 = _tail_ge(y, mu, r1, q, is_nb)
    s0 = _tail_ge(y + 1.0, mu, r, q, is_nb)
    val = 0.5 * (nu2 * s2 - 2.0 * y * mu * s1 + (y * y + y) * s0)
    full = 0.5 * (nu2 - 2.0 * y * mu + y * y + y)  # y <= 0: every tail probability is 1
    val = np.where(y <= 0, full, val)
    return np.maximum(val, 0.0)


def _count_cdf(y, mu, r, q, is_nb):
    """P(X <= y)."""
    y = np.floor(np.asarray(y, dtype=float))
    pos = y >= 0
    yy = np.where(pos, y, 0.0)
    pois = special.gammaincc(yy + 1.0, mu)
    if np.any(is_nb):
        rr = np.where(is_nb, r, 1.0)
        pp = np.where(is_nb, 1.0 - q, 0.5)
        val = np.where(is_nb, special.betainc(rr, yy + 1.0, pp), pois)
    else:
        val = pois
    return np.where(pos, val, 0.0)


def _count_pmf(k, mu, r, q, is_nb):
    k = np.floor(np.asarray(k, dtype=float))
    kk = np.maximum(k, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        logp = special.xlogy(kk, mu) - mu - special.gammaln(kk + 1.0)
        if np.any(is_nb):
            rr = np.where(is_nb, r, 1.0)
            qq = np.where(is_nb, q, 0.5)
            lnb = (special.gammaln(kk + rr) - special.gammaln(rr) - special.gammaln(kk + 1.0)
                   + rr * np.log1p(-qq) + special.xlogy(kk, qq))
            logp = np.where(is_nb, lnb, logp)
    return np.where(k < 0, 0.0, np.exp(logp))


# ------------------------------------------------------------------------------------------- dispatch
def _broadcast(y, mean, sd, distribution):
    y, mean, sd, dist = np.broadcast_arrays(np.asarray(y, dtype=float), np.asarray(mean, dtype=float),
                                            np.asarray(sd, dtype=float), np.asarray(distribution))
    return y, mean, sd, dist


def _normal_part(fn_z, deterministic, y, mean, sd, scale_power):
    pos = sd > 0
    s = np.where(pos, sd, 1.0)
    z = (y - mean) / s
    return np.where(pos, s ** scale_power * fn_z(z), deterministic(mean - y))


def _apply(y, mean, sd, distribution, normal_fn, count_fn):
    y, mean, sd, dist = _broadcast(y, mean, sd, distribution)
    is_normal = dist == NORMAL
    bad = ~(is_normal | (dist == POISSON) | (dist == NEGBIN))
    if bad.any():
        raise ValueError(f"distribution codes must be 0 (normal), 1 (poisson) or 2 (negbin), "
                         f"got {np.unique(dist[bad]).tolist()}")
    out = np.empty(y.shape, dtype=float)
    if is_normal.any():
        out[is_normal] = normal_fn(y[is_normal], mean[is_normal], sd[is_normal])
    cnt = ~is_normal
    if cnt.any():
        mu, r, q, is_nb = _count_params(mean[cnt], sd[cnt], dist[cnt])
        out[cnt] = count_fn(y[cnt], mu, r, q, is_nb)
    return out


def loss(y, mean, sd, distribution=NORMAL) -> np.ndarray:
    """First-order loss n(y) = E[(X − y)⁺] of lead-time demand X.

    Parameters
    ----------
    y : array_like
        Stock levels (integers for counts).
    mean, sd : array_like
        Mean and standard deviation of X (sd = 0 gives a point mass at the mean for normal).
    distribution : array_like of int
        Codes ``NORMAL``, ``POISSON``, ``NEGBIN`` per element.

    Returns
    -------
    ndarray

    Notes
    -----
    Normal: σ·G((y − μ)/σ). Counts: n(y) = μ·P(X' >= y) − y·P(X >= y + 1), where X' is Poisson(μ) for
    Poisson and NB(r + 1, p) for NB(r, p) (from k·p_r(k) = μ·p_{r+1}(k − 1)).

    References
    ----------
    Zipkin, P. H. (2000). Foundations of Inventory Management. McGraw-Hill.

    Examples
    --------
    >>> round(float(loss(3, 2.0, 2.0 ** 0.5, 1)), 6)
    0.218018
    """
    return _apply(y, mean, sd, distribution,
                  lambda y, m, s: _normal_part(normal_loss, lambda d: np.maximum(d, 0.0), y, m, s, 1),
                  _count_loss)


def loss2(y, mean, sd, distribution=NORMAL) -> np.ndarray:
    """Second-order loss (see the module notes for the continuous and count definitions).

    Parameters
    ----------
    y, mean, sd, distribution : array_like
        As for :func:`loss`.

    Returns
    -------
    ndarray

    Notes
    -----
    Normal: σ²·G2((y − μ)/σ). Counts: ½[ν2·P(X'' >= y − 1) − 2yμ·P(X' >= y) + (y² + y)·P(X >= y + 1)],
    ν2 = E[X(X − 1)], X'' Poisson(μ) or NB(r + 2, p).

    References
    ----------
    Zipkin, P. H. (2000). Foundations of Inventory Management. McGraw-Hill.

    Examples
    --------
    >>> round(float(loss2(0, 2.0, 2.0 ** 0.5, 1)), 6)  # E[X(X-1)]/2 = mu^2/2
    2.0
    """
    return _apply(y, mean, sd, distribution,
                  lambda y, m, s: _normal_part(normal_loss2, lambda d: 0.5 * np.maximum(d, 0.0) ** 2,
                                               y, m, s, 2),
                  _count_loss2)


def cdf(y, mean, sd, distribution=NORMAL) -> np.ndarray:
    """Distribution function P(X <= y) of lead-time demand, element-wise.

    Parameters
    ----------
    y, mean, sd, distribution : array_like
        As for :func:`loss` (a normal element with sd = 0 is a point mass at the mean).

    Returns
    -------
    ndarray

    Notes
    -----
    Normal Φ((y − μ)/σ); Poisson Q(⌊y⌋ + 1, μ) (regularised upper incomplete gamma); negative binomial
    I_p(r, ⌊y⌋ + 1) (regularised incomplete beta).

    References
    ----------
    Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions, 6.5 and 26.5.

    Examples
    --------
    >>> round(float(cdf(2, 2.0, 2.0 ** 0.5, 1)), 6)
    0.676676
    """
    return _apply(y, mean, sd, distribution,
                  lambda y, m, s: _normal_part(normal_cdf, lambda d: (d <= 0).astype(float), y, m, s, 0),
                  _count_cdf)


def sf(y, mean, sd, distribution=NORMAL) -> np.ndarray:
    """Survival function P(X > y) of lead-time demand, computed directly (never as 1 − cdf).

    Parameters
    ----------
    y, mean, sd, distribution : array_like
        As for :func:`loss`.

    Returns
    -------
    ndarray

    Notes
    -----
    Normal Φ(−(y − μ)/σ); Poisson P(⌊y⌋ + 1, μ) (regularised lower incomplete gamma); negative binomial
    I_{1−p}(⌊y⌋ + 1, r).

    References
    ----------
    Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions, 6.5 and 26.5.

    Examples
    --------
    >>> round(float(sf(2, 2.0, 2.0 ** 0.5, 1)), 6)
    0.323324
    """
    return _apply(y, mean, sd, distribution,
                  lambda y, m, s: _normal_part(normal_sf, lambda d: (d > 0).astype(float), y, m, s, 0),
                  lambda y, mu, r, q, nb: _tail_ge(np.floor(y) + 1.0, mu, r, q, nb))


def pmf(k, mean, sd, distribution=POISSON) -> np.ndarray:
    """Probability P(X = k) for count elements (normal elements give the density at k).

    Parameters
    ----------
    k, mean, sd, distribution : array_like
        As for :func:`loss`.

    Returns
    -------
    ndarray

    Notes
    -----
    Poisson e^{−μ}μ^k/k!; negative binomial Γ(k + r)/(Γ(r)k!)·p^r(1 − p)^k, evaluated in logs.

    References
    ----------
    Johnson, N. L., Kemp, A. W. & Kotz, S. (2005). Univariate Discrete Distributions, 3rd ed., Wiley.

    Examples
    --------
    >>> round(float(pmf(0, 2.0, 2.0 ** 0.5)), 6)
    0.135335
    """
    def normal_pdf(y, m, s):
        pos = s > 0
        ss = np.where(pos, s, 1.0)
        return np.where(pos, np.exp(-0.5 * ((y - m) / ss) ** 2) * _INV_SQRT2PI / ss, 0.0)
    return _apply(k, mean, sd, distribution, normal_pdf, _count_pmf)
