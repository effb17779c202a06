"""Event-driven simulation of a network of stocking sites, for checking any set of policies.

Two layers:

* :func:`simulate_network_arrays` - the array interface: a forest of ``S`` sites (``parent``), ``n`` items,
  per (item, site) policy, demand and lead-time arrays; runs the compiled event loop of
  :mod:`optimiser.sim_kernel` for every item and replication and returns per-replication statistics
  (:class:`NetworkSimulation`) with means and 95% confidence half-widths over replications.
* :func:`simulate_policies` - the application layer: item-site table + policies frame + case settings ->
  one row per (site, item) with simulated KPIs beside the planned ones; :func:`write_simulation` writes
  ``simulation.csv`` (and a plot of chosen time series) atomically.

Definitions of the KPIs (all counted after the warm-up):

* fill rate - share of the units demanded from a site (customer demand plus orders of the sites below it) that
  are met from stock at once;
* cycle service - share of replenishment cycles with no demand short; a cycle ends at each receipt at the
  site (with one order outstanding at a time and unit demand this is P(lead-time demand <= R));
* on hand, backorders - time averages in units (backorders include store orders waiting at a warehouse);
* orders per year - replenishment orders placed by the site;
* store delay - mean wait, in days, of the units a site ordered from its upstream site between the order and
  their shipment (unit-weighted; 0 at a root site);
* annual costs - ordering (orders x order cost), holding (on hand x holding cost per unit-year), backorder
  (units short x cost per unit, or backorders x cost per unit-year, by the case's basis).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import stats as _sps

from optimiser import sim_kernel as _k
from optimiser.sim_kernel import DEMAND_COMPOUND, DEMAND_NORMAL_DAILY, DEMAND_POISSON

__all__ = [
    "DEMAND_COMPOUND",
    "DEMAND_NORMAL_DAILY",
    "DEMAND_POISSON",
    "NetworkSimulation",
    "compound_parameters",
    "confidence_half_width",
    "simulate_network_arrays",
]

CONFIDENCE = 0.95
HEAP_CAPACITY = 64  # first capacity of the pending-shipment heap per task (doubled on overflow)
QUEUE_CAPACITY = 32  # first capacity of each site's FCFS queue per task (doubled on overflow)
MAX_CAPACITY = 1 << 22  # give up beyond this many pending shipments / waiting orders


def confidence_half_width(values: np.ndarray, axis: int = 0, confidence: float = CONFIDENCE) -> np.ndarray:
    """Half-width of the two-sided Student-t confidence interval for the mean over ``axis``.

    Parameters
    ----------
    values : ndarray
        Replication results; NaN entries are ignored.
    axis : int
        Axis of the replications.
    confidence : float
        Two-sided level, 0.95 by default.

    Returns
    -------
    ndarray
        t_{(1+c)/2, K-1} * s / sqrt(K) with K the number of non-NaN values; NaN where K < 2.

    Examples
    --------
    >>> float(confidence_half_width(np.array([1.0, 2.0, 3.0])))  # doctest: +ELLIPSIS
    2.484...

    Notes
    -----
    Replications are independent, so the interval is the usual t interval on their means.

    References
    ----------
    Law, A. M., Simulation Modeling and Analysis, 5th ed., 2015, ch. 9.
    """
    v = np.asarray(values, dtype=float)
    k = np.sum(~np.isnan(v), axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        if v.shape[axis] > 1:
            sd = np.nanstd(v, axis=axis, ddof=1)
        else:
            sd = np.full(np.delete(v.shape, axis), np.nan)
        tq = _sps.t.ppf(0.5 + confidence / 2.0, np.maximum(k - 1, 1))
        hw = tq * sd / np.sqrt(k)
    return np.where(k >= 2, hw, np.nan)


def compound_parameters(daily_mean: np.ndarray, daily_sd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Customer arrival rate and logarithmic size parameter matching a daily mean and sd.

    Parameters
    ----------
    daily_mean, daily_sd : ndarray
        Mean and standard deviation of demand per day (units).

    Returns
    -------
    rate : ndarray
        Customer arrivals per day, nu = d / E[X].
    theta : ndarray
        Parameter of the logarithmic size distribution P(X = k) = -theta^k / (k ln(1 - theta)); 0 means unit
        sizes (plain Poisson), used where the variance does not exceed the mean.

    Examples
    --------
    >>> rate, theta = compound_parameters(np.array([2.0]), np.array([2.0]))
    >>> round(float(theta[0]), 6), round(float(rate[0]), 6)
    (0.5, 1.442695)

    Notes
    -----
    Compound Poisson demand with logarithmic sizes has negative binomial counts over any interval. With
    r = variance / mean, E[X^2] / E[X] = 1 / (1 - theta) = r, so theta = 1 - 1/r and
    E[X] = -theta / ((1 - theta) ln(1 - theta)).

    References
    ----------
    Johnson, N. L., Kemp, A. W., Kotz, S., Univariate Discrete Distributions, 3rd ed., 2005, ch. 7.
    Quenouille, M. H., "A relation between the logarithmic, Poisson, and negative binomial series",
    Biometrics 5, 1949.
    """
    d = np.asarray(daily_mean, dtype=float)
    sd = np.asarray(daily_sd, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.where(d > 0, sd * sd / np.where(d > 0, d, 1.0), 1.0)
        theta = np.where(r > 1.0, 1.0 - 1.0 / np.maximum(r, 1.0), 0.0)
        safe = np.where(theta > 0, theta, 0.5)
        mean_size = np.where(theta > 0, -safe / ((1.0 - safe) * np.log1p(-safe)), 1.0)
        rate = np.where(d > 0, d / mean_size, 0.0)
    return rate, theta


@dataclass(frozen=True)
class NetworkSimulation:
    """Per-replication results of :func:`simulate_network_arrays`.

    Every KPI array has shape (K, n, S): replication, item, site. Inactive sites and sites with nothing to
    measure hold NaN. ``mean(name)`` and ``half_width(name)`` summarise over replications.
    """

    fill_rate: np.ndarray
    cycle_service: np.ndarray
    on_hand: np.ndarray
    backorders: np.ndarray
    orders_per_day: np.ndarray
    units_short_per_day: np.ndarray
    store_delay: np.ndarray
    demand_per_day: np.ndarray
    raw: np.ndarray  # (K, n, S, N_STATS) counters from the kernel
    measured_days: float
    seeds: np.ndarray  # (K, n) seeds of the tasks
    trace_times: np.ndarray  # (n_samples,) days after the warm-up
    trace_on_hand: np.ndarray  # (n_traced, n_samples, S)
    trace_backorders: np.ndarray
    trace_items: np.ndarray
    retries: int = 0
    info: dict[str, Any] = field(default_factory=dict)

    def mean(self, name: str) -> np.ndarray:
        """Mean over replications of KPI ``name`` -> (n, S)."""
        v = getattr(self, name)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmean(v, axis=0)

    def half_width(self, name: str) -> np.ndarray:
        """95% confidence half-width over replications of KPI ``name`` -> (n, S)."""
        return confidence_half_width(getattr(self, name), axis=0)

    @property
    def demand_events(self) -> int:
        """Customer demand events simulated after the warm-up, summed over items, sites and replications."""
        return int(self.raw[..., _k.ST_DEMAND_EVENTS].sum())


def _as_grid(name: str, value, n: int, s: int, dtype) -> np.ndarray:
    a = np.asarray(value, dtype=dtype) if value is not None else None
    if a is None:
        raise ValueError(f"{name}: required")
    if a.ndim == 0:
        return np.full((n, s), a, dtype=dtype)
    if a.shape == (s,):
        return np.ascontiguousarray(np.broadcast_to(a, (n, s)), dtype=dtype)
    if a.shape == (n, s):
        return np.ascontiguousarray(a, dtype=dtype)
    raise ValueError(f"{name}: shape must be (), ({s},) or ({n}, {s}); got {a.shape}")


def _validate_parent(parent: np.ndarray) -> None:
    n, s = parent.shape
    if np.any((parent < -1) | (parent >= s)):
        raise ValueError(f"parent: entries must be -1 or a site index 0..{s - 1}")
    # walk up: every chain must reach -1 within s steps (no cycles)
    cur = parent.copy()
    for _ in range(s + 1):
        if np.all(cur < 0):
            return
        cur = np.where(cur >= 0, np.take_along_axis(parent, np.maximum(cur, 0), axis=1), -1)
    raise ValueError("parent: the site tree has a cycle")


def simulate_network_arrays(
    parent,
    reorder_point,
    order_quantity,
    *,
    demand_mean,
    lead_mean,
    demand_sd=None,
    demand_model=DEMAND_POISSON,
    lead_sd=0.0,
    review_period=None,
    order_up_to=None,
    review_phase=None,
    active=None,
    n_items: int | None = None,
    horizon_days: float,
    warmup_days: float = 0.0,
    replications: int = 10,
    seed: int = 0,
    partial_shipments: bool = True,
    orders_cross: bool = False,
    trace_items=None,
    trace_step_days: float = 1.0,
    parallel: bool = True,
) -> NetworkSimulation:
    """Simulate (R, Q) / order-up-to policies on a site forest for many items and replications.

    Parameters
    ----------
    parent : array_like of int, (S,) or (n, S)
        Upstream site of each site; -1 for a site fed by a supplier (unlimited supplier stock).
    reorder_point, order_quantity : array_like, (), (S,) or (n, S)
        Continuous-review policy: when the inventory position falls to R or below, order n*Q units so that it
        lands in R+1..R+Q. R is floored and Q rounded to whole units (Q >= 1 where active and not periodic).
    demand_mean : array_like
        Customer demand per day at each site (units); 0 for a site without customers of its own.
    lead_mean : array_like
        Mean replenishment time of each site in days: the supplier lead time at a root, transit from the
        upstream site below (the wait at the upstream site comes from the simulation).
    demand_sd : array_like, optional
        Daily demand sd, for ``DEMAND_COMPOUND`` (matched by :func:`compound_parameters`) and
        ``DEMAND_NORMAL_DAILY``.
    demand_model : int or array_like
        ``DEMAND_POISSON`` (unit Poisson), ``DEMAND_COMPOUND`` (compound Poisson, logarithmic sizes) or
        ``DEMAND_NORMAL_DAILY`` (normal per day, rounded to whole units, negative days count 0; common
        practice).
    lead_sd : array_like
        Lead-time sd in days; gamma distributed with the given mean and sd, constant when 0.
    review_period, order_up_to, review_phase : array_like, optional
        Periodic order-up-to review where ``review_period > 0`` (days): at times phase, phase + T, ...
        (phase 0 means the first review at T) order up to ``order_up_to`` when the position is below it.
    active : array_like of bool, optional
        Which (item, site) pairs stock the item; an inactive site must have no active site below it.
    n_items : int, optional
        Number of items when no argument has an item axis.
    horizon_days, warmup_days : float
        Simulated time per replication and the initial part discarded (days).
    replications : int
        Independent replications K.
    seed : int
        Master seed; ``numpy.random.SeedSequence(seed).spawn(K)`` gives one Generator per replication, which
        draws one task seed per item.
    partial_shipments : bool
        Whether an upstream site ships part of a waiting order (True) or only whole orders (False).
    orders_cross : bool
        False: each arrival at a site is no earlier than the one scheduled before it.
    trace_items : array_like of int, optional
        Items whose on hand and backorders per site are recorded on replication 0 every ``trace_step_days``.
    parallel : bool
        Run the tasks with numba's parallel loop (True) or on one thread.

    Returns
    -------
    NetworkSimulation
        Per-replication KPIs of shape (K, n, S); ``.mean(name)``, ``.half_width(name)``.

    Examples
    --------
    >>> sim = simulate_network_arrays([-1], 2, 3, demand_mean=1.0, lead_mean=1.0, n_items=1,
    ...                               horizon_days=2000.0, warmup_days=50.0, replications=4, seed=1)
    >>> sim.fill_rate.shape
    (4, 1, 1)

    Notes
    -----
    Time averages are integrals of the piecewise-constant levels over the measured period divided by its
    length.
    Orders per day, units short per day and demand per day are counts over the measured period divided by it;
    the store delay is (sum of unit waits) / (units shipped). The 95% half-width uses Student's t over the
    replications (:func:`confidence_half_width`).

    References
    ----------
    Law, A. M., Simulation Modeling and Analysis, 5th ed., 2015.
    Axsäter, S., Inventory Control, 3rd ed., Springer, 2015 (the (R, Q) and FCFS mechanics).
    """
    par = np.atleast_1d(np.asarray(parent, dtype=np.int64))
    s_count = par.shape[-1]
    n = n_items
    for cand in (par, reorder_point, order_quantity, demand_mean, lead_mean, demand_sd, demand_model, lead_sd,
                 review_period, order_up_to, review_phase, active):
        if cand is not None and np.ndim(cand) == 2:
            n = np.shape(cand)[0]
            break
    if n is None:
        n = 1
    if n < 0 or s_count < 1:
        raise ValueError(f"need at least one site; got parent shape {par.shape}")
    par = _as_grid("parent", par, n, s_count, np.int64)
    _validate_parent(par)
    act = _as_grid("active", True if active is None else active, n, s_count, np.bool_)
    per = _as_grid("review_period", 0.0 if review_period is None else review_period, n, s_count, float)
    per = np.where(np.isfinite(per) & (per > 0), per, 0.0)
    periodic = per > 0
    r_raw = _as_grid("reorder_point", reorder_point, n, s_count, float)
    q_raw = _as_grid("order_quantity", order_quantity, n, s_count, float)
    cont = act & ~periodic
    if np.any(cont & ~np.isfinite(r_raw)):
        raise ValueError("reorder_point: must be finite at every active continuous-review site")
    if np.any(cont & ~(np.round(q_raw) >= 1)):
        bad = q_raw[cont & ~(np.round(q_raw) >= 1)][0]
        raise ValueError(f"order_quantity: must round to at least 1 at active sites; got {bad}")
    rop = np.where(cont, np.floor(np.where(np.isfinite(r_raw), r_raw, 0.0)), 0).astype(np.int64)
    oq = np.where(cont, np.round(np.where(np.isfinite(q_raw), q_raw, 1.0)), 1).astype(np.int64)
    upto_raw = _as_grid("order_up_to", 0.0 if order_up_to is None else order_up_to, n, s_count, float)
    if np.any(act & periodic & ~np.isfinite(upto_raw)):
        raise ValueError("order_up_to: must be finite at every periodic-review site")
    upto_f = np.floor(np.where(np.isfinite(upto_raw), upto_raw, 0.0))
    upto = np.where(act & periodic, upto_f, 0).astype(np.int64)
    phase = _as_grid("review_phase", 0.0 if review_phase is None else review_phase, n, s_count, float)
    if np.any(phase < 0) or not np.all(np.isfinite(phase)):
        raise ValueError("review_phase: must be finite and >= 0")
    model = _as_grid("demand_model", demand_model, n, s_count, np.int64)
    if np.any(~np.isin(model, (DEMAND_POISSON, DEMAND_COMPOUND, DEMAND_NORMAL_DAILY))):
        raise ValueError(
            f"demand_model: codes are {DEMAND_POISSON}, {DEMAND_COMPOUND}, {DEMAND_NORMAL_DAILY}")
    dmean = _as_grid("demand_mean", demand_mean, n, s_count, float)
    dsd = _as_grid("demand_sd", 0.0 if demand_sd is None else demand_sd, n, s_count, float)
    if np.any(~np.isfinite(dmean) | (dmean < 0)):
        raise ValueError("demand_mean: must be finite and >= 0")
    if np.any(~np.isfinite(dsd) | (dsd < 0)):
        raise ValueError("demand_sd: must be finite and >= 0")
    dmean = np.where(act, dmean, 0.0)
    dsd = np.where(act, dsd, 0.0)
    rate_c, theta = compound_parameters(dmean, dsd)
    rate = np.where(model == DEMAND_COMPOUND, rate_c, np.where(model == DEMAND_POISSON, dmean, 0.0))
    theta = np.where(model == DEMAND_COMPOUND, theta, 0.0)
    lt_m = _as_grid("lead_mean", lead_mean, n, s_count, float)
    lt_s = _as_grid("lead_sd", lead_sd, n, s_count, float)
    if np.any(act & (~np.isfinite(lt_m) | (lt_m < 0))):
        raise ValueError("lead_mean: must be finite and >= 0 at active sites")
    if np.any(act & (~np.isfinite(lt_s) | (lt_s < 0))):
        raise ValueError("lead_sd: must be finite and >= 0 at active sites")
    lt_m = np.where(act, lt_m, 0.0)
    lt_s = np.where(act, lt_s, 0.0)
    # an active site's upstream must be active
    up_active = np.where(par >= 0, np.take_along_axis(act, np.maximum(par, 0), axis=1), True)
    if np.any(act & ~up_active):
        raise ValueError("active: a stocked site's upstream site must stock the item too")
    if not (np.isfinite(horizon_days) and horizon_days > 0):
        raise ValueError(f"horizon_days: must be finite and > 0; got {horizon_days}")
    if not (0 <= warmup_days < horizon_days):
        raise ValueError(f"warmup_days: must be in [0, horizon_days); got {warmup_days}")
    if int(replications) < 1:
        raise ValueError(f"replications: must be >= 1; got {replications}")
    k_rep = int(replications)

    rep_seqs = np.random.SeedSequence(int(seed)).spawn(k_rep)
    seeds = np.empty((k_rep, n), dtype=np.int64)
    for k, ss in enumerate(rep_seqs):
        seeds[k] = np.random.Generator(np.random.PCG64(ss)).integers(0, 2**32 - 1, size=n, dtype=np.int64)

    tr_items = np.asarray([] if trace_items is None else trace_items, dtype=np.int64).ravel()
    if np.any((tr_items < 0) | (tr_items >= n)):
        raise ValueError(f"trace_items: indices must be in 0..{n - 1}")
    trace_row = np.full(n, -1, dtype=np.int64)
    trace_row[tr_items] = np.arange(tr_items.size)
    if tr_items.size and not trace_step_days > 0:
        raise ValueError(f"trace_step_days: must be > 0; got {trace_step_days}")
    n_samples = int(np.floor((horizon_days - warmup_days) / trace_step_days)) + 1 if tr_items.size else 0
    trace_oh = np.zeros((tr_items.size, n_samples, s_count))
    trace_bo = np.zeros((tr_items.size, n_samples, s_count))

    stats = np.zeros((k_rep, n, s_count, _k.N_STATS))
    status = np.zeros((k_rep, n), dtype=np.int64)
    mask = np.ones((k_rep, n), dtype=np.bool_)
    heap_cap, queue_cap = HEAP_CAPACITY, QUEUE_CAPACITY
    runner = _k.run_tasks if parallel else _k.run_tasks_serial
    retries = 0
    while True:
        runner(par, act, rop, oq, per, upto, phase, model, rate, theta, dmean, dsd, lt_m, lt_s,
               bool(partial_shipments), bool(orders_cross), float(horizon_days), float(warmup_days), seeds,
               heap_cap, queue_cap, mask, trace_row, float(trace_step_days), trace_oh, trace_bo, stats,
               status)
        bad = status != _k.STATUS_OK
        if not bad.any():
            break
        if np.any(status == _k.STATUS_HEAP_FULL):
            heap_cap *= 4
        if np.any(status == _k.STATUS_QUEUE_FULL):
            queue_cap *= 4
        if max(heap_cap, queue_cap) > MAX_CAPACITY:
            raise ValueError("simulation: more than MAX_CAPACITY shipments or waiting orders at once; "
                             "check the policies (order quantities far below demand?)")
        mask = bad
        status[:] = 0
        retries += 1

    return _summarise(stats, act, horizon_days - warmup_days, seeds, tr_items, trace_oh, trace_bo,
                      warmup_days, trace_step_days, n_samples, retries)


def _summarise(stats, act, measured, seeds, tr_items, trace_oh, trace_bo, warmup, step, n_samples, retries):
    st = stats
    nan = np.nan
    a = np.broadcast_to(act, st.shape[:3])
    with np.errstate(invalid="ignore", divide="ignore"):
        dem = st[..., _k.ST_DEMAND_UNITS]
        imm = st[..., _k.ST_IMMEDIATE_UNITS]
        fill = np.where(a & (dem > 0), imm / dem, nan)
        cyc = st[..., _k.ST_CYCLES]
        cs = np.where(a & (cyc > 0), 1.0 - st[..., _k.ST_SHORT_CYCLES] / cyc, nan)
        oh = np.where(a, st[..., _k.ST_AREA_ON_HAND] / measured, nan)
        bo = np.where(a, st[..., _k.ST_AREA_BACKORDERS] / measured, nan)
        opd = np.where(a, st[..., _k.ST_ORDERS] / measured, nan)
        short = np.where(a, (dem - imm) / measured, nan)
        shp = st[..., _k.ST_SHIPPED_UNITS]
        delay = np.where(a & (shp > 0), st[..., _k.ST_WAIT_UNIT_DAYS] / shp, np.where(a, 0.0, nan))
        dpd = np.where(a, dem / measured, nan)
    times = warmup + step * np.arange(n_samples) if n_samples else np.zeros(0)
    return NetworkSimulation(
        fill_rate=fill, cycle_service=cs, on_hand=oh, backorders=bo, orders_per_day=opd,
        units_short_per_day=short,
        store_delay=delay, demand_per_day=dpd, raw=st, measured_days=float(measured), seeds=seeds,
        trace_times=times, trace_on_hand=trace_oh, trace_backorders=trace_bo, trace_items=tr_items,
        retries=retries,
    )

