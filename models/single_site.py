"""(R, Q) policies for one stocking site: optimisers and evaluators, vectorised over item-sites.

Conventions
-----------
Continuous review, complete backordering, order Q when the inventory position falls to R. Lead-time demand
X has mean μ and standard deviation σ (``ltd_mean``, ``ltd_sd``) and is normal (R, Q real; inventory
position uniform on (R, R + Q]) or a count (Poisson / negative binomial; R, Q integers; inventory position
uniform on R+1..R+Q). Costs are per year: D annual demand, A cost per order, h holding cost per unit per
year, b backorder cost per unit short (``backorder_basis="per_unit"``) or p per unit per year
(``"per_unit_year"``).

Reported quantities (exact for the stated demand model, whatever the mode)::

    E[B]  = [n2(R) − n2(R + Q)] / Q                    expected backorders (time average)
    fill  = 1 − [n(R) − n(R + Q)] / Q                  share of demand met from stock at once
    CSL   = F(R)                                       no stockout in a replenishment cycle
    E[IP] = R + Q/2 (normal) or R + (Q + 1)/2 (counts)
    E[OH] = E[IP] − μ + E[B]                           expected on hand

Costs (the optimiser's objective is exactly the reported total, so ``evaluate_policy`` reproduces it):

* ``per_unit`` basis (Hadley & Whitin 1963): ordering A·D/Q, cycle stock h·Q/2, safety stock
  h·(E[IP] − Q/2 − μ) (= h·(R − μ) for normal), backorders b·D·n(R)/Q (n(R) = expected units short per
  cycle in Hadley-Whitin's model). Total = G(Q, R) = h(Q/2 + R − μ) + A·D/Q + b·D·n(R)/Q.
* ``per_unit_year`` basis (exact time averages): safety stock h·(E[OH] − Q/2), backorders p·E[B];
  total = A·D/Q + h·E[OH] + p·E[B].
* Service modes minimise ordering + cycle stock + safety stock (by the basis above) under the target;
  the backorder cost is reported where one is given (0 otherwise) but not minimised.

Negative reorder points are allowed (service targets and per-unit-year costs can call for them). In the
per-unit cost mode R is kept >= 0: Hadley-Whitin's G is unbounded below as R → −∞ whenever h·Q >= b·D (no
interior optimum), so the optimiser returns the best policy with R >= 0 and sets ``NOTE_NO_INTERIOR_OPTIMUM``.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
from scipy import special

from models.demand import NEGBIN, NORMAL, POISSON
from models.loss import (
    NEGBIN_MIN_EXCESS,
    _count_cdf,
    _count_loss,
    _count_loss2,
    _count_params,
    _tail_ge,
    normal_loss,
    normal_loss2,
    normal_losses,
)

_INV_SQRT2PI = 1.0 / np.sqrt(2.0 * np.pi)

# ------------------------------------------------------------------------------------------------ notes
NOTE_ZERO_DEMAND = 1
NOTE_NO_INTERIOR_OPTIMUM = 2
NOTE_DETERMINISTIC = 4
NOTE_NOT_CONVERGED = 8
NOTE_FIXED_Q = 16
NOTE_PACK_ROUNDED = 32
NOTE_POISSON_FALLBACK = 64
NOTE_SEARCH_LIMIT = 128
NOTE_ONE_FOR_ONE = 256

_NOTE_TEXT = {
    NOTE_ZERO_DEMAND: "no demand: no stock, no orders",
    NOTE_NO_INTERIOR_OPTIMUM: "backorder cost per unit short too low for an interior optimum (h·Q >= b·D, "
                              "or the best reorder point would be negative): reorder point held at 0",
    NOTE_DETERMINISTIC: "no demand variability: deterministic lot size",
    NOTE_NOT_CONVERGED: "optimiser did not converge within its iteration limit",
    NOTE_FIXED_Q: "order quantity fixed by the case",
    NOTE_PACK_ROUNDED: "order quantity rounded to a multiple of the pack size",
    NOTE_POISSON_FALLBACK: "negative binomial asked for but variance <= mean: Poisson used",
    NOTE_SEARCH_LIMIT: "order quantity from a bounded search (cost may fall further, or the exact scan was "
                       "cut short)",
    NOTE_ONE_FOR_ONE: "no order cost: one unit (or one pack) per order",
}

# ------------------------------------------------------------------------------------- tolerances, limits
#: Hadley-Whitin iteration: stop when |Q_new − Q| <= HW_TOL·Q.
HW_TOL = 1e-12
#: Hadley-Whitin iteration limit before the safeguarded bisection takes over.
HW_MAX_ITER = 60
#: Bisection steps (on the sign of dC/dQ along the optimal-R path) for items the iteration did not settle.
BISECT_STEPS = 200
#: Newton on the per-unit-year normal cost: stop when both steps are below NEWTON_TOL (relative).
NEWTON_TOL = 1e-11
NEWTON_MAX_ITER = 100
#: Newton also stops when the cost decrease a full step predicts is below NEWTON_COST_TOL·cost.
NEWTON_COST_TOL = 1e-14
#: Where (Q/σ)·(1 + |z_mid|) is below this, the Newton derivatives come from the small-window expansion.
NEWTON_SMALL_Q = 1e-3
#: Root solver for the reorder point under a shortage-fraction condition.
ROOT_TOL = 1e-13
ROOT_MAX_ITER = 200
#: Service target with a jointly optimised Q: search range Q <= Q_HIGH_FACTOR·EOQ + Q_HIGH_SIGMAS·σ, divided
#: by the target for fill rates (low targets call for large Q). Reached only where the cost keeps falling
#: in Q, e.g. a fill-rate target <= 1/2 under the per-unit basis, whose holding term h(R − μ) then falls
#: without bound; such items are flagged NOTE_SEARCH_LIMIT.
Q_HIGH_FACTOR = 8.0
Q_HIGH_SIGMAS = 50.0
#: Count items, service target with a jointly optimised Q: at most this many Q values are scanned exactly.
COUNT_SCAN_MAX = 300
#: Where (Q/σ)·(1 + |z_mid|) is below this, window averages use the midpoint rule with its q² term.
SMALL_WINDOW = 1e-3
#: Smallest tail probability used to bound integer searches (Cantelli bound).
MIN_TAIL = 1e-15

_MODES = ("cost", "cycle_service", "fill_rate")
_BASES = ("per_unit", "per_unit_year")
_RULES = ("optimise", "eoq")


@dataclass(frozen=True)
class SitePolicy:
    """Policy and its figures for n item-sites; every field is an (n,) array.

    Costs are per year. ``note`` holds ``NOTE_*`` bit flags (see :func:`describe_notes`).
    """

    order_quantity: np.ndarray
    reorder_point: np.ndarray
    safety_stock: np.ndarray
    z: np.ndarray
    cycle_service: np.ndarray
    fill_rate: np.ndarray
    expected_on_hand: np.ndarray
    expected_backorders: np.ndarray
    orders_per_year: np.ndarray
    ordering_cost: np.ndarray
    cycle_stock_cost: np.ndarray
    safety_stock_cost: np.ndarray
    backorder_cost: np.ndarray
    total_cost: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    note: np.ndarray

    def __len__(self) -> int:
        return int(self.order_quantity.shape[0])

    def as_dict(self) -> dict[str, np.ndarray]:
        """The fields as a dict of arrays (for a DataFrame)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


def describe_notes(note: int) -> list[str]:
    """Words for the ``NOTE_*`` flags set in one note value.

    Parameters
    ----------
    note : int
        Bit flags.

    Returns
    -------
    list of str

    Examples
    --------
    >>> describe_notes(NOTE_ZERO_DEMAND | NOTE_FIXED_Q)
    ['no demand: no stock, no orders', 'order quantity fixed by the case']
    """
    note = int(note)
    return [text for bit, text in _NOTE_TEXT.items() if note & bit]


# =============================================================================================== helpers
def _isf(p):
    """Standard normal upper quantile z with P(Z > z) = p (accurate for small p)."""
    return -special.ndtri(p)


def _phi(z):
    with np.errstate(under="ignore", over="ignore"):
        return np.exp(-0.5 * z * z) * _INV_SQRT2PI


def _avg_sf(z, q):
    """[G(z) − G(z + q)] / q: the average of P(Z > s) over s in [z, z + q].

    Where q·(1 + |m|) < SMALL_WINDOW the midpoint rule with its q² term, sf(m) + m·φ(m)·q²/24
    (m = z + q/2), replaces the difference quotient (which would lose digits to cancellation).
    """
    m = z + 0.5 * q
    small = q * (1.0 + np.abs(m)) < SMALL_WINDOW
    qq = np.where(small, 1.0, q)
    wide = (normal_loss(z) - normal_loss(z + qq)) / qq
    return np.where(small, special.ndtr(-m) + m * _phi(m) * q * q / 24.0, wide)


def _avg_G(z, q):
    """[G2(z) − G2(z + q)] / q: the average of G(s) over s in [z, z + q] (small q: G(m) + φ(m)·q²/24)."""
    m = z + 0.5 * q
    small = q * (1.0 + np.abs(m)) < SMALL_WINDOW
    qq = np.where(small, 1.0, q)
    wide = (normal_loss2(z) - normal_loss2(z + qq)) / qq
    return np.where(small, normal_loss(m) + _phi(m) * q * q / 24.0, wide)


def _nrm_backorders(R, Q, mu, sd):
    """E[B] = [n2(R) − n2(R + Q)] / Q for normal (σ > 0) or a point mass (σ = 0)."""
    pos = sd > 0
    s = np.where(pos, sd, 1.0)
    qpos = Q > 0
    Qs = np.where(qpos, Q, 1.0)
    cont = s * _avg_G((R - mu) / s, Qs / s)
    a = np.maximum(mu - R, 0.0)
    b = np.maximum(mu - R - Qs, 0.0)
    det = 0.5 * (a * a - b * b) / Qs
    return np.where(qpos, np.where(pos, cont, det), 0.0)


def _nrm_loss(y, mu, sd):
    pos = sd > 0
    s = np.where(pos, sd, 1.0)
    return np.where(pos, s * normal_loss((y - mu) / s), np.maximum(mu - y, 0.0))


def _eoq(A, D, h):
    return np.sqrt(2.0 * A * D / h)


class _Counts:
    """Count distribution parameters for a subset, with the loss functions bound to them."""

    def __init__(self, mu, sd, dist):
        self.mu, self.r, self.q, self.is_nb = _count_params(mu, sd, dist)
        self.sd = np.asarray(sd, dtype=float)
        self.r1 = np.where(self.is_nb, self.r + 1.0, np.inf)

    def take(self, idx):
        c = _Counts.__new__(_Counts)
        c.mu, c.r, c.q, c.is_nb, c.sd, c.r1 = (self.mu[idx], self.r[idx], self.q[idx], self.is_nb[idx],
                                               self.sd[idx], self.r1[idx])
        return c

    def n(self, y):
        return _count_loss(y, self.mu, self.r, self.q, self.is_nb)

    def n2(self, y):
        return _count_loss2(y, self.mu, self.r, self.q, self.is_nb)

    def sf(self, y):
        """P(X > y)."""
        return _tail_ge(np.floor(y) + 1.0, self.mu, self.r, self.q, self.is_nb)

    def cdf(self, y):
        return _count_cdf(y, self.mu, self.r, self.q, self.is_nb)

    def short(self, R, Q):
        return (self.n(R) - self.n(R + Q)) / Q

    def backorders(self, R, Q):
        return (self.n2(R) - self.n2(R + Q)) / Q

    def upper(self, tail):
        """An integer y with P(X > y) <= tail (Cantelli's inequality)."""
        t = np.clip(tail, MIN_TAIL, 1.0)
        return np.ceil(self.mu + self.sd * np.sqrt((1.0 - t) / t)) + 1.0


def _int_search(pred, lo, hi):
    """Smallest integer x in (lo, hi] with pred(idx, x) true; pred monotone (false ... true), pred(hi) true.

    ``pred(idx, x)`` receives the positions of the active elements and their trial values.
    Returns (x, steps).
    """
    lo = np.asarray(lo, dtype=float).copy()
    hi = np.asarray(hi, dtype=float).copy()
    steps = np.zeros(lo.shape, dtype=np.int64)
    active = np.flatnonzero(hi - lo > 1)
    while active.size:
        mid = np.floor(0.5 * (lo[active] + hi[active]))
        ok = pred(active, mid)
        hi[active] = np.where(ok, mid, hi[active])
        lo[active] = np.where(ok, lo[active], mid)
        steps[active] += 1
        active = active[hi[active] - lo[active] > 1]
    return hi, steps


def _solve_short(q, s, start=None):
    """z with [G(z) − G(z + q)]/q = s (0 < s < 1): safeguarded Newton inside a bracket.

    ``start`` (optional) is a first guess (clipped into the bracket). Returns (z, iterations, converged).
    """
    q = np.asarray(q, dtype=float)
    s = np.asarray(s, dtype=float)
    q, s = np.broadcast_arrays(q, s)
    hi = _isf(s)             # avg sf <= sf(z) <= s here
    lo = hi - q              # avg sf >= sf(z + q) >= s here
    z = hi.copy() if start is None else np.clip(np.asarray(start, dtype=float), lo, hi)
    it = np.zeros(q.shape, dtype=np.int64)
    conv = np.zeros(q.shape, dtype=bool)
    conv |= q <= 0
    active = np.flatnonzero(~conv)
    lo = lo.copy()
    hi = hi.copy()
    for _ in range(ROOT_MAX_ITER):
        if not active.size:
            break
        za, qa, sa = z[active], q[active], s[active]
        f = _avg_sf(za, qa) - sa
        small = qa < SMALL_WINDOW
        deriv = np.where(small, -np.exp(-0.5 * (za + 0.5 * qa) ** 2) / np.sqrt(2 * np.pi),
                         -(special.ndtr(-za) - special.ndtr(-(za + qa))) / np.where(small, 1.0, qa))
        lo[active] = np.where(f > 0, za, lo[active])
        hi[active] = np.where(f > 0, hi[active], za)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.where(deriv < 0, -f / deriv, np.nan)
        new = za + step
        bad = ~np.isfinite(new) | (new <= lo[active]) | (new >= hi[active])
        new = np.where(bad, 0.5 * (lo[active] + hi[active]), new)
        done = (np.abs(new - za) <= ROOT_TOL * (1.0 + np.abs(za))) | (f == 0) | (
            hi[active] - lo[active] <= ROOT_TOL * (1.0 + np.abs(za)))
        z[active] = np.where(f == 0, za, new)
        it[active] += 1
        conv[active[done]] = True
        active = active[~done]
    return z, it, conv


# ====================================================================================== best R for a Q
def _best_R_normal(Q, mu, sd, D, h, b, mode, basis, t):
    """Reorder point for given Q (normal / point mass), per mode. Returns (R, iterations, converged, flag)."""
    n = Q.shape[0]
    it = np.zeros(n, dtype=np.int64)
    conv = np.ones(n, dtype=bool)
    flag = np.zeros(n, dtype=bool)
    pos = sd > 0
    s = np.where(pos, sd, 1.0)
    if mode == "cycle_service":
        R = np.where(pos, mu + s * special.ndtri(t), mu)
    elif mode == "cost" and basis == "per_unit":
        ratio = h * Q / (b * D)
        flag = ratio >= 1.0
        zf = np.where(flag, -np.inf, _isf(np.minimum(ratio, 1.0)))
        R = np.where(pos, np.maximum(mu + s * zf, 0.0), np.where(flag, 0.0, mu))
    else:
        short = h / (h + b) if mode == "cost" else 1.0 - t
        short = np.broadcast_to(short, Q.shape)
        z, it, conv = _solve_short(Q / s, short)
        R = np.where(pos, mu + s * z, mu - short * Q)
        it = np.where(pos, it, 0)
        conv = np.where(pos, conv, True)
    return R, it, conv, flag


def _best_R_counts(Q, c: _Counts, D, h, b, mode, basis, t, csl_R=None):
    """Integer reorder point for an integer Q (counts). Returns (R, steps, flag).

    ``csl_R`` (fill rate only, optional): the cycle-service reorder point for the same target, which bounds
    the answer from above (computed here when not given).
    """
    n = Q.shape[0]
    flag = np.zeros(n, dtype=bool)
    if mode == "cycle_service":
        hi = c.upper(1.0 - t)
        R, steps = _int_search(lambda i, x: c.take(i).sf(x) <= 1.0 - t[i], np.full(n, -1.0), hi)
    elif mode == "cost" and basis == "per_unit":
        ratio = h * Q / (b * D)
        flag = ratio >= 1.0
        hi = np.maximum(c.upper(np.minimum(ratio, 1.0)), 0.0)
        R, steps = _int_search(lambda i, x: c.take(i).sf(x) <= ratio[i], np.full(n, -1.0), hi)
        R = np.maximum(R, 0.0)
    elif mode == "cost":
        # minimise sum_{y=R+1}^{R+Q} g(y), g(y) = h(y − μ) + (h + p) n(y) convex: smallest R with
        # g(R + Q + 1) >= g(R + 1)
        def g(cc, y, hh, pp):
            return hh * (y - cc.mu) + (hh + pp) * cc.n(y)
        ystar, s1, _ = _best_R_counts(np.ones(n), c, D, h, b, "cycle_service", basis, b / (h + b))
        R, steps = _int_search(
            lambda i, x: g(c.take(i), x + Q[i] + 1, h[i], b[i]) >= g(c.take(i), x + 1, h[i], b[i]),
            ystar - Q - 1, ystar - 1)
        steps = steps + s1
    else:  # fill rate: smallest R with short(R, Q) <= 1 − t
        if csl_R is None:
            sr, s1, _ = _best_R_counts(Q, c, D, h, b, "cycle_service", basis, t)
        else:
            sr, s1 = csl_R, 0
        R, steps = _int_search(lambda i, x: c.take(i).short(x, Q[i]) <= 1.0 - t[i], sr - Q - 1, sr)
        steps = steps + s1
    return R, steps, flag


# ============================================================================================ objectives
def _objective(R, Q, mu, sd, D, A, h, b, discrete, mode, basis, c: _Counts | None = None):
    """The quantity each mode minimises (see the module notes); b is ignored in service modes."""
    Qs = np.where(Q > 0, Q, 1.0)
    eip = R + 0.5 * Q + (0.5 if discrete else 0.0)
    order = A * D / Qs
    if basis == "per_unit":
        hold = h * (eip - mu)
        if mode == "cost":
            nR = c.n(R) if discrete else _nrm_loss(R, mu, sd)
            return order + hold + b * D * nR / Qs
        return order + hold
    eb = c.backorders(R, Qs) if discrete else _nrm_backorders(R, Qs, mu, sd)
    hold = h * (eip - mu + eb)
    if mode == "cost":
        return order + hold + b * eb
    return order + hold


# ================================================================================ cost mode, per unit
def _hw_normal(mu, sd, D, A, h, b, accelerate=True):
    """Hadley-Whitin iteration on G(Q, R) with R >= 0, σ > 0. Returns (Q, R, it, conv, flag).

    Works in standard units q = Q/σ, z = (R − μ)/σ with k = AD/σ², B = bD/σ:
    G/σ = h(q/2 + z) + (k + B·G(z))/q. One step maps q to z(q) (the R condition, z >= −μ/σ) and then to
    T(q) = √(2(k + B·G(z(q)))/h) (the Q condition). Plain iteration: q ← T(q). Accelerated: a Newton step
    on q − T(q) = 0 with T'(q) = (hq/B)/(T·φ(z)) (0 where z is held at its bound), kept inside the bracket
    [EOQ, q_cap] that always holds the fixed point (q_cap = √(2(k + B·G(−μ/σ))/h)); the plain step or a
    bisection replaces a Newton step that leaves the bracket.
    """
    k = A * D / (sd * sd)
    B = b * D / sd
    z0 = -mu / sd                       # R >= 0
    n = mu.shape[0]
    q_eoq = np.maximum(np.sqrt(2.0 * k / h), 1e-300)
    q_cap = np.sqrt(2.0 * (k + B * normal_loss(z0)) / h)

    def z_of(q, BB, hh, zz0):
        ratio = hh * q / BB
        zf = np.where(ratio < 1.0, _isf(np.minimum(ratio, 1.0)), -np.inf)
        return np.maximum(zf, zz0), ratio, zf < zz0

    q = q_eoq.copy()
    it = np.zeros(n, dtype=np.int64)
    conv = np.zeros(n, dtype=bool)
    idx = np.arange(n)
    kk, BB, hh, zz0, qq, lo, hi = k, B, h, z0, q.copy(), q_eoq.copy(), np.maximum(q_cap, q_eoq)
    for _ in range(HW_MAX_ITER):
        if not idx.size:
            break
        z, ratio, clamped = z_of(qq, BB, hh, zz0)
        T = np.sqrt(2.0 * (kk + BB * normal_loss(z)) / hh)
        if accelerate:
            F = T - qq
            lo = np.where(F >= 0, np.maximum(lo, qq), lo)
            hi = np.where(F <= 0, np.minimum(hi, qq), hi)
            with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
                tp = np.where(clamped, 0.0, ratio / (T * np.exp(-0.5 * z * z) * _INV_SQRT2PI))
                newton = qq + F / (1.0 - tp)
            ok = (tp < 1.0) & np.isfinite(newton) & (newton >= lo) & (newton <= hi)
            plain_ok = (T >= lo) & (T <= hi)
            qn = np.where(ok, newton, np.where(plain_ok, T, 0.5 * (lo + hi)))
        else:
            qn = T
        done = np.abs(qn - qq) <= HW_TOL * qn
        it[idx] += 1
        q[idx] = qn
        conv[idx[done]] = True
        keep = ~done
        idx = idx[keep]
        kk, BB, hh, zz0, qq, lo, hi = (x[keep] for x in (kk, BB, hh, zz0, qn, lo, hi))
    if idx.size:
        # safeguard: bisection on the sign of dG/dq = h/2 − (k + B·G(z(q)))/q² along the optimal-z path,
        # on [EOQ, q_cap] (z >= z0 bounds G(z) by G(z0), so the derivative is >= 0 at q_cap).
        ka, Ba, ha, za0 = k[idx], B[idx], h[idx], z0[idx]
        lo = q_eoq[idx].copy()
        hi = np.maximum(q_cap[idx], lo)
        for _ in range(BISECT_STEPS):
            mid = 0.5 * (lo + hi)
            d = 0.5 * ha - (ka + Ba * normal_loss(z_of(mid, Ba, ha, za0)[0])) / (mid * mid)
            lo = np.where(d < 0, mid, lo)
            hi = np.where(d < 0, hi, mid)
            it[idx] += 1
            if np.all(hi - lo <= HW_TOL * hi):
                break
        q[idx] = 0.5 * (lo + hi)
        conv[idx] = hi - lo <= 1e3 * HW_TOL * hi
    z, ratio, clamped = z_of(q, B, h, z0)
    if accelerate:
        # Newton may land on a root of q = T(q) other than the smallest one (the interior local minimum
        # of G along the path): a local maximum (T' > 1) or the root with z held at z0. Redo those items
        # with the plain iteration, which climbs monotonically from the EOQ to the smallest root.
        T = np.sqrt(2.0 * (k + B * normal_loss(z)) / h)
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            tp = np.where(clamped, 0.0, ratio / (T * np.exp(-0.5 * z * z) * _INV_SQRT2PI))
        redo = np.flatnonzero(~conv | (tp > 1.0) | clamped)
        if redo.size:
            Qr, _, itr, cvr, _ = _hw_normal(mu[redo], sd[redo], D[redo], A[redo], h[redo], b[redo], False)
            q[redo] = Qr / sd[redo]
            it[redo] += itr
            conv[redo] = cvr
            z = z_of(q, B, h, z0)[0]
    # G along the optimal-z path can have a second local minimum where z is held at z0 (R = 0), at
    # q_cap = √(2(k + B·G(z0))/h): keep whichever of the two is cheaper
    zc = z_of(q_cap, B, h, z0)[0]
    c1 = h * (0.5 * q + z) + (k + B * normal_loss(z)) / q
    c2 = h * (0.5 * q_cap + zc) + (k + B * normal_loss(zc)) / q_cap
    use_cap = c2 < c1
    q = np.where(use_cap, q_cap, q)
    z = np.where(use_cap, zc, z)
    flag = (h * q >= B) | (z <= z0)            # no solution of the R condition, or R held at 0
    R = np.where(z <= z0, 0.0, np.maximum(mu + sd * z, 0.0))
    return q * sd, R, it, conv, flag


@dataclass(frozen=True)
class HadleyWhitinResult:
    """Result of :func:`hadley_whitin` ((n,) arrays)."""

    order_quantity: np.ndarray
    reorder_point: np.ndarray
    cost: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    no_interior_optimum: np.ndarray


def hadley_whitin(annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost, backorder_cost, *,
                  accelerate: bool = True) -> HadleyWhitinResult:
    """The Hadley-Whitin iteration for normal lead-time demand (σ > 0), cost per unit short.

    Parameters
    ----------
    annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost, backorder_cost : array_like
        D, μ, σ (> 0), A (> 0), h, b (> 0).
    accelerate : bool
        False: the plain alternation Q → R → Q from the EOQ. True (used by :func:`optimise_policy`):
        each Q update is a safeguarded Newton step on the same fixed-point equation (same answer, fewer
        iterations).

    Returns
    -------
    HadleyWhitinResult

    Notes
    -----
    Minimises G(Q, R) = h(Q/2 + R − μ) + A·D/Q + b·D·n(R)/Q, n(R) = σ·G((R − μ)/σ), R >= 0, by alternating
    Q = √(2D[A + b·n(R)]/h) and P(X > R) = hQ/(bD) from Q = EOQ until |ΔQ| <= HW_TOL·Q (at most
    HW_MAX_ITER steps, then a bisection on dG/dQ along the optimal-R path). Where hQ >= bD the R condition
    has no solution (no interior optimum; G falls without bound as R → −∞): R is held at 0 and
    ``no_interior_optimum`` is set, as it is wherever the bound R >= 0 binds. G along the optimal-R path can
    then have two local minima (interior, and R = 0 at Q = √(2D[A + b·n(0)]/h)); the cheaper is returned.

    References
    ----------
    Hadley, G. & Whitin, T. M. (1963). Analysis of Inventory Systems. Prentice-Hall.

    Examples
    --------
    >>> res = hadley_whitin(200.0, 100.0, 25.0, 50.0, 2.0, 25.0, accelerate=False)
    >>> round(float(res.order_quantity[0]), 3), round(float(res.reorder_point[0]), 3)
    (110.774, 142.568)
    """
    D, mu, sd, A, h, b = np.broadcast_arrays(*(_arr(nm, v) for nm, v in (
        ("annual_demand", annual_demand), ("ltd_mean", ltd_mean), ("ltd_sd", ltd_sd),
        ("order_cost", order_cost), ("holding_cost", holding_cost), ("backorder_cost", backorder_cost))))
    for nm, v in (("annual_demand", D), ("ltd_sd", sd), ("order_cost", A), ("holding_cost", h),
                  ("backorder_cost", b)):
        _check(nm, v, "finite and > 0", np.isfinite(v) & (v > 0))
    _check("ltd_mean", mu, "finite and >= 0", np.isfinite(mu) & (mu >= 0))
    Q, R, it, conv, flag = _hw_normal(mu, sd, D, A, h, b, accelerate=accelerate)
    cost = h * (0.5 * Q + R - mu) + A * D / Q + b * D * sd * normal_loss((R - mu) / sd) / Q
    return HadleyWhitinResult(Q, R, cost, it, conv, flag)


def _hw_counts(c: _Counts, D, A, h, b):
    """Hadley-Whitin alternation on the integer lattice (R >= 0), then a path search in Q.

    Returns (Q, R, steps, flag).
    """
    n = D.shape[0]
    steps = np.zeros(n, dtype=np.int64)

    def cost(idx, R, Q):
        cc = c.take(idx)
        return A[idx] * D[idx] / Q + h[idx] * (R + 0.5 * Q + 0.5 - cc.mu) + b[idx] * D[idx] * cc.n(R) / Q

    def best_R(idx, Q):
        R, st, _ = _best_R_counts(Q, c.take(idx), D[idx], h[idx], b[idx], "cost", "per_unit", None)
        return R, st

    def best_Q(idx, R):
        cc = c.take(idx)
        qs = np.sqrt(2.0 * D[idx] * (A[idx] + b[idx] * cc.n(R)) / h[idx])
        q1 = np.maximum(np.floor(qs), 1.0)
        q2 = q1 + 1.0
        return np.where(cost(idx, R, q1) <= cost(idx, R, q2), q1, q2)

    allidx = np.arange(n)
    Q = np.maximum(np.round(_eoq(A, D, h)), 1.0)
    R, st = best_R(allidx, Q)
    steps += st
    active = allidx
    for _ in range(HW_MAX_ITER):
        if not active.size:
            break
        Qn = best_Q(active, R[active])
        Rn, st = best_R(active, Qn)
        steps[active] += st + 1
        same = (Qn == Q[active]) & (Rn == R[active])
        Q[active], R[active] = Qn, Rn
        active = active[~same]
    # path search on C(Q) = G(Q, R*(Q)) from the fixed point, one unit at a time
    best = cost(allidx, R, Q)
    for direction in (1.0, -1.0):
        active = allidx[(Q + direction >= 1)]
        while active.size:
            Qt = Q[active] + direction
            Rt, st = best_R(active, Qt)
            ct = cost(active, Rt, Qt)
            steps[active] += st + 1
            better = ct < best[active] * (1.0 - 1e-15)
            idx = active[better]
            Q[idx], R[idx], best[idx] = Qt[better], Rt[better], ct[better]
            active = idx[Q[idx] + direction >= 1]
    # the second local minimum with R held at 0 (see _hw_normal)
    Qb = best_Q(allidx, np.zeros(n))
    Rb, st = best_R(allidx, Qb)
    cb = cost(allidx, Rb, Qb)
    use_b = cb < best
    Q, R = np.where(use_b, Qb, Q), np.where(use_b, Rb, R)
    steps += st + 1
    flag = h * Q >= b * D
    return Q, R, steps, flag


# =========================================================================== cost mode, per unit-year
def _tw_normal(mu, sd, D, A, h, p):
    """Exact (R, Q) for normal LTD, time-weighted backorder cost: damped Newton in (z, q) on the jointly
    convex C/σ = k/q + h(z + q/2) + (h + p)·[G2(z) − G2(z + q)]/q. Returns (Q, R, it, conv)."""
    k = A * D / (sd * sd)
    n = mu.shape[0]
    hp = h + p

    def gam(s, hh, pp):
        return hh * s + (hh + pp) * normal_loss(s)

    def dgam(s, hh, pp):
        return hh - (hh + pp) * special.ndtr(-s)

    def f(z, q, kk, hh, pp):
        return kk / q + hh * (z + 0.5 * q) + (hh + pp) * _avg_G(z, q)

    q = np.sqrt(2.0 * k * hp / (h * p))
    z = _isf(h / hp) - q * h / hp
    it = np.zeros(n, dtype=np.int64)
    conv = np.zeros(n, dtype=bool)
    active = np.arange(n)
    for _ in range(NEWTON_MAX_ITER):
        if not active.size:
            break
        za, qa, ka, ha, pa = z[active], q[active], k[active], h[active], p[active]
        fa = f(za, qa, ka, ha, pa)
        g0, g1 = gam(za, ha, pa), gam(za + qa, ha, pa)
        d0, d1 = dgam(za, ha, pa), dgam(za + qa, ha, pa)
        fz = (g1 - g0) / qa
        fq = (g1 - fa) / qa
        fzz = (d1 - d0) / qa
        fzq = (d1 - fz) / qa
        fqq = (d1 - 2.0 * fq) / qa
        small = qa * (1.0 + np.abs(za + 0.5 * qa)) < NEWTON_SMALL_Q
        if small.any():
            # the difference quotients cancel for a narrow window: use f = k/q + γ(m) + γ2(m)q²/24 with
            # m = z + q/2 and the derivatives γ1 = h − (h + p)·sf, γ2 = (h + p)·φ, γ3 = −(h + p)·m·φ
            m = za + 0.5 * qa
            ph = (ha + pa) * _phi(m)
            g1m = ha - (ha + pa) * special.ndtr(-m)
            g3m = -m * ph
            fz = np.where(small, g1m + g3m * qa * qa / 24.0, fz)
            fq = np.where(small, -ka / (qa * qa) + 0.5 * g1m + ph * qa / 12.0 + g3m * qa * qa / 48.0, fq)
            fzz = np.where(small, ph, fzz)
            fzq = np.where(small, 0.5 * ph + g3m * qa / 12.0, fzq)
            fqq = np.where(small, 2.0 * ka / qa ** 3 + ph / 3.0, fqq)
        det = fzz * fqq - fzq * fzq
        good = (fzz > 0) & (det > 0) & np.isfinite(det)
        with np.errstate(divide="ignore", invalid="ignore"):
            dz = np.where(good, -(fqq * fz - fzq * fq) / det, -fz / np.maximum(np.abs(fzz), 1e-300))
            dq = np.where(good, -(-fzq * fz + fzz * fq) / det, -fq * qa ** 3 / (2.0 * ka + 1e-300))
        dz = np.where(np.isfinite(dz), dz, 0.0)
        dq = np.where(np.isfinite(dq), dq, 0.0)
        # keep q positive
        shrink = qa + dq < 0.1 * qa
        scale = np.ones_like(qa)
        scale[shrink] = 0.9 * qa[shrink] / -dq[shrink]
        step = np.minimum(scale, 1.0)
        accepted = np.zeros(active.size, dtype=bool)
        zn, qn = za.copy(), qa.copy()
        for _ls in range(60):
            zt, qt = za + step * dz, qa + step * dq
            ft = f(zt, qt, ka, ha, pa)
            ok = (ft <= fa + 1e-14 * np.abs(fa)) & ~accepted
            zn = np.where(ok, zt, zn)
            qn = np.where(ok, qt, qn)
            accepted |= ok
            if accepted.all():
                break
            step = np.where(accepted, step, 0.5 * step)
        small = (np.abs(zn - za) <= NEWTON_TOL * np.maximum(1.0, np.maximum(np.abs(za), qa))) & (
            np.abs(qn - qa) <= NEWTON_TOL * qa)
        # or: the Newton decrement (the cost decrease a full step predicts) is below rounding of the cost
        small |= good & (-(fz * dz + fq * dq) <= NEWTON_COST_TOL * np.abs(fa))
        z[active], q[active] = zn, qn
        it[active] += 1
        done = small | ~accepted
        conv[active[small]] = True
        active = active[~done]
    return q * sd, mu + sd * z, it, conv


def _fz_counts(c: _Counts, D, A, h, p):
    """Federgruen & Zheng (1992) exact (r, Q) for integer demand, vectorised over items.

    c(r, Q) = [A·D + Σ_{y=r+1}^{r+Q} g(y)] / Q, g(y) = h(y − μ) + (h + p)·n(y). Start with the window {y*}
    (y* minimises g), then add whichever neighbour g(r) or g(r + Q + 1) is smaller while it is below the
    current average cost. Returns (Q, R, steps).
    """
    n = D.shape[0]
    fr = p / (h + p)
    ystar, st0, _ = _best_R_counts(np.ones(n), c, D, h, p, "cycle_service", "per_unit", fr)

    def g(idx, y):
        cc = c.take(idx)
        return h[idx] * (y - cc.mu) + (h[idx] + p[idx]) * cc.n(y)

    allidx = np.arange(n)
    r = ystar - 1.0
    Q = np.ones(n)
    total = g(allidx, ystar)                    # Σ g over the window
    K = A * D
    gl = g(allidx, r)                           # candidate on the left: g(r)
    gr = g(allidx, r + Q + 1.0)                 # candidate on the right: g(r + Q + 1)
    steps = st0.copy()
    active = allidx
    while active.size:
        cost = (K[active] + total[active]) / Q[active]
        left = gl[active] <= gr[active]
        m = np.where(left, gl[active], gr[active])
        grow = m <= cost
        idx = active[grow]
        lft = left[grow]
        total[idx] += m[grow]
        Q[idx] += 1.0
        r[idx] -= lft
        li, ri = idx[lft], idx[~lft]
        if li.size:
            gl[li] = g(li, r[li])
        if ri.size:
            gr[ri] = g(ri, r[ri] + Q[ri] + 1.0)
        steps[idx] += 1
        active = idx
    return Q, r, steps


# ===================================================================== service targets, normal, free Q
def _service_q_normal(mu, sd, D, A, h, t, mode, basis):
    """Q minimising ordering + holding under a service target (normal, σ > 0, A > 0).

    Works in q = Q/σ, z = (R − μ)/σ, k = AD/σ². Along the minimal-z path z(q) (z fixed for cycle service;
    [G(z) − G(z + q)]/q = 1 − t for fill rate, so dz/dq = (sf(z + q) − s)/(sf(z) − sf(z + q))), the cost
    per σ is k/q + h(q/2 + z) (per-unit basis) or k/q + h(z + q/2 + [G2(z) − G2(z + q)]/q) (per-unit-year:
    exact on hand), with derivative
    −k/q² + h/2 + h·dz/dq  [+ h(−s·dz/dq + (G(z + q) − avg G)/q)].
    The derivative is <= 0 at the EOQ; the bracket is widened by doubling until it turns positive (at most
    to Q_HIGH_FACTOR·EOQ + Q_HIGH_SIGMAS·σ, else the item is flagged), then a bracketing secant (Illinois)
    finds its root. Returns (Q, iterations, converged, at_search_limit).
    """
    n = mu.shape[0]
    k = A * D / (sd * sd)
    fill = mode == "fill_rate"
    s = 1.0 - t if fill else np.zeros(n)
    zt = np.zeros(n) if fill else special.ndtri(t)
    q_eoq = np.sqrt(2.0 * k / h)
    it = np.zeros(n, dtype=np.int64)
    zlast = np.full(n, np.nan)

    def deriv(idx, q):
        if fill:
            start = zlast[idx]
            z, itz, _ = _solve_short(q, s[idx], np.where(np.isfinite(start), start, _isf(s[idx])))
            it[idx] += itz
            zlast[idx] = z
            sf1, sf2 = special.ndtr(-z), special.ndtr(-(z + q))
            den = sf1 - sf2
            dz = np.where(den > 0, (sf2 - s[idx]) / np.where(den > 0, den, 1.0), 0.0)
        else:
            z = zt[idx]
            dz = np.zeros(idx.size)
        hh = h[idx]
        d = -k[idx] / (q * q) + 0.5 * hh + hh * dz
        if basis == "per_unit_year":
            avg = _avg_G(z, q)
            d = d + hh * (-s[idx] * dz + (normal_loss(z + q) - avg) / q)
        it[idx] += 1
        return d

    allidx = np.arange(n)
    q_max = (Q_HIGH_FACTOR * q_eoq + Q_HIGH_SIGMAS) / (t if fill else 1.0)   # search range, units of σ
    a = q_eoq.copy()
    fa = np.minimum(deriv(allidx, a), 0.0)
    b = np.minimum(np.maximum(2.0 * a, a + 1.0), q_max)
    fb = deriv(allidx, b)
    edge = np.zeros(n, dtype=bool)
    grow = np.flatnonzero((fb <= 0) & (b < q_max))
    while grow.size:                                      # widen: b ← 2b until the derivative is > 0
        a[grow], fa[grow] = b[grow], np.minimum(fb[grow], 0.0)
        b[grow] = np.minimum(2.0 * b[grow], q_max[grow])
        fb[grow] = deriv(grow, b[grow])
        grow = grow[(fb[grow] <= 0) & (b[grow] < q_max[grow])]
    grow = np.flatnonzero(fb <= 0)                        # still falling at the end of the range
    edge[grow] = True
    conv = np.zeros(n, dtype=bool)
    conv[grow] = True
    side = np.zeros(n, dtype=np.int8)
    active = np.flatnonzero(~conv)
    x = 0.5 * (a + b)
    for _ in range(ROOT_MAX_ITER):
        if not active.size:
            break
        aa, bb, fA, fB = a[active], b[active], fa[active], fb[active]
        with np.errstate(divide="ignore", invalid="ignore"):
            xs = (aa * fB - bb * fA) / (fB - fA)
        bad = ~np.isfinite(xs) | (xs <= aa) | (xs >= bb)
        xs = np.where(bad, 0.5 * (aa + bb), xs)
        fx = deriv(active, xs)
        left = fx < 0
        sd_prev = side[active]
        a[active] = np.where(left, xs, aa)
        fa[active] = np.where(left, fx, np.where(sd_prev == 1, 0.5 * fA, fA))
        b[active] = np.where(left, bb, xs)
        fb[active] = np.where(left, np.where(sd_prev == -1, 0.5 * fB, fB), fx)
        side[active] = np.where(left, -1, 1)
        x[active] = xs
        done = (b[active] - a[active] <= ROOT_TOL * b[active]) | (fx == 0) | (
            np.abs(xs - np.where(left, aa, bb)) <= ROOT_TOL * xs)
        conv[active[done]] = True
        active = active[~done]
    x = np.where(edge, b, x)
    return x * sd, it, conv, edge


# ========================================================== counts, service target, free Q
def _count_service_q(fun, D, mu, A, h, t, mode, basis, q1, sd):
    """Exact integer Q for counts under a service target (ordering + holding along the minimal-R path).

    The cost is not unimodal in Q (R jumps by whole units). The better of the EOQ and the rounded optimum of
    the normal approximation with the same moments is a first incumbent c*; then every Q in
    [⌈AD/c*⌉, Q_ub] is evaluated, where Q_ub is the last Q whose lower bound
    LB(Q) <= c* (at most COUNT_SCAN_MAX values around the incumbent; items where that cap or the search
    range binds are flagged ``NOTE_SEARCH_LIMIT``):

    * cycle service: LB = AD/Q + h(R_t + (Q + 1)/2 − μ) (R_t does not depend on Q; E[B] >= 0);
    * fill rate: X >= 0 gives R >= −(1 − t)Q; per-unit basis LB = AD/Q + h((t − ½)Q + ½ − μ) (no bound
      for t <= ½: the scan stops at Q_HIGH_FACTOR·EOQ + Q_HIGH_SIGMAS·σ and the item is flagged);
      per-unit-year LB = AD/Q + h((tQ − μ)⁺)²/(2Q) (Jensen on each inventory-position level).

    Returns (Q, at_search_limit, steps).
    """
    n = D.shape[0]
    hi_cap = np.ceil((Q_HIGH_FACTOR * q1 + Q_HIGH_SIGMAS * sd) / (t if mode == "fill_rate" else 1.0)) + 2.0
    # incumbent: the better of the EOQ and the normal-approximation optimum (same moments), rounded
    allidx = np.arange(n)
    qn = q1.copy()
    pos = np.flatnonzero(sd > 0)
    if pos.size:
        qn[pos] = _service_q_normal(mu[pos], sd[pos], D[pos], A[pos], h[pos], t[pos], mode, basis)[0]
    qn = np.clip(np.round(qn), 1.0, hi_cap)
    Q = np.minimum(q1, hi_cap)
    best = fun(allidx, Q)
    fn = fun(allidx, qn)
    Q = np.where(fn < best, qn, Q)
    best = np.minimum(fn, best)
    AD = A * D
    if mode == "cycle_service":
        Rt = fun.csl_R

        def lb(i, q):
            return AD[i] / q + h[i] * (Rt[i] + 0.5 * (q + 1.0) - mu[i])
    elif basis == "per_unit":
        def lb(i, q):
            return AD[i] / q + h[i] * ((t[i] - 0.5) * q + 0.5 - mu[i])
    else:
        def lb(i, q):
            return AD[i] / q + h[i] * np.maximum(t[i] * q - mu[i], 0.0) ** 2 / (2.0 * q)
    # Q_ub: double from the incumbent while LB <= c*, then bisect (LB is convex in Q)
    lo = Q.copy()
    up = np.minimum(np.maximum(2.0 * Q, Q + 1.0), hi_cap)
    grow = np.flatnonzero((lb(allidx, up) <= best) & (up < hi_cap))
    while grow.size:
        lo[grow] = up[grow]
        up[grow] = np.minimum(2.0 * up[grow], hi_cap[grow])
        grow = grow[(lb(grow, up[grow]) <= best[grow]) & (up[grow] < hi_cap[grow])]
    edge = lb(allidx, up) <= best
    while True:
        act = np.flatnonzero(up - lo > 1)
        if not act.size:
            break
        mid = np.floor(0.5 * (lo[act] + up[act]))
        ok = lb(act, mid) <= best[act]
        lo[act] = np.where(ok, mid, lo[act])
        up[act] = np.where(ok, up[act], mid)
    q_ub = np.where(edge, up, lo)
    q_lb = np.maximum(np.ceil(AD / best), 1.0)
    # cap the scan at COUNT_SCAN_MAX values of Q centred on the incumbent
    wide = q_ub - q_lb + 1 > COUNT_SCAN_MAX
    half = COUNT_SCAN_MAX // 2
    q_lb = np.where(wide, np.maximum(q_lb, Q - half), q_lb)
    q_ub = np.where(wide, np.minimum(q_ub, q_lb + COUNT_SCAN_MAX - 1), q_ub)
    edge = edge | wide
    steps = np.zeros(n, dtype=np.int64)
    j = 0.0
    active = np.flatnonzero(q_lb <= q_ub)
    # R(Q) is non-increasing in Q (the fill rate rises with Q at fixed R): solve it once at the start of the
    # scan, then step it down one unit at a time while the target still holds
    r_cur = np.zeros(n)
    r_cur[active] = fun.best_R(active, q_lb[active])
    while active.size:
        qc = q_lb[active] + j
        if mode == "fill_rate":
            down = np.arange(active.size)
            while down.size:
                ok = fun.meets(active[down], r_cur[active[down]] - 1.0, qc[down])
                down = down[ok]
                r_cur[active[down]] -= 1.0
                steps[active[down]] += 1
        fc = fun.cost_at(active, r_cur[active], qc)
        better = fc < best[active]
        Q[active] = np.where(better, qc, Q[active])
        best[active] = np.where(better, fc, best[active])
        steps[active] += 1
        j += 1.0
        active = active[q_lb[active] + j <= q_ub[active]]
    return Q, edge, steps


# ================================================================================== validation
def _arr(name, value):
    a = np.atleast_1d(np.asarray(value, dtype=float))
    if a.ndim != 1:
        raise ValueError(f"{name} must be a scalar or a 1-D array, got shape {a.shape}")
    return a


def _check(name, a, rule, ok):
    bad = ~ok
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(f"{name} must be {rule}; item-site {i} has {a[i]!r}")


def _prepare(annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost, distribution, backorder_cost,
             backorder_basis, extra=None):
    """Check and broadcast the common inputs (and the ``extra`` named arrays) to one (n,) shape."""
    if backorder_basis not in _BASES:
        raise ValueError(f"backorder_basis must be one of {_BASES}, got {backorder_basis!r}")
    D = _arr("annual_demand", annual_demand)
    mu = _arr("ltd_mean", ltd_mean)
    sd = _arr("ltd_sd", ltd_sd)
    A = _arr("order_cost", order_cost)
    h = _arr("holding_cost", holding_cost)
    dist = np.atleast_1d(np.asarray(distribution))
    b = _arr("backorder_cost", np.nan if backorder_cost is None else backorder_cost)
    extra = extra or {}
    more = [_arr(name, value) for name, value in extra.items()]
    try:
        D, mu, sd, A, h, dist, b, *more = np.broadcast_arrays(D, mu, sd, A, h, dist, b, *more)
    except ValueError as exc:
        raise ValueError(f"inputs must broadcast to one shape (n,): {exc}") from None
    extra_out = {name: np.array(v, dtype=float) for name, v in zip(extra, more, strict=True)}
    D, mu, sd, A, h, b = (np.array(x, dtype=float) for x in (D, mu, sd, A, h, b))
    dist = np.array(dist).astype(np.int8)
    _check("annual_demand", D, "finite and >= 0", np.isfinite(D) & (D >= 0))
    _check("ltd_mean", mu, "finite and >= 0", np.isfinite(mu) & (mu >= 0))
    _check("ltd_sd", sd, "finite and >= 0", np.isfinite(sd) & (sd >= 0))
    _check("order_cost", A, "finite and >= 0", np.isfinite(A) & (A >= 0))
    _check("holding_cost", h, "finite and > 0", np.isfinite(h) & (h > 0))
    _check("distribution", dist, "0 (normal), 1 (poisson) or 2 (negbin)",
           (dist == NORMAL) | (dist == POISSON) | (dist == NEGBIN))
    _check("backorder_cost", b, "NaN (none) or finite and >= 0", np.isnan(b) | (np.isfinite(b) & (b >= 0)))
    return D, mu, sd, A, h, dist, b, extra_out


# ==================================================================================== evaluation core
def _evaluate(D, mu, sd, A, h, dist, b, R, Q, basis, it, conv, note):
    n = D.shape[0]
    zero = (D <= 0)
    discrete = dist != NORMAL
    Qs = np.where(Q > 0, Q, 1.0)
    short = np.zeros(n)
    eb = np.zeros(n)
    csl = np.ones(n)
    nR = np.zeros(n)
    nm = ~discrete & ~zero
    if nm.any():
        Rn, Qn, mn, sn = R[nm], Qs[nm], mu[nm], sd[nm]
        pos = sn > 0
        s = np.where(pos, sn, 1.0)
        z1 = (Rn - mn) / s
        qz = Qn / s
        g1, l1 = normal_losses(z1)
        g2, l2 = normal_losses(z1 + qz)
        small = qz * (1.0 + np.abs(z1 + 0.5 * qz)) < SMALL_WINDOW
        qq = np.where(small, 1.0, qz)
        sh_c = (g1 - g2) / qq
        eb_c = (l1 - l2) / qq
        if small.any():
            sh_c[small] = _avg_sf(z1[small], qz[small])
            eb_c[small] = _avg_G(z1[small], qz[small])
        eb_c = s * eb_c
        d1 = np.maximum(mn - Rn, 0.0)
        d2 = np.maximum(mn - Rn - Qn, 0.0)
        short[nm] = np.where(pos, sh_c, (d1 - d2) / Qn)
        eb[nm] = np.where(pos, eb_c, 0.5 * (d1 * d1 - d2 * d2) / Qn)
        csl[nm] = np.where(pos, special.ndtr(z1), (Rn >= mn).astype(float))
        nR[nm] = np.where(pos, s * g1, d1)
    ct = discrete & ~zero
    if ct.any():
        c = _Counts(mu[ct], sd[ct], dist[ct])
        nR[ct] = c.n(R[ct])
        short[ct] = (nR[ct] - c.n(R[ct] + Qs[ct])) / Qs[ct]
        eb[ct] = c.backorders(R[ct], Qs[ct])
        csl[ct] = c.cdf(R[ct])
    short = np.clip(short, 0.0, 1.0)
    eip = R + 0.5 * Q + np.where(discrete, 0.5, 0.0)
    on_hand = np.where(zero, np.maximum(R, 0.0), np.maximum(eip - mu + eb, 0.0))
    pos = sd > 0
    z = np.where(pos, (R - mu) / np.where(pos, sd, 1.0), 0.0)
    orders = np.where(zero, 0.0, D / Qs)
    ordering = A * orders
    cycle = np.where(zero, 0.0, 0.5 * h * Q)
    bb = np.where(np.isnan(b), 0.0, b)
    if basis == "per_unit":
        safety = np.where(zero, h * on_hand, h * (eip - 0.5 * Q - mu))
        back = np.where(zero, 0.0, bb * D * nR / Qs)
    else:
        safety = np.where(zero, h * on_hand, h * (on_hand - 0.5 * Q))
        back = np.where(zero, 0.0, bb * eb)
    total = ordering + cycle + safety + back
    return SitePolicy(
        order_quantity=Q, reorder_point=R, safety_stock=R - mu, z=z,
        cycle_service=np.where(zero, 1.0, csl), fill_rate=np.where(zero, 1.0, 1.0 - short),
        expected_on_hand=on_hand, expected_backorders=np.where(zero, 0.0, eb), orders_per_year=orders,
        ordering_cost=ordering, cycle_stock_cost=cycle, safety_stock_cost=safety, backorder_cost=back,
        total_cost=total, iterations=it.astype(np.int64), converged=conv.astype(bool),
        note=note.astype(np.int64))


def evaluate_policy(annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost, reorder_point,
                    order_quantity, *, distribution=NORMAL, backorder_cost=None,
                    backorder_basis: str = "per_unit") -> SitePolicy:
    """Figures of given (R, Q) policies.

    Parameters
    ----------
    annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost : array_like
        D, μ, σ of lead-time demand, A, h (see the module notes).
    reorder_point, order_quantity : array_like
        The policy; Q > 0 wherever D > 0 (integers for counts).
    distribution : array_like of int
        ``NORMAL``, ``POISSON`` or ``NEGBIN`` per item-site.
    backorder_cost : array_like, optional
        b (per unit short) or p (per unit per year) by ``backorder_basis``; NaN or None = none (cost 0).
    backorder_basis : {"per_unit", "per_unit_year"}

    Returns
    -------
    SitePolicy
        ``iterations`` = 0, ``converged`` = True; notes for zero demand, zero variance, Poisson fallback.

    Notes
    -----
    E[B] = [n2(R) − n2(R + Q)]/Q, fill rate = 1 − [n(R) − n(R + Q)]/Q, CSL = F(R); the costs follow the
    basis as described in the module notes.

    References
    ----------
    Hadley, G. & Whitin, T. M. (1963). Analysis of Inventory Systems. Prentice-Hall.
    Zipkin, P. H. (2000). Foundations of Inventory Management. McGraw-Hill.

    Examples
    --------
    >>> pol = evaluate_policy(200.0, 100.0, 25.0, 50.0, 2.0, 90.0, 10.0)
    >>> round(float(pol.fill_rate[0]), 6)
    0.421259
    """
    D, mu, sd, A, h, dist, b, ex = _prepare(annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost,
                                            distribution, backorder_cost, backorder_basis,
                                            {"reorder_point": reorder_point,
                                             "order_quantity": order_quantity})
    R, Q = ex["reorder_point"], ex["order_quantity"]
    _check("reorder_point", R, "finite", np.isfinite(R))
    _check("order_quantity", Q, "finite, and > 0 where annual_demand > 0",
           np.isfinite(Q) & ((Q > 0) | (D <= 0)) & (Q >= 0))
    note = _base_notes(D, mu, sd, dist)
    n = D.shape[0]
    return _evaluate(D, mu, sd, A, h, dist, b, R, Q, backorder_basis, np.zeros(n, np.int64),
                     np.ones(n, bool), note)


def _base_notes(D, mu, sd, dist):
    note = np.zeros(D.shape[0], dtype=np.int64)
    note |= np.where(D <= 0, NOTE_ZERO_DEMAND, 0)
    note |= np.where((D > 0) & (dist == NORMAL) & (sd <= 0), NOTE_DETERMINISTIC, 0)
    nbfb = (dist == NEGBIN) & ~(sd * sd > mu * (1.0 + NEGBIN_MIN_EXCESS)) & (D > 0)
    note |= np.where(nbfb, NOTE_POISSON_FALLBACK, 0)
    return note


# ================================================================================== optimise_policy
def optimise_policy(annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost, *, distribution=NORMAL,
                    mode: str = "cost", backorder_cost=None, backorder_basis: str = "per_unit",
                    target=None, order_quantity=None, pack_size=None,
                    quantity_rule: str = "optimise") -> SitePolicy:
    """Best (R, Q) for every item-site.

    Parameters
    ----------
    annual_demand : array_like
        D, units per year (>= 0; 0 = no demand, no stock).
    ltd_mean, ltd_sd : array_like
        Mean and standard deviation of lead-time demand (units).
    order_cost, holding_cost : array_like
        A per order (>= 0) and h per unit per year (> 0).
    distribution : array_like of int
        ``NORMAL``, ``POISSON`` or ``NEGBIN`` per item-site.
    mode : {"cost", "cycle_service", "fill_rate"}
        Minimise total cost with a backorder cost, or ordering + holding cost under a service target.
    backorder_cost : array_like, optional
        b per unit short (``per_unit``) or p per unit per year (``per_unit_year``); required (> 0) in cost
        mode wherever D > 0.
    backorder_basis : {"per_unit", "per_unit_year"}
    target : array_like, optional
        Cycle service level or fill rate in (0, 1), required in the service modes.
    order_quantity : array_like, optional
        Fixed Q where finite (NaN = free); R is then optimised for it.
    pack_size : array_like, optional
        Free Q becomes a multiple of the pack size (where finite and > 0); the better neighbouring multiple
        (each with its own best R) is taken.
    quantity_rule : {"optimise", "eoq"}
        Service modes: Q jointly optimised under the target, or the EOQ √(2AD/h).

    Returns
    -------
    SitePolicy

    Notes
    -----
    * cost, per_unit (Hadley & Whitin 1963): alternate Q = √(2D[A + b·n(R)]/h) and P(X > R) = hQ/(bD) from
      Q = EOQ until |ΔQ| <= HW_TOL·Q; items not settled after HW_MAX_ITER go to a bisection on the sign of
      dG/dQ along the optimal-R path (the iteration count includes it). R >= 0 (see module notes). Counts:
      the same alternation on integers, then a unit-step search in Q along the optimal-R path.
    * cost, per_unit_year: normal, damped Newton on the jointly convex exact cost in (z, Q/σ); counts, the
      exact Federgruen & Zheng (1992) algorithm.
    * cycle_service: R = F⁻¹(target) (smallest integer for counts). fill_rate: the smallest R with
      1 − [n(R) − n(R + Q)]/Q >= target. Q given, EOQ, or minimising ordering + holding cost along the
      minimal-R path: normal, a bracketing secant on dC/dQ (see ``_service_q_normal``); counts, an integer
      ternary search (cost assumed unimodal in Q).
    * σ = 0 (normal): exact deterministic answers (EOQ and R = μ for per-unit costs and cycle service,
      planned backorders R = μ − Q·h/(h + p) for per-unit-year costs, R = μ − (1 − target)·Q for fill rate).

    References
    ----------
    Hadley, G. & Whitin, T. M. (1963). Analysis of Inventory Systems. Prentice-Hall.
    Federgruen, A. & Zheng, Y.-S. (1992). An efficient algorithm for computing an optimal (r, Q) policy in
    continuous review stochastic inventory systems. Operations Research 40(4):808-813.
    Zheng, Y.-S. (1992). On properties of stochastic inventory systems. Management Science 38(1):87-103.

    Examples
    --------
    >>> pol = optimise_policy(200.0, 100.0, 25.0, 50.0, 2.0, backorder_cost=25.0)
    >>> round(float(pol.order_quantity[0]), 1), round(float(pol.reorder_point[0]), 1)
    (110.8, 142.6)
    """
    if mode not in _MODES:
        raise ValueError(f"mode must be one of {_MODES}, got {mode!r}")
    if quantity_rule not in _RULES:
        raise ValueError(f"quantity_rule must be one of {_RULES}, got {quantity_rule!r}")
    extra = {"target": np.nan if target is None else target,
             "order_quantity": np.nan if order_quantity is None else order_quantity,
             "pack_size": np.nan if pack_size is None else pack_size}
    D, mu, sd, A, h, dist, b, ex = _prepare(annual_demand, ltd_mean, ltd_sd, order_cost, holding_cost,
                                            distribution, backorder_cost, backorder_basis, extra)
    n = D.shape[0]
    live = D > 0
    if mode == "cost":
        _check("backorder_cost", b, "> 0 in cost mode (for every item-site with demand)",
               ~live | (np.isfinite(b) & (b > 0)))
        t = np.full(n, np.nan)
    else:
        if target is None:
            raise ValueError(f"target is required in mode {mode!r}")
        t = ex["target"]
        _check("target", t, "strictly between 0 and 1", (t > 0) & (t < 1))
    fq = ex["order_quantity"]
    _check("order_quantity", fq, "NaN (free) or finite and > 0", np.isnan(fq) | (np.isfinite(fq) & (fq > 0)))
    pk = ex["pack_size"]
    _check("pack_size", pk, "NaN (none) or finite and > 0", np.isnan(pk) | (np.isfinite(pk) & (pk > 0)))
    discrete = dist != NORMAL
    _check("pack_size", pk, "a whole number for count distributions",
           ~discrete | np.isnan(pk) | (pk == np.round(pk)))

    note = _base_notes(D, mu, sd, dist)
    R = np.zeros(n)
    Q = np.zeros(n)
    it = np.zeros(n, dtype=np.int64)
    conv = np.ones(n, dtype=bool)
    note |= np.where(live & np.isfinite(fq), NOTE_FIXED_Q, 0)
    # no order cost and a free Q: one unit (or one pack) per order, the base-stock limit
    single = live & np.isnan(fq) & (A <= 0)
    fq = np.where(single, np.where(np.isfinite(pk), pk, 1.0), fq)
    note |= np.where(single, NOTE_ONE_FOR_ONE, 0)
    fixed = live & np.isfinite(fq)
    bx = np.where(np.isnan(b), 0.0, b)

    # ---------------------------------------------------------------------- free Q, joint optimisation
    for is_disc in (False, True):
        sel = np.flatnonzero(live & ~fixed & (discrete == is_disc))
        if not sel.size:
            continue
        Rs, Qs, its, cvs, flg, edge = _joint(is_disc, D[sel], mu[sel], sd[sel], A[sel], h[sel], bx[sel],
                                             dist[sel], t[sel], mode, backorder_basis, quantity_rule)
        R[sel], Q[sel], it[sel], conv[sel] = Rs, Qs, its, cvs
        note[sel] |= np.where(flg, NOTE_NO_INTERIOR_OPTIMUM, 0) | np.where(edge, NOTE_SEARCH_LIMIT, 0)

    # ----------------------------------------------------------------------------- pack-size rounding
    packed = live & ~fixed & np.isfinite(pk)
    if packed.any():
        sel = np.flatnonzero(packed)
        m1 = np.maximum(np.floor(Q[sel] / pk[sel] + 1e-9), 1.0) * pk[sel]
        cands = (m1, m1 + pk[sel])
        best_c = np.full(sel.size, np.inf)
        for qc in cands:
            Rc, itc, cvc, flc = _R_for_Q(qc, sel, D, mu, sd, h, bx, dist, t, mode, backorder_basis)
            cc = _mode_objective(Rc, qc, sel, D, mu, sd, A, h, bx, dist, mode, backorder_basis, quantity_rule)
            better = cc < best_c
            best_c = np.where(better, cc, best_c)
            R[sel] = np.where(better, Rc, R[sel])
            Q[sel] = np.where(better, qc, Q[sel])
            it[sel] += itc
            conv[sel] = np.where(better, cvc & conv[sel], conv[sel])
            note[sel] = np.where(better, (note[sel] & ~NOTE_NO_INTERIOR_OPTIMUM)
                                 | np.where(flc, NOTE_NO_INTERIOR_OPTIMUM, 0), note[sel])
        note[sel] |= NOTE_PACK_ROUNDED

    # ------------------------------------------------------------------------------------- fixed Q
    if fixed.any():
        sel = np.flatnonzero(fixed)
        qf = np.where(discrete[sel], np.maximum(np.round(fq[sel]), 1.0), fq[sel])
        Rf, itf, cvf, flf = _R_for_Q(qf, sel, D, mu, sd, h, bx, dist, t, mode, backorder_basis)
        R[sel], Q[sel], it[sel], conv[sel] = Rf, qf, itf, cvf
        note[sel] |= np.where(flf, NOTE_NO_INTERIOR_OPTIMUM, 0)

    note |= np.where(~conv, NOTE_NOT_CONVERGED, 0)
    R = np.where(live, R, 0.0)
    Q = np.where(live, Q, 0.0)
    return _evaluate(D, mu, sd, A, h, dist, np.where(np.isnan(b), np.nan, b), R, Q, backorder_basis,
                     it, conv, note)


def _by_kind(sel, dist):
    """Split item-sites ``sel`` into normal, then count ones: yield ``(is_count, positions in sel, rows)``."""
    disc = dist[sel] != NORMAL
    for is_disc in (False, True):
        loc = np.flatnonzero(disc == is_disc)
        if loc.size:
            yield is_disc, loc, sel[loc]


def _R_for_Q(Qc, sel, D, mu, sd, h, b, dist, t, mode, basis):
    """Best R for given Q on the subset sel (mixed distributions). Returns (R, it, conv, flag)."""
    m = sel.size
    R = np.zeros(m)
    it = np.zeros(m, dtype=np.int64)
    conv = np.ones(m, dtype=bool)
    flag = np.zeros(m, dtype=bool)
    for is_disc, loc, g in _by_kind(sel, dist):
        if is_disc:
            c = _Counts(mu[g], sd[g], dist[g])
            Rr, st, fl = _best_R_counts(Qc[loc], c, D[g], h[g], b[g], mode, basis, t[g])
            R[loc], it[loc], flag[loc] = Rr, st, fl
        else:
            Rr, itr, cvr, fl = _best_R_normal(Qc[loc], mu[g], sd[g], D[g], h[g], b[g], mode, basis, t[g])
            R[loc], it[loc], conv[loc], flag[loc] = Rr, itr, cvr, fl
    return R, it, conv, flag


def _mode_objective(Rc, Qc, sel, D, mu, sd, A, h, b, dist, mode, basis, rule):
    out = np.empty(sel.size)
    for is_disc, loc, g in _by_kind(sel, dist):
        c = _Counts(mu[g], sd[g], dist[g]) if is_disc else None
        if mode != "cost" and rule == "eoq":
            out[loc] = A[g] * D[g] / Qc[loc] + 0.5 * h[g] * Qc[loc]
        else:
            out[loc] = _objective(Rc[loc], Qc[loc], mu[g], sd[g], D[g], A[g], h[g], b[g], is_disc, mode,
                                  basis, c)
    return out


def _joint(is_disc, D, mu, sd, A, h, b, dist, t, mode, basis, rule):
    """Free-Q optimisation for one family (all normal or all counts).

    Returns (R, Q, iterations, converged, no_interior_flag, search_edge_flag).
    """
    n = D.shape[0]
    it = np.zeros(n, dtype=np.int64)
    conv = np.ones(n, dtype=bool)
    flag = np.zeros(n, dtype=bool)
    edge = np.zeros(n, dtype=bool)
    R = np.zeros(n)
    Q = np.zeros(n)
    eoq = _eoq(A, D, h)
    if not is_disc:
        pos = sd > 0
        det = ~pos
        P = np.flatnonzero(pos)
        if mode == "cost" and basis == "per_unit":
            if P.size:
                Q[P], R[P], it[P], conv[P], flag[P] = _hw_normal(mu[P], sd[P], D[P], A[P], h[P], b[P])
            if det.any():
                d = np.flatnonzero(det)
                q1 = eoq[d]
                g1 = A[d] * D[d] / q1 + h[d] * 0.5 * q1
                q2 = np.sqrt(2.0 * D[d] * (A[d] + b[d] * mu[d]) / h[d])
                g2 = A[d] * D[d] / q2 + h[d] * (0.5 * q2 - mu[d]) + b[d] * D[d] * mu[d] / q2
                use2 = g2 < g1
                Q[d] = np.where(use2, q2, q1)
                R[d] = np.where(use2, 0.0, mu[d])
                flag[d] = use2
            return R, Q, it, conv, flag, edge
        if mode == "cost":
            if P.size:
                Q[P], R[P], it[P], conv[P] = _tw_normal(mu[P], sd[P], D[P], A[P], h[P], b[P])
            if det.any():
                d = np.flatnonzero(det)
                Q[d] = np.sqrt(2.0 * A[d] * D[d] * (h[d] + b[d]) / (h[d] * b[d]))
                R[d] = mu[d] - Q[d] * h[d] / (h[d] + b[d])
            return R, Q, it, conv, flag, edge
        # service modes, normal
        qmin = np.maximum(eoq, 1e-9 * np.maximum(np.maximum(mu, sd), 1.0))
        if rule == "eoq" or (mode == "cycle_service" and basis == "per_unit"):
            Q = qmin
        else:
            Q = qmin.copy()
            if P.size:
                Q[P], it[P], conv[P], edge[P] = _service_q_normal(mu[P], sd[P], D[P], A[P], h[P], t[P], mode,
                                                                  basis)
            if det.any():
                d = np.flatnonzero(det)
                if mode == "cycle_service":          # R = μ, on hand Q/2: the EOQ
                    Q[d] = qmin[d]
                elif basis == "per_unit_year":        # R = μ − (1 − t)Q, on hand t²Q/2
                    Q[d] = qmin[d] / t[d]
                else:                                 # cost AD/Q + hQ(t − 1/2)
                    ok = t[d] > 0.5
                    Q[d] = np.where(ok, qmin[d] / np.sqrt(np.where(ok, 2.0 * t[d] - 1.0, 1.0)),
                                    Q_HIGH_FACTOR * qmin[d])
                    edge[d] = ~ok
        R, itr, cvr, _ = _best_R_normal(Q, mu, sd, D, h, b, mode, basis, t)
        return R, Q, it + itr, conv & cvr, flag, edge

    c = _Counts(mu, sd, dist)
    if mode == "cost" and basis == "per_unit":
        Q, R, it, flag = _hw_counts(c, D, A, h, b)
        return R, Q, it, conv, flag, edge
    if mode == "cost":
        Q, R, it = _fz_counts(c, D, A, h, b)
        return R, Q, it, conv, flag, edge
    q1 = np.maximum(np.floor(eoq), 1.0)
    if rule == "eoq" or (mode == "cycle_service" and basis == "per_unit"):
        better = A * D / (q1 + 1) + 0.5 * h * (q1 + 1) < A * D / q1 + 0.5 * h * q1
        Q = np.where(better, q1 + 1, q1)
    else:
        r_csl, st0, _ = _best_R_counts(np.ones(n), c, D, h, b, "cycle_service", basis, t)
        it = it + st0

        def best_R(idx, q):
            if mode == "cycle_service":
                return r_csl[idx]
            return _best_R_counts(q, c.take(idx), D[idx], h[idx], b[idx], mode, basis, t[idx],
                                  csl_R=r_csl[idx])[0]

        def cost_at(idx, Rq, q):
            return _objective(Rq, q, mu[idx], sd[idx], D[idx], A[idx], h[idx], b[idx], True, mode, basis,
                              c.take(idx))

        def fun(idx, q):
            return cost_at(idx, best_R(idx, q), q)
        fun.csl_R = r_csl
        fun.best_R = best_R
        fun.cost_at = cost_at
        fun.meets = lambda idx, Rq, q: c.take(idx).short(Rq, q) <= 1.0 - t[idx]
        Q, edge, st = _count_service_q(fun, D, mu, A, h, t, mode, basis, q1, sd)
        it = it + st
    R, st, _ = _best_R_counts(Q, c, D, h, b, mode, basis, t)
    return R, Q, it + st, conv, flag, edge
