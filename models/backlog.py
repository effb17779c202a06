"""Units a store still has unshipped at the warehouse: store figures behind an (R0, Q0) warehouse, per item.

The METRIC-type store model (:mod:`models.echelon`) gives each store the lead-time demand ``D(L + W)`` with
a random delay ``W`` fitted by moments. This module follows the units instead. With a constant warehouse lead
time ``L0``, first come first served allocation and part shipments, the warehouse backorders at time ``t`` are
``B0(t) = (D0(t - L0, t] - Y0)^+`` with ``Y0`` the warehouse inventory position at ``t - L0`` (uniform on
``R0 + g, .., R0 + Q0``), and they are the *last* ``B0`` units demanded. Store ``i``'s net stock one transit
time later is

    IL_i(t + L_i) = IP_i(t) - D_i(t, t + L_i] - U_i(t),

``U_i(t)`` the store's units still unshipped at ``t``. A unit of a store order placed ``a`` time units before
``t``, with ``j - 1`` units of the same order ahead of it, is unshipped at ``t`` if and only if

* ``a < L0``: ``Y0 - W(L0 - a) <= j - 1``, ``W(tau)`` the warehouse demand in the window of length ``tau``
  just before the order (the other stores' order streams in stationary phase; this store's own orders, which
  restart at its order epoch, ``Q_i floor(D_i(tau) / Q_i)``);
* ``a >= L0`` (only when ``R0 + g <= -1``): ``Y0 + O(x) + Q_i floor(d / Q_i) <= j - Q_i - 1``, with ``x`` the
  time from the order to ``t - L0``, ``O`` the others' demand in it and ``d`` the store's own demands in it.

Under FCFS a store's orders leave in sequence, so ``P(U_i >= (m - 1) Q_i + c | IP_i = R_i + k)`` is the
probability that the ``c``-th last unit of the store's ``m``-th latest order is unshipped: a *marginal*
probability, the integral of the conditions above over the order's age (the time back to the demand that
triggered it: ``n + 1`` demands back, ``n = m Q_i - k``). Collecting terms, ``Z = U_i - K`` (``K`` the
uniform phase) has ``P(Z >= z) = (1/Q_i) sum_{j=1..Q_i} H(z + j - 1, j)`` with ``H(n, j)`` the probability
that a unit with ``j - 1`` units ahead in an order ``n + 1`` store demands old is unshipped, and the store
is a single-site (R, Q) system with ``IL = R_i - (D_i(L_i) + Z)``: fill rate ``P(V <= R - 1)``, backorders
``E(V - R)^+``,
on hand ``R - E[V] + E(V - R)^+`` with ``V = D_i(L_i) + Z``.

For Poisson store demand and a constant ``L0`` this is exact up to the two integrals (``AGE_CELLS`` cells
each) and to the independence of the warehouse position from the demand that follows it (exact for one-for-one
stores: it reproduces Graves' (1985) binomial disaggregation). For compound Poisson (negative binomial) store
demand the ages are taken from the unit counts (``P(A_{n+1} <= a) = P(D_i(a) >= n + 1)``) and the store's own
orders restart at zero after each order (the undershoot is ignored).

References
----------
Axsäter, S. (2000). Exact analysis of continuous review (R, Q) policies in two-echelon inventory systems with
compound Poisson demand. Operations Research 48(5), 686-696. Forsberg, R. (1997). Exact evaluation of
(R, Q)-policies for two-level inventory systems with Poisson demand. European Journal of Operational Research
96(1), 130-138. Graves, S. C. (1985). A multi-echelon inventory model for a repairable item with one-for-one
replenishment. Management Science 31(10), 1247-1256. Kiesmüller, G. P., de Kok, A. G., Smits, S. R. &
van Laarhoven, P. J. M. (2004). Evaluation of divergent N-echelon (s, nQ)-policies under compound renewal
demand. OR Spectrum 26(4), 547-577.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import signal

from models.demand import lead_points
from models.echelon import SUPPORT_SDS, TAIL_TOL, _strided_cumsum, count_pmf

__all__ = [
    "AGE_CELLS",
    "BACKLOG_LEAD_POINTS",
    "BacklogTables",
    "backlog_tables",
    "window_width",
    "transit_pmf",
    "store_shortfall",
    "StoreFigures",
    "store_figures",
]

#: Cells of each age integral (orders younger than ``L0``; windows after ``t - L0`` for negative ``R0``).
AGE_CELLS = 32
#: Lead-time points of the unit model for a random warehouse lead time (each point is a full set of tables).
BACKLOG_LEAD_POINTS = 3
#: Probability below which a tail (ages, backlog) is cut.
BACKLOG_TAIL = 1e-10


def _pmf(mean: np.ndarray, var_rate_times: np.ndarray, width: int) -> np.ndarray:
    """Count pmf rows (Poisson where not over-dispersed) on ``0 .. width - 1``."""
    mean = np.asarray(mean, dtype=float)
    var = np.maximum(np.asarray(var_rate_times, dtype=float), mean)
    return count_pmf(mean.ravel(), var.ravel(), width)[0].reshape(mean.shape + (width,))


def _lattice_mean(
    prefix: np.ndarray, x0: np.ndarray, m: int, g: int, below: float, above: float
) -> np.ndarray:
    """``(1/m) sum_{k=1..m} f(x0 + g k)`` from the strided prefix sums of ``f`` on ``0 .. P - 1``.

    ``prefix`` has shape ``(rows, P)``; ``x0`` broadcasts against ``(rows, J)``; ``f = below`` left of the
    table
    and ``above`` right of it. Returns ``(rows, J)``.
    """
    p = prefix.shape[-1]
    x0 = np.asarray(x0, dtype=np.int64)
    kneg = np.clip(np.where(x0 >= 0, 0, np.ceil(-x0 / g).astype(np.int64) - 1), 0, m)
    ktop = np.clip(np.floor_divide(p - 1 - x0, g), kneg, m)  # last k inside the table
    rows = np.arange(prefix.shape[0])[:, None]
    top_idx = x0 + g * ktop
    has = ktop > kneg
    top = np.where(has, prefix[rows, np.clip(top_idx, 0, p - 1)], 0.0)
    low_idx = x0 + g * kneg
    low = np.where(has & (low_idx >= 0), prefix[rows, np.clip(low_idx, 0, p - 1)], 0.0)
    total = below * kneg + (top - low) + above * (m - ktop)
    return total / m


def _batched(dem: np.ndarray, q: int) -> tuple[np.ndarray, np.ndarray]:
    """Orders in batches of ``q`` over windows with demand pmf rows ``dem`` (c, P).

    Returns the stationary stream ``q floor((D + V) / q)`` (``V`` uniform on ``0 .. q - 1``, as
    :func:`models.echelon.order_stream_pmf`) and the stream just after an order ``q floor(D / q)``.
    """
    c, w = dem.shape
    cdf = np.cumsum(dem, axis=1)
    cc = np.cumsum(cdf, axis=1)
    k = np.arange(0, w, q)

    def big_c(y):
        yi = np.clip(y, 0, w - 1)
        val = cc[:, yi] + np.maximum(y - (w - 1), 0)[None, :] * cdf[:, -1:]
        return np.where(y[None, :] < 0, 0.0, val)

    def f_y(y):
        return (big_c(y) - big_c(y - q)) / q

    stream = np.zeros_like(dem)
    stream[:, k] = np.clip(f_y(k + q - 1) - f_y(k - 1), 0.0, None)

    def cdf_at(y):
        return np.where(y[None, :] < 0, 0.0, cdf[:, np.clip(y, 0, w - 1)])

    fresh = np.zeros_like(dem)
    fresh[:, k] = np.clip(cdf_at(k + q - 1) - cdf_at(k - 1), 0.0, None)
    return stream, fresh


@dataclass(frozen=True)
class _LeadTables:
    """Tables for one warehouse lead time ``L0``.

    ``before`` (m, cells, P): strided prefix sums of ``P(W >= x)`` for the windows before an order;
    ``after`` (m, cells, P) or None: strided prefix sums of the others' cdf for windows after an order;
    ``age`` list of (N_i, cells) cell probabilities of the order ages below ``L0``; ``late`` list of
    (N_i, cells) cell probabilities of the time from an order to ``t - L0``; ``recent`` list of (N_i,) pmfs of
    the store's demand over ``L0``.
    """

    before: np.ndarray
    after: np.ndarray | None
    age: list
    late: list
    recent: list
    width: int
    horizon: np.ndarray
    age_tilt: list
    late_tilt: list
    age_mids: np.ndarray
    late_mids: np.ndarray | None


@dataclass(frozen=True)
class BacklogTables:
    """Per-item tables that do not depend on ``R0`` (from :func:`backlog_tables`).

    ``nodes``: one :class:`_LeadTables` per warehouse lead-time point, ``weights`` their probabilities
    (one node of weight 1 for a fixed lead time); ``q`` (m,) int; ``step`` int; ``width`` the widest window
    support; ``r0_min`` the lowest ``R0`` served; ``horizon`` (m,) the longest order-age count per store.
    """

    nodes: tuple
    weights: np.ndarray
    q: np.ndarray
    step: int
    width: int
    r0_min: int
    horizon: np.ndarray


def backlog_tables(
    rate: np.ndarray,
    var_rate: np.ndarray,
    order_quantity: np.ndarray,
    warehouse_lead: float,
    *,
    warehouse_lead_sd: float = 0.0,
    own_rate: float = 0.0,
    own_var_rate: float = 0.0,
    step: int = 1,
    lowest_reorder_point: int = 0,
    cells: int = AGE_CELLS,
) -> BacklogTables:
    """Tables of one item's warehouse windows and store order ages, independent of the warehouse policy.

    Parameters
    ----------
    rate, var_rate : ndarray, shape (m,)
        Store demand per time unit and its variance per time unit (count demand; Poisson where equal).
    order_quantity : ndarray of int, shape (m,)
        Store batches ``Q_i >= 1``.
    warehouse_lead : float
        Warehouse lead time ``L0 > 0`` (mean).
    warehouse_lead_sd : float
        Its standard deviation: the figures are averaged over ``models.demand.lead_points`` (each lead
        time taken for the whole backlog at once; exact only for a fixed lead time).
    own_rate, own_var_rate : float
        The warehouse's own customer demand (served first come first served with the store orders).
    step : int
        Lattice step ``g`` of the warehouse inventory position.
    lowest_reorder_point : int
        Lowest ``R0`` the tables must serve (sets how far windows after ``t - L0`` reach).
    cells : int
        Cells of each age integral.

    Returns
    -------
    BacklogTables

    Examples
    --------
    >>> t = backlog_tables(np.array([0.5, 0.5]), np.array([0.5, 0.5]), np.array([1, 1]), 2.0)
    >>> t.nodes[0].before.shape[:2] == (2, AGE_CELLS), t.nodes[0].after is None, t.weights.tolist()
    (True, True, [1.0])

    Notes
    -----
    See the module notes. Window pmfs are built in Fourier space: the others' transform is the product of the
    other stores' order-stream transforms (prefix and suffix products), times the own customers'.

    References
    ----------
    Kiesmüller, G. P., de Kok, A. G., Smits, S. R. & van Laarhoven, P. J. M. (2004). Evaluation of divergent
    N-echelon (s, nQ)-policies under compound renewal demand. OR Spectrum 26(4), 547-577.
    """
    nodes, weights = lead_points(float(warehouse_lead), float(warehouse_lead_sd), BACKLOG_LEAD_POINTS)
    parts = tuple(
        _lead_tables(rate, var_rate, order_quantity, float(l0), own_rate, own_var_rate, step,
                     lowest_reorder_point, cells)
        for l0 in nodes
    )
    return BacklogTables(
        parts, weights, np.asarray(order_quantity, dtype=np.int64), int(step), max(p.width for p in parts),
        int(min(lowest_reorder_point, 0)), np.max([p.horizon for p in parts], axis=0),
    )


def _window_width(lam, vr, q, l0, own_rate, own_var_rate, r0_min, g) -> tuple[int, float, float]:
    """Support (FFT length) of the warehouse windows, how far windows after an order reach (in units of the
    others' demand), and the demand's dispersion (variance / mean of the customer demand, >= 1)."""
    lam0 = float(np.sum(lam)) + own_rate
    disp = float(max(np.max(vr / np.maximum(lam, 1e-300)), own_var_rate / max(own_rate, 1e-300), 1.0))
    batches = float((np.asarray(q, dtype=float) ** 2).sum()) / 4.0
    var0 = (float(np.sum(vr)) + max(own_var_rate, own_rate)) * l0 + batches
    tail = disp * np.log(1.0 / TAIL_TOL)
    width = int(np.ceil(lam0 * l0 + SUPPORT_SDS * np.sqrt(var0) + tail + np.max(q) + 2))
    width = max(width, -r0_min + int(np.max(q)) + 2)
    # windows after an order reach until the others' demand has passed -R0 (with room for its spread)
    reach = -r0_min + 6.0 * np.sqrt(max(-r0_min, 1) * disp) + 6.0
    if r0_min + g <= -1:
        spread = reach * disp + batches
        width = max(width, int(np.ceil(reach + SUPPORT_SDS * np.sqrt(spread) + tail + np.max(q) + 2)))
    return sfft.next_fast_len(width, real=True), reach, disp


def window_width(
    rate: np.ndarray,
    var_rate: np.ndarray,
    order_quantity: np.ndarray,
    warehouse_lead: float,
    *,
    warehouse_lead_sd: float = 0.0,
    own_rate: float = 0.0,
    own_var_rate: float = 0.0,
    step: int = 1,
    lowest_reorder_point: int = 0,
) -> int:
    """Support :func:`backlog_tables` would use for these arguments (to check the size before building).

    Examples
    --------
    >>> window_width(np.array([0.5, 0.5]), np.array([0.5, 0.5]), np.array([1, 1]), 2.0) >= 2
    True
    """
    lam = np.asarray(rate, dtype=float)
    vr = np.maximum(np.asarray(var_rate, dtype=float), lam)
    nodes, _ = lead_points(float(warehouse_lead), float(warehouse_lead_sd), BACKLOG_LEAD_POINTS)
    return _window_width(lam, vr, np.asarray(order_quantity), float(nodes.max()), own_rate, own_var_rate,
                         int(min(lowest_reorder_point, 0)), int(step))[0]


def _lead_tables(rate, var_rate, order_quantity, warehouse_lead, own_rate, own_var_rate, step,
                 lowest_reorder_point, cells) -> _LeadTables:
    """:func:`backlog_tables` for one fixed warehouse lead time."""
    lam = np.asarray(rate, dtype=float)
    vr = np.maximum(np.asarray(var_rate, dtype=float), lam)
    q = np.asarray(order_quantity, dtype=np.int64)
    m = lam.size
    l0 = float(warehouse_lead)
    g = int(step)
    r0_min = int(min(lowest_reorder_point, 0))
    neg = r0_min + g <= -1
    width, reach, disp = _window_width(lam, vr, q, l0, own_rate, own_var_rate, r0_min, g)
    lam0 = lam.sum() + own_rate

    def stream_transforms(windows: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """rfft of each store's order stream (stationary) and of its own fresh batches, and of own demand."""
        c = windows.size
        dem = _pmf(lam[:, None] * windows[None, :], vr[:, None] * windows[None, :], width)  # (m, c, P)
        stream = np.zeros_like(dem)
        fresh = np.zeros_like(dem)
        for i in range(m):  # per store: the same columns for every window
            stream[i], fresh[i] = _batched(dem[i], int(q[i]))
        own = np.ones((c, width // 2 + 1), dtype=complex)
        if own_rate > 0:
            own = sfft.rfft(_pmf(own_rate * windows, max(own_var_rate, own_rate) * windows, width), axis=-1)
        return sfft.rfft(stream, axis=-1), sfft.rfft(fresh, axis=-1), own

    def others(ft: np.ndarray, own: np.ndarray) -> np.ndarray:
        """Product over the other stores (prefix/suffix products), shape (m, c, F)."""
        ones = np.ones((1,) + ft.shape[1:], dtype=complex)
        pre = np.cumprod(np.concatenate([ones, ft[:-1]], axis=0), axis=0)
        suf = np.cumprod(np.concatenate([ones, ft[::-1][:-1]], axis=0), axis=0)[::-1]
        return pre * suf * own[None]

    # windows before an order: tau = L0 - (cell midpoints of the age)
    edges = np.linspace(0.0, l0, cells + 1)
    tau = l0 - 0.5 * (edges[1:] + edges[:-1])
    ft, fresh, own = stream_transforms(tau)
    w = np.clip(sfft.irfft(others(ft, own) * fresh, n=width, axis=-1), 0.0, None)
    sf = np.cumsum(w[..., ::-1], axis=-1)[..., ::-1]  # P(W >= x)
    before = _strided_cumsum(sf, g)
    # windows after an order (negative R0 only)
    lam_oth = lam0 - lam
    after = None
    if neg:
        x_ext = float(np.max(np.where(lam_oth > 0, reach / np.where(lam_oth > 0, lam_oth, 1.0), 0.0)))
        xe = np.linspace(0.0, x_ext, cells + 1)
        xm = 0.5 * (xe[1:] + xe[:-1])
        ft2, _, own2 = stream_transforms(xm)
        o = np.clip(sfft.irfft(others(ft2, own2), n=width, axis=-1), 0.0, None)
        # a window where the others' demand is far past -R0 has no chance left (and its pmf would wrap)
        o[(lam_oth[:, None] * xm[None, :] > reach) & (lam_oth[:, None] > 0)] = 0.0
        after = _strided_cumsum(np.cumsum(o, axis=-1), g)
    else:
        xe = np.zeros(1)
    # per store: order-age cells, late-window cells, demand over L0
    # an order older than L0 + x_ext is shipped: count the store's demands over that time
    span = l0 + float(xe[-1])
    disp_i = vr / np.maximum(lam, 1e-300)
    n_bound = lam * span + SUPPORT_SDS * np.sqrt(vr * span) + disp_i * np.log(1.0 / TAIL_TOL)
    age, late, recent, horizon = [], [], [], np.zeros(m, dtype=np.int64)
    age_tilt, late_tilt = [], []
    mids = 0.5 * (edges[1:] + edges[:-1])
    for i in range(m):
        n_max = int(np.ceil(n_bound[i] + q[i])) + 1
        horizon[i] = n_max
        poisson = vr[i] <= lam[i] * (1.0 + 1e-9)
        cdf = np.cumsum(_pmf(lam[i] * edges, vr[i] * edges, n_max + 1), axis=-1)  # (cells + 1, N + 1)
        # P(A_{n+1} <= a) = P(D(a) >= n + 1) = 1 - F_a(n)
        cell = np.clip(cdf[:-1] - cdf[1:], 0.0, None).T  # (N + 1, cells)
        age.append(cell[:-1])
        age_tilt.append(_tilt(cell, mids, lam[i]) if poisson else None)
        if neg:
            cx = np.cumsum(_pmf(lam[i] * xe, vr[i] * xe, n_max + 1), axis=-1)  # (cells + 1, N + 1)
            cell = np.clip(cx[:-1] - cx[1:], 0.0, None)
            cell[-1] = cx[-2]  # the last cell takes every later time
            cell = cell.T
            late.append(cell[:-1])
            tilt = _tilt(cell, xm, lam[i]) if poisson else None
            if tilt is not None:
                tilt[:, -1] = 0.0
            late_tilt.append(tilt)
            recent.append(_pmf(np.array(lam[i] * l0), np.array(vr[i] * l0), n_max))
        else:
            late.append(None)
            late_tilt.append(None)
            recent.append(None)
    return _LeadTables(before, after, age, late, recent, width, horizon, age_tilt, late_tilt,
                       mids, xm if neg else None)


def _tilt(cell: np.ndarray, mids: np.ndarray, lam: float) -> np.ndarray:
    """``E[(A - mid); A in cell]`` for ``A ~ Erlang(n + 1, lam)`` from the cell probabilities of
    ``Erlang(n + 2)`` (``E[A; cell] = (n + 1) / lam * P(A_{n+2} in cell)``): rows ``n = 0 .. N - 1``."""
    n1 = np.arange(1, cell.shape[0])[:, None]
    return n1 / lam * cell[1:] - mids[None, :] * cell[:-1]


def _unshipped_by_age(node: _LeadTables, i: int, r0: int, mpos: int, g: int, q: int, j: np.ndarray):
    """``H(n, j)`` of store ``i`` for one lead time: the chance that the unit with ``j - 1`` units ahead of it
    in an order ``n + 1`` store demands old is unshipped (rows ``n = 0 .. N - 1``)."""
    # G_before(cell, j) = (1/M) sum_k P(W >= R0 + g k - j + 1)
    gb = _lattice_mean(node.before[i], (r0 - j + 1)[None, :], mpos, g, 1.0, 0.0)  # (cells, Q)
    h = node.age[i] @ gb  # (N, Q)
    if node.age_tilt[i] is not None:  # the age's spread inside each cell, times the slope of G there
        h = h + node.age_tilt[i] @ np.gradient(gb, node.age_mids, axis=0)
    if r0 + g <= -1 and node.after is not None:
        n_max = h.shape[0]
        late = node.late[i]  # (N, cells)
        cnt = np.arange(n_max) // q
        k_mat = np.zeros((n_max, q))
        for c in np.unique(cnt):
            # G_after(cell, c, j) = (1/M) sum_k P(O <= j - Q - 1 - Q c - R0 - g k)
            z0 = j - q - 1 - q * int(c) - r0 - g * (mpos + 1)  # ascending form: z0 + g k', k' = 1..M
            ga = _lattice_mean(node.after[i], z0[None, :], mpos, g, 0.0, 1.0)  # (cells, Q)
            rows = cnt == c
            k_mat[rows] = late[rows] @ ga
            if node.late_tilt[i] is not None:
                k_mat[rows] += node.late_tilt[i][rows] @ np.gradient(ga, node.late_mids, axis=0)
        h = h + signal.fftconvolve(node.recent[i][:, None], k_mat, axes=0)[:n_max]
    return h


def store_shortfall(tables: BacklogTables, reorder_point: int, order_quantity: int) -> list:
    """Distribution of ``Z_i = U_i - K_i`` (units unshipped at the warehouse less the store's phase).

    Parameters
    ----------
    tables : BacklogTables
    reorder_point, order_quantity : int
        Warehouse ``R0`` (not below ``tables.r0_min``) and ``Q0`` (a multiple of the lattice step).

    Returns
    -------
    list of (offset, pmf)
        Per store: ``P(Z = offset + x) = pmf[x]``, ``offset = -Q_i``.

    Examples
    --------
    >>> t = backlog_tables(np.array([1.0]), np.array([1.0]), np.array([1]), 1.0)
    >>> off, p = store_shortfall(t, 10**6, 1)[0]       # a warehouse that never runs out: U = 0, K = 1
    >>> off, round(float(p[0]), 12)
    (-1, 1.0)

    Notes
    -----
    ``P(Z >= z) = (1/Q) sum_j H(z + j - 1, j)`` with ``H(n, j) = sum_cells P(age cell) G_before(cell, j)
    + sum_d P(D(L0) = n - d) sum_cells P(late cell | d) G_after(cell, floor(d / Q), j)``
    (module notes).

    References
    ----------
    Axsäter, S. (2000). Exact analysis of continuous review (R, Q) policies in two-echelon inventory systems
    with compound Poisson demand. Operations Research 48(5), 686-696.
    """
    r0 = int(reorder_point)
    g = tables.step
    mpos = max(int(round(order_quantity / g)), 1)
    if r0 < tables.r0_min:
        raise ValueError(f"reorder_point {r0} is below the tables' lowest {tables.r0_min}")
    out = []
    for i, q in enumerate(tables.q):
        q = int(q)
        j = np.arange(1, q + 1)
        h = np.zeros((int(tables.horizon[i]), q))
        for node, weight in zip(tables.nodes, tables.weights, strict=True):
            hn = _unshipped_by_age(node, i, r0, mpos, g, q, j)
            h[: hn.shape[0]] += weight * hn
        h = np.clip(h, 0.0, 1.0)
        n_max = h.shape[0]
        # P(Z >= z) for z = 1 - Q .. n_max: mean over j of H(z + j - 1, j) (H = 1 below n = 0, 0 past n_max)
        hp = np.concatenate([np.ones((q, q)), h, np.zeros((1, q))], axis=0)
        z = np.arange(-q, n_max + 1)
        idx = np.clip(z[:, None] + j[None, :] - 1 + q, 0, hp.shape[0] - 1)
        tail = hp[idx, j[None, :] - 1].mean(axis=1)
        tail = np.minimum.accumulate(np.concatenate([[1.0], tail[1:]]))
        pmf = np.clip(tail - np.concatenate([tail[1:], [0.0]]), 0.0, None)
        keep = np.flatnonzero(tail > BACKLOG_TAIL)
        pmf = pmf[: keep[-1] + 1] if keep.size else pmf[:1]
        out.append((-q, pmf))
    return out


@dataclass(frozen=True)
class StoreFigures:
    """Store figures for a range of reorder points ``R = low .. low + len - 1`` (from :func:`store_figures`).

    ``fill_rate``, ``backorders``, ``on_hand`` arrays over ``R``; ``mean_unshipped`` ``E[U]``;
    ``mean_ltd`` ``E[V] = E[D(L)] + E[U]``.
    """

    low: int
    fill_rate: np.ndarray
    backorders: np.ndarray
    on_hand: np.ndarray
    mean_unshipped: float
    mean_ltd: float
    order_quantity: int


def store_figures(shortfall: tuple, transit: np.ndarray, order_quantity: int) -> StoreFigures:
    """Fill rate, backorders and on hand of one store for every reorder point in its relevant range.

    Parameters
    ----------
    shortfall : (offset, pmf)
        ``Z = U - K`` from :func:`store_shortfall`.
    transit : ndarray
        Pmf of the store's demand over its transit time ``L_i`` on ``0, 1, ..``.
    order_quantity : int

    Returns
    -------
    StoreFigures

    Examples
    --------
    >>> from scipy import stats
    >>> d = stats.poisson.pmf(np.arange(40), 2.0)
    >>> f = store_figures((-1, np.array([1.0])), d, 1)        # no backlog, Q = 1: the base-stock store
    >>> r = 2 - f.low
    >>> round(float(f.fill_rate[r]), 6) == round(float(stats.poisson.cdf(2, 2.0)), 6)
    True

    Notes
    -----
    ``V = D(L) + Z``; ``fill(R) = P(V <= R - 1)``; ``E[B](R) = E(V - R)^+``;
    ``E[OH](R) = R - E[V] + E[B](R)``.
    """
    off, pz = shortfall
    q = int(order_quantity)
    v = np.convolve(np.asarray(transit, dtype=float), pz)
    v = v / v.sum()
    low = off  # R from the lowest value of V
    x = off + np.arange(v.size)
    ev = float(v @ x)
    cdf = np.cumsum(v)
    # R = low .. low + size: fill = P(V <= R - 1); loss E(V - R)^+ = sum_{y >= R} P(V > y)
    gt = 1.0 - cdf  # P(V > x)
    loss = np.concatenate([np.cumsum(gt[::-1])[::-1], [0.0]])  # at R = x_0 .. x_end + 1
    r = low + np.arange(v.size + 1)
    fill = np.concatenate([[0.0], cdf])
    backorders = np.clip(loss, 0.0, None)
    on_hand = r - ev + backorders
    k = np.asarray(pz) @ (off + np.arange(np.size(pz)))
    return StoreFigures(low, np.clip(fill, 0.0, 1.0), backorders, on_hand, float(k + (q + 1) / 2.0), ev, q)


# ----------------------------------------------------------------------------------------------------------
# the network step: which items, and the stores' figures (and the warehouse reorder point) per item
# ----------------------------------------------------------------------------------------------------------
#: Largest work per item (sum over stores of backlog horizon x Q_i) for the unit-level evaluation; larger
#: items keep the moment (three-point delay) model.
MAX_ITEM_WORK = 50_000_000
#: Largest window support (units) for the unit-level evaluation.
MAX_WINDOW = 1 << 15
#: Largest number of store-items in one call for which ``method="auto"`` uses the unit-level evaluation.
AUTO_MAX_STORE_ITEMS = 5_000
#: Largest variance-to-mean ratio of a store's demand for the unit model (compound demand is taken unit by
#: unit: the undershoot of the reorder point is ignored).
MAX_DISPERSION = 4.0
#: Half-width of the warehouse reorder-point bracket searched with the unit-level figures, in sd of the
#: warehouse lead-time demand (at least ``2 g``).
SEARCH_SDS = 2.0


def eligible_items(
    count: np.ndarray,
    active: np.ndarray,
    rate: np.ndarray,
    order_quantity: np.ndarray,
    warehouse_lead: np.ndarray,
    warehouse_lead_sd: np.ndarray,
    warehouse_order_quantity: np.ndarray,
    own_rate: np.ndarray,
    own_count: np.ndarray,
    step: np.ndarray,
    *,
    dispersion: np.ndarray | None = None,
) -> np.ndarray:
    """Items the unit-level evaluation applies to (boolean, shape (n,)).

    Parameters
    ----------
    count, active : ndarray of bool, shape (n, m)
        Count demand at the store; real store.
    rate : ndarray, shape (n, m)
        Store demand per time unit.
    order_quantity : ndarray, shape (n, m)
        Store batches.
    warehouse_lead, warehouse_lead_sd, warehouse_order_quantity, own_rate : ndarray, shape (n,)
    own_count : ndarray of bool, shape (n,)
    step : ndarray of int, shape (n,)
        Lattice step of the warehouse position.
    dispersion : ndarray, shape (n, m), optional
        Variance-to-mean ratio of each store's demand; items with a store above ``MAX_DISPERSION`` are left
        to the moment model.

    Returns
    -------
    ndarray of bool

    Examples
    --------
    >>> one = np.ones((1, 2), dtype=bool)
    >>> eligible_items(one, one, np.full((1, 2), 0.2), np.full((1, 2), 2.0), np.array([5.0]), np.array([0.0]),
    ...                np.array([4.0]), np.array([0.0]), np.array([True]), np.array([2])).tolist()
    [True]

    Notes
    -----
    Every store with demand has count demand and a whole batch ``Q_i >= 1``; the warehouse lead time is
    positive (a random one is averaged over ``models.demand.lead_points``); ``Q0`` is a whole multiple of the
    lattice step; the warehouse's own customers, if any, have count demand; no store's demand is more
    dispersed than ``MAX_DISPERSION``. (The unit model takes compound demand unit by unit. Measured on the
    demo case against the simulator, store backorders of all-count items: within 3% where every store's
    ratio is up to 2, 35% low between 2 and 4, 82% low above 4; the moment model errs there by +75%, +35%
    and -51%.)
    """
    flowing = active & (rate > 0)
    q = np.where(flowing, order_quantity, 1.0)
    whole = np.isfinite(q) & (q >= 1) & (np.abs(q - np.rint(q)) < 1e-9)
    q0 = np.asarray(warehouse_order_quantity, dtype=float)
    ok = np.all(~flowing | (count & whole), axis=1) & flowing.any(axis=1)
    ok &= (warehouse_lead > 0) & np.isfinite(warehouse_lead_sd)
    ok &= np.isfinite(q0) & (q0 >= 1) & (np.abs(np.mod(q0, step)) < 1e-9)
    ok &= (own_rate == 0) | own_count
    if dispersion is not None:
        ok &= np.all(~flowing | (dispersion <= MAX_DISPERSION), axis=1)
    return ok


def transit_pmf(rate: float, var_rate: float, lead: float, lead_sd: float) -> np.ndarray:
    """Pmf of a store's demand over its transit time (a random one: mixed over its gamma points).

    Parameters
    ----------
    rate, var_rate : float
        Demand per time unit and its variance per time unit (Poisson where equal).
    lead, lead_sd : float
        Transit time mean and standard deviation (gamma).

    Returns
    -------
    ndarray
        Pmf on ``0, 1, ..``.

    Examples
    --------
    >>> p = transit_pmf(2.0, 2.0, 1.5, 0.0)
    >>> round(float(p @ np.arange(p.size)), 9)
    3.0
    """
    mean = rate * lead
    var = max(var_rate * lead + rate * rate * lead_sd * lead_sd, mean)
    width = int(np.ceil(mean + SUPPORT_SDS * np.sqrt(var) + max(var / max(mean, 1e-12), 1.0) * 25.0 + 2))
    nodes, weights = np.array([0.0]), np.array([1.0])
    if lead > 0:
        nodes, weights = lead_points(lead, lead_sd, BACKLOG_LEAD_POINTS)
    width = max(width, int(np.ceil(rate * nodes.max() + SUPPORT_SDS * np.sqrt(var_rate * nodes.max()) + 30)))
    return weights @ _pmf(rate * nodes, var_rate * nodes, width)


@dataclass(frozen=True)
class ItemStores:
    """Unit-level store figures of one item at one warehouse reorder point (from :func:`item_stores`)."""

    warehouse_reorder_point: int
    reorder_point: np.ndarray
    fill_rate: np.ndarray
    backorders: np.ndarray
    on_hand: np.ndarray
    mean_unshipped: np.ndarray
    cost: np.ndarray


def item_stores(
    tables: BacklogTables,
    transit: list,
    warehouse_reorder_point: int,
    warehouse_order_quantity: int,
    *,
    annual: np.ndarray,
    order_cost: np.ndarray,
    holding_cost: np.ndarray,
    backorder_cost: np.ndarray,
    basis: str,
    reorder_point: np.ndarray | None = None,
    target: np.ndarray | None = None,
) -> ItemStores:
    """Store figures of one item for one ``R0``: given store reorder points, or the best ones.

    Parameters
    ----------
    tables : BacklogTables
    transit : list of ndarray
        Per store, pmf of its demand over its transit time.
    warehouse_reorder_point, warehouse_order_quantity : int
    annual, order_cost, holding_cost, backorder_cost : ndarray, shape (m,)
        Store annual demand and costs.
    basis : {"per_unit", "per_unit_year"}
    reorder_point : ndarray, shape (m,), optional
        Evaluate these; otherwise choose them (least cost, or the least meeting ``target`` fill rates).
    target : ndarray, shape (m,), optional
        Fill-rate targets (NaN: none, least cost).

    Returns
    -------
    ItemStores

    Examples
    --------
    >>> t = backlog_tables(np.array([0.5]), np.array([0.5]), np.array([1]), 2.0)
    >>> from scipy import stats
    >>> d = [stats.poisson.pmf(np.arange(30), 1.0)]
    >>> s = item_stores(t, d, 0, 1, annual=np.array([182.5]), order_cost=np.array([0.0]),
    ...                 holding_cost=np.array([1.0]), backorder_cost=np.array([9.0]), basis="per_unit_year",
    ...                 reorder_point=np.array([1]))
    >>> bool(0 < s.fill_rate[0] < 1)
    True

    Notes
    -----
    Cost per store: ``A D / Q + h E[OH] + b E[B]`` (per unit-year) or ``+ b D (1 - fill)`` (per unit short);
    holding is charged on the expected on hand in both bases.
    """
    sh = store_shortfall(tables, warehouse_reorder_point, warehouse_order_quantity)
    m = len(sh)
    r_out = np.zeros(m)
    fill = np.zeros(m)
    eb = np.zeros(m)
    oh = np.zeros(m)
    eu = np.zeros(m)
    cost = np.zeros(m)
    for i in range(m):
        q = int(tables.q[i])
        f = store_figures(sh[i], transit[i], q)
        r = f.low + np.arange(f.fill_rate.size)
        short = f.backorders if basis == "per_unit_year" else annual[i] * (1 - f.fill_rate)
        back = backorder_cost[i] * short
        c = order_cost[i] * annual[i] / q + holding_cost[i] * f.on_hand + back
        if reorder_point is not None:
            k = int(round(reorder_point[i])) - f.low
        elif target is not None and np.isfinite(target[i]):
            hit = np.flatnonzero(f.fill_rate >= target[i] - 1e-12)
            k = int(hit[0]) if hit.size else r.size - 1
        else:
            k = int(np.argmin(c))
        r_out[i] = f.low + k
        if k < 0:  # below the table: V >= low always
            fill[i], eb[i] = 0.0, f.mean_ltd - r_out[i]
        elif k >= r.size:  # above it: V < R always
            fill[i], eb[i] = 1.0, 0.0
        else:
            fill[i], eb[i] = f.fill_rate[k], f.backorders[k]
        oh[i] = r_out[i] - f.mean_ltd + eb[i]
        eu[i] = f.mean_unshipped
        back_i = backorder_cost[i] * (eb[i] if basis == "per_unit_year" else annual[i] * (1 - fill[i]))
        cost[i] = order_cost[i] * annual[i] / q + holding_cost[i] * oh[i] + back_i
    return ItemStores(int(warehouse_reorder_point), r_out, fill, eb, oh, eu, cost)
