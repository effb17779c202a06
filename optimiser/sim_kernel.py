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
  sd = 0). Without crossing, each arrival at a site is no earlier than the one scheduled before it.

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
ST_SHORT_CYCLES = 7  # cycles in which some demand was not met at once
ST_WAIT_UNIT_DAYS = 8  # sum over units shipped to the site of their wait at the upstream site
ST_SHIPPED_UNITS = 9  # units shipped to the site by its upstream site
ST_DEMAND_EVENTS = 10  # customer demand events at the site
ST_CUSTOMER_UNITS = 11  # customer demand units at the site
ST_MEASURED_DAYS = 12  # length of the measured period (same for every site)
N_STATS = 13

# integer state per site
_OH = 0  # on hand
_BO = 1  # backordered units (queue)
_IP = 2  # inventory position
_SHORT = 3  # a demand was short since the last receipt
_N_STATE = 4

# task status
STATUS_OK = 0
STATUS_HEAP_FULL = 1
STATUS_QUEUE_FULL = 2


@njit(cache=True)
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


@njit(cache=True)
def _lead_time(mean: float, sd: float) -> float:
    if sd <= 0.0 or mean <= 0.0:
        return mean
    shape = (mean / sd) ** 2
    return np.random.gamma(shape, sd * sd / mean)


@njit(cache=True)
def _touch(s, t, st, last, stats):
    dt = t - last[s]
    if dt > 0.0:
        stats[s, ST_AREA_ON_HAND] += st[s, _OH] * dt
        stats[s, ST_AREA_BACKORDERS] += st[s, _BO] * dt
    last[s] = t


@njit(cache=True)
def _heap_push(ht, hsq, cnt, t, s, q):
    """Push arrival (t, site, qty); False when the heap is full."""
    n = cnt[0]
    if n >= ht.shape[0]:
        return False
    i = n
    while i > 0:
        p = (i - 1) >> 1
        if ht[p] <= t:
            break
        ht[i] = ht[p]
        hsq[i, 0] = hsq[p, 0]
        hsq[i, 1] = hsq[p, 1]
        i = p
    ht[i] = t
    hsq[i, 0] = s
    hsq[i, 1] = q
    cnt[0] = n + 1
    return True


@njit(cache=True)
def _heap_pop(ht, hsq, cnt):
    """Remove the root; the caller has read it."""
    n = cnt[0] - 1
    cnt[0] = n
    if n == 0:
        return
    t = ht[n]
    s = hsq[n, 0]
    q = hsq[n, 1]
    i = 0
    while True:
        c = 2 * i + 1
        if c >= n:
            break
        if c + 1 < n and ht[c + 1] < ht[c]:
            c += 1
        if ht[c] >= t:
            break
        ht[i] = ht[c]
        hsq[i, 0] = hsq[c, 0]
        hsq[i, 1] = hsq[c, 1]
        i = c
    ht[i] = t
    hsq[i, 0] = s
    hsq[i, 1] = q


@njit(cache=True)
def _ship(c, x, wait, t, measuring, lt_mean, lt_sd, crossing, last_arr, ht, hsq, cnt, stats):
    """Send x units to child site c (c < 0: a customer, nothing to send)."""
    if c < 0:
        return True
    arr = t + _lead_time(lt_mean[c], lt_sd[c])
    if not crossing:
        if arr < last_arr[c]:
            arr = last_arr[c]
        last_arr[c] = arr
    if measuring:
        stats[c, ST_WAIT_UNIT_DAYS] += x * wait
        stats[c, ST_SHIPPED_UNITS] += x
    return _heap_push(ht, hsq, cnt, arr, c, x)


@njit(cache=True)
def _demand_chain(s, child, q, t, measuring, parent, rop, oq, review, lt_mean, lt_sd, partial, crossing,
                  st, last, stats, last_arr, ht, hsq, cnt, qc, qq, qt, qhl):
    """Site s receives a demand of q units from `child` (-1 = customers); orders travel up the tree.

    Returns a status code (STATUS_OK or a capacity overflow).
    """
    while True:
        _touch(s, t, st, last, stats)
        if measuring:
            stats[s, ST_DEMAND_UNITS] += q
        st[s, _IP] -= q
        qlen = qhl[s, 1]
        if qlen == 0 and st[s, _OH] >= q:
            st[s, _OH] -= q
            if measuring:
                stats[s, ST_IMMEDIATE_UNITS] += q
            if not _ship(child, q, 0.0, t, measuring, lt_mean, lt_sd, crossing, last_arr, ht, hsq, cnt,
                         stats):
                return STATUS_HEAP_FULL
        else:
            x = 0
            if qlen == 0 and (partial or child < 0):
                x = st[s, _OH]
            if x > 0:
                st[s, _OH] -= x
                if measuring:
                    stats[s, ST_IMMEDIATE_UNITS] += x
                if not _ship(child, x, 0.0, t, measuring, lt_mean, lt_sd, crossing, last_arr, ht, hsq, cnt,
                             stats):
                    return STATUS_HEAP_FULL
            rem = q - x
            st[s, _BO] += rem
            st[s, _SHORT] = 1
            cap = qc.shape[1]
            head = qhl[s, 0]
            if child < 0 and qlen > 0:
                tail = (head + qlen - 1) % cap
                if qc[s, tail] < 0:  # merge consecutive customer backorders
                    qq[s, tail] += rem
                    rem = 0
            if rem > 0:
                if qlen >= cap:
                    return STATUS_QUEUE_FULL
                pos = (head + qlen) % cap
                qc[s, pos] = child
                qq[s, pos] = rem
                qt[s, pos] = t
                qhl[s, 1] = qlen + 1
        # replenishment decision
        if review[s] > 0.0:
            return STATUS_OK
        ip = st[s, _IP]
        if ip > rop[s]:
            return STATUS_OK
        n = (rop[s] - ip) // oq[s] + 1
        qty = n * oq[s]
        st[s, _IP] += qty
        if measuring:
            stats[s, ST_ORDERS] += 1
            stats[s, ST_ORDER_UNITS] += qty
        p = parent[s]
        if p < 0:
            arr = t + _lead_time(lt_mean[s], lt_sd[s])
            if not crossing:
                if arr < last_arr[s]:
                    arr = last_arr[s]
                last_arr[s] = arr
            if not _heap_push(ht, hsq, cnt, arr, s, qty):
                return STATUS_HEAP_FULL
            return STATUS_OK
        child = s
        s = p
        q = qty


@njit(cache=True)
def _receive(s, q, t, measuring, partial, lt_mean, lt_sd, crossing, st, last, stats, last_arr, ht, hsq, cnt,
             qc, qq, qt, qhl):
    """q units arrive at site s; serve its queue first come, first served."""
    _touch(s, t, st, last, stats)
    st[s, _OH] += q
    if measuring:
        stats[s, ST_CYCLES] += 1
        stats[s, ST_SHORT_CYCLES] += st[s, _SHORT]
    st[s, _SHORT] = 0
    cap = qc.shape[1]
    while qhl[s, 1] > 0 and st[s, _OH] > 0:
        h = qhl[s, 0]
        c = qc[s, h]
        rq = qq[s, h]
        oh = st[s, _OH]
        if c < 0 or partial:
            x = rq if rq < oh else oh
        elif oh >= rq:
            x = rq
        else:
            break
        st[s, _OH] -= x
        st[s, _BO] -= x
        wait = t - qt[s, h]
        if not _ship(c, x, wait, t, measuring, lt_mean, lt_sd, crossing, last_arr, ht, hsq, cnt, stats):
            return STATUS_HEAP_FULL
        if x == rq:
            qhl[s, 0] = (h + 1) % cap
            qhl[s, 1] -= 1
        else:
            qq[s, h] = rq - x
    return STATUS_OK


@njit(cache=True)
def _run_task(parent, active, rop, oq, review, upto, phase, model, rate, theta, dmean, dsd, lt_mean, lt_sd,
              partial, crossing, horizon, warmup, seed, heap_cap, queue_cap, stats, trace_oh, trace_bo,
              trace_step):
    """Simulate one item once; fills ``stats`` (S, N_STATS); returns a status code."""
    np.random.seed(seed)
    n_sites = parent.shape[0]
    st = np.zeros((n_sites, _N_STATE), dtype=np.int64)
    last = np.zeros(n_sites)
    last_arr = np.zeros(n_sites)
    ht = np.empty(heap_cap)
    hsq = np.empty((heap_cap, 2), dtype=np.int64)
    cnt = np.zeros(1, dtype=np.int64)
    qc = np.empty((n_sites, queue_cap), dtype=np.int64)
    qq = np.empty((n_sites, queue_cap), dtype=np.int64)
    qt = np.empty((n_sites, queue_cap))
    qhl = np.zeros((n_sites, 2), dtype=np.int64)
    stats[:, :] = 0.0

    # initial state: position at R + Q (or S), all of it on hand
    next_rev = np.full(n_sites, np.inf)
    cum = np.zeros(n_sites)
    total_rate = 0.0
    any_daily = False
    for s in range(n_sites):
        if not active[s]:
            continue
        if review[s] > 0.0:
            start = upto[s]
            next_rev[s] = phase[s] if phase[s] > 0.0 else review[s]
        else:
            start = rop[s] + oq[s]
        if start < 0:
            start = 0
        st[s, _OH] = start
        st[s, _IP] = start
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
    status = STATUS_OK

    while True:
        th = ht[0] if cnt[0] > 0 else np.inf
        tn = min(min(next_dem, next_tick), min(th, rev_min))
        if not measuring and tn >= warmup:
            for s in range(n_sites):
                _touch(s, warmup, st, last, stats)
            stats[:, :] = 0.0
            for s in range(n_sites):
                st[s, _SHORT] = 0
            measuring = True
        if n_trace > 0:
            lim = tn if tn < horizon else horizon
            while k_sample < n_trace and next_sample <= lim:
                for s in range(n_sites):
                    trace_oh[k_sample, s] = st[s, _OH]
                    trace_bo[k_sample, s] = st[s, _BO]
                k_sample += 1
                next_sample = warmup + k_sample * trace_step
        if tn >= horizon:
            break
        t = tn
        if th == tn:
            s = hsq[0, 0]
            q = hsq[0, 1]
            _heap_pop(ht, hsq, cnt)
            status = _receive(s, q, t, measuring, partial, lt_mean, lt_sd, crossing, st, last, stats,
                              last_arr, ht, hsq, cnt, qc, qq, qt, qhl)
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
            if model[s] == DEMAND_COMPOUND and theta[s] > 0.0:
                q = _logseries(theta[s], math.log1p(-theta[s]))
            else:
                q = 1
            if measuring:
                stats[s, ST_DEMAND_EVENTS] += 1
                stats[s, ST_CUSTOMER_UNITS] += q
            status = _demand_chain(s, -1, q, t, measuring, parent, rop, oq, review, lt_mean, lt_sd, partial,
                                   crossing, st, last, stats, last_arr, ht, hsq, cnt, qc, qq, qt, qhl)
            next_dem = t + np.random.exponential(1.0 / total_rate)
        elif next_tick == tn:
            for s in range(n_sites):
                if not active[s] or model[s] != DEMAND_NORMAL_DAILY:
                    continue
                x = dmean[s]
                if dsd[s] > 0.0:
                    x += dsd[s] * np.random.standard_normal()
                q = int(math.floor(x + 0.5))
                if q <= 0:
                    continue
                if measuring:
                    stats[s, ST_DEMAND_EVENTS] += 1
                    stats[s, ST_CUSTOMER_UNITS] += q
                status = _demand_chain(s, -1, q, t, measuring, parent, rop, oq, review, lt_mean, lt_sd,
                                       partial, crossing, st, last, stats, last_arr, ht, hsq, cnt, qc, qq, qt,
                                       qhl)
                if status != STATUS_OK:
                    break
            next_tick += 1.0
        else:
            for s in range(n_sites):
                if next_rev[s] > tn:
                    continue
                next_rev[s] += review[s]
                ip = st[s, _IP]
                if ip >= upto[s]:
                    continue
                qty = upto[s] - ip
                st[s, _IP] += qty
                if measuring:
                    stats[s, ST_ORDERS] += 1
                    stats[s, ST_ORDER_UNITS] += qty
                p = parent[s]
                if p < 0:
                    arr = t + _lead_time(lt_mean[s], lt_sd[s])
                    if not crossing:
                        if arr < last_arr[s]:
                            arr = last_arr[s]
                        last_arr[s] = arr
                    if not _heap_push(ht, hsq, cnt, arr, s, qty):
                        status = STATUS_HEAP_FULL
                else:
                    status = _demand_chain(p, s, qty, t, measuring, parent, rop, oq, review, lt_mean, lt_sd,
                                           partial, crossing, st, last, stats, last_arr, ht, hsq, cnt, qc, qq,
                                           qt, qhl)
                if status != STATUS_OK:
                    break
            rev_min = np.inf
            for s in range(n_sites):
                if next_rev[s] < rev_min:
                    rev_min = next_rev[s]
        if status != STATUS_OK:
            return status

    if not measuring:  # warm-up longer than the horizon: nothing measured
        stats[:, :] = 0.0
        return STATUS_OK
    for s in range(n_sites):
        _touch(s, horizon, st, last, stats)
    for s in range(n_sites):
        stats[s, ST_MEASURED_DAYS] = horizon - warmup
    return STATUS_OK


@njit(cache=True, parallel=True)
def run_tasks(parent, active, rop, oq, review, upto, phase, model, rate, theta, dmean, dsd, lt_mean, lt_sd,
              partial, crossing, horizon, warmup, seeds, heap_cap, queue_cap, task_mask, trace_row,
              trace_step, trace_oh, trace_bo, stats, status):
    """Run every (replication, item) task where ``task_mask`` is set, in parallel.

    Arrays per item are (n, S); ``seeds`` is (K, n); ``stats`` is (K, n, S, N_STATS) and ``status`` (K, n).
    ``trace_row[i] >= 0`` records on hand and backorders of item i on replication 0 every ``trace_step`` days
    from the end of the warm-up into ``trace_oh[trace_row[i]]`` / ``trace_bo[...]`` (n_samples, S).
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
                                 trace_step)


@njit(cache=True)
def run_tasks_serial(parent, active, rop, oq, review, upto, phase, model, rate, theta, dmean, dsd, lt_mean,
                     lt_sd, partial, crossing, horizon, warmup, seeds, heap_cap, queue_cap, task_mask,
                     trace_row, trace_step, trace_oh, trace_bo, stats, status):
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
                                 trace_step)
