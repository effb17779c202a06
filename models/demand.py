"""Lead-time demand moments, the choice of a demand distribution, and demand estimates from history.

Everything here works on numpy arrays over item-sites and broadcasts scalars.

Distribution codes (int8): ``NORMAL = 0``, ``POISSON = 1``, ``NEGBIN = 2``.
Demand classes (int8): ``SMOOTH = 0``, ``ERRATIC = 1``, ``INTERMITTENT = 2``, ``LUMPY = 3``,
``NO_DEMAND = 4`` (a history without a single sale).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

NORMAL = 0
POISSON = 1
NEGBIN = 2
DISTRIBUTION_NAMES = {NORMAL: "normal", POISSON: "poisson", NEGBIN: "negbin"}
DISTRIBUTION_CODES = {name: code for code, name in DISTRIBUTION_NAMES.items()}

SMOOTH = 0
ERRATIC = 1
INTERMITTENT = 2
LUMPY = 3
NO_DEMAND = 4
CLASS_NAMES = {SMOOTH: "smooth", ERRATIC: "erratic", INTERMITTENT: "intermittent", LUMPY: "lumpy",
               NO_DEMAND: "no demand"}

#: Syntetos & Boylan (2005) cut-off on the average inter-demand interval (days) [from memory].
ADI_CUTOFF = 1.32
#: Syntetos & Boylan (2005) cut-off on the squared coefficient of variation of demand sizes [from memory].
CV2_CUTOFF = 0.49
#: ``auto`` rule (common practice): lead-time demand with mean at least this many units is modelled as normal.
AUTO_NORMAL_MIN_MEAN = 10.0
#: ``auto`` rule (common practice): a count demand whose variance exceeds its mean by more than this share
#: is negative binomial, otherwise Poisson.
AUTO_OVERDISPERSION = 0.1


def _as_float(name: str, value, *, allow_negative: bool = False) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if np.isnan(arr).any():
        raise ValueError(f"{name} must not contain NaN")
    if not allow_negative and (arr < 0).any():
        raise ValueError(f"{name} must be >= 0, got {float(arr.min())}")
    return arr


def lead_time_demand(daily_mean, daily_sd, lead_mean, lead_sd) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation of demand over a random lead time.

    Parameters
    ----------
    daily_mean, daily_sd : array_like
        Mean and standard deviation of demand per day (independent from day to day), >= 0.
    lead_mean, lead_sd : array_like
        Mean and standard deviation of the lead time in days, >= 0.

    Returns
    -------
    mean, sd : ndarray
        Moments of lead-time demand (broadcast shape of the inputs).

    Notes
    -----
    E[X] = d·L and Var[X] = L·σ_d² + d²·σ_L². With a random lead time the lead-time demand is not normal
    even for normal daily demand (Eppen & Martin 1988); the moments are exact all the same.

    References
    ----------
    Hadley, G. & Whitin, T. M. (1963). Analysis of Inventory Systems. Prentice-Hall.

    Examples
    --------
    >>> m, s = lead_time_demand(20.0, 5.0, 10.0, 2.0)
    >>> float(m), round(float(s), 4)
    (200.0, 43.0116)
    """
    d = _as_float("daily_mean", daily_mean)
    sd = _as_float("daily_sd", daily_sd)
    lt = _as_float("lead_mean", lead_mean)
    lsd = _as_float("lead_sd", lead_sd)
    mean = d * lt
    var = lt * sd * sd + d * d * lsd * lsd
    return mean, np.sqrt(var)


def _code_of(default) -> int | None:
    if isinstance(default, str):
        key = default.strip().lower()
        if key == "auto":
            return None
        if key not in DISTRIBUTION_CODES:
            raise ValueError(f"default must be 'normal', 'poisson', 'negbin', 'auto' or a code, "
                             f"got {default!r}")
        return DISTRIBUTION_CODES[key]
    code = int(default)
    if code not in DISTRIBUTION_NAMES:
        raise ValueError(f"default must be a distribution code 0, 1 or 2, got {default!r}")
    return code


def choose_distribution(mean, variance, default, demand_class=None) -> np.ndarray:
    """Pick a lead-time demand distribution for each item-site.

    Parameters
    ----------
    mean, variance : array_like
        Moments of lead-time demand (units, units²).
    default : {"normal", "poisson", "negbin", "auto"} or int
        A fixed distribution for all item-sites, or ``"auto"`` for the rule below.
    demand_class : array_like of int, optional
        Syntetos-Boylan classes from :func:`estimate_demand`; intermittent and lumpy items get a count
        distribution under ``"auto"`` whatever their mean.

    Returns
    -------
    ndarray of int8
        Distribution codes.

    Notes
    -----
    The ``auto`` rule (common practice, not from a single source): a count distribution when the mean
    lead-time demand is below ``AUTO_NORMAL_MIN_MEAN`` units or the item is intermittent or lumpy,
    otherwise normal. A count distribution is negative binomial when
    variance > (1 + AUTO_OVERDISPERSION)·mean, otherwise Poisson. Zero-mean items get Poisson.

    References
    ----------
    Syntetos, A. A., Boylan, J. E. & Croston, J. D. (2005). On the categorization of demand patterns.
    Journal of the Operational Research Society 56(5), 495-503 (intermittent and lumpy classes); the
    mean cut-off for counts is common practice.

    Examples
    --------
    >>> choose_distribution([50.0, 2.0, 2.0], [100.0, 2.0, 8.0], "auto").tolist()
    [0, 1, 2]
    """
    m = _as_float("mean", mean)
    v = _as_float("variance", variance)
    m, v = np.broadcast_arrays(m, v)
    code = _code_of(default)
    if code is not None:
        return np.full(m.shape, code, dtype=np.int8)
    count = m < AUTO_NORMAL_MIN_MEAN
    if demand_class is not None:
        cls = np.broadcast_to(np.asarray(demand_class), m.shape)
        count = count | (cls == INTERMITTENT) | (cls == LUMPY)
    over = v > (1.0 + AUTO_OVERDISPERSION) * m
    out = np.where(count, np.where(over, NEGBIN, POISSON), NORMAL)
    return out.astype(np.int8)


@dataclass(frozen=True)
class DemandEstimate:
    """Demand estimates per row of a history array (all fields are (n,) arrays).

    ``daily_mean`` and ``daily_sd`` are over all days (zeros included); ``adi`` is the average interval in
    days between days with a sale (inf without any sale); ``cv2`` is the squared coefficient of variation of
    the non-zero daily quantities (0 with fewer than two); ``demand_class`` is the Syntetos-Boylan class;
    ``nonzero_days`` counts days with a sale.
    """

    daily_mean: np.ndarray
    daily_sd: np.ndarray
    adi: np.ndarray
    cv2: np.ndarray
    demand_class: np.ndarray
    nonzero_days: np.ndarray


def estimate_demand(history) -> DemandEstimate:
    """Estimate daily demand moments and the demand class from a sales history.

    Parameters
    ----------
    history : array_like, shape (n, days)
        Quantity sold per item-site (rows) and day (columns), zeros on days without a sale; finite, >= 0.

    Returns
    -------
    DemandEstimate

    Notes
    -----
    Mean and sample standard deviation (ddof = 1) over all days. ADI = days / days with a sale;
    CV² = (sd / mean)² of the non-zero quantities (ddof = 1). Classes: smooth (ADI < 1.32, CV² < 0.49),
    erratic (ADI < 1.32, CV² ≥ 0.49), intermittent (ADI ≥ 1.32, CV² < 0.49), lumpy (both ≥).

    References
    ----------
    Syntetos, A. A. & Boylan, J. E. (2005). The accuracy of intermittent demand estimates.
    International Journal of Forecasting 21(2):303-314 (classification in Syntetos, Boylan & Croston,
    Journal of the Operational Research Society 56(5), 2005) [cut-offs from memory].

    Examples
    --------
    >>> est = estimate_demand([[0, 3, 0, 0, 3, 0, 0, 3]])
    >>> round(float(est.adi[0]), 3), int(est.demand_class[0]) == INTERMITTENT
    (2.667, True)
    """
    h = np.asarray(history, dtype=float)
    if h.ndim == 1:
        h = h[None, :]
    if h.ndim != 2:
        raise ValueError(f"history must be a 2-D array (item-sites x days), got {h.ndim} dimensions")
    n, days = h.shape
    if days < 2:
        raise ValueError(f"history must have at least 2 days, got {days}")
    if not np.isfinite(h).all():
        raise ValueError("history must be finite (use 0 for days without a sale)")
    if (h < 0).any():
        raise ValueError(f"history must be >= 0, got {float(h.min())}")
    mean = h.mean(axis=1)
    sd = h.std(axis=1, ddof=1)
    nz = h > 0
    k = nz.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        adi = np.where(k > 0, days / np.maximum(k, 1), np.inf)
        s1 = np.where(nz, h, 0.0).sum(axis=1)
        nz_mean = np.where(k > 0, s1 / np.maximum(k, 1), 0.0)
        dev = np.where(nz, h - nz_mean[:, None], 0.0)
        nz_var = np.where(k > 1, (dev * dev).sum(axis=1) / np.maximum(k - 1, 1), 0.0)
        cv2 = np.where(nz_mean > 0, nz_var / np.maximum(nz_mean, 1e-300) ** 2, 0.0)
    frequent = adi < ADI_CUTOFF
    variable = cv2 >= CV2_CUTOFF
    cls = np.where(frequent, np.where(variable, ERRATIC, SMOOTH), np.where(variable, LUMPY, INTERMITTENT))
    cls = np.where(k == 0, NO_DEMAND, cls).astype(np.int8)
    return DemandEstimate(mean, sd, adi, cv2, cls, k.astype(np.int64))


#: Points of a random lead time's distribution (gamma; generalised Gauss-Laguerre) for expectations over
#: it: 12 keep warehouse backorders within about 1.5% of the integral at reorder points far in the tail.
LEAD_POINTS = 12
#: Gamma shape above which :func:`lead_points` uses Gauss-Hermite nodes (the gamma is then nearly normal).
GAMMA_NODES_MAX_SHAPE = 100.0


def lead_points(mean: float, sd: float, points: int = LEAD_POINTS) -> tuple[np.ndarray, np.ndarray]:
    """Nodes and weights for expectations over a gamma lead time with the given mean and sd.

    Parameters
    ----------
    mean, sd : float
        Lead-time mean (> 0) and standard deviation (>= 0).
    points : int
        Number of nodes.

    Returns
    -------
    nodes, weights : ndarray

    Examples
    --------
    >>> x, w = lead_points(10.0, 3.0)
    >>> round(float(w @ x), 9), round(float(w @ x**2 - (w @ x) ** 2), 9)
    (10.0, 9.0)

    Notes
    -----
    With shape ``k = (mean / sd)**2`` and scale ``theta = sd**2 / mean``, ``E f(L) = sum_i w_i f(theta x_i)``
    where ``x_i, w_i`` are the generalised Gauss-Laguerre nodes and weights for ``alpha = k - 1``, normalised
    (exact for polynomials of degree up to ``2 points - 1``). ``sd = 0``: the single node ``mean``. For a
    shape above ``GAMMA_NODES_MAX_SHAPE`` the gamma is nearly normal: Gauss-Hermite nodes ``mean + sd z_i``.

    References
    ----------
    Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions, 25.4.45. National Bureau of
    Standards.
    """
    if sd <= 1e-9 * max(mean, 1.0):
        return np.array([float(mean)]), np.array([1.0])
    k = (mean / sd) ** 2
    theta = sd * sd / mean
    from scipy import special

    if k <= GAMMA_NODES_MAX_SHAPE:
        x, w = special.roots_genlaguerre(points, k - 1.0)
        w = w / w.sum()
        if np.all(np.isfinite(w)) and np.all(np.isfinite(x)):
            return theta * x, w
    # a nearly symmetric gamma: Gauss-Hermite nodes on mean +- sd (its weights overflow the Laguerre form)
    z, w = special.roots_hermitenorm(points)
    return np.maximum(mean + sd * z, 0.0), w / w.sum()
