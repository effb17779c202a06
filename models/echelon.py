"""Two-echelon kernels: warehouse demand from store order streams, its backorders, the delay, the stores.

Everything here is numpy over items: a warehouse quantity has shape ``(n,)``, a store quantity ``(n, m)`` with
``m`` the (padded) number of stores per item; absent stores are padded with zero demand. Count pmfs are 2-D
arrays ``(items, width)`` on the unit grid ``0 .. width - 1``, grouped by width.

Time is in one consistent unit chosen by the caller (the application uses days): demand rates per time unit,
lead times in time units, costs per year. Store costs and service come from the single-site functions
(:mod:`models.single_site`); this module supplies the lead-time demand the stores face.

The METRIC-type step (Sherbrooke 1968, extended to batches as in Deuermeyer & Schwarz 1981, with the delay
variance after Svoronos & Zipkin 1988):

* warehouse lead-time demand ``X0`` = own customer demand + ``sum_i Q_i * floor((D_i(L0) + V_i) / Q_i)`` with
  ``V_i`` uniform on ``{0 .. Q_i - 1}``, independent across stores: convolved exactly for narrow count items,
  else moments (with the batching correction) fitted by a negative binomial or a normal;
* warehouse inventory position uniform on ``R0 + g, .., R0 + Q0`` (``g`` the gcd of the store batches when
  there is no own demand and ``Q0`` is a multiple of it, else 1; continuous for normal demand);
* ``E[W] = E[B0] / lambda0`` (Little's law); ``Var(W)`` from a base-stock decomposition over the positions
  (:func:`delay_moments`); the probability of waiting at all from the positions;
* store ``i`` faces lead-time demand with mean ``d_i (L_i + E[W])`` and variance
  ``s_i**2 (L_i + E[W]) + d_i**2 (sL_i**2 + Var(W))`` (two-moment fit, used inside searches) and, for the
  reported figures and the final reorder points, the mixture over a three-point delay (:func:`wait_points`).

For one-for-one stores with Poisson demand the two-moment store figures use the exact moments of Graves'
(1985) binomial disaggregation; :func:`exact_one_for_one` computes the exact distributions as a reference.
Optimisation: :func:`optimise_two_level` (two levels), :func:`optimise_tree` (deeper trees, level by level).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import special

from models.demand import LEAD_POINTS, lead_points

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
    "lone_unit_offset",
    "store_ltd_moments",
    "exact_one_for_one",
    "normal_loss_moments",
]

#: Largest dropped tail mass accepted when a pmf is truncated to a finite support.
TAIL_TOL = 1e-9
#: Support of a count pmf: mean + SUPPORT_SDS standard deviations (+ the largest batch), rounded up.
SUPPORT_SDS = 14.0
#: Largest support of the exact convolution of the stores' order streams; wider count items get a negative
#: binomial fitted to the same moments (the shape of many batches summed is close to it).
MAX_EXACT_SUPPORT = 512
#: Largest support of a count pmf at all; wider items are moment-matched normals.
MAX_FIT_SUPPORT = 4096
#: Smallest pmf width; widths are powers of two from here (items are grouped by width).
MIN_WIDTH = 64
#: Cells (items x width) per block of the convolution, to bound memory.
CHUNK_CELLS = 2_000_000
#: Relative over-dispersion below which a count variable is taken as Poisson.
DISPERSION_TOL = 1e-9
#: Terms of the Fourier series for the batching correction of normal demand.
FOURIER_TERMS = 64
#: Batching correction: Fourier series when sd >= BATCH_SERIES_RATIO * Q, else interval sums over
#: +-BATCH_INTERVAL_SDS standard deviations.
BATCH_SERIES_RATIO = 0.5
BATCH_INTERVAL_SDS = 10.0
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

    References
    ----------
    Johnson, N. L., Kemp, A. W. & Kotz, S. (2005). Univariate Discrete Distributions, 3rd ed. Wiley.
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
            lnb = (
                special.gammaln(k + r)
                - special.gammaln(r)
                - special.gammaln(k + 1.0)
                + r * np.log(p)
                + k * np.log1p(-p)
            )
            logp[nb] = lnb
    pmf = np.exp(logp)
    tail = np.clip(1.0 - pmf.sum(axis=1), 0.0, None)
    return pmf, tail


def _support_width(mean: np.ndarray, var: np.ndarray, pad: np.ndarray | int = 0) -> np.ndarray:
    """Support width for a count pmf: normal-type bulk plus the geometric tail of a negative binomial."""
    sd = np.sqrt(np.maximum(var, 0.0))
    ratio = np.where(mean > 0, np.maximum(var, 0.0) / np.where(mean > 0, mean, 1.0), 1.0)
    geometric = np.maximum(ratio, 1.0) * np.log(1.0 / TAIL_TOL)
    return np.ceil(mean + SUPPORT_SDS * sd + geometric + pad).astype(np.int64)


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

    References
    ----------
    Axsäter, S. (1993). Exact and approximate evaluation of batch-ordering policies for two-level inventory
    systems. Operations Research 41(4), 777-785.
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
    >>> round(float(order_stream_variance(np.array([0.0]), np.array([1e6]), np.array([6.0]))[0]), 6)
    1000006.0

    Notes
    -----
    Given ``D = d`` with ``d = mQ + r``, the order quantity is ``mQ`` or ``(m + 1)Q`` with probability
    ``r/Q``,
    so the conditional variance is ``r (Q - r)``. Its mean uses the Fourier series
    ``r (Q - r) = Q**2/6 - (Q**2 / pi**2) sum_k cos(2 pi k r / Q) / k**2`` and, for normal ``D``,
    ``E cos(2 pi k D / Q) = exp(-2 pi**2 k**2 Var(D) / Q**2) cos(2 pi k E[D] / Q)`` (used when the sd is at
    least ``BATCH_SERIES_RATIO * Q``; otherwise the sum over the intervals ``[jQ, (j + 1)Q)`` of truncated
    normal moments). When the demand spread is large against ``Q`` the correction tends to ``Q**2/6``; when
    ``Q`` is large against the mean demand it is about ``E[D] Q``.

    References
    ----------
    Axsäter, S. (1993). Exact and approximate evaluation of batch-ordering policies for two-level inventory
    systems. Operations Research 41(4), 777-785.
    """
    mean = np.asarray(mean, dtype=float)
    var = np.maximum(np.asarray(var, dtype=float), 0.0)
    q = np.maximum(np.asarray(q, dtype=float), 1e-12)
    shape = np.broadcast(mean, var, q).shape
    mean_b, var_b, q_b = (np.broadcast_to(a, shape).astype(float) for a in (mean, var, q))
    sd_b = np.maximum(np.sqrt(var_b), 1e-9 * q_b)
    wide = sd_b >= BATCH_SERIES_RATIO * q_b
    corr = np.empty(shape)
    # spread wide against Q: Fourier series (terms fall like exp(-2 pi^2 k^2 sd^2 / Q^2))
    k = np.arange(1, FOURIER_TERMS + 1, dtype=float)
    mw, vw_, qw = mean_b[wide][:, None], var_b[wide][:, None], q_b[wide][:, None]
    terms = np.exp(-2.0 * np.pi**2 * k**2 * vw_ / qw**2) * np.cos(2.0 * np.pi * k * mw / qw) / k**2
    corr[wide] = qw[:, 0] ** 2 / 6.0 - qw[:, 0] ** 2 / np.pi**2 * terms.sum(axis=1)
    # narrow: sum over the batch intervals [jQ, (j+1)Q) within +-BATCH_INTERVAL_SDS sd (truncated normal
    # moments)
    nr = ~wide
    if np.any(nr):
        mu, sd, qq = mean_b[nr][:, None], sd_b[nr][:, None], q_b[nr][:, None]
        j0 = np.floor((mu - BATCH_INTERVAL_SDS * sd) / qq)
        j = j0 + np.arange(int(np.ceil(2 * BATCH_INTERVAL_SDS * BATCH_SERIES_RATIO)) + 3)[None, :]
        lo = j * qq
        al = (lo - mu) / sd
        be = (lo + qq - mu) / sd
        pa, pb = special.ndtr(al), special.ndtr(be)
        fa, fb = np.exp(-0.5 * al * al), np.exp(-0.5 * be * be)
        fa, fb = fa / np.sqrt(2 * np.pi), fb / np.sqrt(2 * np.pi)
        p0 = pb - pa
        m1 = fa - fb
        m2 = p0 + np.where(np.isfinite(al), al * fa, 0.0) - np.where(np.isfinite(be), be * fb, 0.0)
        c = mu - lo
        eu = c * p0 + sd * m1
        eu2 = c * c * p0 + 2.0 * c * sd * m1 + sd * sd * m2
        corr[nr] = (qq * eu - eu2).sum(axis=1)
    return var_b + np.maximum(corr, 0.0)


# ----------------------------------------------------------------------------------------------------------
# warehouse lead-time demand
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class WarehouseDemand:
    """Warehouse lead-time demand per item.

    ``mean``, ``var`` (n,): moments. ``discrete`` (n,) bool: a pmf is held (count demand convolved or fitted)
    rather than a normal. ``blocks``: tuple of ``(rows, pmf)`` holding the pmfs of the discrete rows, grouped
    by support width (powers of two) to bound memory. ``step`` (n,) int:
    lattice step ``g`` of the demand (1 unless every flow comes in multiples of ``g``). ``rate`` (n,): demand
    rate ``lambda0`` into the warehouse. ``variance_rate`` (n,): ``v0``. ``tail`` (n,): dropped pmf mass.
    ``method`` (n,) int8: 0 normal moments, 1 convolution of order streams, 2 moment-fitted count pmf.
    ``order_size`` (n,): mean size of the demand a unit arrives in (units weighted); ``own_rate`` (n,): the
    warehouse's own customer demand rate (None: none); ``lone_offset`` (n,): :func:`lone_unit_offset`.
    ``lead_weight``, ``lead_mean``, ``lead_var`` (n, P) or None: for a random lead time, the lead-time demand
    as a mixture over gamma lead-time points (``models.demand.lead_points``): weights, means and variances
    (a fixed lead time: one point of weight 1); normal rows are evaluated over the mixture.
    """

    mean: np.ndarray
    var: np.ndarray
    discrete: np.ndarray
    blocks: tuple
    step: np.ndarray
    rate: np.ndarray
    variance_rate: np.ndarray
    tail: np.ndarray
    method: np.ndarray
    lead_sd: np.ndarray
    stream_short: np.ndarray | None = None
    stream_long: np.ndarray | None = None
    stream_const: np.ndarray | None = None
    own_var_rate: np.ndarray | None = None
    order_size: np.ndarray | None = None
    own_rate: np.ndarray | None = None
    lone_offset: np.ndarray | None = None
    lead_weight: np.ndarray | None = None
    lead_mean: np.ndarray | None = None
    lead_var: np.ndarray | None = None

    def pmf_of(self, row: int) -> np.ndarray:
        """The pmf held for one discrete row (empty array for a normal row)."""
        for rows, pmf in self.blocks:
            hit = np.flatnonzero(rows == row)
            if hit.size:
                return pmf[hit[0]]
        return np.zeros(0)


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

    References
    ----------
    Axsäter, S. (1993). Exact and approximate evaluation of batch-ordering policies for two-level inventory
    systems. Operations Research 41(4), 777-785.
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
    stream_var = np.where(
        active, order_stream_variance(win_mean, win_var, np.where(active, store_q, 1.0)), 0.0
    )
    var = stream_var.sum(axis=1) + own_sd**2 * lead + rate**2 * lead_sd**2
    # variance of the units arriving in a window w: per store min(short * w, long * w + const)
    stream_short = np.where(active, np.maximum(store_mean * store_q, store_sd**2), 0.0)
    stream_long = np.where(active, store_sd**2, 0.0)
    stream_const = np.where(active, np.where(store_count, (store_q**2 - 1.0) / 6.0, store_q**2 / 6.0), 0.0)
    variance_rate = stream_short.sum(axis=1) + own_sd**2

    # lattice step: gcd of the batches of active stores when there is no own demand
    qi = np.where(active, np.rint(store_q), 0).astype(np.int64)
    step = np.gcd.reduce(qi, axis=1)
    step = np.where(own_mean > 0, 1, step)
    step = np.maximum(step, 1)

    all_count = np.all(store_count | ~active, axis=1) & (own_count | (own_mean <= 0))
    integral_q = np.all((np.abs(store_q - np.rint(store_q)) < 1e-9) | ~active, axis=1)
    all_count &= integral_q
    width_need = _support_width(mean, var, pad=np.where(active, store_q, 0).max(axis=1))
    discrete = all_count & (width_need <= MAX_FIT_SUPPORT)
    exact = discrete & (width_need <= max_support)
    method = np.where(exact, 1, np.where(discrete, 2, 0)).astype(np.int8)

    # a random lead time: demand over each gamma lead-time point (mixture weights per row)
    lead_weight = lead_mean = lead_var = lead_at = None
    rand = np.flatnonzero(lead_sd > 0)
    if rand.size:
        npts = LEAD_POINTS
        lead_weight = np.zeros((n, npts))
        lead_weight[:, 0] = 1.0
        lead_at = np.repeat(lead[:, None], npts, axis=1)
        for r in rand:
            x, wts = lead_points(float(lead[r]), float(lead_sd[r]), npts)
            lead_at[r, : x.size], lead_weight[r, : x.size] = x, wts
        lead_mean = rate[:, None] * lead_at
        lead_var = np.zeros((n, npts))
        for k in range(npts):
            lk = lead_at[:, k][:, None]
            sv = np.where(
                active,
                order_stream_variance(store_mean * lk, store_sd**2 * lk, np.where(active, store_q, 1.0)),
                0.0,
            )
            lead_var[:, k] = sv.sum(axis=1) + own_sd**2 * lead_at[:, k]
    tail = np.zeros(n)
    bucket = np.maximum(2 ** np.ceil(np.log2(np.maximum(width_need, 1))), MIN_WIDTH).astype(np.int64)
    blocks = []
    for w in np.unique(bucket[discrete]):
        idx_all = np.flatnonzero(discrete & (bucket == w))
        pmf = np.zeros((idx_all.size, int(w)))
        per = max(1, int(CHUNK_CELLS // w))
        for start in range(0, idx_all.size, per):
            part = np.arange(start, min(start + per, idx_all.size))
            idx = idx_all[part]
            # a random lead time: the pmf mixed over its gamma points (each point a fixed lead time)
            for sub in (idx[lead_sd[idx] <= 0], idx[lead_sd[idx] > 0]):
                if sub.size == 0:
                    continue
                rows = np.searchsorted(idx_all, sub)
                points = [(lead[sub], np.ones(sub.size))]
                if lead_sd[sub[0]] > 0:
                    points = [(lead_at[sub, k], lead_weight[sub, k]) for k in range(lead_at.shape[1])]
                acc = np.zeros((sub.size, int(w)))
                tacc = np.zeros(sub.size)
                for lw, weight in points:
                    on = weight > 0
                    if not np.any(on):
                        continue
                    p_, t_ = _lead_pmf(sub[on], lw[on], exact, store_mean, store_sd, qi, active, own_mean,
                                       own_sd, int(w))
                    acc[on] += weight[on, None] * p_
                    tacc[on] += weight[on] * t_
                pmf[rows] = acc
                tail[sub] = tacc
        keep = tail[idx_all] <= TAIL_TOL
        blocks.append((idx_all[keep], pmf[keep]))
    # a support that would drop more than TAIL_TOL falls back to the moment-matched normal
    short = discrete & (tail > TAIL_TOL)
    discrete = discrete & ~short
    method = np.where(short, 0, method).astype(np.int8)
    step = np.where(method == 2, 1, step)
    return WarehouseDemand(
        mean=mean,
        var=var,
        discrete=discrete,
        blocks=tuple(blocks),
        step=np.where(discrete, step, 1),
        rate=rate,
        variance_rate=variance_rate,
        tail=tail,
        method=method,
        stream_short=stream_short,
        stream_long=stream_long,
        stream_const=stream_const,
        own_var_rate=own_sd**2,
        order_size=np.where(
            rate > 0,
            (np.where(active, store_mean * store_q, 0.0).sum(axis=1) + own_mean)
            / np.where(rate > 0, rate, 1.0),
            1.0,
        ),
        lead_sd=lead_sd.copy(),
        own_rate=own_mean.copy(),
        lone_offset=lone_unit_offset(store_mean, store_q, store_count, active, rate, lead),
        lead_weight=lead_weight,
        lead_mean=lead_mean,
        lead_var=lead_var,
    )


def _lead_pmf(k, lead, exact, store_mean, store_sd, qi, active, own_mean, own_sd, width):
    """Warehouse demand pmf of rows ``k`` over fixed lead times ``lead``: exact convolution where
    ``exact``, else a count pmf by moments (order-stream variances at that lead time)."""
    pmf = np.zeros((k.size, width))
    tail = np.zeros(k.size)
    wm = store_mean[k] * lead[:, None]
    wv = store_sd[k] ** 2 * lead[:, None]
    ex = exact[k]
    if np.any(ex):
        e = np.flatnonzero(ex)
        p, t = _convolve_streams(wm[e], wv[e], qi[k[e]], active[k[e]], own_mean[k[e]] * lead[e],
                                 own_sd[k[e]] ** 2 * lead[e], width)
        pmf[e], tail[e] = p, t
    if np.any(~ex):
        f = np.flatnonzero(~ex)
        act = active[k[f]]
        sv = np.where(act, order_stream_variance(wm[f], wv[f], np.where(act, qi[k[f]], 1)), 0.0)
        mean = wm[f].sum(axis=1) + own_mean[k[f]] * lead[f]
        var = sv.sum(axis=1) + own_sd[k[f]] ** 2 * lead[f]
        p, t = count_pmf(mean, var, width)
        pmf[f], tail[f] = p, t
    return pmf, tail


def lone_unit_offset(
    store_mean: np.ndarray,
    store_q: np.ndarray,
    store_count: np.ndarray,
    active: np.ndarray,
    rate: np.ndarray,
    window: np.ndarray,
) -> np.ndarray:
    """Units by which a lone unit demanded at the warehouse fares better than the mean unit of the stream.

    Parameters
    ----------
    store_mean, store_q, store_count, active : ndarray, shape (n, m)
        Stores' demand rates, order quantities, count flags and which stores send orders.
    rate : ndarray, shape (n,)
        All demand into the warehouse per time unit (stores' and own).
    window : ndarray, shape (n,)
        Warehouse lead time (the window of demand a unit's wait depends on).

    Returns
    -------
    ndarray, shape (n,)
        ``sum_i (d_i / lambda0) max((Q_i - c) / 2 - d_i L0, 0)``, ``c = 1`` for counts, else 0.

    Examples
    --------
    >>> float(lone_unit_offset(np.array([[0.1]]), np.array([[21.0]]), np.array([[True]]),
    ...                        np.array([[True]]), np.array([0.2]), np.array([10.0]))[0])
    4.5

    Notes
    -----
    A unit of a store order of ``Q_i`` has ``(Q_i - c) / 2`` units of its own order ahead of it on average
    (and as many behind it); a unit of the warehouse's own customers has none. Against that, the store has
    just ordered, so over the window before its order it has sent fewer units than its mean rate gives: about
    ``d_i L0`` fewer while ``L0`` is shorter than its order cycle ``Q_i / d_i`` and ``(Q_i - c) / 2`` fewer
    over many cycles (the renewal function of an Erlang stream started at an order). The difference, capped
    at 0, is how much further along a lone own-customer unit is than the store's units. From the mechanics of
    the METRIC-type model, checked against the project's simulator (tests/test_network.py).

    References
    ----------
    Cox, D. R. (1962). Renewal Theory. Methuen (renewal function from an epoch).
    """
    c = np.where(store_count, 1.0, 0.0)
    gap = np.maximum((store_q - c) / 2.0 - store_mean * np.asarray(window, dtype=float)[:, None], 0.0)
    num = np.where(active, store_mean * gap, 0.0).sum(axis=1)
    return np.where(rate > 0, num / np.where(rate > 0, rate, 1.0), 0.0)


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

    Parameters
    ----------
    z : ndarray
        Standardised levels (any shape).

    Returns
    -------
    h1, h2, h3 : ndarray
        ``H_1(z), H_2(z), H_3(z)``, each of the shape of ``z``.

    Examples
    --------
    >>> [round(float(v), 6) for v in normal_loss_moments(np.array(0.0))]
    [0.398942, 0.5, 0.797885]

    Notes
    -----
    ``H1 = phi - z Phi_c``, ``H2 = (z**2 + 1) Phi_c - z phi``, ``H3 = (z**2 + 2) phi - z (z**2 + 3) Phi_c``,
    with ``dH_k/dz = -k H_{k-1}``; ``Phi_c`` is computed as ``ndtr(-z)`` (no cancellation).

    References
    ----------
    Zipkin, P. H. (2000). Foundations of Inventory Management. McGraw-Hill.
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
    """Warehouse steady state for given ``(R0, Q0)``: expected on hand, backorders and their second moment.

    ``own_stockout_probability``: probability that a unit demanded by the warehouse's own customers finds no
    stock; ``own_backorders``: the part of ``expected_backorders`` owed to its own customers (0 without them).
    """

    expected_on_hand: np.ndarray
    expected_backorders: np.ndarray
    backorders_second_moment: np.ndarray
    stockout_probability: np.ndarray
    wait_probability: np.ndarray
    max_wait: np.ndarray
    negative_share: np.ndarray
    negative_depth: np.ndarray
    negative_square: np.ndarray
    ltd_var: np.ndarray
    own_stockout_probability: np.ndarray
    own_backorders: np.ndarray


class _DiscreteLoss:
    """Prefix tables of n1(y) = E(X - y)^+ and n2(y) = E((X - y)^+)^2 for lattice sums."""

    def __init__(self, pmf: np.ndarray, step: np.ndarray):
        self.pmf = pmf
        n, width = pmf.shape
        self.width = width
        sf = np.cumsum(pmf[:, ::-1], axis=1)[:, ::-1]  # P(X >= y)
        gt = np.concatenate([sf[:, 1:], np.zeros((n, 1))], axis=1)  # P(X > y)
        n1 = np.cumsum(gt[:, ::-1], axis=1)[:, ::-1]  # sum_{j >= y} P(X > j)
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

    def take(self, keep: np.ndarray) -> _DiscreteLoss:
        """The tables of a subset of rows (boolean mask)."""
        out = _DiscreteLoss.__new__(_DiscreteLoss)
        out.width = self.width
        for name in ("mean", "second", "step", "p1", "p2", "pg"):
            setattr(out, name, getattr(self, name)[keep])
        return out

    def lattice_sums(self, r0: np.ndarray, q0: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sums over y = r0 + g k, k = 1..m (m = q0 / g) of n1(y), n2(y) and P(X > y)."""
        g = self.step
        m = np.maximum(np.rint(q0 / g).astype(np.int64), 1)
        r0 = np.rint(r0).astype(np.int64)
        a = self.mean - r0  # for y < 0: n1 = mean - y, n2 = E X^2 - 2 y mean + y^2
        kneg = np.clip(np.ceil(-r0 / g).astype(np.int64) - 1, 0, m)  # number of k >= 1 with r0 + g k < 0
        k = kneg.astype(float)
        s1 = k * a - g * k * (k + 1) / 2.0
        # sum (X - y)^2 expectations: E X^2 - 2 y mu + y^2 with y = r0 + g j
        sy = k * r0 + g * k * (k + 1) / 2.0
        sy2 = k * r0**2 + 2.0 * r0 * g * k * (k + 1) / 2.0 + g * g * k * (k + 1) * (2 * k + 1) / 6.0
        s2 = k * self.second - 2.0 * self.mean * sy + sy2
        sgt = k.copy()  # P(X > y) = 1 for y < 0
        # in-table part: k from kneg+1 .. min(m, (width-1-r0)//g)
        ktop = np.minimum(m, np.floor_divide(self.width - 1 - r0, g))
        has = ktop >= kneg + 1
        ytop = np.clip(r0 + g * ktop, 0, self.width - 1)[:, None]
        t1 = np.take_along_axis(self.p1, ytop, axis=1)[:, 0]
        t2 = np.take_along_axis(self.p2, ytop, axis=1)[:, 0]
        tg = np.take_along_axis(self.pg, ytop, axis=1)[:, 0]
        ylow = r0 + g * kneg  # prefix below the first in-table term (same residue class)
        low_ok = (ylow >= 0) & has
        yl = np.clip(ylow, 0, self.width - 1)[:, None]
        t1 = t1 - np.where(low_ok, np.take_along_axis(self.p1, yl, axis=1)[:, 0], 0.0)
        t2 = t2 - np.where(low_ok, np.take_along_axis(self.p2, yl, axis=1)[:, 0], 0.0)
        tg = tg - np.where(low_ok, np.take_along_axis(self.pg, yl, axis=1)[:, 0], 0.0)
        s1 = s1 + np.where(has, t1, 0.0)
        s2 = s2 + np.where(has, t2, 0.0)
        sgt = sgt + np.where(has, tg, 0.0)
        kle = np.clip(np.floor_divide(-r0, g), 0, m)  # k >= 1 with r0 + g k <= 0 (no stock ahead)
        return s1 / m, s2 / m, sgt / m, kle / m, -sy / m, sy2 / m


def _strided_cumsum(a: np.ndarray, g: int) -> np.ndarray:
    """Cumulative sums along the last axis over every ``g``-th element (each residue class apart)."""
    if g == 1:
        return np.cumsum(a, axis=-1)
    w = a.shape[-1]
    wp = -(-w // g) * g
    pad = np.zeros(a.shape[:-1] + (wp,))
    pad[..., :w] = a
    return np.cumsum(pad.reshape(a.shape[:-1] + (wp // g, g)), axis=-2).reshape(a.shape[:-1] + (wp,))[..., :w]


def discrete_tables(demand: WarehouseDemand) -> list:
    """Loss tables of the discrete rows of ``demand``, one per width block.

    Parameters
    ----------
    demand : WarehouseDemand
        From :func:`warehouse_demand`.

    Returns
    -------
    list of (ndarray, _DiscreteLoss)
        Row indices of a block and its cumulative loss tables, for :func:`warehouse_moments` (``tables=``)
        when it is called many times on the same demand.

    Examples
    --------
    >>> wd = warehouse_demand(np.array([[0.5]]), np.sqrt([[0.5]]), np.array([[1]]), np.array([[True]]),
    ...                       np.array([2.0]), np.array([0.0]))
    >>> [rows.tolist() for rows, _ in discrete_tables(wd)]
    [[0]]
    """
    return [(rows, _DiscreteLoss(pmf, demand.step[rows])) for rows, pmf in demand.blocks if rows.size]


def warehouse_moments(
    demand: WarehouseDemand,
    reorder_point: np.ndarray,
    order_quantity: np.ndarray,
    *,
    tables: list | None = None,
) -> WarehouseState:
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
    Normal: ``E[B0] = sigma**2 (H2(z_R) - H2(z_RQ)) / (2 Q0)``, ``E[B0^2] = sigma**3 (H3(z_R) - H3(z_RQ)) / (3
    Q0)``.

    The warehouse's own customers (``demand.own_rate``), served first come first served with the store
    orders: a unit of theirs waits when ``X >= y`` (counts) and finds no stock with probability
    ``mean_y P(X >= y)``; their backorders are their share of the demand times the backorders the stream
    would owe if each unit fared as a lone unit (:func:`lone_unit_offset`, ``_own_unit_backorders_discrete``
    and its normal integral), capped at ``E[B0]``.

    References
    ----------
    Hadley, G. & Whitin, T. M. (1963). Analysis of Inventory Systems. Prentice-Hall.
    Axsäter, S. (1993). Exact and approximate evaluation of batch-ordering policies for two-level inventory
    systems. Operations Research 41(4), 777-785.
    """
    r0 = np.asarray(reorder_point, dtype=float)
    q0 = np.asarray(order_quantity, dtype=float)
    n = demand.mean.size
    r0 = np.broadcast_to(r0, (n,))
    q0 = np.broadcast_to(q0, (n,))
    eb = np.zeros(n)
    eb2 = np.zeros(n)
    stockout = np.zeros(n)
    neg_share = np.zeros(n)
    neg_depth = np.zeros(n)
    neg_sq = np.zeros(n)
    wait = np.zeros(n)
    order_size = (
        np.where(demand.rate > 0, demand.order_size, 1.0) if demand.order_size is not None else np.ones(n)
    )
    ltd_var = np.maximum(np.asarray(demand.var, dtype=float), 0.0).copy()
    own_rate = np.zeros(n) if demand.own_rate is None else np.asarray(demand.own_rate, dtype=float)
    own_share = np.where(demand.rate > 0, own_rate / np.where(demand.rate > 0, demand.rate, 1.0), 0.0)
    # how much further along a lone own-customer unit is than the mean unit of the stream
    ahead = np.zeros(n) if demand.lone_offset is None else np.asarray(demand.lone_offset, dtype=float)
    own_so = np.zeros(n)
    own_unit = np.zeros(n)
    eip = np.where(demand.discrete, r0 + (q0 + demand.step) / 2.0, r0 + q0 / 2.0)
    d = demand.discrete
    if np.any(d):
        for rows, loss in tables if tables is not None else discrete_tables(demand):
            s1, s2, sg, ns, nd, nq = loss.lattice_sums(r0[rows], q0[rows])
            neg_sq[rows] = nq
            neg_share[rows] = ns
            neg_depth[rows] = nd
            ltd_var[rows] = np.maximum(loss.second - loss.mean**2, 0.0)
            eb[rows] = s1
            eb2[rows] = s2
            stockout[rows] = sg
            shift = np.maximum(np.rint(order_size[rows]), 1.0)
            wait[rows] = loss.lattice_sums(r0[rows] - shift, q0[rows])[2]
            own_so[rows] = loss.lattice_sums(r0[rows] - 1.0, q0[rows])[2]
            if np.any(own_share[rows] > 0):
                own_unit[rows] = _own_unit_backorders_discrete(
                    loss, r0[rows], q0[rows], ahead[rows], demand.mean[rows]
                )
    c = ~d
    if np.any(c):
        if demand.lead_weight is None:
            _normal_state(c, demand.mean[c], demand.var[c], np.ones(int(c.sum())), r0, q0, order_size, ahead,
                          eb, eb2, stockout, wait, own_so, own_unit, first=True)
        else:  # a random lead time: the state mixed over its lead-time points
            first = True
            for k in range(demand.lead_weight.shape[1]):
                wk = demand.lead_weight[c, k]
                if not np.any(wk > 0):
                    continue
                _normal_state(c, demand.lead_mean[c, k], demand.lead_var[c, k], wk, r0, q0, order_size, ahead,
                              eb, eb2, stockout, wait, own_so, own_unit, first=first)
                first = False
        qq = q0[c]
        small = qq < 1e-6 * np.maximum(np.sqrt(np.maximum(demand.var[c], 0.0)), 1e-300)
        qs = np.where(small, 1.0, qq)
        # inventory positions below zero: share of (R0, R0 + Q0] and mean of |y| there (times the share)
        lo_, hi_ = r0[c], np.minimum(r0[c] + qq, 0.0)
        width_ = np.maximum(hi_ - lo_, 0.0)
        neg_share[c] = np.where(small, (r0[c] < 0).astype(float), width_ / qs)
        neg_depth[c] = np.where(small, np.maximum(-r0[c], 0.0), width_ * (-(lo_ + hi_) / 2.0) / qs)
        hi_c = np.maximum(hi_, lo_)
        neg_sq[c] = np.where(small, np.maximum(-r0[c], 0.0) ** 2, (hi_c**3 - lo_**3) / 3.0 / qs)
    eb = np.maximum(eb, 0.0)
    eb2 = np.maximum(eb2, eb * eb)
    on_hand = np.maximum(eip - demand.mean + eb, 0.0)
    # longest plausible wait: the lead time (3 sd up) plus the passage to the deepest position below zero
    rate_safe = np.where(demand.rate > 0, demand.rate, 1.0)
    max_wait = (
        demand.mean / rate_safe
        + 3.0 * demand.lead_sd
        + np.maximum(-(r0 + np.where(demand.discrete, demand.step, 0.0)), 0.0) / rate_safe
    )
    return WarehouseState(
        expected_on_hand=on_hand,
        expected_backorders=eb,
        backorders_second_moment=eb2,
        negative_share=neg_share,
        negative_depth=neg_depth,
        negative_square=neg_sq,
        ltd_var=ltd_var,
        stockout_probability=np.clip(stockout, 0.0, 1.0),
        wait_probability=np.clip(wait, 0.0, 1.0),
        max_wait=max_wait,
        own_stockout_probability=np.clip(own_so, 0.0, 1.0),
        own_backorders=np.clip(own_share * own_unit, 0.0, eb),
    )


def _normal_state(c, mu, var, weight, r0, q0, order_size, ahead, eb, eb2, stockout, wait, own_so, own_unit,
                  *, first):
    """Normal lead-time demand ``(mu, var)`` on rows ``c``: add ``weight`` times its backorders, their second
    moment, stock-out and wait probabilities and own-customer backorders into the arrays (set them when
    ``first``)."""
    sd = np.maximum(np.sqrt(np.maximum(var, 0.0)), SD_FLOOR * np.maximum(1.0, mu))
    za = (r0[c] - mu) / sd
    qq = q0[c]
    zb = (r0[c] + qq - mu) / sd
    a1, a2, a3 = normal_loss_moments(za)
    b1, b2, b3 = normal_loss_moments(zb)
    small = qq < 1e-6 * sd
    qs = np.where(small, 1.0, qq)
    vals = {}
    vals["eb"] = np.where(small, sd * a1, sd**2 * (a2 - b2) / (2.0 * qs))
    vals["eb2"] = np.where(small, sd**2 * a2, sd**3 * (a3 - b3) / (3.0 * qs))
    # P(X > y) averaged: sd (H1(z_R) - H1(z_RQ)) / Q0
    vals["so"] = np.where(small, special.ndtr(-za), sd * (a1 - b1) / qs)
    sh = order_size[c]
    wa = normal_loss_moments(za - sh / sd)[0]
    wb = normal_loss_moments(zb - sh / sd)[0]
    vals["wait"] = np.where(small, special.ndtr(-(za - sh / sd)), sd * (wa - wb) / qs)
    # own customers (see _own_unit_backorders_discrete): positions y > 0 at y + ahead, y <= 0 at y - ahead
    m_c = ahead[c]
    lo_p = np.maximum(r0[c], 0.0)
    hi_p = np.maximum(r0[c] + qq, lo_p)
    pos_int = sd**2 * (
        normal_loss_moments((lo_p + m_c - mu) / sd)[1] - normal_loss_moments((hi_p + m_c - mu) / sd)[1]
    ) / 2.0
    lo_n = np.minimum(r0[c], 0.0)
    hi_n = np.minimum(r0[c] + qq, 0.0)
    neg_int = (hi_n - lo_n) * (mu + m_c) - (hi_n**2 - lo_n**2) / 2.0
    at_r = np.where(r0[c] > 0, sd * normal_loss_moments((r0[c] + m_c - mu) / sd)[0], mu + m_c - r0[c])
    vals["own"] = np.where(small, at_r, (pos_int + neg_int) / qs)
    for arr, key in ((eb, "eb"), (eb2, "eb2"), (stockout, "so"), (wait, "wait"), (own_so, "so"),
                     (own_unit, "own")):
        arr[c] = weight * vals[key] + (0.0 if first else arr[c])


def _own_unit_backorders_discrete(loss, r0, q0, ahead, mu0):
    """Backorders if every unit were served like a lone unit of the warehouse's own customers (step 1).

    ``ahead`` is :func:`lone_unit_offset`: how many units of its own store order a store unit has before it
    (and as many behind it), net of the store's lighter past orders. At an inventory position ``y > 0`` the
    units before it count against a store unit, so a lone unit fares as a store unit would at ``y + ahead``:
    ``E(X - y - ahead)^+``. At ``y <= 0`` a unit waits for a warehouse order not yet placed, which the units
    behind a store unit help to trigger; a lone unit fares as a store unit would at ``y - ahead``:
    ``mu0 - y + ahead``. Averaged over ``y = R0 + 1 .. R0 + Q0`` (``ahead`` interpolated between whole
    units); the caller multiplies by the own customers' share of the demand.
    """
    r0 = np.rint(r0)
    q0 = np.rint(q0)
    lo = np.maximum(r0, 0.0)  # positive positions lo + 1 .. r0 + q0
    kp = np.maximum(r0 + q0 - lo, 0.0)
    kn = np.clip(-r0, 0.0, q0)  # positions r0 + 1 .. r0 + kn <= 0
    sum_y = kn * r0 + kn * (kn + 1.0) / 2.0
    base = np.floor(ahead)
    frac = ahead - base
    out = np.zeros(r0.size)
    for shift, weight in ((base, 1.0 - frac), (base + 1.0, frac)):
        pos = np.where(kp > 0, kp * loss.lattice_sums(lo + shift, np.maximum(kp, 1.0))[0], 0.0)
        neg = kn * (mu0 + shift) - sum_y
        out += weight * (pos + neg)
    return out / np.maximum(q0, 1.0)


def arrival_variance(demand: WarehouseDemand, window: np.ndarray) -> np.ndarray:
    """Variance of the demand noise arriving at the warehouse in a window of given length, per item.

    Parameters
    ----------
    demand : WarehouseDemand
    window : ndarray, shape (n,)
        Window length (time units).

    Returns
    -------
    ndarray, shape (n,)
        ``(sum_i s_i**2 + s0**2) w``: the stores' customer-demand variance rates (and the warehouse's own).

    Examples
    --------
    >>> wd = warehouse_demand(np.array([[0.5]]), np.sqrt([[0.5]]), np.array([[4]]), np.array([[True]]),
    ...                       np.array([2.0]), np.array([0.0]))
    >>> round(float(arrival_variance(wd, np.array([3.0]))[0]), 12)
    1.5

    Notes
    -----
    Only the demand noise counts, not the batching of the store orders: which batch arrives during a wait
    depends on the phase of the stores' order cycles, and so does the wait itself; the phase is therefore not
    noise independent of the wait. For one-for-one Poisson stores this is ``lambda0 w``, the exact
    distributional Little's law; for regular batch streams it tends to the fluid limit ``W = B0 / lambda0``.

    References
    ----------
    Keilson, J. & Servi, L. D. (1988). A distributional form of Little's law. Operations Research Letters
    7(5), 223-227.
    """
    w = np.asarray(window, dtype=float)
    if demand.stream_long is None:
        return demand.variance_rate * w
    return (demand.stream_long.sum(axis=1) + demand.own_var_rate) * w


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
    ``E[W] = E[B0] / lambda0`` (Little's law; Sherbrooke 1968). For the second moment the warehouse is seen,
    as an (R0, Q0) system with uniform inventory position, as a mixture of base-stock systems with
    ``S0 = y`` on the lattice ``R0 + g .. R0 + Q0``:

    * ``y >= 0``: the order is filled by stock ordered ``y`` units earlier; the backorders are the units that
      arrived during the oldest order's wait, so ``E[B^2 | y] = E v(W) + lambda0**2 E[W^2 | y]`` with ``v(w)``
      the variance of the demand noise in a window ``w`` (:func:`arrival_variance`, at the mean wait of these
      points). For Poisson unit demand ``v(w) = lambda0 w`` and this is the distributional Little's law,
      exact, giving the Svoronos & Zipkin (1988) delay variance;
    * ``y <= 0``: the order waits for a warehouse order not yet placed: ``W = L0 + T_|y|`` with ``T_k`` the
      time for the warehouse demand to reach ``k`` more units, ``E T = k / lambda0``. ``T`` is made of the
      stores' own future demand: given the ``k`` units, a store's share of them is binomial, whose variance
      does not exceed its mean, so ``T`` is taken at its mean (no variance of its own). For one-for-one
      Poisson stores the exact share variance is ``p(1 - p)k`` against ``pk`` here (``p`` the store's share).
      This choice (against the Little form, which gives ``T`` a negative variance, and the full passage-time
      variance) is the one that reproduces Axsäter's (1993) batch problems with negative warehouse reorder
      points (test_echelon: all 16 policies within 4.2%).

    ``Var(W) = E[W^2] - E[W]^2`` (clipped at 0).

    With own customers at the warehouse (``demand.own_rate`` > 0) the store orders' wait is
    ``E[W] = (E[B0] - E[B_own]) / (lambda0 - own rate)`` (Little's law on the store units alone; ``E[B_own]``
    from :func:`warehouse_moments`), and ``W`` is the all-unit wait scaled to that mean (variance times the
    squared ratio of the means).

    References
    ----------
    Sherbrooke, C. C. (1968). METRIC: a multi-echelon technique for recoverable item control. Operations
    Research 16(1), 122-141. Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level
    inventory systems. Operations Research 36(1), 57-72. Axsäter, S. (1993). Exact and approximate evaluation
    of batch-ordering policies for two-level inventory systems. Operations Research 41(4), 777-785.
    """
    lam = demand.rate
    pos = lam > 0
    safe = np.where(pos, lam, 1.0)
    eb = state.expected_backorders
    ew = np.where(pos, eb / safe, 0.0)
    mu0 = demand.mean
    share = state.negative_share
    # lattice points y < 0: E[B | y] = mu0 - y, E[W | y] = (mu0 - y) / lambda0, W = L0 + T at its mean
    neg1 = share * mu0 + state.negative_depth
    neg_sq = share * mu0**2 + 2.0 * mu0 * state.negative_depth + state.negative_square
    neg2 = share * state.ltd_var + neg_sq
    # lattice points y >= 0: the Little form with the variance of the arrivals during the wait
    pos_share = np.maximum(1.0 - share, 0.0)
    p1 = np.maximum(eb - neg1, 0.0)
    p2 = np.maximum(state.backorders_second_moment - neg2, 0.0)
    w_pos = np.where(pos_share > 0, p1 / np.where(pos_share > 0, pos_share, 1.0), 0.0) / safe
    ew2 = (p2 - pos_share * arrival_variance(demand, w_pos)) / safe**2
    ew2 = ew2 + neg_sq / safe**2 + share * demand.lead_sd**2
    vw = np.where(pos, np.maximum(ew2 - ew * ew, 0.0), 0.0)
    # with own customers the stores' orders owe E[B0] - E[B_own] at rate lambda0 - own rate; the wait of a
    # store unit is taken as the all-unit wait scaled to that mean
    own = np.zeros_like(lam) if demand.own_rate is None else np.asarray(demand.own_rate, dtype=float)
    lam_st = lam - own
    has_own = pos & (own > 0)
    if np.any(has_own):
        ew_st = np.where(
            lam_st > 0, np.maximum(eb - state.own_backorders, 0.0) / np.where(lam_st > 0, lam_st, 1.0), 0.0
        )
        scale = np.where(ew > 0, ew_st / np.where(ew > 0, ew, 1.0), 1.0)
        ew = np.where(has_own, ew_st, ew)
        vw = np.where(has_own, vw * scale**2, vw)
    return ew, vw


def store_ltd_moments(
    daily_mean: np.ndarray,
    daily_sd: np.ndarray,
    lead: np.ndarray,
    lead_sd: np.ndarray,
    mean_delay: np.ndarray,
    var_delay: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
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

    References
    ----------
    Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level inventory systems. Operations
    Research 36(1), 57-72.
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
    """Exact steady state of one-for-one Poisson stores behind an (R0, Q0) warehouse (Graves 1985).

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
    Graves, S. C. (1985). A multi-echelon inventory model for a repairable item with one-for-one
    replenishment.
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
            if s0 <= 0:  # B0 = X - s0: shift right by -s0
                shifted[-s0:] = x[row, : width + s0]
            else:  # B0 = (X - s0)^+
                shifted[0] = x[row, : s0 + 1].sum()
                shifted[1 : width - s0] = x[row, s0 + 1 :]
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


# ----------------------------------------------------------------------------------------------------------
# two-level evaluation and optimisation (stores through the single-site functions)
# ----------------------------------------------------------------------------------------------------------
#: Grid points bracketing the warehouse reorder point before the golden-section steps.
SEARCH_POINTS = 5
#: Most golden-section steps of the warehouse reorder-point search.
GOLDEN_MAX_ITER = 10
#: Items per process below which optimise_two_level does not split the work.
PARALLEL_MIN_ITEMS = 500
#: Items from which the unit-level store figures run in worker processes (when workers > 1).
BACKLOG_PARALLEL_MIN_ITEMS = 24
#: Seconds between progress lines of the unit-level store figures.
PROGRESS_SECONDS = 5.0
#: Rounds of the search (each narrows the bracket around the best candidate).
SEARCH_ROUNDS = 7
#: The search stops when the bracket is below this many units (count) / this fraction of the LTD sd (normal).
SEARCH_TOL_UNITS = 1.0
SEARCH_TOL_SD = 0.2
#: Upper end of the search: warehouse LTD mean + SEARCH_HIGH_SDS standard deviations.
SEARCH_HIGH_SDS = 5.0


@dataclass(frozen=True)
class TwoLevelInputs:
    """Arrays describing ``n`` items, each with one warehouse and up to ``m`` stores.

    Store arrays have shape ``(n, m)``, warehouse arrays ``(n,)``; times in days, costs per year.
    ``store_active`` marks real stores (padding stores must have zero demand). ``*_count``: count demand
    (Poisson / negative binomial). ``*_fixed_q``: a fixed order quantity or NaN. ``*_target``: service target
    or NaN. ``*_backorder_cost``: 0 where none. ``warehouse_own_*``: the warehouse's own customers.
    """

    store_active: np.ndarray
    store_mean: np.ndarray
    store_sd: np.ndarray
    store_lead: np.ndarray
    store_lead_sd: np.ndarray
    store_count: np.ndarray
    store_order_cost: np.ndarray
    store_holding_cost: np.ndarray
    store_backorder_cost: np.ndarray
    store_target: np.ndarray
    store_fixed_q: np.ndarray
    store_pack: np.ndarray
    warehouse_lead: np.ndarray
    warehouse_lead_sd: np.ndarray
    warehouse_own_mean: np.ndarray
    warehouse_own_sd: np.ndarray
    warehouse_count: np.ndarray
    warehouse_order_cost: np.ndarray
    warehouse_holding_cost: np.ndarray
    warehouse_backorder_cost: np.ndarray
    warehouse_target: np.ndarray
    warehouse_fixed_q: np.ndarray
    warehouse_pack: np.ndarray
    days_per_year: float = 365.0
    mode: str = "cost"
    backorder_basis: str = "per_unit"

    def __post_init__(self) -> None:
        _check_inputs(self, self.store_mean.shape, self.store_mean.shape[:1], "store_", "warehouse_")

    @property
    def n(self) -> int:
        return int(self.store_mean.shape[0])


@dataclass(frozen=True)
class TwoLevelResult:
    """Policies and performance of a two-level network per item.

    Store fields ``(n, m)``: ``store_policy`` (a ``SitePolicy`` flattened over the active stores, in row-major
    order of ``store_active``), ``store_ltd_mean``, ``store_ltd_sd``, ``store_distribution`` and
    ``store_reorder_point``/``store_order_quantity``, ``store_delay`` (mean wait of a store's units at the
    warehouse, days), ``store_method`` (0 the three-point delay mixture, 1 the unit-level backlog evaluation
    of :mod:`models.backlog`). Warehouse fields ``(n,)``. ``mean_delay``/``var_delay``
    in days. ``network_cost`` per item per year. ``iterations``/``converged`` of the reorder-point search.
    """

    store_reorder_point: np.ndarray
    store_order_quantity: np.ndarray
    store_ltd_mean: np.ndarray
    store_ltd_sd: np.ndarray
    store_distribution: np.ndarray
    store_policy: object
    warehouse_reorder_point: np.ndarray
    warehouse_order_quantity: np.ndarray
    warehouse_on_hand: np.ndarray
    warehouse_backorders: np.ndarray
    warehouse_fill_rate: np.ndarray
    warehouse_cycle_service: np.ndarray
    warehouse_ltd_mean: np.ndarray
    warehouse_ltd_sd: np.ndarray
    warehouse_ordering_cost: np.ndarray
    warehouse_holding_cost: np.ndarray
    warehouse_backorder_cost: np.ndarray
    mean_delay: np.ndarray
    var_delay: np.ndarray
    store_cost: np.ndarray
    network_cost: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    demand_method: np.ndarray
    store_delay: np.ndarray
    store_method: np.ndarray


_NONNEGATIVE = ("mean", "sd", "lead", "lead_sd", "order_cost", "holding_cost", "backorder_cost", "own_mean",
                "own_sd")
_MODES = ("cost", "cycle_service", "fill_rate")
_BASES = ("per_unit", "per_unit_year")


def _check_inputs(inp, grid_shape, item_shape, *prefixes) -> None:
    """Shapes, signs and modes of TwoLevelInputs / TreeInputs; errors name the field, rule and value."""
    from dataclasses import fields

    if inp.mode not in _MODES:
        raise ValueError(f"mode must be one of {_MODES}; found {inp.mode!r}")
    if inp.backorder_basis not in _BASES:
        raise ValueError(f"backorder_basis must be one of {_BASES}; found {inp.backorder_basis!r}")
    if not inp.days_per_year > 0:
        raise ValueError(f"days_per_year must be > 0; found {inp.days_per_year!r}")
    for f in fields(inp):
        v = getattr(inp, f.name)
        if not isinstance(v, np.ndarray) or f.name == "parent":
            continue
        want = grid_shape if (v.ndim == len(grid_shape)) else item_shape
        if v.shape != tuple(want):
            raise ValueError(f"{f.name} must have shape {tuple(want)}; found {v.shape}")
        base = f.name
        for pre in prefixes:
            base = base.removeprefix(pre)
        if base in _NONNEGATIVE and v.dtype.kind == "f":
            bad = np.flatnonzero(~(v >= 0).ravel() & ~np.isnan(v.ravel()) | np.isinf(v.ravel()))
            if bad.size:
                raise ValueError(f"{f.name} must be finite and >= 0; element {int(bad[0])} has "
                                 f"{v.ravel()[bad[0]]!r}")


def _store_codes(count: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    from models import demand as md

    over = sd * sd > mean * (1.0 + DISPERSION_TOL) + 1e-12
    return np.where(count, np.where(over, md.NEGBIN, md.POISSON), md.NORMAL).astype(np.int8)


def _warehouse_rows(inp: TwoLevelInputs, demand: WarehouseDemand, state: WarehouseState, q0):
    """Warehouse cost and service given its steady state."""
    lam0 = demand.rate
    own = inp.warehouse_own_mean
    through_year = lam0 * inp.days_per_year
    ordering = np.where(q0 > 0, inp.warehouse_order_cost * through_year / np.maximum(q0, 1e-12), 0.0)
    holding = inp.warehouse_holding_cost * state.expected_on_hand
    # with own customers: their fill rate and their share of the backorders (FCFS, as the simulator serves)
    fill = 1.0 - np.where(own > 0, state.own_stockout_probability, state.stockout_probability)
    if inp.backorder_basis == "per_unit_year":
        back = inp.warehouse_backorder_cost * state.own_backorders
    else:
        back = inp.warehouse_backorder_cost * own * inp.days_per_year * (1.0 - fill)
    return ordering, holding, back, fill


def _store_args(inp: TwoLevelInputs):
    """Item index of each active store and its :func:`leaf_policies` inputs (demand, lead time, costs)."""
    act = inp.store_active
    rows = np.nonzero(act)[0]
    return rows, (
        inp.store_mean[act] * inp.days_per_year,
        inp.store_mean[act],
        inp.store_sd[act],
        inp.store_lead[act],
        inp.store_lead_sd[act],
        inp.store_count[act],
        inp.store_order_cost[act],
        inp.store_holding_cost[act],
        inp.store_backorder_cost[act],
        inp.store_target[act],
    )


def _store_policies(inp: TwoLevelInputs, ew, vw, pw, mw, q_active, **options):
    """:func:`leaf_policies` on the active stores behind the warehouse delay ``(ew, vw, pw, mw)`` per item."""
    rows, args = _store_args(inp)
    pwv = np.zeros_like(ew) if pw is None else pw
    pol, mean, sd, codes = leaf_policies(
        *args,
        q_active,
        inp.store_pack[inp.store_active],
        ew[rows],
        vw[rows],
        pwv[rows],
        mode=inp.mode,
        basis=inp.backorder_basis,
        max_wait=None if mw is None else mw[rows],
        **options,
    )
    return rows, mean, sd, codes, pol


def _optimise_stores(inp: TwoLevelInputs, ew, vw, store_q, pw=None, refine=False, mixture=True, mw=None):
    q = store_q[inp.store_active]
    return _store_policies(inp, ew, vw, pw, mw, q, refine=refine, mixture=mixture)


def _evaluate_stores(inp: TwoLevelInputs, ew, vw, store_r, store_q, pw=None, mw=None):
    act = inp.store_active
    q = np.where(np.isfinite(store_q[act]), store_q[act], 0.0)
    r = np.where(np.isfinite(store_r[act]), store_r[act], 0.0)
    return _store_policies(inp, ew, vw, pw, mw, q, reorder_point=r)


def _per_item(rows: np.ndarray, values: np.ndarray, n: int) -> np.ndarray:
    return np.bincount(rows, weights=values, minlength=n)


def _assemble(inp, demand, r0, q0, state, ew, vw, rows, mean, sd, codes, pol, iterations, converged):
    n, m = inp.store_mean.shape
    act = inp.store_active

    def grid(v, fill=np.nan):
        out = np.full((n, m), fill, dtype=float)
        out[act] = v
        return out

    ordering, holding, back, fill = _warehouse_rows(inp, demand, state, q0)
    store_cost = _per_item(rows, np.asarray(pol.total_cost, dtype=float), n)
    sd0 = np.sqrt(np.maximum(demand.var, 0.0))
    cdf_r0 = np.zeros(n)
    for rws, pmf in demand.blocks:
        cdf = np.cumsum(pmf, axis=1)
        idx = np.clip(np.rint(r0[rws]).astype(np.int64), -1, cdf.shape[1] - 1)
        cdf_r0[rws] = np.where(
            idx < 0, 0.0, np.take_along_axis(cdf, np.maximum(idx, 0)[:, None], axis=1)[:, 0]
        )
    cyc = np.where(
        demand.discrete,
        cdf_r0,
        special.ndtr((r0 - demand.mean) / np.maximum(sd0, SD_FLOOR * np.maximum(1.0, demand.mean))),
    )
    return TwoLevelResult(
        store_reorder_point=grid(pol.reorder_point),
        store_order_quantity=grid(pol.order_quantity),
        store_ltd_mean=grid(mean),
        store_ltd_sd=grid(sd),
        store_distribution=grid(codes, fill=-1),
        store_policy=pol,
        warehouse_reorder_point=r0,
        warehouse_order_quantity=q0,
        warehouse_on_hand=state.expected_on_hand,
        warehouse_backorders=state.expected_backorders,
        warehouse_fill_rate=fill,
        warehouse_cycle_service=cyc,
        warehouse_ltd_mean=demand.mean,
        warehouse_ltd_sd=sd0,
        warehouse_ordering_cost=ordering,
        warehouse_holding_cost=holding,
        warehouse_backorder_cost=back,
        mean_delay=ew,
        var_delay=vw,
        store_cost=store_cost,
        network_cost=ordering + holding + back + store_cost,
        iterations=iterations,
        converged=converged,
        demand_method=demand.method,
        store_delay=grid(ew[rows]),
        store_method=np.where(act, 0, -1).astype(np.int8),
    )


def _take_inputs(inp, idx):
    """The inputs of a subset of items (rows ``idx``)."""
    from dataclasses import fields, replace

    n = inp.n
    return replace(
        inp,
        **{
            f.name: getattr(inp, f.name)[idx]
            for f in fields(inp)
            if isinstance(getattr(inp, f.name), np.ndarray) and getattr(inp, f.name).shape[:1] == (n,)
        },
    )


def _take_demand(demand: WarehouseDemand, idx: np.ndarray) -> WarehouseDemand:
    from dataclasses import fields, replace

    n = demand.mean.size
    pos = np.full(n, -1, dtype=np.int64)
    pos[idx] = np.arange(idx.size)
    blocks = tuple((pos[rows[pos[rows] >= 0]], pmf[pos[rows] >= 0]) for rows, pmf in demand.blocks)
    out = {
        f.name: getattr(demand, f.name)[idx]
        for f in fields(demand)
        if isinstance(getattr(demand, f.name), np.ndarray) and getattr(demand, f.name).shape[:1] == (n,)
    }
    return replace(demand, blocks=blocks, **out)


def _take_tables(tables, idx, n):
    pos = np.full(n, -1, dtype=np.int64)
    pos[idx] = np.arange(idx.size)
    out = []
    for rows, loss in tables:
        keep = pos[rows] >= 0
        if keep.any():
            out.append((pos[rows[keep]], loss.take(keep)))
    return out


def golden_search(
    f,
    lo: np.ndarray,
    hi: np.ndarray,
    integer: np.ndarray,
    tol: np.ndarray,
    *,
    points: int = 6,
    max_iter: int = 40,
    extra: np.ndarray | None = None,
    subset: bool = False,
):
    """Vectorised minimisation of ``f`` (array of x -> array of values) per element over ``[lo, hi]``.

    Parameters
    ----------
    f : callable
        ``f(x)`` -> values, element-wise over arrays of shape (n,); with ``subset``, ``f(x, idx)`` on the
        elements ``idx`` only.
    lo, hi : ndarray, shape (n,)
        Search interval per element.
    integer : ndarray of bool, shape (n,)
        Elements searched over the integers.
    tol : ndarray, shape (n,)
        Final bracket width (integers: at least adjacent points).
    points : int
        Grid candidates that bracket the minimum.
    max_iter : int
        Golden-section steps at the most.
    extra : ndarray, shape (n,), optional
        One more candidate per element (e.g. the incumbent).
    subset : bool
        Call ``f`` on the elements not yet converged only.

    Returns
    -------
    x, fx : ndarray, shape (n,)
        Best point found and its value.
    iterations : ndarray of int, shape (n,)
    converged : ndarray of bool, shape (n,)

    Examples
    --------
    >>> x, fx, its, ok = golden_search(lambda x: (x - 2.3) ** 2, np.array([0.0]), np.array([10.0]),
    ...                                np.array([False]), np.array([1e-6]))
    >>> round(float(x[0]), 4), bool(ok[0])
    (2.3, True)

    Notes
    -----
    A grid of ``points`` candidates (plus ``extra``) brackets the minimum; golden-section steps (one
    evaluation of ``f`` per step) narrow the bracket by the factor ``(sqrt(5) - 1) / 2``. Assumes
    unimodality within the bracket.

    References
    ----------
    Kiefer, J. (1953). Sequential minimax search for a maximum. Proceedings of the American Mathematical
    Society 4(3), 502-506.
    """
    n = lo.size
    lo = np.where(integer, np.floor(lo), lo)
    hi = np.where(integer, np.ceil(hi), hi)
    hi = np.maximum(hi, lo + np.where(integer, 1.0, 1e-12))
    t = np.linspace(0.0, 1.0, points)
    grid = lo[:, None] + t[None, :] * (hi - lo)[:, None]
    grid = np.where(integer[:, None], np.rint(grid), grid)
    vals = np.stack([f(grid[:, j]) for j in range(points)], axis=1)
    best_x = grid[np.arange(n), np.argmin(vals, axis=1)]
    best_f = np.min(vals, axis=1)
    if extra is not None:
        extra = np.where(integer, np.rint(extra), extra)
        fe = f(extra)
        take = fe < best_f
        best_x = np.where(take, extra, best_x)
        best_f = np.where(take, fe, best_f)
    j = np.argmin(vals, axis=1)
    a = grid[np.arange(n), np.maximum(j - 1, 0)]
    b = grid[np.arange(n), np.minimum(j + 1, points - 1)]
    gr = (np.sqrt(5.0) - 1.0) / 2.0

    def inner(a, b):
        x1 = b - gr * (b - a)
        x2 = a + gr * (b - a)
        x1 = np.where(integer, np.floor(x1), x1)
        x2 = np.where(integer, np.maximum(np.ceil(x2), x1 + 1.0), x2)
        return x1, x2

    x1, x2 = inner(a, b)
    f1, f2 = f(x1), f(x2)
    its = np.zeros(n, dtype=np.int64)
    done = np.where(integer, b - a <= np.maximum(2.0, tol), b - a <= tol)
    for _ in range(max_iter):
        if np.all(done):
            break
        left = f1 <= f2  # minimum in [a, x2]
        a_new = np.where(left, a, x1)
        b_new = np.where(left, x2, b)
        # reuse the surviving interior point, place one new point
        keep = np.where(left, x1, x2)
        fkeep = np.where(left, f1, f2)
        y1, y2 = inner(a_new, b_new)
        new = np.where(left, y1, y2)
        new = np.where(integer & (new == keep), np.where(left, keep - 1.0, keep + 1.0), new)
        new = np.clip(new, a_new, b_new)
        live = np.flatnonzero(~done)
        fnew = np.where(done, f1, 0.0)
        fnew[live] = f(new[live], live) if subset else f(new)[live]
        nx1 = np.where(left, new, keep)
        nx2 = np.where(left, keep, new)
        nf1 = np.where(left, fnew, fkeep)
        nf2 = np.where(left, fkeep, fnew)
        swap = nx1 > nx2
        nx1, nx2 = np.where(swap, nx2, nx1), np.where(swap, nx1, nx2)
        nf1, nf2 = np.where(swap, nf2, nf1), np.where(swap, nf1, nf2)
        a, b = np.where(done, a, a_new), np.where(done, b, b_new)
        x1, x2 = np.where(done, x1, nx1), np.where(done, x2, nx2)
        f1, f2 = np.where(done, f1, nf1), np.where(done, f2, nf2)
        its += ~done
        done |= np.where(integer, b - a <= np.maximum(2.0, tol), b - a <= tol)
    for x, fx in ((x1, f1), (x2, f2)):
        take = fx < best_f
        best_x = np.where(take, x, best_x)
        best_f = np.where(take, fx, best_f)
    return best_x, best_f, its, done


def _lattice_q0(demand: WarehouseDemand, q0: np.ndarray) -> WarehouseDemand:
    """Drop the lattice (step 1) where Q0 is not a multiple of it."""
    ok = np.abs(np.mod(q0, demand.step)) < 1e-9
    if np.all(ok):
        return demand
    return WarehouseDemand(**{**demand.__dict__, "step": np.where(ok, demand.step, 1)})


def _store_order_demand(inp: TwoLevelInputs, store_q: np.ndarray) -> WarehouseDemand:
    """Warehouse demand from the stores' orders in batches of ``store_q`` (stores with no demand, or no
    positive finite Q, send no orders) plus the warehouse's own customers."""
    flowing = inp.store_active & (inp.store_mean > 0) & np.isfinite(store_q) & (store_q > 0)
    return warehouse_demand(
        np.where(flowing, inp.store_mean, 0.0),
        inp.store_sd,
        np.where(flowing, store_q, 1.0),
        inp.store_count,
        inp.warehouse_lead,
        inp.warehouse_lead_sd,
        inp.warehouse_own_mean,
        inp.warehouse_own_sd,
        inp.warehouse_count,
    )


def evaluate_two_level(
    inp: TwoLevelInputs,
    store_reorder_point: np.ndarray,
    store_order_quantity: np.ndarray,
    warehouse_reorder_point: np.ndarray,
    warehouse_order_quantity: np.ndarray,
    *,
    demand: WarehouseDemand | None = None,
    store_method: str = "auto",
    workers: int = 1,
    progress=None,
) -> TwoLevelResult:
    """Evaluate given ``(R, Q)`` at a warehouse and its stores, per item (METRIC-type, batch ordering).

    Parameters
    ----------
    inp : TwoLevelInputs
    store_reorder_point, store_order_quantity : ndarray, shape (n, m)
    warehouse_reorder_point, warehouse_order_quantity : ndarray, shape (n,)
    store_method : {"auto", "backlog", "units", "moments"}
        Store figures from the units each store has unshipped at the warehouse (:mod:`models.backlog`;
        items with count demand at every store, variance/mean at most ``models.backlog.MAX_DISPERSION``) or
        from the three-point delay mixture. ``"auto"``: the unit-level figures where they apply, for up to
        ``models.backlog.AUTO_MAX_STORE_ITEMS`` store-items per call; ``"backlog"``: wherever they apply;
        ``"units"``: also for normal-demand stores, taken as counts with the same mean and variance.
    workers : int
        Processes for the unit-level figures (items are independent).
    progress : callable, optional
        Called with a line of text now and then during the unit-level figures.

    Returns
    -------
    TwoLevelResult

    Examples
    --------
    See ``tests/test_echelon.py`` (Axsäter 1993 problems).

    Notes
    -----
    Warehouse demand by :func:`warehouse_demand`, its state by :func:`warehouse_moments`, delay moments by
    :func:`delay_moments`; each store is then evaluated by ``models.single_site.evaluate_policy`` with
    lead-time demand from :func:`store_ltd_moments` (negative binomial for counts when over-dispersed, normal
    otherwise).

    References
    ----------
    Sherbrooke (1968); Deuermeyer, B. L. & Schwarz, L. B. (1981), A model for the analysis of system service
    level in warehouse-retailer distribution systems, TIMS Studies in the Management Sciences 16;
    Svoronos & Zipkin (1988).
    """
    sq = np.asarray(store_order_quantity, dtype=float)
    if demand is None:  # (optional argument: the same demand already built by the caller for these Q)
        demand = _store_order_demand(inp, sq)
    q0 = np.asarray(warehouse_order_quantity, dtype=float)
    demand = _lattice_q0(demand, q0)
    res = _evaluate_mixture(inp, store_reorder_point, sq, warehouse_reorder_point, q0, demand)
    return _apply_backlog(inp, demand, res, sq, optimise=False, method=store_method, workers=workers,
                          progress=progress)


def _evaluate_mixture(inp, store_reorder_point, sq, warehouse_reorder_point, q0, demand) -> TwoLevelResult:
    """The moment model: stores over the three-point delay mixture."""
    r0 = np.asarray(warehouse_reorder_point, dtype=float)
    state = warehouse_moments(demand, r0, q0)
    ew, vw = delay_moments(state, demand)
    rows, mean, sd, codes, pol = _evaluate_stores(
        inp, ew, vw, np.asarray(store_reorder_point, dtype=float), sq, state.wait_probability, state.max_wait
    )
    n = inp.n
    return _assemble(
        inp,
        demand,
        r0,
        q0,
        state,
        ew,
        vw,
        rows,
        mean,
        sd,
        codes,
        pol,
        np.zeros(n, dtype=np.int64),
        np.ones(n, dtype=bool),
    )


def _golden_integers(f, a: int, b: int) -> int:
    """Least ``f`` over the integers ``a .. b`` (unimodal search, memoised by the caller)."""
    while b - a > 3:
        c = a + int(round((b - a) * 0.381966))
        d = max(a + int(round((b - a) * 0.618034)), c + 1)
        if f(c) <= f(d):
            b = d
        else:
            a = c
    return min(range(a, b + 1), key=f)


def _backlog_chunk(args):
    return _backlog_items(*args)


def _backlog_items(inp, demand, items, r0_in, r_in, store_q, q0, optimise, say=None) -> dict:
    """Unit-level figures (with ``optimise``, the R0 search too): {item: (cols, ItemStores, lam)}."""
    import time

    from models import backlog as bl

    act = inp.store_active
    dpy = inp.days_per_year
    sd0 = np.sqrt(np.maximum(demand.var, 0.0))
    r0_new = np.asarray(r0_in, dtype=float)
    r_new = np.asarray(r_in, dtype=float)
    found = {}
    last = time.monotonic()
    for done, it in enumerate(items):
        if say is not None and time.monotonic() - last > PROGRESS_SECONDS:
            say(f"store figures unit by unit: {done}/{len(items)} items")
            last = time.monotonic()
        cols = np.flatnonzero(act[it] & (inp.store_mean[it] > 0))
        lam = inp.store_mean[it, cols]
        vr = inp.store_sd[it, cols] ** 2
        q = np.rint(store_q[it, cols]).astype(np.int64)
        g = int(demand.step[it])
        q0i = int(round(q0[it]))
        if not demand.discrete[it] and float(inp.warehouse_own_mean[it]) == 0:
            g = int(np.gcd.reduce(q))  # normal rows taken as counts: the position moves in store batches
            g = g if g >= 1 and q0i % g == 0 else 1
        r0i = int(round(r0_new[it]))
        own = float(inp.warehouse_own_mean[it])
        transit = [
            bl.transit_pmf(lam[k], vr[k], inp.store_lead[it, c], inp.store_lead_sd[it, c])
            for k, c in enumerate(cols)
        ]
        kw = dict(
            annual=lam * dpy,
            order_cost=inp.store_order_cost[it, cols],
            holding_cost=inp.store_holding_cost[it, cols],
            backorder_cost=inp.store_backorder_cost[it, cols],
            basis=inp.backorder_basis,
        )
        search = optimise and inp.mode != "cycle_service"
        span = max(int(np.ceil(bl.SEARCH_SDS * sd0[it] / g)), 2) * g if search else 0
        lo = max(r0i - span, min(-q0i, r0i))  # (the moment search's own floor: R0 >= -Q0)
        tab_kw = dict(
            own_rate=own, own_var_rate=float(inp.warehouse_own_sd[it]) ** 2, step=g,
            warehouse_lead_sd=float(inp.warehouse_lead_sd[it]),
        )
        if bl.window_width(lam, vr, q, float(inp.warehouse_lead[it]), lowest_reorder_point=lo,
                           **tab_kw) > bl.MAX_WINDOW:
            continue
        tables = bl.backlog_tables(
            lam, vr, q, float(inp.warehouse_lead[it]), lowest_reorder_point=lo, **tab_kw
        )
        if int((tables.horizon * q).sum()) > bl.MAX_ITEM_WORK:
            continue
        if not search:
            st = bl.item_stores(tables, transit, r0i, q0i, reorder_point=r_new[it, cols], **kw)
        else:
            sub_inp, sub_dem = _take_inputs(inp, np.array([it])), _take_demand(demand, np.array([it]))
            target = inp.store_target[it, cols] if inp.mode == "fill_rate" else None
            cache = {}

            def cost(t, r0i=r0i, lo=lo, g=g, q0i=q0i, sub_inp=sub_inp, sub_dem=sub_dem, tables=tables,
                     transit=transit, kw=kw, target=target, cache=cache):
                if t not in cache:
                    r = lo + g * t
                    st = bl.item_stores(tables, transit, r, q0i, target=target, **kw)
                    state = warehouse_moments(sub_dem, np.array([float(r)]), np.array([float(q0i)]))
                    o, h, b, _ = _warehouse_rows(sub_inp, sub_dem, state, np.array([float(q0i)]))
                    cache[t] = (float(o[0] + h[0] + b[0]) + float(st.cost.sum()), st)
                return cache[t][0]

            t_mom = (r0i - lo) // g
            t_best = _golden_integers(cost, 0, (r0i + span - lo) // g)
            if cost(t_mom) <= cost(t_best):  # the moment model's choice
                t_best = t_mom
            st = cache[t_best][1]
        found[it] = (cols, st, lam)
    return found


def _apply_backlog(inp, demand, res, store_q, *, optimise: bool, method: str = "auto", workers: int = 1,
                   progress=None):
    """Unit-level store figures (:mod:`models.backlog`) for the items they apply to.

    With ``optimise`` the warehouse reorder point is searched again (golden section over the lattice within
    ``SEARCH_SDS`` sd of the moment model's choice, which is also a candidate) with each store's reorder point
    chosen by the unit-level figures (least cost, or the least meeting its fill-rate target; in the
    cycle-service mode the stores keep the moment model's reorder points and only the figures change).
    """
    from dataclasses import replace

    from models import backlog as bl

    if method not in ("auto", "backlog", "units", "moments"):
        raise ValueError(f"store_method must be 'auto', 'backlog', 'units' or 'moments'; found {method!r}")
    if method == "moments":
        return res
    n, m = inp.store_mean.shape
    act = inp.store_active
    q0 = np.asarray(res.warehouse_order_quantity, dtype=float)
    own_count = np.asarray(inp.warehouse_count, dtype=bool) | (inp.warehouse_own_mean == 0)
    # "units": normal-demand stores too, as counts with the same mean and variance (the simulator's rule)
    count = np.ones_like(inp.store_count) if method == "units" else inp.store_count
    ok = bl.eligible_items(
        count, act, inp.store_mean, store_q, inp.warehouse_lead, inp.warehouse_lead_sd, q0,
        inp.warehouse_own_mean, own_count, demand.step,
        dispersion=inp.store_sd**2 / np.maximum(inp.store_mean, 1e-300),
    )
    if method == "auto" and int(act[ok].sum()) > bl.AUTO_MAX_STORE_ITEMS:
        return res
    items = np.flatnonzero(ok)
    if items.size == 0:
        return res
    dpy = inp.days_per_year
    r0_new = np.asarray(res.warehouse_reorder_point, dtype=float).copy()
    r_new = np.asarray(res.store_reorder_point, dtype=float).copy()
    say = progress or (lambda _text: None)
    if workers > 1 and items.size >= BACKLOG_PARALLEL_MIN_ITEMS:
        from concurrent.futures import ProcessPoolExecutor

        say(f"store figures unit by unit: {items.size} items in {workers} processes")
        chunks = np.array_split(items, workers)
        jobs = [(inp, demand, c, r0_new, r_new, store_q, q0, optimise) for c in chunks]
        with ProcessPoolExecutor(max_workers=workers) as pool:
            found = {}
            for part in pool.map(_backlog_chunk, jobs):
                found.update(part)
    else:
        found = _backlog_items(inp, demand, items, r0_new, r_new, store_q, q0, optimise, say)
    for it, (cols, st, _) in found.items():
        r0_new[it] = st.warehouse_reorder_point
        r_new[it, cols] = st.reorder_point
    if not found:
        return res
    out = _evaluate_mixture(inp, r_new, store_q, r0_new, q0, demand)
    # overwrite the store figures of the items evaluated unit by unit
    pos = np.full((n, m), -1, dtype=np.int64)
    pos[act] = np.arange(int(act.sum()))
    pol = out.store_policy
    fields = {f: np.array(getattr(pol, f), dtype=float) for f in (
        "fill_rate", "expected_backorders", "expected_on_hand", "safety_stock", "z", "safety_stock_cost",
        "backorder_cost", "total_cost")}
    ltd_mean = out.store_ltd_mean.copy()
    delay = out.store_delay.copy()
    method_grid = out.store_method.copy()
    for it, (cols, st, lam) in found.items():
        p = pos[it, cols]
        h = inp.store_holding_cost[it, cols]
        mean = lam * inp.store_lead[it, cols] + st.mean_unshipped
        sd = out.store_ltd_sd[it, cols]
        fields["fill_rate"][p] = st.fill_rate
        fields["expected_backorders"][p] = st.backorders
        fields["expected_on_hand"][p] = st.on_hand
        fields["safety_stock"][p] = st.reorder_point - mean
        fields["z"][p] = np.where(sd > 0, (st.reorder_point - mean) / np.where(sd > 0, sd, 1.0), 0.0)
        fields["safety_stock_cost"][p] = h * st.on_hand - np.asarray(pol.cycle_stock_cost, dtype=float)[p]
        b = inp.store_backorder_cost[it, cols]
        fields["backorder_cost"][p] = b * (
            st.backorders if inp.backorder_basis == "per_unit_year" else lam * dpy * (1.0 - st.fill_rate)
        )
        fields["total_cost"][p] = st.cost
        ltd_mean[it, cols] = mean
        delay[it, cols] = st.mean_unshipped / lam
        method_grid[it, cols] = 1
    # notes, iterations and convergence stay those of the policy search
    keep = {f: getattr(res.store_policy, f) for f in ("note", "iterations", "converged")}
    pol = replace(pol, **fields, **keep)
    rows = np.nonzero(act)[0]
    store_cost = _per_item(rows, fields["total_cost"], n)
    network = (
        out.warehouse_ordering_cost + out.warehouse_holding_cost + out.warehouse_backorder_cost + store_cost
    )
    return replace(
        out, store_policy=pol, store_ltd_mean=ltd_mean, store_delay=delay, store_method=method_grid,
        store_cost=store_cost, network_cost=network, iterations=res.iterations, converged=res.converged,
    )


def single_site_seed(inp: TwoLevelInputs):
    """Each site planned alone: stores on their transit time, the warehouse on the aggregated order stream.

    Parameters
    ----------
    inp : TwoLevelInputs

    Returns
    -------
    store_r, store_q : ndarray, shape (n, m)
        Stores' reorder points and order quantities (``NaN`` Q for an active store without demand).
    warehouse_r, warehouse_q : ndarray, shape (n,)
    demand : WarehouseDemand
        Warehouse lead-time demand from the stores' orders in batches of ``store_q``.

    Examples
    --------
    See ``tests/test_echelon.py`` and ``tests/test_network.py`` (the seed is the single-site plan that the
    network plan is compared with).

    Notes
    -----
    The warehouse has no cost of its own for keeping stores waiting; where it has no backorder cost or
    target of its own it is planned with the demand-weighted mean of its stores' values (the way a site
    planned alone would be set up).

    References
    ----------
    Axsäter, S. (2003). Approximate optimization of a two-level distribution inventory system. International
    Journal of Production Economics 81-82, 545-553.
    """
    from models import single_site as ss

    n, m = inp.store_mean.shape
    act = inp.store_active
    zero = np.zeros(n)
    _, mean, sd, codes, pol = _optimise_stores(inp, zero, zero, inp.store_fixed_q)
    store_q = np.full((n, m), 1.0)
    store_r = np.zeros((n, m))
    q_seed = np.asarray(pol.order_quantity, dtype=float)
    store_q[act] = np.where(q_seed > 0, q_seed, np.nan)  # zero-demand stores keep a free Q
    store_r[act] = pol.reorder_point
    demand = _store_order_demand(inp, store_q)
    w = np.where(act, inp.store_mean, 0.0)
    wsum = np.where(w.sum(axis=1) > 0, w.sum(axis=1), 1.0)
    proxy_b = (w * np.where(act, inp.store_backorder_cost, 0.0)).sum(axis=1) / wsum
    proxy_t = (w * np.where(act & np.isfinite(inp.store_target), inp.store_target, 0.0)).sum(axis=1) / wsum
    b0 = np.where(inp.warehouse_backorder_cost > 0, inp.warehouse_backorder_cost, proxy_b)
    t0 = np.where(np.isfinite(inp.warehouse_target), inp.warehouse_target, proxy_t)
    sd0 = np.sqrt(np.maximum(demand.var, 0.0))
    code0 = np.where(demand.discrete, _store_codes(np.ones(n, dtype=bool), demand.mean, sd0), 0).astype(
        np.int8
    )
    # Q0: a multiple of the store batch lattice for count items (orders arrive in those batches)
    pol0 = ss.optimise_policy(
        demand.rate * inp.days_per_year,
        demand.mean,
        sd0,
        inp.warehouse_order_cost,
        inp.warehouse_holding_cost,
        distribution=code0,
        mode=inp.mode,
        backorder_cost=b0,
        backorder_basis=inp.backorder_basis,
        target=t0,
        order_quantity=inp.warehouse_fixed_q,
        pack_size=inp.warehouse_pack,
    )
    q0 = np.asarray(pol0.order_quantity, dtype=float)
    free = ~np.isfinite(inp.warehouse_fixed_q) & demand.discrete
    g = (
        demand.step
        * np.maximum(np.rint(inp.warehouse_pack), 1).astype(np.int64)
        // np.gcd(demand.step, np.maximum(np.rint(inp.warehouse_pack), 1).astype(np.int64))
    )
    q0 = np.where(free, np.maximum(np.rint(q0 / g), 1) * g, q0)
    r0 = np.asarray(pol0.reorder_point, dtype=float)
    return store_r, store_q, r0, q0, demand


def _concat_results(parts: list[TwoLevelResult]) -> TwoLevelResult:
    from dataclasses import fields

    from models import single_site as ss

    out = {}
    for f in fields(TwoLevelResult):
        vals = [getattr(p, f.name) for p in parts]
        if f.name == "store_policy":
            out[f.name] = ss.SitePolicy(
                **{
                    g: np.concatenate([np.asarray(getattr(v, g)) for v in vals])
                    for g in ss.SitePolicy.__dataclass_fields__
                }
            )
        else:
            out[f.name] = np.concatenate(vals, axis=0)
    return TwoLevelResult(**out)


def _optimise_chunk(args):
    inp, points, rounds, store_method = args
    return optimise_two_level(inp, points=points, rounds=rounds, workers=1, store_method=store_method)


def optimise_two_level(
    inp: TwoLevelInputs,
    *,
    points: int = SEARCH_POINTS,
    rounds: int = SEARCH_ROUNDS,
    workers: int = 1,
    store_method: str = "auto",
    progress=None,
) -> tuple[TwoLevelResult, TwoLevelResult]:
    """Network-optimal warehouse reorder point with the stores re-optimised for each candidate.

    Parameters
    ----------
    inp : TwoLevelInputs
    points, rounds : int
        Grid points bracketing the warehouse reorder point (``rounds`` is kept for the tree search).
    workers : int
        Processes over chunks of items (items are independent); 1 runs in this process.
    store_method : {"auto", "backlog", "moments"}
        As in :func:`evaluate_two_level`; with the unit model the warehouse reorder point is searched again
        around the moment model's choice.
    progress : callable, optional
        Called with a line of text now and then during the unit-level figures.

    Returns
    -------
    network : TwoLevelResult
        The network plan.
    seed : TwoLevelResult
        The single-site plan (each site alone, :func:`single_site_seed`) evaluated in the network.

    Examples
    --------
    See ``tests/test_echelon.py``.

    Notes
    -----
    Order quantities stay as seeded (or as fixed). For every item the warehouse reorder point ``R0`` runs over
    a grid between ``-Q0`` (no stock kept) and the LTD mean + ``SEARCH_HIGH_SDS`` sd; each candidate gives the
    delay moments, the stores' reorder points are re-optimised for them
    (``models.single_site.optimise_policy``
    with the stores' own cost or service mode) and the network cost (warehouse ordering + holding +
    own-customer
    backorders, plus the stores' total costs) is computed. The grid then narrows around the best candidate
    (``points`` candidates, ``rounds`` rounds, stop below ``SEARCH_TOL_UNITS`` units / ``SEARCH_TOL_SD`` sd),
    vectorised over items. In the service modes the stores meet their targets for each candidate, so the least
    network cost is the least-cost way to meet them (Axsäter 2003; Andersson, Axsäter & Marklund 1998).

    References
    ----------
    Axsäter, S. (2003). Approximate optimization of a two-level distribution inventory system. International
    Journal of Production Economics 81-82, 545-553.
    """
    n, m = inp.store_mean.shape
    if workers > 1 and n >= 2 * PARALLEL_MIN_ITEMS:
        from concurrent.futures import ProcessPoolExecutor

        chunks = np.array_split(np.arange(n), workers)
        with ProcessPoolExecutor(max_workers=workers) as pool:
            jobs = [(_take_inputs(inp, c), points, rounds, store_method) for c in chunks]
            parts = list(pool.map(_optimise_chunk, jobs))
        return _concat_results([p[0] for p in parts]), _concat_results([p[1] for p in parts])
    store_r, store_q, r0_seed, q0, demand = single_site_seed(inp)
    demand = _lattice_q0(demand, q0)
    seed_eval = evaluate_two_level(
        inp, store_r, store_q, r0_seed, q0, demand=demand, store_method=store_method, workers=workers,
        progress=progress,
    )
    tables = discrete_tables(demand)
    sd0 = np.sqrt(np.maximum(demand.var, 0.0))
    disc = demand.discrete
    lo = -q0.astype(float)
    hi = np.maximum(np.ceil(demand.mean + SEARCH_HIGH_SDS * sd0), lo + 1.0)
    hi = np.maximum(hi, r0_seed)
    lo = np.minimum(lo, r0_seed)
    best_r = r0_seed.copy()
    its = np.zeros(n, dtype=np.int64)
    done = np.zeros(n, dtype=bool)

    def network_cost(r0c, idx=None):
        if idx is None:
            sub_inp, sub_dem, sub_tab, sub_q, q0s = inp, demand, tables, store_q, q0
        else:
            sub_inp, sub_dem, sub_tab = (
                _take_inputs(inp, idx),
                _take_demand(demand, idx),
                _take_tables(tables, idx, n),
            )
            sub_q, q0s = store_q[idx], q0[idx]
        state = warehouse_moments(sub_dem, r0c, q0s, tables=sub_tab)
        ew, vw = delay_moments(state, sub_dem)
        rows, _, _, _, pol = _optimise_stores(sub_inp, ew, vw, sub_q, state.wait_probability, mixture=False)
        ordering, holding, back, _ = _warehouse_rows(sub_inp, sub_dem, state, q0s)
        return ordering + holding + back + _per_item(rows, np.asarray(pol.total_cost, dtype=float), r0c.size)

    tol = np.maximum(np.where(disc, SEARCH_TOL_UNITS, 0.0), SEARCH_TOL_SD * np.maximum(sd0, 1e-9))
    # on a lattice of step g the reorder point moves in steps of g (the residue would only shift positions)
    g = np.where(disc, demand.step, 1).astype(float)
    best_x, _, its, done = golden_search(
        lambda x, idx=None: network_cost(x * (g if idx is None else g[idx]), idx),
        lo / g,
        hi / g,
        disc,
        tol / g,
        points=points,
        max_iter=GOLDEN_MAX_ITER,
        extra=r0_seed / g,
        subset=True,
    )
    best_r = best_x * g
    # final: stores re-optimised at the best R0, then evaluated
    state = warehouse_moments(demand, best_r, q0, tables=tables)
    ew, vw = delay_moments(state, demand)
    rows, mean, sd, codes, pol = _optimise_stores(
        inp, ew, vw, store_q, state.wait_probability, refine=True, mw=state.max_wait
    )
    result = _assemble(inp, demand, best_r, q0, state, ew, vw, rows, mean, sd, codes, pol, its, done)
    result = _apply_backlog(inp, demand, result, store_q, optimise=True, method=store_method, workers=workers,
                            progress=progress)
    return result, seed_eval


# ----------------------------------------------------------------------------------------------------------
# trees deeper than two levels: the same step level by level (moment-fitted site demand)
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class TreeInputs:
    """``n`` items on a tree of ``S`` slots (slot 0 the root; ``parent[s]`` the slot above, -1 at the root).

    Arrays ``(n, S)``: ``active`` (the item is stocked there), ``mean``/``sd`` (own customer demand per day),
    ``lead``/``lead_sd`` (supplier lead time at the root, transit below), ``count`` (count demand),
    ``order_cost``, ``holding_cost``, ``backorder_cost`` (0 where none), ``target`` (NaN where none),
    ``fixed_q`` (NaN = free), ``pack``. A site whose children do not stock an item is a leaf for that item.
    """

    parent: np.ndarray
    active: np.ndarray
    mean: np.ndarray
    sd: np.ndarray
    lead: np.ndarray
    lead_sd: np.ndarray
    count: np.ndarray
    order_cost: np.ndarray
    holding_cost: np.ndarray
    backorder_cost: np.ndarray
    target: np.ndarray
    fixed_q: np.ndarray
    pack: np.ndarray
    days_per_year: float = 365.0
    mode: str = "cost"
    backorder_basis: str = "per_unit"

    def __post_init__(self) -> None:
        _check_inputs(self, self.active.shape, self.active.shape[:1])
        if self.parent.shape != self.active.shape[1:]:
            raise ValueError(f"parent must have shape {self.active.shape[1:]}; found {self.parent.shape}")


@dataclass(frozen=True)
class TreeResult:
    """Per (item, slot) arrays ``(n, S)`` (NaN where not stocked) and per item ``network_cost`` (n,).

    ``delay``/``delay_var``: the wait a slot's orders see at its parent (0 at the root). ``leaf``: slots
    evaluated by the single-site functions. ``iterations``/``converged``: the reorder-point search (n,).
    """

    reorder_point: np.ndarray
    order_quantity: np.ndarray
    safety_stock: np.ndarray
    ltd_mean: np.ndarray
    ltd_sd: np.ndarray
    distribution: np.ndarray
    cycle_service: np.ndarray
    fill_rate: np.ndarray
    on_hand: np.ndarray
    backorders: np.ndarray
    orders_per_year: np.ndarray
    ordering_cost: np.ndarray
    cycle_stock_cost: np.ndarray
    safety_stock_cost: np.ndarray
    backorder_cost: np.ndarray
    total_cost: np.ndarray
    z: np.ndarray
    note: np.ndarray
    delay: np.ndarray
    delay_var: np.ndarray
    leaf: np.ndarray
    network_cost: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray


def _tree_shape(parent: np.ndarray, active: np.ndarray):
    parent = np.asarray(parent, dtype=np.int64)
    s_count = parent.size
    depth = np.zeros(s_count, dtype=np.int64)
    for s in range(s_count):
        p, d = parent[s], 0
        while p >= 0:
            d += 1
            p = parent[p]
            if d > s_count:
                raise ValueError("parent: the slots form a cycle")
        depth[s] = d
    children = [np.flatnonzero(parent == s) for s in range(s_count)]
    has_child = np.zeros_like(active)
    for s in range(s_count):
        for c in children[s]:
            has_child[:, s] |= active[:, c]
    return depth, children, active & ~has_child, active & has_child


def _fitted_demand(
    mean, var, rate, lead_sd, short, long_, const, own_var, count, order_size, own_rate=None, lone_offset=None
) -> WarehouseDemand:
    """A site's lead-time demand by moments: negative binomial / Poisson pmf for counts, else normal."""
    n = mean.size
    width_need = _support_width(mean, var)
    discrete = count & (width_need <= MAX_FIT_SUPPORT)
    bucket = np.maximum(2 ** np.ceil(np.log2(np.maximum(width_need, 1))), MIN_WIDTH).astype(np.int64)
    tail = np.zeros(n)
    blocks = []
    for w in np.unique(bucket[discrete]):
        idx = np.flatnonzero(discrete & (bucket == w))
        pmf, t = count_pmf(mean[idx], var[idx], int(w))
        tail[idx] = t
        keep = t <= TAIL_TOL
        blocks.append((idx[keep], pmf[keep]))
    discrete = discrete & (tail <= TAIL_TOL)
    return WarehouseDemand(
        mean=mean,
        var=var,
        discrete=discrete,
        blocks=tuple(blocks),
        step=np.ones(n, np.int64),
        rate=rate,
        variance_rate=short.sum(axis=1) + own_var,
        tail=tail,
        method=np.where(discrete, 2, 0).astype(np.int8),
        lead_sd=lead_sd,
        stream_short=short,
        stream_long=long_,
        stream_const=const,
        own_var_rate=own_var,
        order_size=order_size,
        own_rate=own_rate,
        lone_offset=lone_offset,
    )


def _tree_pass(inp: TreeInputs, r: np.ndarray, q: np.ndarray, *, optimise_leaves: bool, refine: bool = False):
    """One evaluation of the whole tree (leaves evaluated or re-optimised for the delays they face)."""

    n, s_count = inp.active.shape
    act = inp.active
    depth, children, leaf, internal = _tree_shape(inp.parent, act)
    qv = np.where(act, q, np.nan)
    # bottom-up: rates and long-window variance rates of the demand arriving at each slot
    rate = np.where(act, inp.mean, 0.0)
    longv = np.where(act, inp.sd**2, 0.0)
    for s in np.argsort(-depth, kind="stable"):
        for c in children[s]:
            rate[:, s] += np.where(act[:, c], rate[:, c], 0.0)
            longv[:, s] += np.where(act[:, c], longv[:, c], 0.0)

    def window_var(s, w):
        v = np.where(act[:, s], inp.sd[:, s] ** 2 * w, 0.0)
        for c in children[s]:
            on = act[:, c] & (rate[:, c] > 0)
            if not np.any(on):
                continue
            inner = window_var(c, w)
            qc = np.where(on & np.isfinite(qv[:, c]), qv[:, c], 1.0)
            v = v + np.where(on, order_stream_variance(rate[:, c] * w, inner, qc), 0.0)
        return v

    def streams(s):
        cs = children[s]
        if len(cs) == 0:
            z = np.zeros((n, 1))
            return z, z, z
        on = act[:, cs] & (rate[:, cs] > 0)
        qc = np.where(on & np.isfinite(qv[:, cs]), qv[:, cs], 1.0)
        short = np.where(on, np.maximum(rate[:, cs] * qc, longv[:, cs]), 0.0)
        long_ = np.where(on, longv[:, cs], 0.0)
        cnt = inp.count[:, cs]
        const = np.where(on, np.where(cnt, (qc**2 - 1.0) / 6.0, qc**2 / 6.0), 0.0)
        return short, long_, const

    out = {
        k: np.full((n, s_count), np.nan)
        for k in (
            "safety_stock",
            "ltd_mean",
            "ltd_sd",
            "cycle_service",
            "fill_rate",
            "on_hand",
            "backorders",
            "orders_per_year",
            "ordering_cost",
            "cycle_stock_cost",
            "safety_stock_cost",
            "backorder_cost",
            "total_cost",
            "z",
        )
    }
    dist = np.full((n, s_count), -1, dtype=np.int64)
    note = np.zeros((n, s_count), dtype=np.int64)
    delay = np.zeros((n, s_count))
    delay_var = np.zeros((n, s_count))
    wait_p = np.zeros((n, s_count))
    wait_cap = np.full((n, s_count), np.inf)
    r_out = np.where(act, r, np.nan)
    q_out = qv.copy()
    days = inp.days_per_year
    # top-down over internal slots: each slot's state gives its children's delay
    for s in np.argsort(depth, kind="stable"):
        rows = internal[:, s]
        if not np.any(rows):
            continue
        ew_p, vw_p = delay[:, s], delay_var[:, s]
        window = inp.lead[:, s] + ew_p
        mean = rate[:, s] * window
        var = window_var(s, window) + rate[:, s] ** 2 * (inp.lead_sd[:, s] ** 2 + vw_p)
        short, long_, const = streams(s)
        cs = children[s]
        on = act[:, cs] & (rate[:, cs] > 0)
        qcs = np.where(on & np.isfinite(qv[:, cs]), qv[:, cs], 1.0)
        osize = np.where(on, rate[:, cs] * qcs, 0.0).sum(axis=1) + np.where(act[:, s], inp.mean[:, s], 0.0)
        osize = np.where(rate[:, s] > 0, osize / np.where(rate[:, s] > 0, rate[:, s], 1.0), 1.0)
        demand = _fitted_demand(
            mean,
            var,
            rate[:, s],
            np.sqrt(inp.lead_sd[:, s] ** 2 + vw_p),
            short,
            long_,
            const,
            np.where(act[:, s], inp.sd[:, s] ** 2, 0.0),
            inp.count[:, s],
            osize,
            np.where(act[:, s], inp.mean[:, s], 0.0),
            lone_unit_offset(rate[:, cs], qcs, inp.count[:, cs], on, rate[:, s], window),
        )
        rs = np.where(rows, r[:, s], 0.0)
        qs = np.where(rows & np.isfinite(qv[:, s]), qv[:, s], 1.0)
        state = warehouse_moments(demand, rs, qs)
        ew, vw = delay_moments(state, demand)
        for c in children[s]:
            delay[:, c] = np.where(act[:, c], ew, 0.0)
            delay_var[:, c] = np.where(act[:, c], vw, 0.0)
            wait_p[:, c] = np.where(act[:, c], state.wait_probability, 0.0)
            wait_cap[:, c] = state.max_wait
        sd0 = np.sqrt(np.maximum(var, 0.0))
        ordering = inp.order_cost[:, s] * rate[:, s] * days / qs
        holding = inp.holding_cost[:, s] * state.expected_on_hand
        fill = 1.0 - np.where(inp.mean[:, s] > 0, state.own_stockout_probability, state.stockout_probability)
        if inp.backorder_basis == "per_unit_year":
            back = inp.backorder_cost[:, s] * state.own_backorders
        else:
            back = inp.backorder_cost[:, s] * inp.mean[:, s] * days * (1.0 - fill)
        cycle = inp.holding_cost[:, s] * qs / 2.0
        cdf_r = special.ndtr((rs - mean) / np.maximum(sd0, SD_FLOOR * np.maximum(1.0, mean)))
        for rws, pmf in demand.blocks:
            cdf = np.cumsum(pmf, axis=1)
            k = np.clip(np.rint(rs[rws]).astype(np.int64), -1, cdf.shape[1] - 1)
            cdf_r[rws] = np.where(
                k < 0, 0.0, np.take_along_axis(cdf, np.maximum(k, 0)[:, None], axis=1)[:, 0]
            )
        vals = {
            "safety_stock": rs - mean,
            "ltd_mean": mean,
            "ltd_sd": sd0,
            "cycle_service": cdf_r,
            "fill_rate": fill,
            "on_hand": state.expected_on_hand,
            "backorders": state.expected_backorders,
            "orders_per_year": rate[:, s] * days / qs,
            "ordering_cost": ordering,
            "cycle_stock_cost": cycle,
            "safety_stock_cost": holding - cycle,
            "backorder_cost": back,
            "total_cost": ordering + holding + back,
            "z": np.where(sd0 > 0, (rs - mean) / np.where(sd0 > 0, sd0, 1.0), np.nan),
        }
        for k, v in vals.items():
            out[k][:, s] = np.where(rows, v, out[k][:, s])
        dist[:, s] = np.where(rows, np.where(demand.discrete, 1, 0), dist[:, s])
    # leaves: the single-site functions with the delay they face
    args = (
        inp.mean[leaf] * days,
        inp.mean[leaf],
        inp.sd[leaf],
        inp.lead[leaf],
        inp.lead_sd[leaf],
        inp.count[leaf],
        inp.order_cost[leaf],
        inp.holding_cost[leaf],
        inp.backorder_cost[leaf],
        inp.target[leaf],
    )
    if optimise_leaves:
        q_leaf, options = qv[leaf], {"refine": refine}
    else:
        q_leaf = np.where(np.isfinite(qv[leaf]), qv[leaf], 0.0)
        options = {"reorder_point": np.where(np.isfinite(r_out[leaf]), r_out[leaf], 0.0)}
    pol, lm, lsd, codes = leaf_policies(
        *args,
        q_leaf,
        inp.pack[leaf],
        delay[leaf],
        delay_var[leaf],
        wait_p[leaf],
        mode=inp.mode,
        basis=inp.backorder_basis,
        max_wait=wait_cap[leaf],
        **options,
    )
    r_out[leaf] = pol.reorder_point
    q_out[leaf] = pol.order_quantity
    out["ltd_mean"][leaf] = lm
    out["ltd_sd"][leaf] = lsd
    for k, f in (
        ("safety_stock", "safety_stock"),
        ("cycle_service", "cycle_service"),
        ("fill_rate", "fill_rate"),
        ("on_hand", "expected_on_hand"),
        ("backorders", "expected_backorders"),
        ("orders_per_year", "orders_per_year"),
        ("ordering_cost", "ordering_cost"),
        ("cycle_stock_cost", "cycle_stock_cost"),
        ("safety_stock_cost", "safety_stock_cost"),
        ("backorder_cost", "backorder_cost"),
        ("total_cost", "total_cost"),
        ("z", "z"),
    ):
        out[k][leaf] = np.asarray(getattr(pol, f), dtype=float)
    dist[leaf] = codes
    note[leaf] = np.asarray(pol.note).astype(np.int64)
    cost = np.nansum(np.where(act, out["total_cost"], 0.0), axis=1)
    return TreeResult(
        reorder_point=r_out,
        order_quantity=q_out,
        distribution=dist,
        note=note,
        delay=delay,
        delay_var=delay_var,
        leaf=leaf,
        network_cost=cost,
        iterations=np.zeros(n, np.int64),
        converged=np.ones(n, dtype=bool),
        **out,
    )


def evaluate_tree(inp: TreeInputs, reorder_point: np.ndarray, order_quantity: np.ndarray) -> TreeResult:
    """Evaluate given ``(R, Q)`` on a site tree of any depth, level by level.

    Parameters
    ----------
    inp : TreeInputs
    reorder_point, order_quantity : ndarray, shape (n, S)

    Returns
    -------
    TreeResult

    Examples
    --------
    See ``tests/test_network.py`` (three-level trees against the simulator).

    Notes
    -----
    Bottom-up, each slot's arriving demand is its own customers plus its children's order streams (rates add;
    the variance over a window ``w`` is ``sum_c Var(Q_c floor((D_c(w) + V_c) / Q_c))`` by
    :func:`order_stream_variance`, recursively). Top-down, an internal slot faces lead time ``L_s +
    W_parent``;
    its lead-time demand (mean ``lambda_s (L_s + E W)``, variance ``V_s(L_s + E W) + lambda_s**2 (sL**2 +
    Var W)``) is fitted (negative binomial / normal), its state gives the delay moments of its children
    (:func:`delay_moments`); leaves use the single-site functions. For two levels
    :func:`evaluate_two_level` uses the exact convolution at the root instead.

    References
    ----------
    Sherbrooke, C. C. (1968). METRIC: a multi-echelon technique for recoverable item control. Operations
    Research 16(1), 122-141.
    Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level inventory systems. Operations
    Research 36(1), 57-72.
    """
    return _tree_pass(
        inp,
        np.asarray(reorder_point, dtype=float),
        np.asarray(order_quantity, dtype=float),
        optimise_leaves=False,
    )


def optimise_tree(
    inp: TreeInputs, *, points: int = SEARCH_POINTS, rounds: int = SEARCH_ROUNDS
) -> tuple[TreeResult, TreeResult]:
    """Plan a site tree of any depth: single-site seeds, then each internal level's reorder points searched.

    Parameters
    ----------
    inp : TreeInputs
    points, rounds : int
        As :func:`optimise_two_level`.

    Returns
    -------
    network, seed : TreeResult
        The plan, and the single-site plan evaluated on the tree.

    Examples
    --------
    See ``tests/test_network.py``.

    Notes
    -----
    Seeds: every site planned alone (leaves on their transit time; an internal site on the demand passing
    through it, with its own backorder cost or target, else the demand-weighted mean of its leaves'). Order
    quantities stay as seeded. Then internal slots are taken deepest level first, then up to the root; for
    each slot the reorder point runs over a bracketing grid (vectorised over items) with every leaf
    re-optimised
    for the resulting delays and the other internal slots fixed, minimising the network cost per item.

    References
    ----------
    Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level inventory systems. Operations
    Research 36(1), 57-72.
    Axsäter, S. (2003). Approximate optimization of a two-level distribution inventory system. International
    Journal of Production Economics 81-82, 545-553.
    """
    from models import single_site as ss

    n, s_count = inp.active.shape
    act = inp.active
    depth, children, leaf, internal = _tree_shape(inp.parent, act)
    days = inp.days_per_year
    # seeds -------------------------------------------------------------------------------------------
    rate = np.where(act, inp.mean, 0.0)
    var_rate = np.where(act, inp.sd**2, 0.0)
    w_b = np.where(leaf, inp.mean * inp.backorder_cost, 0.0)
    w_t = np.where(leaf & np.isfinite(inp.target), inp.mean * np.nan_to_num(inp.target), 0.0)
    w_m = np.where(leaf, inp.mean, 0.0)
    for s in np.argsort(-depth, kind="stable"):
        for c in children[s]:
            on = act[:, c]
            for a in (rate, var_rate, w_b, w_t, w_m):
                a[:, s] += np.where(on, a[:, c], 0.0)
    wm = np.where(w_m > 0, w_m, 1.0)
    back = np.where(internal & (inp.backorder_cost <= 0), w_b / wm, inp.backorder_cost)
    target = np.where(internal & ~np.isfinite(inp.target), w_t / wm, inp.target)
    ltd_m = rate * inp.lead
    ltd_v = var_rate * inp.lead + rate**2 * inp.lead_sd**2
    ltd_s = np.sqrt(np.maximum(ltd_v, 0.0))
    codes = _store_codes(inp.count[act], ltd_m[act], ltd_s[act])
    pol = ss.optimise_policy(
        rate[act] * days,
        ltd_m[act],
        ltd_s[act],
        inp.order_cost[act],
        inp.holding_cost[act],
        distribution=codes,
        mode=inp.mode,
        backorder_cost=back[act],
        backorder_basis=inp.backorder_basis,
        target=target[act],
        order_quantity=inp.fixed_q[act],
        pack_size=inp.pack[act],
    )
    q = np.full((n, s_count), np.nan)
    r = np.zeros((n, s_count))
    qseed = np.asarray(pol.order_quantity, dtype=float)
    q[act] = np.where(qseed > 0, qseed, np.nan)
    r[act] = pol.reorder_point
    q = np.where(internal & ~(q > 0), 1.0, q)
    seed = _tree_pass(inp, r, q, optimise_leaves=False)
    # level-wise search ---------------------------------------------------------------------------------
    its = np.zeros(n, dtype=np.int64)
    conv = np.ones(n, dtype=bool)
    best = seed
    for s in np.argsort(-depth, kind="stable"):
        rows = internal[:, s]
        if not np.any(rows):
            continue
        mean_s = best.ltd_mean[:, s]
        sd_s = best.ltd_sd[:, s]
        disc = inp.count[:, s]
        lo = np.where(rows, -q[:, s], 0.0)
        hi = np.where(rows, np.ceil(np.nan_to_num(mean_s) + SEARCH_HIGH_SDS * np.nan_to_num(sd_s)), 1.0)
        hi = np.maximum(hi, lo + 1.0)
        best_r = np.where(rows, r[:, s], 0.0)
        best_c = np.full(n, np.inf)
        done = ~rows
        tol = np.where(disc, SEARCH_TOL_UNITS, SEARCH_TOL_SD * np.maximum(np.nan_to_num(sd_s), 1e-9))
        for _ in range(rounds):
            step = (hi - lo) / (points - 1)
            cand = lo[:, None] + np.linspace(0.0, 1.0, points)[None, :] * (hi - lo)[:, None]
            cand = np.where(disc[:, None], np.rint(cand), cand)
            costs = np.empty((n, points))
            for j in range(points):
                rr = r.copy()
                rr[:, s] = np.where(rows, cand[:, j], r[:, s])
                costs[:, j] = _tree_pass(inp, rr, q, optimise_leaves=True).network_cost
            j = np.argmin(costs, axis=1)
            cj = costs[np.arange(n), j]
            better = (cj < best_c) & ~done
            best_c = np.where(better, cj, best_c)
            best_r = np.where(better, cand[np.arange(n), j], best_r)
            its += ~done
            done |= step <= tol
            lo = np.where(done, lo, np.maximum(best_r - step, lo))
            hi = np.where(done, hi, np.minimum(best_r + step, hi))
            if np.all(done):
                break
        conv &= done
        r[:, s] = np.where(rows, best_r, r[:, s])
        best = _tree_pass(inp, r, q, optimise_leaves=True)
        r = np.where(best.leaf, best.reorder_point, r)
    final = _tree_pass(inp, r, q, optimise_leaves=True, refine=True)
    return TreeResult(**{**final.__dict__, "iterations": its, "converged": conv}), seed


# ----------------------------------------------------------------------------------------------------------
# sites facing a random delay: the delay as a three-point mixture
# ----------------------------------------------------------------------------------------------------------
_SKEW = 1.0
#: Iterations of the final reorder-point refinement of stores under the delay mixture.
REFINE_ITER = 6
#: Newton steps of the cost refinement and their finite-difference step (in lead-time-demand sds).
REFINE_NEWTON = 2
REFINE_STEP_SD = 0.25
#: The refinement brackets the reorder point within these many lead-time-demand sds of the first guess.
REFINE_LOW_SDS = 2.0
REFINE_HIGH_SDS = 4.0
#: Wait points with less weight than this are not evaluated.
MIX_MIN_WEIGHT = 1e-7
_MIX_FIELDS = (
    "cycle_service",
    "fill_rate",
    "expected_on_hand",
    "expected_backorders",
    "safety_stock_cost",
    "backorder_cost",
    "total_cost",
)


def wait_points(
    mean_delay: np.ndarray,
    var_delay: np.ndarray,
    wait_probability: np.ndarray,
    max_wait: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Three-point distribution of the delay: no wait, and two points for the wait when there is one.

    Parameters
    ----------
    mean_delay, var_delay : ndarray
        ``E[W]``, ``Var(W)``.
    wait_probability : ndarray
        ``P(W > 0)``.
    max_wait : ndarray, optional
        Longest plausible wait; the upper point is kept below it (mean and variance kept where possible).

    Returns
    -------
    points, weights : ndarray, shape (..., 3)

    Examples
    --------
    >>> pts, wts = wait_points(np.array([1.0]), np.array([3.0]), np.array([0.5]))
    >>> round(float((pts * wts).sum()), 12), round(float((pts**2 * wts).sum()), 12)
    (1.0, 4.0)

    Notes
    -----
    ``W = 0`` with probability ``1 - P``; given ``W > 0`` the wait has mean ``m = E[W] / P`` and variance
    ``v = E[W^2] / P - m**2``, represented by the two-point law with the mean, variance and skewness
    ``2 sqrt(v) / m`` of a gamma variable: ``m + sqrt(v) x`` with ``x = (g -+ sqrt(g**2 + 4)) / 2``, always
    non-negative. ``P`` is raised to ``E[W]**2 / E[W^2]`` where needed so that ``v >= 0``.

    References
    ----------
    Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level inventory systems. Operations
    Research 36(1), 57-72.
    """
    ew = np.asarray(mean_delay, dtype=float)
    ew2 = np.asarray(var_delay, dtype=float) + ew * ew
    p = np.clip(np.asarray(wait_probability, dtype=float), 0.0, 1.0)
    has = ew > 0
    p = np.where(has, np.maximum(p, np.where(ew2 > 0, ew * ew / np.where(ew2 > 0, ew2, 1.0), 1.0)), 0.0)
    p = np.minimum(p, 1.0)
    ps = np.where(has, p, 1.0)
    m = ew / ps
    v = np.maximum(ew2 / ps - m * m, 0.0)
    sd = np.sqrt(v)
    g = np.where(m > 0, _SKEW * 2.0 * sd / np.where(m > 0, m, 1.0), 0.0)
    g = np.maximum(g, np.where(sd > m, (sd * sd - m * m) / np.maximum(m * sd, 1e-300), 0.0))
    root = np.sqrt(g * g + 4.0)
    a, b = (g - root) / 2.0, (g + root) / 2.0
    pa, pb = b / (b - a), -a / (b - a)
    low, up = np.maximum(m + sd * a, 0.0), m + sd * b
    if max_wait is not None:
        cap = np.asarray(max_wait, dtype=float)
        over = (up > cap) & (cap > m)
        capped_low = np.maximum(m - v / np.where(over, cap - m, 1.0), 0.0)
        p_up = np.where(over, (m - capped_low) / np.where(over, cap - capped_low, 1.0), pb)
        low = np.where(over, capped_low, low)
        up = np.where(over, cap, up)
        pb = p_up
        pa = 1.0 - p_up
    points = np.stack([np.zeros_like(m), low, up], axis=-1)
    weights = np.stack([1.0 - p, p * pa, p * pb], axis=-1)
    return points, weights


def _by_code(fn, codes, *arrays, **kwargs):
    """Call a single-site function separately on the negative binomial rows and the others.

    (Its count kernels evaluate both special functions on every element when a call mixes the families.)
    """
    from models import demand as md
    from models import single_site as ss

    nb = codes == md.NEGBIN
    if nb.all() or not nb.any():
        return fn(*arrays, distribution=codes, **kwargs)
    parts = [np.flatnonzero(nb), np.flatnonzero(~nb)]
    kw = {k: v for k, v in kwargs.items()}
    outs = []
    for idx in parts:
        sub_kw = {
            k: (v[idx] if isinstance(v, np.ndarray) and v.shape == codes.shape else v) for k, v in kw.items()
        }
        outs.append(
            fn(
                *[a[idx] if isinstance(a, np.ndarray) and a.shape == codes.shape else a for a in arrays],
                distribution=codes[idx],
                **sub_kw,
            )
        )
    fields = {}
    for f in ss.SitePolicy.__dataclass_fields__:
        v0 = np.asarray(getattr(outs[0], f))
        full = np.empty(codes.shape, dtype=v0.dtype)
        full[parts[0]] = v0
        full[parts[1]] = np.asarray(getattr(outs[1], f))
        fields[f] = full
    return ss.SitePolicy(**fields)


def _mix_eval(annual, dmean, dsd, lead, lead_sd, count, a, h, b, r, q, points, weights, basis):
    """Single-site evaluation mixed over the delay points (each KPI here is linear in the distribution)."""
    from models import single_site as ss

    mixed = {f: np.zeros(np.shape(r)) for f in _MIX_FIELDS}
    first = None
    last = {f: np.zeros(np.shape(r)) for f in _MIX_FIELDS}
    for k in range(points.shape[-1]):
        if k == 2:  # the two wait points coincide where the conditional wait has no spread
            same = np.abs(points[..., 2] - points[..., 1]) <= 1e-12 * np.maximum(points[..., 2], 1.0)
            for f in _MIX_FIELDS:
                mixed[f] += np.where(same, weights[..., 2] * last[f], 0.0)
            sel = np.flatnonzero((weights[..., 2] > MIX_MIN_WEIGHT) & ~same)
        else:
            sel = np.arange(np.size(r)) if k == 0 else np.flatnonzero(weights[..., k] > MIX_MIN_WEIGHT)
        if sel.size == 0:
            last = {f: np.zeros(np.shape(r)) for f in _MIX_FIELDS}
            continue
        m, s = store_ltd_moments(dmean[sel], dsd[sel], lead[sel], lead_sd[sel], points[sel, k], 0.0)
        codes = _store_codes(count[sel], m, s)
        pol = _by_code(
            ss.evaluate_policy,
            codes,
            annual[sel],
            m,
            s,
            a[sel],
            h[sel],
            r[sel],
            q[sel],
            backorder_cost=b[sel],
            backorder_basis=basis,
        )
        if k == 0:
            first = pol
        last = {}
        for f in _MIX_FIELDS:
            full = np.zeros(np.shape(r))
            full[sel] = np.asarray(getattr(pol, f), dtype=float)
            last[f] = full
            mixed[f] += weights[..., k] * full
    return first, mixed


def leaf_policies(
    annual,
    dmean,
    dsd,
    lead,
    lead_sd,
    count,
    order_cost,
    holding_cost,
    backorder_cost,
    target,
    order_quantity,
    pack,
    mean_delay,
    var_delay,
    wait_probability,
    *,
    mode: str,
    basis: str,
    reorder_point=None,
    refine: bool = False,
    mixture: bool = True,
    max_wait=None,
):
    """Evaluate or optimise sites that order from an upstream site with a random delay.

    Parameters
    ----------
    annual, dmean, dsd, lead, lead_sd, count, order_cost, holding_cost, backorder_cost, target : ndarray (k,)
        Annual demand, daily demand mean/sd, transit time mean/sd, count flag, costs, target (NaN = none).
    order_quantity, pack : ndarray (k,)
        Fixed Q (NaN = free) and pack size.
    mean_delay, var_delay, wait_probability : ndarray (k,)
        The upstream delay ``E[W]``, ``Var(W)``, ``P(W > 0)``.
    mode, basis : str
        Planning mode and backorder-cost basis.
    reorder_point : ndarray (k,), optional
        Given: evaluate. None: optimise ``R`` (``Q`` as given or optimised on the moment fit).
    mixture : bool
        False: the two-moment fit only (fast; used inside searches).
    refine : bool
        Re-optimise ``R`` under the delay mixture (cost: golden-section / integer search; service: the
        smallest ``R`` meeting the target) starting from the moment-fit optimum.

    Returns
    -------
    policy : SitePolicy
        KPIs mixed over :func:`wait_points`; ``safety_stock`` and ``z`` against the two-moment fit.
    ltd_mean, ltd_sd : ndarray
        Two-moment lead-time demand (``store_ltd_moments``).
    codes : ndarray of int8
        Distribution of the two-moment fit.

    Examples
    --------
    See ``tests/test_echelon.py``.

    Notes
    -----
    The lead-time demand is a mixture over the delay points ``w`` of demand over ``L + w``; each KPI is the
    weighted sum of the single-site KPIs (``models.single_site.evaluate_policy``). The two-moment version
    (one negative binomial / normal with the variance ``s**2 (L + E W) + d**2 (sL**2 + Var W)``) has too thin
    a tail when the warehouse is rarely out of stock but then for long; the mixture keeps the atom at no wait.

    References
    ----------
    Svoronos, A. & Zipkin, P. (1988). Estimating the performance of multi-level inventory systems. Operations
    Research 36(1), 57-72.
    """
    from dataclasses import replace

    from models import single_site as ss

    m, s = store_ltd_moments(dmean, dsd, lead, lead_sd, mean_delay, var_delay)
    codes = _store_codes(count, m, s)
    points, weights = wait_points(mean_delay, var_delay, wait_probability, max_wait)
    if reorder_point is None:
        base = _by_code(
            ss.optimise_policy,
            codes,
            annual,
            m,
            s,
            order_cost,
            holding_cost,
            mode=mode,
            backorder_cost=backorder_cost,
            backorder_basis=basis,
            target=target,
            order_quantity=order_quantity,
            pack_size=pack,
        )
        r = np.asarray(base.reorder_point, dtype=float)
    else:
        r = np.asarray(reorder_point, dtype=float)
        base = None
    q = np.asarray(base.order_quantity if base is not None else order_quantity, dtype=float)
    q = np.where(np.isfinite(q), q, 0.0)
    if not mixture and base is not None:
        return base, m, s, codes
    if refine and reorder_point is None:
        r = _refine(
            annual,
            dmean,
            dsd,
            lead,
            lead_sd,
            count,
            order_cost,
            holding_cost,
            backorder_cost,
            target,
            q,
            points,
            weights,
            mode,
            basis,
            r,
            s,
            annual > 0,
        )
    first, mixed = _mix_eval(
        annual,
        dmean,
        dsd,
        lead,
        lead_sd,
        count,
        order_cost,
        holding_cost,
        backorder_cost,
        r,
        q,
        points,
        weights,
        basis,
    )
    fit = _by_code(
        ss.evaluate_policy,
        codes,
        annual,
        m,
        s,
        order_cost,
        holding_cost,
        r,
        q,
        backorder_cost=backorder_cost,
        backorder_basis=basis,
    )
    policy = replace(fit, **mixed)
    if base is not None:
        policy = replace(policy, iterations=base.iterations, converged=base.converged, note=base.note)
    return policy, m, s, codes


def _refine(
    annual, dmean, dsd, lead, lead_sd, count, a, h, b, target, q, points, weights, mode, basis, r0, sd, live
):
    """Reorder points under the mixture, from the two-moment optimum ``r0``, vectorised.

    Service modes: secant steps on the service measure towards the target, then upward steps until it is met.
    Cost mode: Newton steps on finite differences of the mixed cost (step ``REFINE_STEP_SD`` sd, one unit for
    counts), each kept only where it lowers the cost.
    """

    def kpi(r):
        _, mixed = _mix_eval(annual, dmean, dsd, lead, lead_sd, count, a, h, b, r, q, points, weights, basis)
        return mixed

    width = np.maximum(sd, 1.0)
    delta = np.where(count, np.maximum(np.rint(REFINE_STEP_SD * width), 1.0), REFINE_STEP_SD * width)
    lo = r0 - REFINE_LOW_SDS * width
    hi = r0 + REFINE_HIGH_SDS * width

    def snap(x, up=False):
        x = np.clip(x, lo, hi)
        return np.where(count, np.ceil(x - 1e-9) if up else np.rint(x), x)

    if mode in ("fill_rate", "cycle_service"):
        field = "fill_rate" if mode == "fill_rate" else "cycle_service"
        t = np.where(np.isfinite(target), target, 0.0)
        x0, k0 = r0, kpi(r0)[field]
        x1 = snap(r0 + np.where(k0 < t, delta, -delta))
        k1 = kpi(x1)[field]
        for _ in range(REFINE_ITER):
            slope = (k1 - k0) / np.where(x1 != x0, x1 - x0, 1.0)
            ok = np.abs(slope) > 1e-12
            x2 = snap(np.where(ok, x1 + (t - k1) / np.where(ok, slope, 1.0), x1 + delta), up=True)
            if np.all(x2 == x1):
                break
            x0, k0, x1 = x1, k1, x2
            k1 = kpi(x1)[field]
        r = x1
        for _ in range(REFINE_ITER):  # feasibility: step up where the target is still missed
            miss = (k1 < t - 1e-12) & live & np.isfinite(target) & (r < hi)
            if not np.any(miss):
                break
            r = np.where(miss, snap(r + delta, up=True), r)
            k1 = np.where(miss, kpi(r)[field], k1)
        return np.where(live & np.isfinite(target), r, r0)
    best = r0.copy()
    best_c = kpi(r0)["total_cost"]
    x = r0
    cx = best_c
    for _ in range(REFINE_NEWTON):
        cm = kpi(snap(x - delta))["total_cost"]
        cp = kpi(snap(x + delta))["total_cost"]
        d1 = (cp - cm) / (2.0 * delta)
        d2 = (cp - 2.0 * cx + cm) / (delta * delta)
        step = np.where(d2 > 0, -d1 / np.where(d2 > 0, d2, 1.0), np.where(cp < cm, delta, -delta))
        for xx, cc in ((snap(x - delta), cm), (snap(x + delta), cp)):
            take = cc < best_c
            best, best_c = np.where(take, xx, best), np.where(take, cc, best_c)
        x = snap(x + np.clip(step, -REFINE_LOW_SDS * width, REFINE_HIGH_SDS * width))
        cx = kpi(x)["total_cost"]
        take = cx < best_c
        best, best_c = np.where(take, x, best), np.where(take, cx, best_c)
        x, cx = best, best_c
    return np.where(live, best, r0)
