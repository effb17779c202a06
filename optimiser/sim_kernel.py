"""Compiled event loop of the network simulator.

One *task* is one item on one replication: a forest of ``S`` sites (``parent[s] = -1`` for a site fed by a
supplier) simulated in continuous time (days) from an empty pipeline. Tasks are independent; the kernel runs
them in parallel over ``prange`` and seeds numba's per-thread generator at the start of every task, so the
result does not depend on the thread count or the scheduling.

Mechanics (all quantities in whole units):

* customer demand at any site: Poisson unit demand, compound Poisson with logarithmic sizes (negative binomial
  counts over any interval), or normal demand in daily buckets rounded to whole units and truncated at zero
  (common practice; the truncation lifts the mean when the sd is large against the mean);
* continuous review (R, Q) on the inventory position (on hand + on order - backorders): when a demand takes
  the position to R or below, one order of n*Q units brings it back into R+1..R+Q; or periodic order-up-to
  review (every T days from a phase, order up to S) where ``review_period > 0``;
* a site below another orders from it; the upstream site serves its queue of demands first come, first served;
  with partial shipments a waiting order takes whatever stock there is, without them it waits until the whole
  quantity can go (and blocks the orders behind it). Customer demand is always served partially;
* complete backordering; supplier stock is unlimited;
* lead times (supplier lead time at a root, transit below) are gamma with the given mean and sd (constant when
  sd = 0). Without crossing, each arrival of an item at a site is no earlier than the one scheduled
  before it (items travel independently).

Every task fills a row of statistics per site (``ST_*`` below), counted after the warm-up.
"""

# The kernel draws from numba's per-thread legacy generator, seeded at the start of every task with a seed
# drawn from a numpy Generator per replication (numba cannot build Generators inside a parallel loop).
# ruff: noqa: NPY002

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

# demand models (per item-site)
DEMAND_POISSON = 0
DEMAND_COMPOUND = 1
DEMAND_NORMAL_DAILY = 2

# statistics gathered per (replication, item, site)
ST_AREA_ON_HAND = 0  # integral of on hand over the measured time (unit-days)
ST_AREA_BACKORDERS = 1  # integral of backordered units (customers and sites below)
ST_DEMAND_UNITS = 2  # units demanded from the site (customers + orders of sites below)
ST_IMMEDIATE_UNITS = 3  # of which met from stock at once
ST_ORDERS = 4  # replenishment orders placed by the site
ST_ORDER_UNITS = 5  # units ordered
ST_CYCLES = 6  # receipts (each receipt closes a replenishment cycle)
ST_SHORT_CYCLES = 7  # receipts that found backorders waiting (the cycle ended out of stock)
ST_WAIT_UNIT_DAYS = 8  # sum over units shipped to the site of their wait at the upstream site
ST_SHIPPED_UNITS = 9  # units shipped to the site by its upstream site
ST_DEMAND_EVENTS = 10  # customer demand events at the site
ST_CUSTOMER_UNITS = 11  # customer demand units at the site
ST_MEASURED_DAYS = 12  # length of the measured period (same for every site)
ST_CUSTOMER_IMMEDIATE = 13  # customer units met from stock at once
ST_AREA_CUSTOMER_BACKORDERS = 14  # integral of backordered customer units
ST_WAIT_SQ_UNIT_DAYS = 15  # sum over units shipped to the site of their squared wait
N_STATS = 16

# task status
STATUS_OK = 0
STATUS_HEAP_FULL = 1
STATUS_QUEUE_FULL = 2


@njit(cache=True, inline="always")
def _logseries(theta: float, log1m_theta: float) -> int:
    """Logarithmic variate on 1, 2, ... (Kemp's 1981 algorithm, as used by numpy)."""
    while True:
        v = np.random.random()
        if v >= theta:
            return 1
        u = np.random.random()
        q = -math.expm1(log1m_theta * u)
        if v <= q * q:
            if v <= 0.0:
                continue
            k = math.floor(1.0 + math.log(v) / math.log(q))
            if k < 1:
                continue
            return int(k)
        if v >= q:
            return 1
        return 2


@njit(cache=True, inline="always")
def _lead_time(mean: float, sd: float) -> float:
    if sd <= 0.0 or mean <= 0.0:
        return mean
    shape = (mean / sd) ** 2
    return np.random.gamma(shape, sd * sd / mean)


@njit(cache=True)
def _run_task(parent, active, rop, oq, review, upto, phase, model, rate, theta, dmean, dsd, lt_mean, lt_sd,
              partial, crossing, horizon, warmup, seed, heap_cap, queue_cap, stats, trace_oh, trace_bo,
              trace_step, log_slot, order_log):
    """Simulate one item once; fills ``stats`` (S, N_STATS); returns a status code.

    ``log_slot[s] >= 0`` marks a periodic-review site whose reviews are logged: ``order_log[log_slot[s], m]``
    is set to 1 when the site's review number m (m = 0 at the first review) places an order after the
    warm-up (reviews beyond the log's length are not logged).

    The event loop is written out flat, without calls that take arrays: numba reference-counts every array
    passed to a function with atomic operations, which cost more than the simulation itself.

    Each event is handled in three steps: (1) the event itself (a receipt serves the site's queue; a customer
    demand, daily bucket or review produces demands on sites), (2) every demand runs up the tree as far as
    orders go, (3) every shipment or supplier order made in (1)-(2) gets its lead time and enters the heap of
    pending arrivals.
    """
    np.random.seed(seed)
    n_sites = parent.shape[0]
    oh = np.zeros(n_sites, dtype=np.int64)  # on hand
    bo = np.zeros(n_sites, dtype=np.int64)  # backordered units waiting at the site
    cbo = np.zeros(n_sites, dtype=np.int64)  # of which customer units
    ipos = np.zeros(n_sites, dtype=np.int64)  # inventory position
    last = np.zeros(n_sites)  # time of the last change of oh / bo
    last_arr = np.zeros(n_sites)  # latest arrival scheduled at each site (no crossing)
    # heap of pending arrivals (time, site, qty)
    ht = np.empty(heap_cap)
    hs = np.empty(heap_cap, dtype=np.int64)
    hq = np.empty(heap_cap, dtype=np.int64)
    hn = 0
    # FCFS queue per site (circular): child site (-1 customers), quantity, time placed
    qc = np.empty((n_sites, queue_cap), dtype=np.int64)
    qq = np.empty((n_sites, queue_cap), dtype=np.int64)
    qt = np.empty((n_sites, queue_cap))
    qhead = np.zeros(n_sites, dtype=np.int64)
    qlen = np.zeros(n_sites, dtype=np.int64)
    # demands to run up the tree in this event: (site, child, qty)
    pend_s = np.empty(n_sites + 1, dtype=np.int64)
    pend_c = np.empty(n_sites + 1, dtype=np.int64)
    pend_q = np.empty(n_sites + 1, dtype=np.int64)
    # arrivals to schedule in this event: (site, qty, wait at the upstream; < 0 for a supplier order)
    bcap = queue_cap + 2 * n_sites * (n_sites + 1) + 4
    buf_s = np.empty(bcap, dtype=np.int64)
    buf_q = np.empty(bcap, dtype=np.int64)
    buf_w = np.empty(bcap)
    stats[:, :] = 0.0

    # initial state: position at R + Q (or S), all of it on hand
    next_rev = np.full(n_sites, np.inf)
    rev_count = np.zeros(n_sites, dtype=np.int64)  # reviews done at each site
    log_len = order_log.shape[1]
    for s in range(n_sites):  # a task run again (larger buffers) starts from a clean log
        if log_slot[s] >= 0:
            for m in range(log_len):
                order_log[log_slot[s], m] = 0
    cum = np.zeros(n_sites)
    total_rate = 0.0
    any_daily = False
    for s in range(n_sites):
        if not active[s]:
            cum[s] = total_rate
            continue
        if review[s] > 0.0:
            start = upto[s]
            next_rev[s] = phase[s] if phase[s] > 0.0 else review[s]
        else:
            start = rop[s] + oq[s]
        if start < 0:
            start = 0
        oh[s] = start
        ipos[s] = start
        if model[s] == DEMAND_NORMAL_DAILY:
            if dmean[s] > 0.0 or dsd[s] > 0.0:
                any_daily = True
        elif rate[s] > 0.0:
            total_rate += rate[s]
        cum[s] = total_rate
    rev_min = np.inf
    for s in range(n_sites):
        if next_rev[s] < rev_min:
            rev_min = next_rev[s]

    next_dem = np.inf
    if total_rate > 0.0:
        next_dem = np.random.exponential(1.0 / total_rate)
    next_tick = 1.0 if any_daily else np.inf
    measuring = warmup <= 0.0
    n_trace = trace_oh.shape[0]
    next_sample = warmup if warmup > 0.0 else 0.0
    k_sample = 0

    while True:
        th = ht[0] if hn > 0 else np.inf
        tn = min(min(next_dem, next_tick), min(th, rev_min))
        if not measuring and tn >= warmup:
            for s in range(n_sites):
                last[s] = warmup
            stats[:, :] = 0.0
            measuring = True
        if n_trace > 0:
            lim = tn if tn < horizon else horizon
            while k_sample < n_trace and next_sample <= lim:
                for s in range(n_sites):
                    trace_oh[k_sample, s] = oh[s]
                    trace_bo[k_sample, s] = bo[s]
                k_sample += 1
                next_sample = warmup + k_sample * trace_step
        if tn >= horizon:
            break
        t = tn
        npend = 0
        nb = 0

        # ---- (1) the event
        if th == tn:
            s = hs[0]
            q = hq[0]
            # pop the heap root
            hn -= 1
            if hn > 0:
                xt = ht[hn]
                xs = hs[hn]
                xq = hq[hn]
                i = 0
                while True:
                    c = 2 * i + 1
                    if c >= hn:
                        break
                    if c + 1 < hn and ht[c + 1] < ht[c]:
                        c += 1
                    if ht[c] >= xt:
                        break
                    ht[i] = ht[c]
                    hs[i] = hs[c]
                    hq[i] = hq[c]
                    i = c
                ht[i] = xt
                hs[i] = xs
                hq[i] = xq
            # receipt at s
            if measuring:
                dt = t - last[s]
                stats[s, ST_AREA_ON_HAND] += oh[s] * dt
                stats[s, ST_AREA_BACKORDERS] += bo[s] * dt
                stats[s, ST_AREA_CUSTOMER_BACKORDERS] += cbo[s] * dt
                stats[s, ST_CYCLES] += 1
                if bo[s] > 0:
                    stats[s, ST_SHORT_CYCLES] += 1
            last[s] = t
            oh[s] += q
            while qlen[s] > 0 and oh[s] > 0:
                h = qhead[s]
                c = qc[s, h]
                rq = qq[s, h]
                if c < 0 or partial:
                    x = rq if rq < oh[s] else oh[s]
                elif oh[s] >= rq:
                    x = rq
                else:
                    break
                oh[s] -= x
                bo[s] -= x
                if c < 0:
                    cbo[s] -= x
                else:
                    buf_s[nb] = c
                    buf_q[nb] = x
                    buf_w[nb] = t - qt[s, h]
                    nb += 1
                if x == rq:
                    qhead[s] = (h + 1) % queue_cap
                    qlen[s] -= 1
                else:
                    qq[s, h] = rq - x
        elif next_dem == tn:
            u = np.random.random() * total_rate
            lo = 0
            hi = n_sites - 1
            while lo < hi:  # first site with cum > u
                mid = (lo + hi) >> 1
                if cum[mid] > u:
                    hi = mid
                else:
                    lo = mid + 1
            s = lo
            q = 1
            if model[s] == DEMAND_COMPOUND and theta[s] > 0.0:
                q = _logseries(theta[s], math.log1p(-theta[s]))
            if measuring:
                stats[s, ST_DEMAND_EVENTS] += 1
                stats[s, ST_CUSTOMER_UNITS] += q
            pend_s[0] = s
            pend_c[0] = -1
            pend_q[0] = q
            npend = 1
            next_dem = t + np.random.exponential(1.0 / total_rate)
        elif next_tick == tn:
            for s in range(n_sites):
                if not active[s] or model[s] != DEMAND_NORMAL_DAILY:
                    continue
                xd = dmean[s]
                if dsd[s] > 0.0:
                    xd += dsd[s] * np.random.standard_normal()
                q = int(math.floor(xd + 0.5))
                if q <= 0:
                    continue
                if measuring:
                    stats[s, ST_DEMAND_EVENTS] += 1
                    stats[s, ST_CUSTOMER_UNITS] += q
                pend_s[npend] = s
                pend_c[npend] = -1
                pend_q[npend] = q
                npend += 1
            next_tick += 1.0
        else:
            for s in range(n_sites):
                if next_rev[s] > tn:
                    continue
                next_rev[s] += review[s]
                m_rev = rev_count[s]
                rev_count[s] = m_rev + 1
                if ipos[s] >= upto[s]:
                    continue
                qty = upto[s] - ipos[s]
                ipos[s] += qty
                if measuring:
                    stats[s, ST_ORDERS] += 1
                    stats[s, ST_ORDER_UNITS] += qty
                    if log_slot[s] >= 0 and m_rev < log_len:
                        order_log[log_slot[s], m_rev] = 1
                p = parent[s]
                if p < 0:
                    buf_s[nb] = s
                    buf_q[nb] = qty
                    buf_w[nb] = -1.0
                    nb += 1
                else:
                    pend_s[npend] = p
                    pend_c[npend] = s
                    pend_q[npend] = qty
                    npend += 1
            rev_min = np.inf
            for s in range(n_sites):
                if next_rev[s] < rev_min:
                    rev_min = next_rev[s]

        # ---- (2) demands run up the tree
        for k in range(npend):
            s = pend_s[k]
            child = pend_c[k]
            q = pend_q[k]
            while True:
                if measuring:
                    dt = t - last[s]
                    stats[s, ST_AREA_ON_HAND] += oh[s] * dt
                    stats[s, ST_AREA_BACKORDERS] += bo[s] * dt
                    stats[s, ST_AREA_CUSTOMER_BACKORDERS] += cbo[s] * dt
                    stats[s, ST_DEMAND_UNITS] += q
                last[s] = t
                ipos[s] -= q
                n_waiting = qlen[s]
                if n_waiting == 0 and oh[s] >= q:
                    x = q
                elif n_waiting == 0 and (partial or child < 0):
                    x = oh[s]
                else:
                    x = 0
                if x > 0:
                    oh[s] -= x
                    if measuring:
                        stats[s, ST_IMMEDIATE_UNITS] += x
                        if child < 0:
                            stats[s, ST_CUSTOMER_IMMEDIATE] += x
                    if child >= 0:
                        buf_s[nb] = child
                        buf_q[nb] = x
                        buf_w[nb] = 0.0
                        nb += 1
                rem = q - x
                if rem > 0:
                    bo[s] += rem
                    if child < 0:
                        cbo[s] += rem
                    head = qhead[s]
                    merged = False
                    if child < 0 and n_waiting > 0:
                        tail = (head + n_waiting - 1) % queue_cap
                        if qc[s, tail] < 0:  # consecutive customer backorders share one entry
                            qq[s, tail] += rem
                            merged = True
                    if not merged:
                        if n_waiting >= queue_cap:
                            return STATUS_QUEUE_FULL
                        pos = (head + n_waiting) % queue_cap
                        qc[s, pos] = child
                        qq[s, pos] = rem
                        qt[s, pos] = t
                        qlen[s] = n_waiting + 1
                # replenishment decision (continuous review)
                if review[s] > 0.0 or ipos[s] > rop[s]:
                    break
                qty = ((rop[s] - ipos[s]) // oq[s] + 1) * oq[s]
                ipos[s] += qty
                if measuring:
                    stats[s, ST_ORDERS] += 1
                    stats[s, ST_ORDER_UNITS] += qty
                p = parent[s]
                if p < 0:
                    buf_s[nb] = s
                    buf_q[nb] = qty
                    buf_w[nb] = -1.0
                    nb += 1
                    break
                child = s
                s = p
                q = qty

        # ---- (3) schedule the shipments and supplier orders
        for k in range(nb):
            c = buf_s[k]
            x = buf_q[k]
            w = buf_w[k]
            arr = t + _lead_time(lt_mean[c], lt_sd[c])
            if not crossing:
                if arr < last_arr[c]:
                    arr = last_arr[c]
                last_arr[c] = arr
            if w >= 0.0 and measuring:
                stats[c, ST_WAIT_UNIT_DAYS] += x * w
                stats[c, ST_WAIT_SQ_UNIT_DAYS] += x * w * w
                stats[c, ST_SHIPPED_UNITS] += x
            if hn >= heap_cap:
                return STATUS_HEAP_FULL
            i = hn
            while i > 0:
                pi = (i - 1) >> 1
                if ht[pi] <= arr:
                    break
                ht[i] = ht[pi]
                hs[i] = hs[pi]
                hq[i] = hq[pi]
                i = pi
            ht[i] = arr
            hs[i] = c
            hq[i] = x
            hn += 1

    if not measuring:  # warm-up longer than the horizon: nothing measured
        stats[:, :] = 0.0
        return STATUS_OK
    for s in range(n_sites):
        dt = horizon - last[s]
        stats[s, ST_AREA_ON_HAND] += oh[s] * dt
        stats[s, ST_AREA_BACKORDERS] += bo[s] * dt
        stats[s, ST_AREA_CUSTOMER_BACKORDERS] += cbo[s] * dt
        stats[s, ST_MEASURED_DAYS] = horizon - warmup
    return STATUS_OK


@njit(cache=True, parallel=True)
def run_tasks(parent, active, rop, oq, review, upto, phase, model, rate, theta, dmean, dsd, lt_mean, lt_sd,
              partial, crossing, horizon, warmup, seeds, heap_cap, queue_cap, task_mask, trace_row,
              trace_step, trace_oh, trace_bo, stats, status, log_slot, order_log):
    """Run every (replication, item) task where ``task_mask`` is set, in parallel.

    Arrays per item are (n, S); ``seeds`` is (K, n); ``stats`` is (K, n, S, N_STATS) and ``status`` (K, n).
    ``trace_row[i] >= 0`` records on hand and backorders of item i on replication 0 every ``trace_step`` days
    from the end of the warm-up into ``trace_oh[trace_row[i]]`` / ``trace_bo[...]`` (n_samples, S).
    ``log_slot`` (n, S) and ``order_log`` (K, n_slots, E) uint8: the review log of periodic sites (see
    :func:`_run_task`); pass ``log_slot`` all -1 and an (K, 0, 0) log to log nothing.
    """
    n_rep, n_items = seeds.shape
    dummy = np.zeros((0, parent.shape[1]))
    for j in prange(n_rep * n_items):
        k = j // n_items
        i = j - k * n_items
        if not task_mask[k, i]:
            continue
        if k == 0 and trace_row[i] >= 0:
            toh = trace_oh[trace_row[i]]
            tbo = trace_bo[trace_row[i]]
        else:
            toh = dummy
            tbo = dummy
        status[k, i] = _run_task(parent[i], active[i], rop[i], oq[i], review[i], upto[i], phase[i], model[i],
                                 rate[i], theta[i], dmean[i], dsd[i], lt_mean[i], lt_sd[i], partial, crossing,
                                 horizon, warmup, seeds[k, i], heap_cap, queue_cap, stats[k, i], toh, tbo,
                                 trace_step, log_slot[i], order_log[k])


@njit(cache=True)
def run_tasks_serial(parent, active, rop, oq, review, upto, phase, model, rate, theta, dmean, dsd, lt_mean,
                     lt_sd, partial, crossing, horizon, warmup, seeds, heap_cap, queue_cap, task_mask,
                     trace_row, trace_step, trace_oh, trace_bo, stats, status, log_slot, order_log):
    """Same as :func:`run_tasks` on one thread (used to measure what the parallel loop pays)."""
    n_rep, n_items = seeds.shape
    dummy = np.zeros((0, parent.shape[1]))
    for j in range(n_rep * n_items):
        k = j // n_items
        i = j - k * n_items
        if not task_mask[k, i]:
            continue
        if k == 0 and trace_row[i] >= 0:
            toh = trace_oh[trace_row[i]]
            tbo = trace_bo[trace_row[i]]
        else:
            toh = dummy
            tbo = dummy
        status[k, i] = _run_task(parent[i], active[i], rop[i], oq[i], review[i], upto[i], phase[i], model[i],
                                 rate[i], theta[i], dmean[i], dsd[i], lt_mean[i], lt_sd[i], partial, crossing,
                                 horizon, warmup, seeds[k, i], heap_cap, queue_cap, stats[k, i], toh, tbo,
                                 trace_step, log_slot[i], order_log[k])
