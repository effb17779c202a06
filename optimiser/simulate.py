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
  are met from stock at once; customer fill rate - the same for the site's own customers only;
* cycle service - share of replenishment cycles that end without a stockout: the share of receipts at the site
  that find no backorders waiting. With unit demand, continuous review and a constant lead time the stock
  just before a receipt is R - D(L), so this is the classic P(lead-time demand <= R);
* on hand, backorders - time averages in units (backorders include store orders waiting at a warehouse);
* orders per year - replenishment orders placed by the site;
* store delay - mean wait, in days, of the units a site ordered from its upstream site between the order and
  their shipment (unit-weighted; 0 at a root site); store delay sd - the standard deviation of that wait;
* annual costs - ordering (orders x order cost), holding (on hand x holding cost per unit-year), backorder
  (customer units short x cost per unit, or customer backorders x cost per unit-year, by the case's basis).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import stats as _sps

from models import joint as joint_model
from optimiser import sim_kernel as _k
from optimiser.sim_kernel import DEMAND_COMPOUND, DEMAND_NORMAL_DAILY, DEMAND_POISSON

__all__ = [
    "DEMAND_COMPOUND",
    "DEMAND_NORMAL_DAILY",
    "DEMAND_POISSON",
    "NetworkSimulation",
    "compound_parameters",
    "confidence_half_width",
    "replication_seeds",
    "simulate_network_arrays",
]

CONFIDENCE = 0.95
HEAP_CAPACITY = 64  # first capacity of the pending-shipment heap per task (doubled on overflow)
QUEUE_CAPACITY = 32  # first capacity of each site's FCFS queue per task (doubled on overflow)
MAX_CAPACITY = 1 << 22  # give up beyond this many pending shipments / waiting orders
MAX_REVIEW_LOG = 1 << 28  # most (replication, periodic item-site, review) entries logged (bytes)
NEVER_ORDERS = -(1 << 60)  # reorder point of a site with Q = 0: the position never falls to it


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
    with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
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
    (0.5, 1.386294)

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
    customer_fill_rate: np.ndarray
    customer_backorders: np.ndarray
    customer_units_short_per_day: np.ndarray
    store_delay: np.ndarray
    store_delay_sd: np.ndarray
    demand_per_day: np.ndarray
    raw: np.ndarray  # (K, n, S, N_STATS) counters from the kernel
    measured_days: float
    seeds: np.ndarray  # (K, n) seeds of the tasks
    trace_times: np.ndarray  # (n_samples,) days after the warm-up
    trace_on_hand: np.ndarray  # (n_traced, n_samples, S)
    trace_backorders: np.ndarray
    trace_items: np.ndarray
    retries: int = 0
    review_slot: np.ndarray | None = None  # (n, S) row of each periodic-review site in review_orders; -1 none
    review_orders: np.ndarray | None = None  # (K, n_slots, E) uint8: review m of the slot placed an order

    def review_order_times(self, review_period: np.ndarray, review_phase: np.ndarray | None = None
                           ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Every logged review that placed an order after the warm-up: (replication, item, site, day).

        ``review_period`` and ``review_phase`` are the (n, S) grids given to the simulation; review m of a
        site happens at ``first + m * T`` with ``first`` the phase (or T when the phase is 0).
        Returns ``(k, i, s, day)``.
        """
        if self.review_orders is None or self.review_slot is None or self.review_orders.size == 0:
            e = np.zeros(0, dtype=np.int64)
            return e, e, e, np.zeros(0)
        slot_i, slot_s = np.nonzero(self.review_slot >= 0)
        order = np.argsort(self.review_slot[slot_i, slot_s])
        slot_i, slot_s = slot_i[order], slot_s[order]
        k, slot, m = np.nonzero(self.review_orders)
        per = np.asarray(review_period, dtype=float)[slot_i[slot], slot_s[slot]]
        ph = (np.zeros_like(per) if review_phase is None
              else np.asarray(review_phase, dtype=float)[slot_i[slot], slot_s[slot]])
        first = np.where(ph > 0, ph, per)
        return k, slot_i[slot], slot_s[slot], first + m * per

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
    parent: ArrayLike,
    reorder_point: ArrayLike,
    order_quantity: ArrayLike,
    *,
    demand_mean: ArrayLike,
    lead_mean: ArrayLike,
    demand_sd: ArrayLike | None = None,
    demand_model: ArrayLike = DEMAND_POISSON,
    lead_sd: ArrayLike = 0.0,
    review_period: ArrayLike | None = None,
    order_up_to: ArrayLike | None = None,
    review_phase: ArrayLike | None = None,
    active: ArrayLike | None = None,
    n_items: int | None = None,
    horizon_days: float,
    warmup_days: float = 0.0,
    replications: int = 10,
    seed: int = 0,
    partial_shipments: bool = True,
    orders_cross: bool = False,
    trace_items: ArrayLike | None = None,
    trace_step_days: float = 1.0,
    parallel: bool = True,
    task_seeds: ArrayLike | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> NetworkSimulation:
    """Simulate (R, Q) / order-up-to policies on a site forest for many items and replications.

    Parameters
    ----------
    parent : array_like of int, (S,) or (n, S)
        Upstream site of each site; -1 for a site fed by a supplier (unlimited supplier stock).
    reorder_point, order_quantity : array_like, (), (S,) or (n, S)
        Continuous-review policy: when the inventory position falls to R or below, order n*Q units so that it
        lands in R+1..R+Q. R is floored and Q rounded to whole units, at least 1 where Q > 0; Q = 0 means the
        site never orders (a policy of not stocking: demand there is backordered for good).
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
        False: each arrival of an item at a site is no earlier than the one scheduled before it (a
        later draw that would overtake waits for it); True: every shipment keeps its own lead time.
    trace_items : array_like of int, optional
        Items whose on hand and backorders per site are recorded on replication 0 every ``trace_step_days``.
    parallel : bool
        Run the tasks with numba's parallel loop (True) or on one thread.
    task_seeds : array_like of int, (K, n), optional
        Explicit seed of every (replication, item) task, instead of drawing them from ``seed``.
    progress : callable, optional
        Called as ``progress(done, K)`` after each replication; with it the replications run one after the
        other (items in parallel), without it all tasks share one parallel loop.

    Returns
    -------
    NetworkSimulation
        Per-replication KPIs of shape (K, n, S); ``.mean(name)``, ``.half_width(name)``; ``review_orders``
        logs which reviews of the periodic-review sites placed an order after the warm-up
        (``.review_order_times(review_period, review_phase)`` turns it into days).

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
    if np.any(cont & ~(np.isfinite(q_raw) & (q_raw >= 0))):
        bad = q_raw[cont & ~(np.isfinite(q_raw) & (q_raw >= 0))][0]
        raise ValueError(f"order_quantity: must be finite and >= 0 at active sites; got {bad}")
    never = cont & (q_raw == 0)
    rop = np.where(cont, np.floor(np.where(np.isfinite(r_raw), r_raw, 0.0)), 0).astype(np.int64)
    rop = np.where(never, NEVER_ORDERS, rop)
    oq = np.where(cont & ~never, np.maximum(np.round(np.where(np.isfinite(q_raw), q_raw, 1.0)), 1), 1)
    oq = oq.astype(np.int64)
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

    if task_seeds is None:
        seeds = replication_seeds(seed, k_rep, n)
    else:
        seeds = np.asarray(task_seeds, dtype=np.int64)
        if seeds.shape != (k_rep, n) or np.any((seeds < 0) | (seeds >= 2**32)):
            raise ValueError(f"task_seeds: need shape ({k_rep}, {n}) with values in [0, 2**32)")

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
    # review log of the periodic sites: which reviews placed an order (for shared order costs of families)
    logged = act & periodic
    log_slot = np.full((n, s_count), -1, dtype=np.int64)
    log_slot[logged] = np.arange(int(logged.sum()))
    first = np.where(phase > 0, phase, per)
    log_len = int(np.max(np.floor((horizon_days - first[logged]) / per[logged])) + 1) if logged.any() else 0
    log_len = max(log_len, 0)
    if k_rep * int(logged.sum()) * log_len > MAX_REVIEW_LOG:
        raise ValueError(f"simulation: the review log of the periodic sites would hold "
                         f"{k_rep * int(logged.sum()) * log_len} entries (limit {MAX_REVIEW_LOG}); use fewer "
                         "years or replications, or longer review intervals")
    order_log = np.zeros((k_rep, int(logged.sum()), log_len), dtype=np.uint8)
    runner = _k.run_tasks if parallel else _k.run_tasks_serial
    caps = [HEAP_CAPACITY, QUEUE_CAPACITY]
    retries = 0
    blocks = [np.arange(k_rep)] if progress is None else [np.array([k]) for k in range(k_rep)]
    for done, reps in enumerate(blocks, start=1):
        mask = np.zeros((k_rep, n), dtype=np.bool_)
        mask[reps] = True
        while True:
            runner(par, act, rop, oq, per, upto, phase, model, rate, theta, dmean, dsd, lt_m, lt_s,
                   bool(partial_shipments), bool(orders_cross), float(horizon_days), float(warmup_days),
                   seeds, caps[0], caps[1], mask, trace_row, float(trace_step_days), trace_oh, trace_bo,
                   stats, status, log_slot, order_log)
            bad = status != _k.STATUS_OK
            if not bad.any():
                break
            if np.any(status == _k.STATUS_HEAP_FULL):
                caps[0] *= 4
            if np.any(status == _k.STATUS_QUEUE_FULL):
                caps[1] *= 4
            if max(caps) > MAX_CAPACITY:
                raise ValueError(f"simulation: more than {MAX_CAPACITY} shipments or waiting orders at once "
                                 "in one run; check the policies (order quantities far below demand?)")
            mask = bad
            status[:] = 0
            retries += 1
        if progress is not None:
            progress(done if len(blocks) > 1 else k_rep, k_rep)

    sim = _summarise(stats, act, horizon_days - warmup_days, seeds, tr_items, trace_oh, trace_bo,
                     warmup_days, trace_step_days, n_samples, retries)
    return replace(sim, review_slot=log_slot, review_orders=order_log)


def replication_seeds(seed: int, replications: int, n_items: int) -> np.ndarray:
    """Seeds of the (replication, item) tasks of a simulation.

    Parameters
    ----------
    seed : int
        Master seed.
    replications, n_items : int
        K and n.

    Returns
    -------
    ndarray of int64, (K, n)
        One numpy Generator per replication (``SeedSequence(seed).spawn(K)``) draws one 32-bit seed per item;
        the kernel seeds its generator with it at the start of the task.

    Examples
    --------
    >>> replication_seeds(1, 2, 3).shape
    (2, 3)

    Notes
    -----
    Item i's seeds do not depend on how many items follow it, and replications are independent streams.

    References
    ----------
    O'Neill, M. E., "PCG: a family of simple fast space-efficient statistically good algorithms for random
    number generation", Harvey Mudd College, HMC-CS-2014-0905, 2014.
    """
    out = np.empty((replications, n_items), dtype=np.int64)
    for k, ss in enumerate(np.random.SeedSequence(int(seed)).spawn(replications)):
        out[k] = np.random.Generator(np.random.PCG64(ss)).integers(0, 2**32 - 1, size=n_items, dtype=np.int64)
    return out


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
        delay2 = np.where(a & (shp > 0), st[..., _k.ST_WAIT_SQ_UNIT_DAYS] / shp, np.where(a, 0.0, nan))
        delay_sd = np.sqrt(np.maximum(delay2 - delay * delay, 0.0))
        dpd = np.where(a, dem / measured, nan)
        cdem = st[..., _k.ST_CUSTOMER_UNITS]
        cimm = st[..., _k.ST_CUSTOMER_IMMEDIATE]
        cfill = np.where(a & (cdem > 0), cimm / cdem, nan)
        cbo = np.where(a, st[..., _k.ST_AREA_CUSTOMER_BACKORDERS] / measured, nan)
        cshort = np.where(a, (cdem - cimm) / measured, nan)
    times = warmup + step * np.arange(n_samples) if n_samples else np.zeros(0)
    return NetworkSimulation(
        fill_rate=fill, cycle_service=cs, on_hand=oh, backorders=bo, orders_per_day=opd,
        units_short_per_day=short, customer_fill_rate=cfill, customer_backorders=cbo,
        customer_units_short_per_day=cshort,
        store_delay=delay, store_delay_sd=delay_sd, demand_per_day=dpd, raw=st, measured_days=float(measured),
        seeds=seeds,
        trace_times=times, trace_on_hand=trace_oh, trace_backorders=trace_bo, trace_items=tr_items,
        retries=retries,
    )



# ============================================================================================================
# application layer: item-site table + policies -> simulation table
# ============================================================================================================

#: simulated KPI -> column of the policies frame holding the planned figure
PLANNED_COLUMNS = {
    "fill_rate": "fill_rate",
    "cycle_service": "cycle_service",
    "on_hand": "expected_on_hand",
    "backorders": "expected_backorders",
    "orders_per_year": "orders_per_year",
    "store_delay_days": "expected_delay_days",
    "ordering_cost": "ordering_cost",
    "holding_cost": "holding_cost",
    "backorder_cost": "backorder_cost",
    "total_cost": "total_cost",
}
KPI_COLUMNS = ["fill_rate", "customer_fill_rate", "cycle_service", "on_hand", "backorders", "orders_per_year",
               "store_delay_days", "store_delay_sd_days", "ordering_cost", "holding_cost", "backorder_cost",
               "total_cost"]
DEMAND_MODELS = ("auto", "poisson", "normal_daily")
PLANNED_SLACK = 1e-9  # a planned figure equal to an interval end counts as inside
POISSON_DISPERSION_TOL = 1e-3  # "auto" demand: variance up to (1 + this) x mean counts as Poisson


@dataclass(frozen=True)
class SimulationOutcome:
    """What :func:`run_simulation` produced.

    Attributes
    ----------
    table : DataFrame
        One row per (site, item): simulated KPIs (mean and ``*_ci`` 95% half-width), the planned figures
        (``planned_*``) and ``outside_interval`` naming the KPIs whose planned figure lies outside the
        interval.
    traces : DataFrame
        ``item, site, day, on_hand, backorders`` sampled on replication 0 (empty when no item was traced).
    info : dict
        Settings of the run and totals (demand events, seconds, ...).
    families : DataFrame or None
        One row per joint replenishment family (see :func:`family_costs`); None without families.
    """

    table: pd.DataFrame
    traces: pd.DataFrame
    info: dict[str, Any]
    families: pd.DataFrame | None = None


def _site_order(itemsites) -> tuple[list[str], dict[str, int], np.ndarray]:
    upstream = dict(zip(itemsites["site"], itemsites["upstream"], strict=False))
    sites: list[str] = []
    for site in itemsites["site"]:
        if site not in sites:
            sites.append(site)
    for up in list(upstream.values()):
        if up and up not in sites:
            sites.append(up)
    index = {site: i for i, site in enumerate(sites)}
    parent = np.array([index[upstream[s]] if upstream.get(s) else -1 for s in sites], dtype=np.int64)
    return sites, index, parent


def run_simulation(
    itemsites: pd.DataFrame,
    policies: pd.DataFrame,
    settings: Any,
    *,
    years: float = 5.0,
    warmup_years: float = 0.5,
    replications: int = 10,
    seed: int = 0,
    partial_shipments: bool = True,
    orders_cross: bool = False,
    demand_model: str = "auto",
    trace_items: list[str] | None = None,
    trace_step_days: float = 1.0,
    progress: Callable[[str], None] | None = None,
    families: pd.DataFrame | None = None,
) -> SimulationOutcome:
    """Simulate a policies frame on the network of an item-site table.

    Parameters
    ----------
    itemsites : DataFrame
        From :func:`optimiser.itemsites.build_itemsites` (columns ``site, item, upstream, daily_mean,
        daily_sd, lead_days, lead_days_sd, order_cost, holding_cost, backorder_cost``).
    policies : DataFrame
        ``site, item, reorder_point, order_quantity`` for every row of ``itemsites``, or, for items under a
        joint replenishment cycle, ``order_interval_days, order_up_to`` (periodic review every T days from
        day 0, so items whose intervals are multiples of a base cycle are reviewed together; rows where both
        are finite and T > 0 use them, the others (R, Q)); planned figures in the
        ``policies.csv`` columns (``fill_rate, cycle_service, expected_on_hand, expected_backorders,
        orders_per_year, expected_delay_days``, costs) are copied beside the simulated ones where present.
    settings : Settings
        ``days_per_year`` and ``backorder_basis`` are used.
    years, warmup_years : float
        Simulated years per replication, of which the first ``warmup_years`` are discarded.
    replications : int
        Independent replications (>= 2 for confidence intervals).
    seed : int
        Master seed (see :func:`simulate_network_arrays`).
    partial_shipments, orders_cross : bool
        See :func:`simulate_network_arrays`.
    demand_model : str
        ``"auto"``: Poisson where the daily variance does not exceed the mean, compound Poisson with
        logarithmic sizes (negative binomial counts, same mean and variance) where it does; ``"poisson"``;
        ``"normal_daily"``: normal per day rounded to whole units (common practice).
    trace_items : list of str, optional
        Items whose on hand and backorders per site are recorded (replication 0).
    progress : callable, optional
        Receives a line of text after each replication.
    families : DataFrame, optional
        Joint replenishment families sharing an order cost, one row per grouped (site, item):
        ``family, site, item, base_cycle_days, major_cost`` (the shared cost per joint order) and
        ``line_cost`` (per item order); optional planned figures ``cycle_multiple, annual_cost``
        (``groups.csv``). The rows must be periodic-review rows of ``policies``. Their ordering cost is the
        line cost per item order plus a share of the family's shared cost, charged once per base cycle in
        which at least one item of the family orders (see :func:`family_costs`).

    Returns
    -------
    SimulationOutcome

    Examples
    --------
    >>> out = run_simulation(table, policies, case.settings, years=2, replications=5)  # doctest: +SKIP
    >>> out.table[["site", "item", "fill_rate", "fill_rate_ci"]]  # doctest: +SKIP

    Notes
    -----
    Annual figures use ``days_per_year``: orders per year = orders per day x days_per_year; ordering cost =
    orders per year x order cost; holding cost = mean on hand x holding cost; backorder cost = customer units
    short per year x cost per unit (basis ``per_unit``) or mean customer backorders x cost per unit-year
    (``per_unit_year``), 0 where no backorder cost is given. Store orders waiting at a warehouse carry no
    backorder cost of their own (they cost through the stores' shortages); they count in the warehouse's
    ``fill_rate`` and ``backorders``. Costs are computed per replication, then
    averaged, so each carries its own interval.

    References
    ----------
    Law, A. M., Simulation Modeling and Analysis, 5th ed., 2015.
    """
    t_start = time.perf_counter()
    need = ["site", "item", "upstream", "daily_mean", "daily_sd", "lead_days", "lead_days_sd", "order_cost",
            "holding_cost", "backorder_cost"]
    missing = [c for c in need if c not in itemsites.columns]
    if missing:
        raise ValueError(f"itemsites: missing columns {missing}")
    for c in ("site", "item"):
        if c not in policies.columns:
            raise ValueError(f"policies: missing column {c!r}")
    has_rq = {"reorder_point", "order_quantity"} <= set(policies.columns)
    has_periodic = {"order_interval_days", "order_up_to"} <= set(policies.columns)
    if not (has_rq or has_periodic):
        raise ValueError("policies: need columns reorder_point and order_quantity, or order_interval_days "
                         "and order_up_to")
    if demand_model not in DEMAND_MODELS:
        raise ValueError(f"demand_model: must be one of {DEMAND_MODELS}; got {demand_model!r}")
    if not (np.isfinite(years) and years > 0):
        raise ValueError(f"years: must be > 0; got {years}")
    if not (0 <= warmup_years < years):
        raise ValueError(f"warmup_years: must be in [0, years); got {warmup_years}")
    table = itemsites.reset_index(drop=True)
    pol = policies.drop_duplicates(["site", "item"])
    if len(pol) != len(policies):
        raise ValueError("policies: more than one row for some (site, item)")
    pol = pol.rename(columns={c: f"policy__{c}" for c in pol.columns if c not in ("site", "item")})
    merged = table[["site", "item"]].merge(pol, on=["site", "item"], how="left", indicator=True)
    merged.columns = [c.removeprefix("policy__") for c in merged.columns]
    lacking = merged[merged["_merge"] != "both"]
    if len(lacking):
        r = lacking.iloc[0]
        raise ValueError(f"policies: no row for item {r['item']!r} at site {r['site']!r} "
                         f"({len(lacking)} item-site(s) without a policy)")

    sites, index, parent = _site_order(table)
    items = list(dict.fromkeys(table["item"]))
    item_index = {it: i for i, it in enumerate(items)}
    n, s_count = len(items), len(sites)
    ii = np.array([item_index[v] for v in table["item"]], dtype=np.int64)
    jj = np.array([index[v] for v in table["site"]], dtype=np.int64)

    def grid(values, fill=0.0):
        g = np.full((n, s_count), fill, dtype=float)
        g[ii, jj] = np.asarray(values, dtype=float)
        return g

    active = np.zeros((n, s_count), dtype=np.bool_)
    active[ii, jj] = True
    dmean = grid(table["daily_mean"].fillna(0.0))
    dsd = grid(table["daily_sd"].fillna(0.0))
    if demand_model == "auto":
        model = np.where(dsd * dsd > dmean * (1.0 + POISSON_DISPERSION_TOL), DEMAND_COMPOUND, DEMAND_POISSON)
    elif demand_model == "poisson":
        model = np.full((n, s_count), DEMAND_POISSON)
    else:
        model = np.full((n, s_count), DEMAND_NORMAL_DAILY)
    nan_col = pd.Series(np.full(len(merged), np.nan))
    r_col = merged["reorder_point"] if has_rq else nan_col
    q_col = merged["order_quantity"] if has_rq else nan_col
    t_col = pd.to_numeric(merged["order_interval_days"], errors="coerce") if has_periodic else nan_col
    s_col = pd.to_numeric(merged["order_up_to"], errors="coerce") if has_periodic else nan_col
    periodic = (np.isfinite(t_col.to_numpy(float)) & (t_col.to_numpy(float) > 0)
                & np.isfinite(s_col.to_numpy(float)))
    lacking_rq = ~periodic & ~(np.isfinite(r_col.to_numpy(float)) & np.isfinite(q_col.to_numpy(float)))
    if lacking_rq.any():
        r = merged[lacking_rq].iloc[0]
        raise ValueError(f"policies: item {r['item']!r} at site {r['site']!r} has neither a reorder point "
                         "and order quantity nor an order interval and order-up-to level")
    rop = grid(np.where(periodic, 0.0, r_col.to_numpy(float)), fill=0.0)
    oq = grid(np.where(periodic, 1.0, q_col.to_numpy(float)), fill=1.0)
    review = grid(np.where(periodic, t_col.to_numpy(float), 0.0))
    upto = grid(np.where(periodic, s_col.to_numpy(float), 0.0))
    lt_m = grid(table["lead_days"].fillna(0.0))
    lt_s = grid(table["lead_days_sd"].fillna(0.0))

    dpy = float(settings.days_per_year)
    horizon = years * dpy
    warm = warmup_years * dpy
    tr = [] if trace_items is None else list(trace_items)
    unknown = [t for t in tr if t not in item_index]
    if unknown:
        raise ValueError(f"trace_items: unknown item(s) {unknown}")

    def report(done: int, total: int) -> None:
        if progress is not None:
            progress(f"simulated replication {done}/{total} ({n} items, {s_count} sites, "
                     f"{years:g} years each)")

    sim = simulate_network_arrays(
        parent, rop, oq, demand_mean=dmean, demand_sd=dsd, demand_model=model, lead_mean=lt_m, lead_sd=lt_s,
        review_period=review, order_up_to=upto, active=active, horizon_days=horizon, warmup_days=warm,
        replications=replications, seed=seed,
        partial_shipments=partial_shipments, orders_cross=orders_cross,
        trace_items=[item_index[t] for t in tr], trace_step_days=trace_step_days, progress=report,
    )

    # per-replication annual figures at the rows of the table: (K, rows)
    def rows(a: np.ndarray) -> np.ndarray:
        return a[:, ii, jj]

    order_cost = table["order_cost"].fillna(0.0).to_numpy(float)
    hold = table["holding_cost"].fillna(0.0).to_numpy(float)
    bcost = table["backorder_cost"].fillna(0.0).to_numpy(float)
    per_rep = {
        "fill_rate": rows(sim.fill_rate),
        "customer_fill_rate": rows(sim.customer_fill_rate),
        "cycle_service": rows(sim.cycle_service),
        "on_hand": rows(sim.on_hand),
        "backorders": rows(sim.backorders),
        "orders_per_year": rows(sim.orders_per_day) * dpy,
        "store_delay_days": np.where(parent[jj] >= 0, rows(sim.store_delay), 0.0),
        "store_delay_sd_days": np.where(parent[jj] >= 0, rows(sim.store_delay_sd), 0.0),
    }
    per_rep["ordering_cost"] = per_rep["orders_per_year"] * order_cost
    fam_table = None
    fam_cols: dict[str, np.ndarray] = {}
    if families is not None and len(families):
        fam_table, fam_cols = family_costs(sim, families, table, periodic, review, ii, jj,
                                           per_rep["orders_per_year"], dpy)
        grouped = fam_cols["grouped"]
        per_rep["ordering_cost"] = np.where(grouped, fam_cols["line_cost"] + fam_cols["shared_cost"],
                                            per_rep["ordering_cost"])
    per_rep["holding_cost"] = per_rep["on_hand"] * hold
    # backorder cost on customer demand only: store orders waiting at a warehouse cost through the stores
    if settings.backorder_basis == "per_unit":
        per_rep["backorder_cost"] = rows(sim.customer_units_short_per_day) * dpy * bcost
    else:
        per_rep["backorder_cost"] = rows(sim.customer_backorders) * bcost
    per_rep["total_cost"] = per_rep["ordering_cost"] + per_rep["holding_cost"] + per_rep["backorder_cost"]
    if fam_table is not None:  # family totals a year, replication by replication
        sel = np.nonzero(fam_cols["family_index"] >= 0)[0]
        for name in ("holding_cost", "backorder_cost", "total_cost"):
            tot = np.zeros((per_rep[name].shape[0], len(fam_table)))
            np.add.at(tot, (slice(None), fam_cols["family_index"][sel]), np.nan_to_num(per_rep[name][:, sel]))
            fam_table[name] = tot.mean(axis=0)
            fam_table[f"{name}_ci"] = confidence_half_width(tot, axis=0)

    out = pd.DataFrame({"site": table["site"].to_numpy(object), "item": table["item"].to_numpy(object)})
    out["reorder_point"] = np.where(periodic, np.nan, r_col.to_numpy(float))
    out["order_quantity"] = np.where(periodic, np.nan, q_col.to_numpy(float))
    out["order_interval_days"] = np.where(periodic, t_col.to_numpy(float), np.nan)
    out["order_up_to"] = np.where(periodic, s_col.to_numpy(float), np.nan)
    names = {DEMAND_POISSON: "poisson", DEMAND_COMPOUND: "compound_poisson",
             DEMAND_NORMAL_DAILY: "normal_daily"}
    out["demand_model"] = [names[int(m)] for m in model[ii, jj]]
    out["demand_per_year"] = _mean0(rows(sim.demand_per_day)) * dpy
    for name in KPI_COLUMNS:
        out[name] = _mean0(per_rep[name])
        out[f"{name}_ci"] = confidence_half_width(per_rep[name], axis=0)
    grouped = fam_cols["grouped"] if fam_table is not None else np.zeros(len(out), dtype=bool)
    planned_cols: dict[str, np.ndarray] = {}
    for name, col in PLANNED_COLUMNS.items():
        if col in merged.columns:
            # for grouped rows the (R, Q) plan's figures do not apply: the grouping's are used below
            planned_cols[name] = np.where(grouped, np.nan,
                                          pd.to_numeric(merged[col], errors="coerce").to_numpy(float))
    if fam_table is not None:
        out["family"] = np.where(grouped, fam_cols["family"], "")
        for name in ("line_cost", "shared_cost"):
            out[name] = np.where(grouped, _mean0(fam_cols[name]), np.nan)
            out[f"{name}_ci"] = np.where(grouped, confidence_half_width(fam_cols[name], axis=0), np.nan)
        for name, values in (("orders_per_year", fam_cols["planned_orders_per_year"]),
                             ("ordering_cost", fam_cols["planned_ordering_cost"]),
                             ("total_cost", fam_cols["planned_annual_cost"]),
                             ("fill_rate", fam_cols["planned_fill_rate"]),
                             ("on_hand", fam_cols["planned_on_hand"])):
            base = planned_cols.get(name, np.full(len(out), np.nan))
            planned_cols[name] = np.where(grouped, values, base)
    flags = [[] for _ in range(len(out))]
    for name in PLANNED_COLUMNS:
        if name not in planned_cols:
            continue
        planned = planned_cols[name]
        out[f"planned_{name}"] = planned
        sim_mean, sim_ci = out[name].to_numpy(), out[f"{name}_ci"].to_numpy()
        if name == "fill_rate":
            # A plan's fill rate at a site with customers of its own is its customers' fill rate; the
            # simulated fill_rate there also counts the orders of the sites it supplies.
            own = table["daily_mean"].to_numpy(float) > 0
            sim_mean = np.where(own, out["customer_fill_rate"].to_numpy(), sim_mean)
            sim_ci = np.where(own, out["customer_fill_rate_ci"].to_numpy(), sim_ci)
        lo = sim_mean - sim_ci
        hi = sim_mean + sim_ci
        outside = (planned < lo - PLANNED_SLACK) | (planned > hi + PLANNED_SLACK)
        off = np.isfinite(planned) & np.isfinite(lo) & outside
        for r in np.nonzero(off)[0]:
            flags[r].append(name)
    out["outside_interval"] = ["; ".join(f) for f in flags]

    trace_frames = []
    for row, item in enumerate(tr):
        for j, site in enumerate(sites):
            if not active[item_index[item], j]:
                continue
            trace_frames.append(pd.DataFrame({
                "item": item, "site": site, "day": sim.trace_times,
                "on_hand": sim.trace_on_hand[row, :, j], "backorders": sim.trace_backorders[row, :, j],
            }))
    traces = (pd.concat(trace_frames, ignore_index=True) if trace_frames
              else pd.DataFrame(columns=["item", "site", "day", "on_hand", "backorders"]))
    info = {
        "years": years, "warmup_years": warmup_years, "replications": int(replications), "seed": int(seed),
        "partial_shipments": bool(partial_shipments), "orders_cross": bool(orders_cross),
        "demand_model": demand_model, "days_per_year": dpy, "items": n, "sites": s_count,
        "item_sites": len(out), "demand_events": sim.demand_events,
        "seconds": round(time.perf_counter() - t_start, 3), "capacity_retries": sim.retries,
        "traced_items": tr,
    }
    return SimulationOutcome(table=out, traces=traces, info=info, families=fam_table)


FAMILY_COLUMNS = ["family", "site", "base_cycle_days", "major_cost"]  # required in ``families``
GROUP_PLANNED = ("cycle_multiple", "annual_cost", "fill_rate", "expected_on_hand",
                 "order_probability")  # optional (groups.csv)
MULTIPLE_TOL = 1e-3  # an item's interval must be within this many base cycles of a whole multiple
DUE_CYCLES_LIMIT = 100_000  # planned joint orders: base cycles scanned for "some item due"


def _due_share(multiples: np.ndarray) -> float:
    """Share of base cycles b = 1, 2, ... in which at least one item is due (some k_i divides b)."""
    k = np.asarray(multiples, dtype=np.int64)
    if k.size == 0:
        return 0.0
    period = int(np.lcm.reduce(k))
    span = min(period if period > 0 else DUE_CYCLES_LIMIT, DUE_CYCLES_LIMIT)
    b = np.arange(1, span + 1)
    return float(np.mean(np.any(b[:, None] % k[None, :] == 0, axis=1)))


def family_costs(sim: NetworkSimulation, families: pd.DataFrame, table: pd.DataFrame, periodic: np.ndarray,
                 review: np.ndarray, ii: np.ndarray, jj: np.ndarray, orders_per_year: np.ndarray,
                 days_per_year: float) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
    """Shared (major) and line (minor) ordering costs of joint replenishment families, per replication.

    Parameters
    ----------
    sim : NetworkSimulation
        The simulation, with its review log (``review_orders``).
    families : DataFrame
        One row per grouped (site, item): ``family, site, item, base_cycle_days, major_cost, line_cost`` and
        optionally ``cycle_multiple, annual_cost, fill_rate, expected_on_hand, order_probability`` (planned,
        ``groups.csv``).
    table : DataFrame
        The simulated item-site rows (``site, item``).
    periodic : ndarray of bool, (rows,)
        Rows under periodic review.
    review : ndarray, (n, S)
        The review periods given to the simulation (days).
    ii, jj : ndarray of int, (rows,)
        Item and site index of every row.
    orders_per_year : ndarray, (K, rows)
        Simulated item orders per year per replication.
    days_per_year : float

    Returns
    -------
    families : DataFrame
        One row per family: ``family, site, items, base_cycle_days, major_cost`` (per joint order), then
        simulated ``orders_per_year`` (joint orders), ``shared_cost``, ``line_cost``, ``ordering_cost`` (each
        a year, with ``_ci``) and the planned ``planned_orders_per_year`` (expected base cycles in which some
        due item orders, with ``order_probability`` p_i from the groups; without it, base cycles in which some
        item is due), ``planned_shared_cost`` (S x those expected joint orders; without p, S/T as the grouping
        model charges it), ``planned_line_cost`` (sum of s_i p_i/(k_i T)), ``planned_ordering_cost``,
        ``planned_grouped_cost`` (sum of ``annual_cost``).
    columns : dict
        Per row: ``grouped`` (bool), ``family`` (name), ``family_index`` (-1 where not grouped),
        ``line_cost`` and ``shared_cost`` (K, rows), ``planned_orders_per_year``, ``planned_ordering_cost``,
        ``planned_annual_cost``, ``planned_fill_rate``, ``planned_on_hand`` (NaN where not given).

    Examples
    --------
    >>> fam, cols = family_costs(sim, families, table, periodic, review, ii, jj, opy, 365.0)  # doctest: +SKIP

    Notes
    -----
    A joint order is a base cycle (review epoch b = round(day / T)) in which at least one item of the family
    places an order; the family pays S for each. Items are reviewed at multiples of their interval k_i T
    from day 0, so their reviews fall on base-cycle epochs; whether a family orders in a cycle is read from
    the simulation's review log, replication by replication. Simulated family ordering cost a year =
    (S x joint orders + sum_i s_i x orders_i) / measured years. The shared cost is allocated to the items
    of a family in proportion to their orders in the replication (the grouping model's allocation, in
    proportion to 1/k_i, is the same rule when every review orders). Planned joint orders a year =
    (1/L) sum_{b=1..L} [1 - prod_{i: k_i | b} (1 - p_i)] / T over the common period L = lcm(k)
    (``models.joint.expected_joint_share``), p_i the chance that a review of item i orders; without p
    (p = 1) the share of base cycles in which some k_i divides b, with the shared cost S/T the grouping
    model charges every base cycle (the same when some k_i = 1).

    References
    ----------
    Khouja, M., Goyal, S., "A review of the joint replenishment problem literature: 1989-2005", European
    Journal of Operational Research 186, 2008 (the cost structure S + sum s_i).
    """
    missing = [c for c in (*FAMILY_COLUMNS, "item", "line_cost") if c not in families.columns]
    if missing:
        raise ValueError(f"families: missing column(s) {missing}")
    fam = families.copy()
    fam["site"] = fam["site"].astype(str)
    fam["item"] = fam["item"].astype(str)
    if fam.duplicated(["site", "item"]).any():
        raise ValueError("families: more than one row for some (site, item)")
    rows = len(table)
    key = table[["site", "item"]].astype(str).reset_index(drop=True).reset_index()
    joined = fam.merge(key, on=["site", "item"], how="left")
    if joined["index"].isna().any():
        r = joined[joined["index"].isna()].iloc[0]
        raise ValueError(f"families: item {r['item']!r} at site {r['site']!r} is not simulated")
    row = joined["index"].to_numpy(np.int64)
    if not np.all(periodic[row]):
        r = joined[~periodic[row]].iloc[0]
        raise ValueError(f"families: item {r['item']!r} at site {r['site']!r} of family {r['family']!r} has "
                         "no order interval and order-up-to level")
    names = list(dict.fromkeys(joined["family"].astype(str)))
    f_of = np.array([names.index(str(v)) for v in joined["family"]], dtype=np.int64)
    n_fam = len(names)
    base = np.full(n_fam, np.nan)
    major = np.full(n_fam, np.nan)
    for col, target in (("base_cycle_days", base), ("major_cost", major)):
        vals = pd.to_numeric(joined[col], errors="coerce").to_numpy(float)
        for f in range(n_fam):
            v = np.unique(vals[f_of == f])
            if v.size != 1 or not np.isfinite(v[0]) or v[0] < 0 or (col == "base_cycle_days" and v[0] <= 0):
                raise ValueError(f"families: family {names[f]!r} needs one {col} (finite, "
                                 f"{'> 0' if col == 'base_cycle_days' else '>= 0'}); got {v.tolist()}")
            target[f] = v[0]
    line = pd.to_numeric(joined["line_cost"], errors="coerce").to_numpy(float)
    if np.any(~np.isfinite(line) | (line < 0)):
        raise ValueError("families: line_cost must be finite and >= 0")
    interval = review[ii[row], jj[row]]
    ratio = interval / base[f_of]
    mult = np.round(ratio)
    if np.any((mult < 1) | (np.abs(ratio - mult) > MULTIPLE_TOL)):
        r = int(np.nonzero((mult < 1) | (np.abs(ratio - mult) > MULTIPLE_TOL))[0][0])
        raise ValueError(f"families: item {joined['item'].iloc[r]!r} at site {joined['site'].iloc[r]!r}: "
                         f"order interval {interval[r]:g} days is not a whole multiple of the family's base "
                         f"cycle {base[f_of[r]]:g} days")
    mult = mult.astype(np.int64)

    grouped = np.zeros(rows, dtype=bool)
    grouped[row] = True
    fam_index = np.full(rows, -1, dtype=np.int64)
    fam_index[row] = f_of
    fam_name = np.full(rows, "", dtype=object)
    fam_name[row] = [names[f] for f in f_of]
    line_row = np.zeros(rows)
    line_row[row] = line
    k_rep = orders_per_year.shape[0]
    years = sim.measured_days / days_per_year

    # joint orders: distinct (replication, family, base cycle) among the reviews that ordered
    k, it, st, day = sim.review_order_times(review)
    row_of = np.full(review.shape, -1, dtype=np.int64)
    row_of[ii, jj] = np.arange(rows)
    r_ev = row_of[it, st]
    f_ev = np.where(r_ev >= 0, fam_index[np.maximum(r_ev, 0)], -1)
    keep = f_ev >= 0
    k, f_ev, day = k[keep], f_ev[keep], day[keep]
    b = np.rint(day / base[f_ev]).astype(np.int64)
    span = int(b.max()) + 1 if b.size else 1
    uniq = np.unique((k * n_fam + f_ev) * span + b)
    joint = np.bincount(uniq // span, minlength=k_rep * n_fam).reshape(k_rep, n_fam).astype(float)
    joint_per_year = joint / years

    orders = np.where(grouped, orders_per_year, 0.0)
    fam_orders = np.zeros((k_rep, n_fam))
    np.add.at(fam_orders, (slice(None), f_of), orders[:, row])
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(fam_orders[:, fam_index.clip(0)] > 0,
                         orders / np.where(fam_orders[:, fam_index.clip(0)] > 0,
                                           fam_orders[:, fam_index.clip(0)], 1.0), 0.0)
    shared_fam = major[None, :] * joint_per_year  # (K, F)
    shared_row = np.where(grouped, shared_fam[:, fam_index.clip(0)] * share, 0.0)
    line_cost = np.where(grouped, orders * line_row, 0.0)
    line_fam = np.zeros((k_rep, n_fam))
    np.add.at(line_fam, (slice(None), f_of), line_cost[:, row])

    # planned figures of the grouping: a review orders with probability p (groups.csv order_probability;
    # without it every review orders and the shared cost is S/T, the model's charge)
    has_p = "order_probability" in joined
    p_ord = (np.clip(np.nan_to_num(pd.to_numeric(joined["order_probability"], errors="coerce")
                                   .to_numpy(float), nan=1.0), 0.0, 1.0) if has_p else np.ones(len(row)))
    inv_k = p_ord / mult
    sum_inv = np.bincount(f_of, weights=inv_k, minlength=n_fam)
    planned_joint = np.array([_due_share(mult[f_of == f]) if not has_p
                              else joint_model.expected_joint_share(mult[f_of == f], p_ord[f_of == f])
                              for f in range(n_fam)]) * days_per_year / base
    planned_shared = major * (planned_joint if has_p else days_per_year / base)
    planned_orders = np.full(rows, np.nan)
    planned_orders[row] = p_ord * days_per_year / interval
    planned_line_item = line * p_ord * days_per_year / interval
    planned_ordering = np.full(rows, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        weight = np.where(sum_inv[f_of] > 0, inv_k / sum_inv[f_of], 0.0)
    planned_ordering[row] = planned_line_item + planned_shared[f_of] * weight
    planned_annual = np.full(rows, np.nan)
    if "annual_cost" in joined:
        planned_annual[row] = pd.to_numeric(joined["annual_cost"], errors="coerce").to_numpy(float)
    planned_service = {}
    for name, col in (("fill_rate", "fill_rate"), ("on_hand", "expected_on_hand")):
        planned_service[name] = np.full(rows, np.nan)
        if col in joined:
            planned_service[name][row] = pd.to_numeric(joined[col], errors="coerce").to_numpy(float)

    recs = []
    for f, name in enumerate(names):
        sel = f_of == f
        rec: dict[str, Any] = {
            "family": name, "site": ",".join(dict.fromkeys(joined.loc[sel, "site"])),
            "items": int(sel.sum()), "base_cycle_days": base[f], "major_cost": major[f],
        }
        for label, per in (("orders_per_year", joint_per_year[:, f]), ("shared_cost", shared_fam[:, f]),
                           ("line_cost", line_fam[:, f]),
                           ("ordering_cost", shared_fam[:, f] + line_fam[:, f])):
            rec[label] = float(np.mean(per))
            rec[f"{label}_ci"] = float(confidence_half_width(per[:, None], axis=0)[0])
        rec["planned_orders_per_year"] = planned_joint[f]
        rec["planned_shared_cost"] = planned_shared[f]
        rec["planned_line_cost"] = float(planned_line_item[sel].sum())
        rec["planned_ordering_cost"] = rec["planned_shared_cost"] + rec["planned_line_cost"]
        rec["planned_grouped_cost"] = float(planned_annual[row][sel].sum()) if "annual_cost" in joined \
            else np.nan
        recs.append(rec)
    columns = {"grouped": grouped, "family": fam_name, "family_index": fam_index, "line_cost": line_cost,
               "shared_cost": shared_row, "planned_orders_per_year": planned_orders,
               "planned_ordering_cost": planned_ordering, "planned_annual_cost": planned_annual,
               "planned_fill_rate": planned_service["fill_rate"],
               "planned_on_hand": planned_service["on_hand"]}
    return pd.DataFrame(recs), columns


def _mean0(a: np.ndarray) -> np.ndarray:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(a, axis=0)


def simulate_policies(itemsites: pd.DataFrame, policies: pd.DataFrame, settings: Any, *, years: float = 5.0,
                      warmup_years: float = 0.5, replications: int = 10, seed: int = 0,
                      **options: Any) -> pd.DataFrame:
    """Simulate given policies and return the table of :class:`SimulationOutcome` (one row per site, item).

    Parameters
    ----------
    itemsites, policies, settings, years, warmup_years, replications, seed
        As in :func:`run_simulation`.
    **options
        Passed on to :func:`run_simulation` (``partial_shipments``, ``orders_cross``, ``demand_model``,
        ``trace_items``, ``progress``).

    Returns
    -------
    DataFrame
        ``site, item, reorder_point, order_quantity, demand_model, demand_per_year`` then for each KPI in
        ``fill_rate, customer_fill_rate, cycle_service, on_hand, backorders, orders_per_year,
        store_delay_days, store_delay_sd_days, ordering_cost, holding_cost, backorder_cost, total_cost`` its
        mean and ``<kpi>_ci`` (95% half-width), then ``planned_<kpi>`` where the policies give it, and
        ``outside_interval``.

    Examples
    --------
    >>> frame = simulate_policies(table, policies, case.settings, years=2, replications=5)  # doctest: +SKIP

    Notes
    -----
    See :func:`run_simulation` for the annual figures and :func:`simulate_network_arrays` for the mechanics.

    References
    ----------
    Law, A. M., Simulation Modeling and Analysis, 5th ed., 2015.
    """
    return run_simulation(itemsites, policies, settings, years=years, warmup_years=warmup_years,
                          replications=replications, seed=seed, **options).table


# ============================================================================================================
# writing: simulation.csv, traces.csv, summary.json, plots (atomically)
# ============================================================================================================


def _plot_traces(traces, folder: Path) -> list[str]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    written = []
    for item, part in traces.groupby("item", sort=False):
        sites = list(dict.fromkeys(part["site"]))
        fig, axes = plt.subplots(len(sites), 1, figsize=(9, 1.9 * len(sites) + 0.6), sharex=True,
                                 squeeze=False)
        for ax, site in zip(axes[:, 0], sites, strict=True):
            rows = part[part["site"] == site]
            ax.step(rows["day"], rows["on_hand"], where="post", color="tab:blue", lw=0.9, label="on hand")
            ax.step(rows["day"], -rows["backorders"], where="post", color="tab:red", lw=0.9,
                    label="backorders (below 0)")
            ax.axhline(0, color="grey", lw=0.5)
            ax.set_ylabel(str(site), fontsize=8)
        axes[0, 0].set_title(f"{item}: simulated on hand and backorders per site (units), replication 1")
        axes[0, 0].legend(fontsize=7, loc="upper right")
        axes[-1, 0].set_xlabel("day")
        fig.tight_layout()
        name = f"trace_{_safe_name(str(item))}.png"
        fig.savefig(folder / name, dpi=100)
        plt.close(fig)
        written.append(name)
    return written


def _check_not_other_command(target: Path) -> None:
    """Replace only an earlier simulation: a plan or grouping output in the way is kept."""
    from optimiser.errors import OutputError

    marker = target / "summary.json"
    if not marker.is_file():
        return
    try:
        command = json.loads(marker.read_text(encoding="utf-8")).get("command")
    except (OSError, ValueError, AttributeError):
        command = None
    if command != "simulate":
        raise OutputError(f"{target} holds the results of 'rqnet {command}'; choose another folder for --out")


def _totals(tab) -> dict[str, Any]:
    """Totals of a part of the simulation table: sums of costs and stock, demand-weighted fill rate."""
    demand = tab["demand_per_year"].fillna(0.0).to_numpy(float)
    fill = tab["fill_rate"].to_numpy(float)
    ok = np.isfinite(fill) & (demand > 0)
    out: dict[str, Any] = {
        "item_sites": len(tab),
        "demand_per_year": float(demand.sum()),
        "fill_rate": float(np.sum(fill[ok] * demand[ok]) / demand[ok].sum()) if ok.any() else None,
        "on_hand": float(tab["on_hand"].sum()),
        "backorders": float(tab["backorders"].sum()),
    }
    for name in ("ordering_cost", "holding_cost", "backorder_cost", "total_cost"):
        out[name] = float(tab[name].sum())
        if f"planned_{name}" in tab:
            out[f"planned_{name}"] = float(tab[f"planned_{name}"].sum())
    out["item_sites_outside_interval"] = int((tab["outside_interval"] != "").sum())
    return out


def _safe_name(text: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in text)


def write_simulation(outcome: SimulationOutcome, out_dir: str | Path, *, case_name: str = "",
                     case_path: str = "", plots: bool = True) -> list[str]:
    """Write ``simulation.csv``, ``traces.csv`` (when items were traced), ``summary.json`` and the plots.

    Parameters
    ----------
    outcome : SimulationOutcome
        From :func:`run_simulation`.
    out_dir : str or Path
        Target folder; created, or replaced when it holds an earlier rqnet output (never otherwise).
    case_name, case_path : str
        Shown in ``summary.json``.
    plots : bool
        Also draw ``trace_<item>.png`` for every traced item.

    Returns
    -------
    list of str
        Files written, relative to ``out_dir``.

    Examples
    --------
    >>> write_simulation(run_simulation(table, policies, settings), "out/sim")  # doctest: +SKIP

    Notes
    -----
    Everything is written into a temporary folder beside the target and renamed into place when complete.

    References
    ----------
    None (file layout of this project).
    """
    from optimiser.report import TOOL, _check_target, _clean, atomic_folder, tool_version

    target = Path(out_dir).resolve()
    _check_target(target)
    _check_not_other_command(target)
    written: list[str] = []
    with atomic_folder(target) as temp:
        outcome.table.to_csv(temp / "simulation.csv", index=False, float_format="%.6g")
        written.append("simulation.csv")
        if len(outcome.traces):
            outcome.traces.to_csv(temp / "traces.csv", index=False, float_format="%.6g")
            written.append("traces.csv")
        tab = outcome.table
        summary = {
            "tool": TOOL,
            "version": tool_version(),
            "command": "simulate",
            "created": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "case": {"name": case_name, "path": case_path},
            "run": outcome.info,
            "network": _totals(tab),
            "sites": {str(site): _totals(part) for site, part in tab.groupby("site", sort=False)},
        }
        if outcome.families is not None:
            summary["families"] = outcome.families.to_dict(orient="records")
        (temp / "summary.json").write_text(json.dumps(_clean(summary), indent=2, ensure_ascii=False) + "\n",
                                           encoding="utf-8")
        written.append("summary.json")
        if plots and len(outcome.traces):
            written += _plot_traces(outcome.traces, temp)
    return written


# ============================================================================================================
# the `rqnet simulate` subcommand (registered in optimiser/cli.py)
# ============================================================================================================

COMMAND_HELP = "simulate reorder points and order quantities on the network and compare with the plan"
COMMAND_DESCRIPTION = (
    "Run the policies in --policies (a policies.csv written by 'rqnet plan', or any CSV with site, item, "
    "reorder_point, order_quantity) through a simulation of the whole network: random customer demand at "
    "every site, random lead times, stores ordering from the warehouse and waiting when it is out of stock, "
    "backorders filled first come, first served. Each of --replications independent runs covers --years "
    "years after a warm-up. simulation.csv gives per site and item the simulated fill rate, cycle service, "
    "stock on hand, backorders, orders per year, wait at the warehouse and annual costs, each with the "
    "half-width of its 95% confidence interval, the planned figures beside them, and outside_interval naming "
    "the figures the plan gets wrong by more than the simulation's uncertainty. Same --seed, same results."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``rqnet simulate``."""
    parser.add_argument("case", metavar="CASE", type=Path, help="the case folder")
    parser.add_argument("--policies", metavar="FILE", type=Path, required=True,
                        help="CSV with site, item, reorder_point, order_quantity for every stocked item-site")
    parser.add_argument("--out", metavar="DIR", type=Path, required=True,
                        help="folder for the results; created, or replaced if it holds earlier rqnet results")
    parser.add_argument("--groups", metavar="FILE", type=Path, default=None,
                        help="groups.csv written by 'rqnet group': its items are reviewed every "
                        "order_interval_days and ordered up to order_up_to instead of their --policies row")
    parser.add_argument("--years", metavar="Y", type=float, default=5.0,
                        help="simulated years per replication after the warm-up (default 5)")
    parser.add_argument("--warmup-years", metavar="W", type=float, default=0.5,
                        help="years simulated first and discarded (default 0.5)")
    parser.add_argument("--replications", metavar="K", type=int, default=10,
                        help="independent replications (default 10; at least 2 for intervals)")
    parser.add_argument("--seed", metavar="S", type=int, default=1, help="random seed (default 1)")
    parser.add_argument("--whole-orders", action="store_true",
                        help="the warehouse ships a store order only when it can send all of it (default: "
                        "it sends what it has and the rest later)")
    parser.add_argument("--orders-cross", action="store_true",
                        help="let a later shipment overtake an earlier one (default: arrivals keep order)")
    parser.add_argument("--demand", choices=["auto", "poisson", "normal-daily"], default="auto",
                        help="customer demand model: auto = Poisson, or compound Poisson where demand varies "
                        "more than Poisson (default); normal-daily = normal per day rounded to units")
    parser.add_argument("--trace", metavar="ITEM", action="append", default=None,
                        help="plot day-by-day stock of this item at every site (repeatable; default: the "
                        "item with the largest demand)")
    parser.add_argument("--no-plots", action="store_true", help="skip the PNG charts")


def _merge_groups(given, path: Path, itemsites):
    """Add ``order_interval_days, order_up_to`` from a groups file to the policies frame."""
    try:
        groups = pd.read_csv(path, dtype={"site": str, "item": str}, keep_default_na=False, na_values=[""])
    except (OSError, ValueError) as exc:
        raise ValueError(f"{path.name}: cannot read it ({exc})") from exc
    groups.columns = [str(c).strip() for c in groups.columns]
    need = ["site", "item", "order_interval_days", "order_up_to"]
    missing = [c for c in need if c not in groups.columns]
    if missing:
        raise ValueError(f"{path.name}: missing column(s) {', '.join(missing)}")
    extra = [c for c in ("family", "base_cycle_days", "cycle_multiple", "annual_cost", "fill_rate",
                         "expected_on_hand", "order_probability") if c in groups.columns]
    groups = groups[need + extra].copy()
    for c in ("order_interval_days", "order_up_to"):
        groups[c] = pd.to_numeric(groups[c], errors="coerce")
    groups = groups[np.isfinite(groups["order_interval_days"]) & np.isfinite(groups["order_up_to"])]
    stocked = set(zip(itemsites["site"], itemsites["item"], strict=True))
    for row, (site, item) in enumerate(zip(groups["site"], groups["item"], strict=True)):
        if (site, item) not in stocked:
            raise ValueError(f"{path.name}, row {groups.index[row] + 2}: item {item!r} is not stocked at "
                             f"site {site!r} in this case")
    if groups.duplicated(["site", "item"]).any():
        raise ValueError(f"{path.name}: more than one row for some site and item")
    if (groups["order_interval_days"] <= 0).any() or (groups["order_up_to"] < 0).any():
        raise ValueError(f"{path.name}: order_interval_days must be > 0 and order_up_to >= 0")
    return given.merge(groups[need], on=["site", "item"], how="left"), groups


def group_families(case: Any, itemsites: pd.DataFrame, groups: pd.DataFrame) -> pd.DataFrame | None:
    """The shared and line order costs of the families in a groups table, from the case.

    Parameters
    ----------
    case : Case
        The case the groups were made for.
    itemsites : DataFrame
        Its item-site table.
    groups : DataFrame
        ``groups.csv`` rows with ``family, site, item, base_cycle_days`` (rows without an interval dropped).

    Returns
    -------
    DataFrame or None
        ``family, site, item, base_cycle_days, major_cost, line_cost`` (and ``cycle_multiple, annual_cost``
        where the groups give them) for :func:`run_simulation`; None when the groups name no family.

    Examples
    --------
    >>> group_families(case, table, pd.read_csv("out/groups/groups.csv"))  # doctest: +SKIP

    Notes
    -----
    A supplier family ``site/supplier`` shares the supplier's ``order_cost``; each item pays its
    ``line_cost`` (``items.csv``, else ``suppliers.csv``). A delivery family ``site<-upstream`` shares the
    site's ``delivery_cost`` with no line cost. A family that rides a shared run (``runs.csv``) is
    simulated with its supplier's order cost as the shared cost (the run's cost split is not simulated).

    References
    ----------
    None (case conventions of this project).
    """
    from optimiser.grouping import _families

    if "family" not in groups.columns or "base_cycle_days" not in groups.columns:
        return None
    known = {}
    for f in _families(case, itemsites, deliveries=True):
        for item, minor in zip(f["rows"]["item"], f["minor"], strict=True):
            known[(f["family"], str(f["site"]), str(item))] = (f["major"], float(minor))
    recs = []
    for r in groups.itertuples(index=False):
        key = (str(r.family), str(r.site), str(r.item))
        if key not in known:
            raise ValueError(f"family {r.family!r} does not hold item {r.item!r} at site {r.site!r} in this "
                             "case")
        major, minor = known[key]
        recs.append({"family": key[0], "site": key[1], "item": key[2], "base_cycle_days": r.base_cycle_days,
                     "major_cost": major, "line_cost": minor,
                     **{c: getattr(r, c) for c in GROUP_PLANNED if c in groups.columns}})
    return pd.DataFrame(recs) if recs else None


def run(args: argparse.Namespace) -> int:
    """Run ``rqnet simulate``; returns the exit code."""
    from optimiser.case import load_case, load_policies_for_case
    from optimiser.cli import EXIT_BAD_INPUT, EXIT_OK, progress_printer
    from optimiser.itemsites import build_itemsites

    say = progress_printer(args)
    out_dir = Path(args.out).resolve()
    for given_file in (args.policies, args.groups):
        if given_file is not None and out_dir in Path(given_file).resolve().parents:
            print(f"rqnet: {given_file} lies inside --out {args.out}, which would be replaced; choose "
                  "another folder for --out", file=sys.stderr)
            print("rqnet: nothing was written", file=sys.stderr)
            return EXIT_BAD_INPUT
    say(f"reading case {args.case}")
    case = load_case(args.case)
    say(f"reading policies {args.policies}")
    given = load_policies_for_case(case, args.policies)
    extra = pd.read_csv(args.policies, dtype={"site": str, "item": str}, keep_default_na=False,
                        na_values=[""])
    extra.columns = [str(c).strip() for c in extra.columns]
    planned = [c for c in PLANNED_COLUMNS.values() if c in extra.columns]
    if planned:
        extra = extra[["site", "item", *planned]].copy()
        extra["site"] = extra["site"].str.strip()
        extra["item"] = extra["item"].str.strip()
        given = given.merge(extra.drop_duplicates(["site", "item"]), on=["site", "item"], how="left")
    itemsites = build_itemsites(case)
    families = None
    if args.groups is not None:
        say(f"reading groups {args.groups}")
        try:
            given, groups = _merge_groups(given, args.groups, itemsites)
            families = group_families(case, itemsites, groups)
        except ValueError as exc:
            print(f"rqnet: cannot simulate: {exc}", file=sys.stderr)
            print("rqnet: nothing was written", file=sys.stderr)
            return EXIT_BAD_INPUT
    trace = args.trace
    if trace is None and len(itemsites):
        trace = [str(itemsites.groupby("item")["annual_demand"].max().idxmax())]
    try:
        outcome = run_simulation(
            itemsites, given, case.settings, years=args.years, warmup_years=args.warmup_years,
            replications=args.replications, seed=args.seed, partial_shipments=not args.whole_orders,
            orders_cross=args.orders_cross, demand_model=args.demand.replace("-", "_"), trace_items=trace,
            progress=say, families=families,
        )
    except ValueError as exc:
        print(f"rqnet: cannot simulate: {exc}", file=sys.stderr)
        print("rqnet: nothing was written", file=sys.stderr)
        return EXIT_BAD_INPUT
    say(f"writing results to {args.out}")
    write_simulation(outcome, args.out, case_name=case.settings.name, case_path=str(args.case),
                     plots=not args.no_plots)
    tab = outcome.table
    cur = case.settings.currency
    info = outcome.info
    print(f"simulate: {info['item_sites']} item-sites at {info['sites']} site(s), {info['replications']} x "
          f"{info['years']:g} years; simulated total cost {tab['total_cost'].sum():,.0f} {cur} a year")
    if "planned_total_cost" in tab:
        print(f"planned total cost {tab['planned_total_cost'].sum():,.0f} {cur} a year")
    planned = "planned_total_cost" in tab
    head = f"  {'site':<16} {'fill rate':>9} {'on hand':>10} {'backorders':>10} {'cost a year':>13}"
    print(head + (f" {'planned':>13}" if planned else ""))
    for site, part in tab.groupby("site", sort=False):
        t = _totals(part)
        fill = "n/a" if t["fill_rate"] is None else f"{100 * t['fill_rate']:.1f} %"
        line = (f"  {str(site):<16} {fill:>9} {t['on_hand']:>10,.0f} {t['backorders']:>10,.1f} "
                f"{t['total_cost']:>13,.0f}")
        print(line + (f" {t['planned_total_cost']:>13,.0f}" if planned else ""))
    if outcome.families is not None:
        print(f"  {'family (ordering together)':<32} {'joint orders/yr':>15} {'ordering cost':>13} "
              f"{'planned':>10}")
        for rec in outcome.families.itertuples(index=False):
            print(f"  {str(rec.family):<32} {rec.orders_per_year:>15,.1f} {rec.ordering_cost:>13,.0f} "
                  f"{rec.planned_ordering_cost:>10,.0f}")
    off = int((tab["outside_interval"] != "").sum())
    print(f"{off} item-site(s) with a planned figure outside the simulation's 95% interval")
    print(f"results in {args.out}")
    say("done")
    return EXIT_OK
