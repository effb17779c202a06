"""Two-echelon kernels: warehouse demand from store order streams, warehouse backorders, delay moments.

Everything here is numpy over items: a warehouse quantity has shape ``(n,)``, a store quantity ``(n, m)`` with
``m`` the (padded) number of stores per item; absent stores are padded with zero demand. Count distributions are
2-D pmf arrays ``(n, width)`` on the unit grid ``0 .. width - 1``.

Time is in one consistent unit chosen by the caller (the application uses days): demand rates are per time unit
and lead times in time units. The store-level cost and service formulas are the single-site ones
(:mod:`models.single_site`); this module supplies the lead-time demand moments the stores face.

The METRIC-type step (Sherbrooke 1968, extended to batches as in Deuermeyer & Schwarz 1981 and, for the delay
variance, Svoronos & Zipkin 1988):

* warehouse lead-time demand ``X0`` = own customer demand + ``sum_i Q_i * floor((D_i(L0) + V_i) / Q_i)`` with
  ``V_i`` uniform on ``{0 .. Q_i - 1}`` (the store's inventory position deficit), independent across stores;
* warehouse inventory position uniform on ``R0 + g, R0 + 2g, .., R0 + Q0`` where ``g`` is the lattice step of the
  warehouse demand (the gcd of the store batches when there is no own demand and ``Q0`` is a multiple of it,
  else 1; continuous for normal demand);
* ``E[W] = E[B0] / lambda0`` (Little's law) and, by the distributional form of Little's law for a stream of
  batches (units arriving during the delay), ``Var(W) = max(0, Var(B0) - v0 E[W]) / lambda0**2`` where ``v0`` is
  the variance rate of the warehouse demand stream (``sum lambda_i Q_i`` for batch streams);
* store ``i`` then faces lead-time demand with mean ``d_i (L_i + E[W])`` and variance
  ``s_i**2 (L_i + E[W]) + d_i**2 (sL_i**2 + Var(W))``.

For one-for-one stores with Poisson demand the store moments above equal the exact moments of Graves' (1985)
binomial disaggregation; :func:`exact_one_for_one` computes the exact distributions as a reference.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import special

__all__ = [
    "TAIL_TOL",
    "SUPPORT_SDS",
    "MAX_EXACT_SUPPORT",
    "DISPERSION_TOL",
    "FOURIER_TERMS",
    "count_pmf",
    "order_stream_pmf",
    "order_stream_variance",
    "warehouse_demand",
    "WarehouseDemand",
    "warehouse_moments",
    "WarehouseState",
    "delay_moments",
    "store_ltd_moments",
    "exact_one_for_one",
    "normal_loss_moments",
]

#: Largest dropped tail mass accepted when a pmf is truncated to a finite support.
TAIL_TOL = 1e-9
#: Support of a count pmf: mean + SUPPORT_SDS standard deviations (+ the largest batch), rounded up.
SUPPORT_SDS = 14.0
#: Above this support the warehouse demand of count items is moment-matched (normal) instead of convolved.
MAX_EXACT_SUPPORT = 4096
#: Relative over-dispersion below which a count variable is taken as Poisson.
DISPERSION_TOL = 1e-9
#: Terms of the Fourier series for the batching correction of normal demand.
FOURIER_TERMS = 64
#: Smallest standard deviation used in normal formulas (relative to max(1, mean)); zero variance is a limit.
SD_FLOOR = 1e-9


# ----------------------------------------------------------------------------------------------------------
# count distributions
# ----------------------------------------------------------------------------------------------------------
def count_pmf(mean: np.ndarray, var: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray]:
    """Poisson or negative binomial pmf by moments, on the grid ``0 .. width - 1``.

    Parameters
    ----------
    mean, var : ndarray, shape (n,)
        Mean and variance. ``var <= mean * (1 + DISPERSION_TOL)`` gives a Poisson pmf (under-dispersion is not
        representable by these families; the Poisson keeps the mean).
    width : int
        Number of support points.

    Returns
    -------
    pmf : ndarray, shape (n, width)
    tail : ndarray, shape (n,)
        Probability mass beyond ``width - 1`` (dropped).

    Examples
    --------
    >>> p, tail = count_pmf(np.array([2.0]), np.array([2.0]), 40)
    >>> round(float(p[0, 0]), 6), bool(tail[0] < 1e-12)
    (0.135335, True)

    Notes
    -----
    Negative binomial with ``r = mean**2 / (var - mean)``, ``p = mean / var``:
    ``P(k) = Gamma(k + r) / (Gamma(r) k!) p**r (1 - p)**k``.
    """
    mean = np.asarray(mean, dtype=float)
    var = np.asarray(var, dtype=float)
    if np.any(mean < 0) or np.any(~np.isfinite(mean)):
        raise ValueError(f"mean must be finite and >= 0, found min {np.min(mean)!r}")
    k = np.arange(width, dtype=float)[None, :]
    mu = mean[:, None]
    nb = var > mean * (1.0 + DISPERSION_TOL) + 1e-300
    logp = np.empty((mean.size, width))
    with np.errstate(divide="ignore", invalid="ignore"):
        # Poisson rows
        lp = k * np.log(np.where(mu > 0, mu, 1.0)) - mu - special.gammaln(k + 1.0)
        lp = np.where(mu > 0, lp, np.where(k == 0, 0.0, -np.inf))
        logp[:] = lp
        if np.any(nb):
            m = mean[nb][:, None]
            v = var[nb][:, None]
            r = m * m / (v - m)
            p = m / v
            lnb = (special.gammaln(k + r) - special.gammaln(r) - special.gammaln(k + 1.0)
                   + r * np.log(p) + k * np.log1p(-p))
            logp[nb] = lnb
    pmf = np.exp(logp)
    tail = np.clip(1.0 - pmf.sum(axis=1), 0.0, None)
    return pmf, tail


def _support_width(mean: np.ndarray, var: np.ndarray, pad: np.ndarray | int = 0) -> np.ndarray:
    sd = np.sqrt(np.maximum(var, 0.0))
    return np.ceil(mean + SUPPORT_SDS * sd + 20.0 + pad).astype(np.int64)


def _cdf_prefix(pmf: np.ndarray) -> np.ndarray:
    """C(y) = sum_{u<=y} F(u) on the grid, with F the cdf."""
    return np.cumsum(np.cumsum(pmf, axis=1), axis=1)


def order_stream_pmf(demand_pmf: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Distribution of a store's replenishment orders over a window, in units.

    Parameters
    ----------
    demand_pmf : ndarray, shape (n, width)
        Pmf of the store's customer demand over the window (units).
    q : ndarray of int, shape (n,)
        Store order quantity ``Q >= 1``.

    Returns
    -------
    ndarray, shape (n, width)
        Pmf of ``Q * floor((D + V) / Q)`` with ``V`` uniform on ``{0 .. Q - 1}`` (mass on multiples of ``Q``).

    Examples
    --------
    >>> p = np.zeros((1, 8)); p[0, 1] = 1.0          # exactly one unit demanded
    >>> order_stream_pmf(p, np.array([4]))[0, [0, 4]]
    array([0.75, 0.25])

    Notes
    -----
    With ``Y = D + V``, ``F_Y(y) = (C(y) - C(y - Q)) / Q`` where ``C(y) = sum_{u <= y} F_D(u)``; the mass at
    ``x = kQ`` is ``F_Y(x + Q - 1) - F_Y(x - 1)``.
    """
    n, width = demand_pmf.shape
    q = np.asarray(q, dtype=np.int64).reshape(n)
    if np.any(q < 1):
        raise ValueError(f"q must be >= 1, found {int(q.min())}")
    cdf = np.cumsum(demand_pmf, axis=1)
    c = np.cumsum(cdf, axis=1)
    last_c = c[:, -1]
    last_f = cdf[:, -1]

    def c_at(y: np.ndarray) -> np.ndarray:
        yi = np.clip(y, 0, width - 1)
        val = np.take_along_axis(c, yi, axis=1)
        beyond = y > width - 1
        val = np.where(beyond, last_c[:, None] + (y - (width - 1)) * last_f[:, None], val)
        return np.where(y < 0, 0.0, val)

    x = np.arange(width, dtype=np.int64)[None, :]
    qq = q[:, None]

    def f_y(y: np.ndarray) -> np.ndarray:
        return (c_at(y) - c_at(y - qq)) / qq

    mass = f_y(x + qq - 1) - f_y(x - 1)
    mass = np.where(x % qq == 0, mass, 0.0)
    return np.clip(mass, 0.0, None)


def order_stream_variance(mean: np.ndarray, var: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Variance of ``Q * floor((D + V) / Q)`` for a normal window demand ``D`` (moment matching).

    Parameters
    ----------
    mean, var : ndarray
        Mean and variance of the window demand ``D``.
    q : ndarray
        Batch size ``Q > 0``.

    Returns
    -------
    ndarray
        ``Var(D) + E[r (Q - r)]`` with ``r = D mod Q``.

    Examples
    --------
    >>> float(order_stream_variance(np.array([0.0]), np.array([1e6]), np.array([6.0]))[0])  # doctest: +ELLIPSIS
    1000006.0...

    Notes
    -----
    Given ``D = d`` with ``d = mQ + r``, the order quantity is ``mQ`` or ``(m + 1)Q`` with probability ``r/Q``,
    so the conditional variance is ``r (Q - r)``. Its mean uses the Fourier series
    ``r (Q - r) = Q**2/6 - (Q**2 / pi**2) sum_k cos(2 pi k r / Q) / k**2`` and, for normal ``D``,
    ``E cos(2 pi k D / Q) = exp(-2 pi**2 k**2 Var(D) / Q**2) cos(2 pi k E[D] / Q)``. When the demand spread
    is large against ``Q`` the correction tends to ``Q**2/6``; when ``Q`` is large against the mean demand it is
    about ``E[D] Q``.
    """
    mean = np.asarray(mean, dtype=float)
    var = np.maximum(np.asarray(var, dtype=float), 0.0)
    q = np.maximum(np.asarray(q, dtype=float), 1e-12)
    k = np.arange(1, FOURIER_TERMS + 1, dtype=float)
    shape = np.broadcast(mean, var, q).shape
    mean_b, var_b, q_b = (np.broadcast_to(a, shape)[..., None] for a in (mean, var, q))
    terms = np.exp(-2.0 * np.pi**2 * k**2 * var_b / q_b**2) * np.cos(2.0 * np.pi * k * mean_b / q_b) / k**2
    corr = q_b[..., 0] ** 2 / 6.0 - q_b[..., 0] ** 2 / np.pi**2 * terms.sum(axis=-1)
    return var_b[..., 0] + np.maximum(corr, 0.0)


# ----------------------------------------------------------------------------------------------------------
# warehouse lead-time demand
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class WarehouseDemand:
    """Warehouse lead-time demand per item.

    ``mean``, ``var`` (n,): moments. ``discrete`` (n,) bool: a pmf is held (count demand convolved or fitted)
    rather than a normal. ``pmf`` (n, width): the pmf for discrete rows (zeros elsewhere). ``step`` (n,) int:
    lattice step ``g`` of the demand (1 unless every flow comes in multiples of ``g``). ``rate`` (n,): demand
    rate ``lambda0`` into the warehouse. ``variance_rate`` (n,): ``v0``. ``tail`` (n,): dropped pmf mass.
    ``method`` (n,) int8: 0 normal moments, 1 convolution of order streams, 2 moment-fitted count pmf.
    """

    mean: np.ndarray
    var: np.ndarray
    discrete: np.ndarray
    pmf: np.ndarray
    step: np.ndarray
    rate: np.ndarray
    variance_rate: np.ndarray
    tail: np.ndarray
    method: np.ndarray


def warehouse_demand(
    store_mean: np.ndarray,
    store_sd: np.ndarray,
    store_q: np.ndarray,
    store_count: np.ndarray,
    lead: np.ndarray,
    lead_sd: np.ndarray,
    own_mean: np.ndarray | float = 0.0,
    own_sd: np.ndarray | float = 0.0,
    own_count: np.ndarray | bool = True,
    *,
    max_support: int = MAX_EXACT_SUPPORT,
) -> WarehouseDemand:
    """Lead-time demand at a warehouse from its stores' order streams (plus its own customers).

    Parameters
    ----------
    store_mean, store_sd : ndarray, shape (n, m)
        Stores' customer demand per time unit (mean, sd); padded stores have mean 0.
    store_q : ndarray, shape (n, m)
        Stores' order quantities (units, ``>= 1`` for count items; any ``> 0`` for normal items).
    store_count : ndarray of bool, shape (n, m)
        Count demand (Poisson / negative binomial) at the store.
    lead, lead_sd : ndarray, shape (n,)
        Warehouse replenishment lead time (mean, sd), time units.
    own_mean, own_sd, own_count : array_like, shape (n,)
        The warehouse's own customer demand per time unit.
    max_support : int
        Largest pmf width for the exact convolution; larger items are moment-matched.

    Returns
    -------
    WarehouseDemand

    Examples
    --------
    >>> wd = warehouse_demand(np.array([[0.1, 0.1]]), np.sqrt([[0.1, 0.1]]), np.array([[1, 1]]),
    ...                       np.array([[True, True]]), np.array([1.0]), np.array([0.0]))
    >>> round(float(wd.mean[0]), 6), int(wd.method[0])
    (0.2, 1)

    Notes
    -----
    Items whose every flow is count demand and whose lead time is fixed are convolved exactly: store ``i``
    contributes the pmf of ``Q_i floor((D_i(L0) + V_i) / Q_i)`` (:func:`order_stream_pmf`), convolved by FFT.
    With a random lead time the stores' flows are dependent through the common ``L0``; such count items get a
    negative binomial fitted to the exact mean and the variance
    ``sum_i [s_i**2 L0 + E r_i (Q_i - r_i)] + own + (sum d)**2 sL0**2``, which is also the variance used for
    normal items (then a normal).
    """
    store_mean = np.atleast_2d(np.asarray(store_mean, dtype=float))
    n, m = store_mean.shape
    store_sd = np.broadcast_to(np.asarray(store_sd, dtype=float), (n, m))
    store_q = np.broadcast_to(np.asarray(store_q, dtype=float), (n, m))
    store_count = np.broadcast_to(np.asarray(store_count, dtype=bool), (n, m))
    lead = np.broadcast_to(np.asarray(lead, dtype=float), (n,))
    lead_sd = np.broadcast_to(np.asarray(lead_sd, dtype=float), (n,))
    own_mean = np.broadcast_to(np.asarray(own_mean, dtype=float), (n,))
    own_sd = np.broadcast_to(np.asarray(own_sd, dtype=float), (n,))
    own_count = np.broadcast_to(np.asarray(own_count, dtype=bool), (n,))
    if np.any(store_q[store_mean > 0] <= 0):
        raise ValueError("store_q must be > 0 for every store with demand")

    active = store_mean > 0
    rate = store_mean.sum(axis=1) + own_mean
    mean = rate * lead
    win_mean = store_mean * lead[:, None]
    win_var = store_sd**2 * lead[:, None]
    stream_var = np.where(active, order_stream_variance(win_mean, win_var, np.where(active, store_q, 1.0)), 0.0)
    var = stream_var.sum(axis=1) + own_sd**2 * lead + rate**2 * lead_sd**2
    variance_rate = np.where(active, np.maximum(store_mean * store_q, store_sd**2), 0.0).sum(axis=1) + own_sd**2

    # lattice step: gcd of the batches of active stores when there is no own demand
    qi = np.where(active, np.rint(store_q), 0).astype(np.int64)
    step = np.gcd.reduce(qi, axis=1)
    step = np.where(own_mean > 0, 1, step)
    step = np.maximum(step, 1)

    all_count = np.all(store_count | ~active, axis=1) & (own_count | (own_mean <= 0))
    integral_q = np.all((np.abs(store_q - np.rint(store_q)) < 1e-9) | ~active, axis=1)
    all_count &= integral_q
    width_need = _support_width(mean, var, pad=np.where(active, store_q, 0).max(axis=1))
    discrete = all_count & (width_need <= max_support)
    exact = discrete & (lead_sd <= 0)
    method = np.where(exact, 1, np.where(discrete, 2, 0)).astype(np.int8)

    width = int(width_need[discrete].max()) if np.any(discrete) else 1
    pmf = np.zeros((n, width))
    tail = np.zeros(n)
    if np.any(exact):
        idx = np.flatnonzero(exact)
        p, t = _convolve_streams(win_mean[idx], win_var[idx], qi[idx], active[idx],
                                 own_mean[idx] * lead[idx], own_sd[idx] ** 2 * lead[idx], width)
        pmf[idx] = p
        tail[idx] = t
    fitted = discrete & ~exact
    if np.any(fitted):
        idx = np.flatnonzero(fitted)
        p, t = count_pmf(mean[idx], var[idx], width)
        pmf[idx] = p
        tail[idx] = t
        step[idx] = 1
    if np.any(tail > TAIL_TOL):
        bad = int(np.argmax(tail))
        raise ArithmeticError(f"warehouse demand support too short: dropped tail mass {tail[bad]:.3g} "
                              f"> TAIL_TOL={TAIL_TOL} (item row {bad})")
    return WarehouseDemand(mean=mean, var=var, discrete=discrete, pmf=pmf, step=np.where(discrete, step, 1),
                           rate=rate, variance_rate=variance_rate, tail=tail, method=method)


def _convolve_streams(win_mean, win_var, q, active, own_mean, own_var, width):
    """Convolve the order-stream pmfs of the stores (and own demand) by FFT; returns pmf and dropped tail."""
    n, m = win_mean.shape
    nfft = sfft.next_fast_len(2 * width, real=True)
    acc = None
    tail = np.zeros(n)
    # stores are processed one column at a time over all items of the block
    for j in range(m):
        act = active[:, j]
        if not np.any(act):
            continue
        dp, dtail = count_pmf(np.where(act, win_mean[:, j], 0.0), np.where(act, win_var[:, j], 0.0), width)
        op = order_stream_pmf(dp, np.where(act, q[:, j], 1))
        tail += np.where(act, np.clip(1.0 - op.sum(axis=1), 0.0, None), 0.0)
        f = sfft.rfft(op, n=nfft, axis=1, workers=-1)
        acc = f if acc is None else acc * f
    if np.any(own_mean > 0):
        dp, dtail = count_pmf(own_mean, own_var, width)
        tail += dtail
        f = sfft.rfft(dp, n=nfft, axis=1, workers=-1)
        acc = f if acc is None else acc * f
    if acc is None:
        pmf = np.zeros((n, width))
        pmf[:, 0] = 1.0
        return pmf, tail
    full = sfft.irfft(acc, n=nfft, axis=1, workers=-1)
    pmf = np.clip(full[:, :width], 0.0, None)
    pmf[pmf < 1e-300] = 0.0
    tail = np.maximum(tail, np.clip(1.0 - pmf.sum(axis=1), 0.0, None))
    return pmf, tail


# ----------------------------------------------------------------------------------------------------------
# warehouse stock and backorders
# ----------------------------------------------------------------------------------------------------------
def normal_loss_moments(z: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Standard normal partial moments ``H_k(z) = E[((Z - z)^+)^k]`` for k = 1, 2, 3.

    Examples
    --------
    >>> [round(float(v), 6) for v in normal_loss_moments(np.array(0.0))]
    [0.398942, 0.5, 0.797885]

    Notes
    -----
    ``H1 = phi - z Phi_c``, ``H2 = (z**2 + 1) Phi_c - z phi``, ``H3 = (z**2 + 2) phi - z (z**2 + 3) Phi_c``,
    with ``dH_k/dz = -k H_{k-1}``; ``Phi_c`` is computed as ``ndtr(-z)`` (no cancellation).
    """
    z = np.asarray(z, dtype=float)
    phi = np.exp(-0.5 * z * z) / np.sqrt(2.0 * np.pi)
    sf = special.ndtr(-z)
    h1 = phi - z * sf
    h2 = (z * z + 1.0) * sf - z * phi
    h3 = (z * z + 2.0) * phi - z * (z * z + 3.0) * sf
    return h1, h2, h3


@dataclass(frozen=True)
class WarehouseState:
    """Warehouse steady state for given ``(R0, Q0)``: expected on hand, backorders and their second moment."""

    expected_on_hand: np.ndarray
    expected_backorders: np.ndarray
    backorders_second_moment: np.ndarray
    stockout_probability: np.ndarray


class _DiscreteLoss:
    """Prefix tables of n1(y) = E(X - y)^+ and n2(y) = E((X - y)^+)^2 for lattice sums."""

    def __init__(self, pmf: np.ndarray, step: np.ndarray):
        self.pmf = pmf
        n, width = pmf.shape
        self.width = width
        sf = np.cumsum(pmf[:, ::-1], axis=1)[:, ::-1]          # P(X >= y)
        gt = np.concatenate([sf[:, 1:], np.zeros((n, 1))], axis=1)  # P(X > y)
        n1 = np.cumsum(gt[:, ::-1], axis=1)[:, ::-1]            # sum_{j >= y} P(X > j)
        n2 = np.cumsum((2.0 * n1 - gt)[:, ::-1], axis=1)[:, ::-1]
        self.gt = gt
        self.n1 = n1
        self.n2 = n2
        x = np.arange(width, dtype=float)
        self.mean = pmf @ x
        self.second = pmf @ (x * x)
        self.step = np.asarray(step, dtype=np.int64)
        self.p1 = np.empty_like(n1)
        self.p2 = np.empty_like(n2)
        self.pg = np.empty_like(gt)
        for g in np.unique(self.step):
            rows = np.flatnonzero(self.step == g)
            for src, dst in ((n1, self.p1), (n2, self.p2), (gt, self.pg)):
                dst[rows] = _strided_cumsum(src[rows], int(g))

    def lattice_sums(self, r0: np.ndarray, q0: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sums over y = r0 + g k, k = 1..m (m = q0 / g) of n1(y), n2(y) and P(X > y)."""
        g = self.step
        m = np.maximum(np.rint(q0 / g).astype(np.int64), 1)
        r0 = np.rint(r0).astype(np.int64)
        a = self.mean - r0                     # for y < 0: n1 = mean - y, n2 = E X^2 - 2 y mean + y^2
        kneg = np.clip(np.ceil(-r0 / g).astype(np.int64) - 1, 0, m)   # number of k >= 1 with r0 + g k < 0
        k = kneg.astype(float)
        s1 = k * a - g * k * (k + 1) / 2.0
        # sum (X - y)^2 expectations: E X^2 - 2 y mu + y^2 with y = r0 + g j
        sy = k * r0 + g * k * (k + 1) / 2.0
        sy2 = k * r0**2 + 2.0 * r0 * g * k * (k + 1) / 2.0 + g * g * k * (k + 1) * (2 * k + 1) / 6.0
        s2 = k * self.second - 2.0 * self.mean * sy + sy2
        sgt = k.copy()                         # P(X > y) = 1 for y < 0
        # in-table part: k from kneg+1 .. min(m, (width-1-r0)//g)
        ktop = np.minimum(m, np.floor_divide(self.width - 1 - r0, g))
        has = ktop >= kneg + 1
        ytop = np.clip(r0 + g * ktop, 0, self.width - 1)[:, None]
        t1 = np.take_along_axis(self.p1, ytop, axis=1)[:, 0]
        t2 = np.take_along_axis(self.p2, ytop, axis=1)[:, 0]
        tg = np.take_along_axis(self.pg, ytop, axis=1)[:, 0]
        ylow = r0 + g * kneg                    # prefix below the first in-table term (same residue class)
        low_ok = (ylow >= 0) & has
        yl = np.clip(ylow, 0, self.width - 1)[:, None]
        t1 = t1 - np.where(low_ok, np.take_along_axis(self.p1, yl, axis=1)[:, 0], 0.0)
        t2 = t2 - np.where(low_ok, np.take_along_axis(self.p2, yl, axis=1)[:, 0], 0.0)
        tg = tg - np.where(low_ok, np.take_along_axis(self.pg, yl, axis=1)[:, 0], 0.0)
        s1 = s1 + np.where(has, t1, 0.0)
        s2 = s2 + np.where(has, t2, 0.0)
        sgt = sgt + np.where(has, tg, 0.0)
        return s1 / m, s2 / m, sgt / m


def _strided_cumsum(a: np.ndarray, g: int) -> np.ndarray:
    if g == 1:
        return np.cumsum(a, axis=1)
    n, w = a.shape
    wp = -(-w // g) * g
    pad = np.zeros((n, wp))
    pad[:, :w] = a
    return np.cumsum(pad.reshape(n, wp // g, g), axis=1).reshape(n, wp)[:, :w]


def warehouse_moments(demand: WarehouseDemand, reorder_point: np.ndarray, order_quantity: np.ndarray,
                      *, _loss: _DiscreteLoss | None = None) -> WarehouseState:
    """Warehouse expected on hand, backorders and second moment of backorders for ``(R0, Q0)``.

    Parameters
    ----------
    demand : WarehouseDemand
        From :func:`warehouse_demand`.
    reorder_point, order_quantity : ndarray, shape (n,)
        ``R0`` and ``Q0`` (units; integers for discrete rows, ``Q0`` a multiple of the lattice step there).

    Returns
    -------
    WarehouseState

    Examples
    --------
    >>> wd = warehouse_demand(np.array([[0.5]]), np.sqrt([[0.5]]), np.array([[1]]), np.array([[True]]),
    ...                       np.array([2.0]), np.array([0.0]))
    >>> st = warehouse_moments(wd, np.array([0.0]), np.array([1.0]))     # base stock 1, Poisson(1)
    >>> round(float(st.expected_backorders[0]), 6)                         # E(X - 1)^+ = e^-1
    0.367879

    Notes
    -----
    Inventory position uniform on ``R0 + g, .., R0 + Q0`` (discrete) or on ``(R0, R0 + Q0]`` (normal):
    ``E[B0] = mean_y E(X - y)^+``, ``E[B0^2] = mean_y E((X - y)^+)^2``, ``E[I0] = E[IP] - E[X] + E[B0]``.
    Normal: ``E[B0] = sigma**2 (H2(z_R) - H2(z_RQ)) / (2 Q0)``, ``E[B0^2] = sigma**3 (H3(z_R) - H3(z_RQ)) /
    (3 Q0)``.
    """
    r0 = np.asarray(reorder_point, dtype=float)
    q0 = np.asarray(order_quantity, dtype=float)
    n = demand.mean.size
    r0 = np.broadcast_to(r0, (n,))
    q0 = np.broadcast_to(q0, (n,))
    eb = np.zeros(n)
    eb2 = np.zeros(n)
    stockout = np.zeros(n)
    eip = np.where(demand.discrete, r0 + (q0 + demand.step) / 2.0, r0 + q0 / 2.0)
    d = demand.discrete
    if np.any(d):
        loss = _loss if _loss is not None else _DiscreteLoss(demand.pmf[d], demand.step[d])
        s1, s2, sg = loss.lattice_sums(r0[d], q0[d])
        eb[d] = s1
        eb2[d] = s2
        stockout[d] = sg
    c = ~d
    if np.any(c):
        mu = demand.mean[c]
        sd = np.maximum(np.sqrt(np.maximum(demand.var[c], 0.0)), SD_FLOOR * np.maximum(1.0, mu))
        za = (r0[c] - mu) / sd
        qq = q0[c]
        zb = (r0[c] + qq - mu) / sd
        a1, a2, a3 = normal_loss_moments(za)
        b1, b2, b3 = normal_loss_moments(zb)
        small = qq < 1e-6 * sd
        qs = np.where(small, 1.0, qq)
        eb[c] = np.where(small, sd * a1, sd**2 * (a2 - b2) / (2.0 * qs))
        eb2[c] = np.where(small, sd**2 * a2, sd**3 * (a3 - b3) / (3.0 * qs))
        # P(X > y) averaged: sd (H1(z_R) - H1(z_RQ)) / Q0
        stockout[c] = np.where(small, special.ndtr(-za), sd * (a1 - b1) / qs)
    eb = np.maximum(eb, 0.0)
    eb2 = np.maximum(eb2, eb * eb)
    on_hand = np.maximum(eip - demand.mean + eb, 0.0)
    return WarehouseState(expected_on_hand=on_hand, expected_backorders=eb, backorders_second_moment=eb2,
                          stockout_probability=np.clip(stockout, 0.0, 1.0))


def delay_moments(state: WarehouseState, demand: WarehouseDemand) -> tuple[np.ndarray, np.ndarray]:
    """Mean and variance of the delay a store order waits at the warehouse.

    Parameters
    ----------
    state : WarehouseState
    demand : WarehouseDemand

    Returns
    -------
    mean_delay, var_delay : ndarray, shape (n,)
        In the time unit of the demand rates.

    Examples
    --------
    >>> wd = warehouse_demand(np.array([[0.5]]), np.sqrt([[0.5]]), np.array([[1]]), np.array([[True]]),
    ...                       np.array([2.0]), np.array([0.0]))
    >>> ew, vw = delay_moments(warehouse_moments(wd, np.array([0.0]), np.array([1.0])), wd)
    >>> round(float(ew[0]), 6)
    0.735759

    Notes
    -----
    ``E[W] = E[B0] / lambda0`` (Little's law; Sherbrooke 1968). The backorders are the units that arrived during
    the delay of the oldest waiting order; for a stream with variance rate ``v0`` this gives
    ``Var(B0) = v0 E[W] + lambda0**2 Var(W)``, hence ``Var(W) = (Var(B0) - v0 E[W]) / lambda0**2`` (clipped
    at 0). For one-for-one Poisson demand this is exact (distributional Little's law) and reproduces the
    Svoronos & Zipkin (1988) delay variance.

    References
    ----------
    Sherbrooke, C. C. (1968). METRIC: a multi-echelon technique for recoverable item control. Operations
    Research 16(1), 122-141. Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level
    inventory systems. Operations Research 36(1), 57-72.
    """
    lam = demand.rate
    safe = np.where(lam > 0, lam, 1.0)
    ew = np.where(lam > 0, state.expected_backorders / safe, 0.0)
    var_b = np.maximum(state.backorders_second_moment - state.expected_backorders**2, 0.0)
    vw = np.where(lam > 0, np.maximum(var_b - demand.variance_rate * ew, 0.0) / safe**2, 0.0)
    return ew, vw


def store_ltd_moments(daily_mean: np.ndarray, daily_sd: np.ndarray, lead: np.ndarray, lead_sd: np.ndarray,
                      mean_delay: np.ndarray, var_delay: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lead-time demand mean and sd a store faces behind a warehouse with random delay ``W``.

    Parameters
    ----------
    daily_mean, daily_sd : ndarray
        Store demand per time unit.
    lead, lead_sd : ndarray
        Transit time (mean, sd).
    mean_delay, var_delay : ndarray
        Warehouse delay moments (broadcast against the store arrays).

    Returns
    -------
    mean, sd : ndarray

    Examples
    --------
    >>> m, s = store_ltd_moments(np.array(2.0), np.sqrt(2.0), np.array(1.0), np.array(0.0),
    ...                          np.array(0.5), np.array(0.25))
    >>> float(m), float(s**2)
    (3.0, 4.0)

    Notes
    -----
    ``mean = d (L + E[W])``, ``var = s**2 (L + E[W]) + d**2 (sL**2 + Var(W))`` (Svoronos & Zipkin 1988).
    """
    t = lead + mean_delay
    mean = daily_mean * t
    var = daily_sd**2 * t + daily_mean**2 * (lead_sd**2 + var_delay)
    return mean, np.sqrt(np.maximum(var, 0.0))


# ----------------------------------------------------------------------------------------------------------
# exact reference: one-for-one stores, Poisson demand
# ----------------------------------------------------------------------------------------------------------
def exact_one_for_one(
    store_rate: np.ndarray,
    store_lead: np.ndarray,
    store_base_stock: np.ndarray,
    warehouse_lead: np.ndarray,
    warehouse_reorder_point: np.ndarray,
    warehouse_order_quantity: np.ndarray,
    *,
    width: int | None = None,
) -> dict[str, np.ndarray]:
    """Exact steady state of one-for-one Poisson stores behind an (R0, Q0) warehouse (binomial disaggregation).

    Parameters
    ----------
    store_rate : ndarray, shape (n, m)
        Poisson demand rates (0 pads absent stores).
    store_lead : ndarray, shape (n, m)
        Transit times.
    store_base_stock : ndarray of int, shape (n, m)
        Store inventory position ``S_i = R_i + 1``.
    warehouse_lead, warehouse_reorder_point, warehouse_order_quantity : ndarray, shape (n,)
        ``L0``, ``R0``, ``Q0`` (units; the warehouse sees unit demands).
    width : int, optional
        Support size for the warehouse lead-time demand (default from the mean).

    Returns
    -------
    dict
        ``store_on_hand``, ``store_backorders``, ``store_fill`` (n, m) and ``warehouse_on_hand``,
        ``warehouse_backorders`` (n,).

    Examples
    --------
    >>> out = exact_one_for_one(np.array([[0.1, 0.1]]), np.array([[1.0, 1.0]]), np.array([[1, 1]]),
    ...                         np.array([1.0]), np.array([0]), np.array([1]))
    >>> round(float(out["warehouse_backorders"][0]), 6)
    0.018731

    Notes
    -----
    With ``S0`` uniform on ``R0 + 1 .. R0 + Q0``, ``B0 = (D0(L0) - S0)^+``; under FCFS each backordered unit
    belongs to store ``i`` with probability ``lambda_i / lambda0`` independently, so store ``i``'s outstanding
    orders are ``Binomial(B0, lambda_i / lambda0) + Poisson(lambda_i L_i)``; store net inventory
    ``= S_i - outstanding``. Fill rate (Poisson, one-for-one) ``= P(outstanding < S_i)``.

    References
    ----------
    Graves, S. C. (1985). A multi-echelon inventory model for a repairable item with one-for-one replenishment.
    Management Science 31(10), 1247-1256. Axsäter, S. (1990). Simple solution procedures for a class of
    two-echelon inventory problems. Operations Research 38(1), 64-69.
    """
    lam = np.atleast_2d(np.asarray(store_rate, dtype=float))
    n, m = lam.shape
    lead = np.broadcast_to(np.asarray(store_lead, dtype=float), (n, m))
    s = np.broadcast_to(np.asarray(store_base_stock), (n, m)).astype(np.int64)
    l0 = np.broadcast_to(np.asarray(warehouse_lead, dtype=float), (n,))
    r0 = np.broadcast_to(np.asarray(warehouse_reorder_point), (n,)).astype(np.int64)
    q0 = np.broadcast_to(np.asarray(warehouse_order_quantity), (n,)).astype(np.int64)
    lam0 = lam.sum(axis=1)
    mu0 = lam0 * l0
    if width is None:
        width = int(np.max(_support_width(mu0, mu0, pad=np.abs(r0) + q0)))
        width = max(width, int(np.max(_support_width(lam * lead, lam * lead))) + int(np.max(np.abs(s))) + 1)
    x, tail = count_pmf(mu0, mu0, width)
    if np.any(tail > TAIL_TOL):
        raise ArithmeticError(f"width {width} too small: tail {tail.max():.3g}")
    grid = np.arange(width)
    # B0 pmf averaged over S0 = R0 + k, k = 1..Q0
    b0 = np.zeros((n, width))
    for row in range(n):  # reference only (small n); the shift differs per row
        for k in range(1, q0[row] + 1):
            s0 = r0[row] + k
            shifted = np.zeros(width)
            if s0 <= 0:                       # B0 = X - s0: shift right by -s0
                shifted[-s0:] = x[row, : width + s0]
            else:                             # B0 = (X - s0)^+
                shifted[0] = x[row, : s0 + 1].sum()
                shifted[1: width - s0] = x[row, s0 + 1:]
            b0[row] += shifted / q0[row]
    eb0 = b0 @ grid
    p = np.where(lam0[:, None] > 0, lam / np.where(lam0[:, None] > 0, lam0[:, None], 1.0), 0.0)
    # thinning: share[k] = sum_b b0[b] C(b,k) p^k (1-p)^(b-k)
    bb = grid[None, None, :, None]
    kk = grid[None, None, None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        logc = special.gammaln(bb + 1) - special.gammaln(kk + 1) - special.gammaln(np.maximum(bb - kk, 0) + 1)
        pp = p[:, :, None, None]
        lp = logc + kk * np.log(pp) + (bb - kk) * np.log1p(-pp)
        binom = np.where(kk <= bb, np.exp(np.nan_to_num(lp, nan=-np.inf)), 0.0)
    binom = np.where((pp == 0) & (kk == 0), 1.0, binom)
    share = np.einsum("nb,nmbk->nmk", b0, binom)
    transit, _ = count_pmf((lam * lead).ravel(), (lam * lead).ravel(), width)
    fs = sfft.rfft(share, n=2 * width, axis=2)
    ft = sfft.rfft(transit.reshape(n, m, width), n=2 * width, axis=2)
    outstanding = np.clip(sfft.irfft(fs * ft, n=2 * width, axis=2)[:, :, :width], 0.0, None)
    net = s[:, :, None] - grid[None, None, :]
    on_hand = (outstanding * np.maximum(net, 0)).sum(axis=2)
    back = (outstanding * np.maximum(-net, 0)).sum(axis=2)
    fill = (outstanding * (grid[None, None, :] < s[:, :, None])).sum(axis=2)
    wip = r0 + (q0 + 1) / 2.0
    return {
        "store_on_hand": on_hand,
        "store_backorders": back,
        "store_fill": fill,
        "warehouse_on_hand": wip - mu0 + eb0,
        "warehouse_backorders": eb0,
    }
