"""Joint replenishment: items ordered together under a shared (major) order cost.

A *family* of ``n`` items is replenished on a base cycle ``T`` (years); item ``i`` is ordered every ``k_i``
cycles. With major cost ``S`` per family order, minor cost ``s_i`` per item line and ``H_i = h_i * D_i``
(holding cost per unit-year times annual demand), the deterministic annual cost of the cyclic policy is

    TC(T, k) = (S + sum_i s_i / k_i) / T + (T / 2) * sum_i k_i * H_i.

Every function here works on numpy arrays of shape ``(n,)`` (one entry per item of one family) and is
vectorised over items; the loops that remain run over iterations or starting points, never over items.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: relative tolerance used when comparing costs / cycles
REL_TOL = 1e-12
#: upper limit on the number of k(T) breakpoints the exact method sweeps
MAX_BREAKPOINTS = 5_000_000
#: default number of equally spaced starting cycles for RAND
RAND_STARTS = 10
#: iteration limit of the RAND alternation from each start
RAND_MAX_ITER = 100

_LN2 = np.log(2.0)


@dataclass(frozen=True)
class JointPolicy:
    """A cyclic joint replenishment policy.

    Attributes
    ----------
    cycle : float
        Base cycle ``T`` (years).
    multiples : numpy.ndarray
        Integer multiples ``k_i >= 1`` (item ``i`` is ordered every ``k_i * T``).
    cost : float
        ``TC(T, k)`` per year.
    method : str
        Name of the method that produced it.
    iterations : int
        Iterations (RAND alternations, breakpoint intervals swept, ...).
    converged : bool
        True when the method met its own stopping rule (or is exact).
    """

    cycle: float
    multiples: np.ndarray
    cost: float
    method: str
    iterations: int
    converged: bool


@dataclass(frozen=True)
class RoundyBound:
    """Roundy's (1985) relaxation: a lower bound on every feasible joint policy.

    Attributes
    ----------
    cost : float
        The lower bound (per year).
    base_cycle : float
        ``T0`` of the relaxation (years).
    item_cycles : numpy.ndarray
        ``T_i >= T0`` of the relaxation.
    """

    cost: float
    base_cycle: float
    item_cycles: np.ndarray


def _check_family(major_cost: float, minor_cost, holding_demand) -> tuple[float, np.ndarray, np.ndarray]:
    S = float(major_cost)
    s = np.atleast_1d(np.asarray(minor_cost, dtype=float))
    H = np.atleast_1d(np.asarray(holding_demand, dtype=float))
    if not np.isfinite(S) or S <= 0.0:
        raise ValueError(f"major_cost must be finite and > 0 (a family needs a shared cost), got {S!r}")
    s, H = np.broadcast_arrays(s, H)
    if s.ndim != 1 or s.size == 0:
        raise ValueError(f"minor_cost/holding_demand must be non-empty 1-d arrays, got shape {s.shape}")
    if not np.all(np.isfinite(s)) or np.any(s < 0):
        raise ValueError(f"minor_cost must be finite and >= 0, got min {np.nanmin(s)!r}")
    if not np.all(np.isfinite(H)) or np.any(H <= 0):
        raise ValueError(
            "holding_demand (holding cost x annual demand) must be finite and > 0 for every item "
            f"(drop zero-demand items first), got min {np.nanmin(H)!r}"
        )
    return S, s.astype(float), H.astype(float)


def joint_cost(cycle, multiples, major_cost: float, minor_cost, holding_demand) -> np.ndarray:
    """Annual cost ``TC(T, k)`` of a cyclic joint replenishment policy.

    Parameters
    ----------
    cycle : float or array_like
        Base cycle ``T`` (years); an array gives one cost per cycle (broadcast against ``multiples``'s
        leading axes).
    multiples : array_like of int, shape (..., n)
        Multiples ``k_i >= 1``.
    major_cost : float
        ``S``, the cost of one family order.
    minor_cost, holding_demand : array_like, shape (n,)
        ``s_i`` and ``H_i = h_i D_i``.

    Returns
    -------
    numpy.ndarray
        ``TC`` (shape of the broadcast of ``cycle`` with ``multiples[..., 0]``).

    Notes
    -----
    ``TC(T, k) = (S + sum_i s_i/k_i)/T + (T/2) sum_i k_i H_i``.

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> float(joint_cost(2.0, [1, 1], 10.0, [1.0, 1.0], [1.0, 1.0]))
    8.0
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    k = np.asarray(multiples, dtype=float)
    if np.any(k < 1):
        raise ValueError(f"multiples must be >= 1, got min {k.min()!r}")
    T = np.asarray(cycle, dtype=float)
    if np.any(T <= 0):
        raise ValueError(f"cycle must be > 0, got {T.min()!r}")
    A = S + np.sum(s / k, axis=-1)
    B = np.sum(k * H, axis=-1)
    return A / T + 0.5 * T * B


def optimal_cycle(multiples, major_cost: float, minor_cost, holding_demand) -> np.ndarray:
    """Best base cycle for fixed multiples.

    Parameters
    ----------
    multiples : array_like of int, shape (..., n)
        Multiples ``k_i >= 1``.
    major_cost, minor_cost, holding_demand
        See :func:`joint_cost`.

    Returns
    -------
    numpy.ndarray
        ``T*(k)`` (years).

    Notes
    -----
    ``T*(k) = sqrt(2 (S + sum s_i/k_i) / sum k_i H_i)`` (TC is convex in T for fixed k).

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> float(optimal_cycle([1, 1], 10.0, [1.0, 1.0], [1.0, 1.0]))
    3.4641016151377544
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    k = np.asarray(multiples, dtype=float)
    return np.sqrt(2.0 * (S + np.sum(s / k, axis=-1)) / np.sum(k * H, axis=-1))


def optimal_multiples(cycle, minor_cost, holding_demand, k_max: int | None = None) -> np.ndarray:
    """Best integer multiples for a fixed base cycle.

    Parameters
    ----------
    cycle : float or array_like, shape (m,)
        Base cycle(s) ``T`` (years). An array gives a result of shape ``(m, n)``.
    minor_cost, holding_demand : array_like, shape (n,)
        ``s_i`` and ``H_i``.
    k_max : int, optional
        Upper limit on the multiples.

    Returns
    -------
    numpy.ndarray of int64
        ``k_i(T)``: the smallest integer ``k >= 1`` with ``k (k + 1) >= 2 s_i / (H_i T^2)``.

    Notes
    -----
    For fixed ``T`` the cost separates by item; ``s/(kT) + kTH/2`` is convex in ``k`` and ``k`` beats
    ``k + 1`` exactly when ``k (k + 1) >= 2 s / (H T^2)``.

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> optimal_multiples(1.0, [1.0, 6.0], [1.0, 1.0]).tolist()
    [1, 3]
    """
    s = np.atleast_1d(np.asarray(minor_cost, dtype=float))
    H = np.atleast_1d(np.asarray(holding_demand, dtype=float))
    T = np.asarray(cycle, dtype=float)
    if np.any(T <= 0):
        raise ValueError(f"cycle must be > 0, got {T.min()!r}")
    a = 2.0 * s / (H * T[..., None] ** 2) if T.ndim else 2.0 * s / (H * float(T) ** 2)
    k = np.maximum(1.0, np.ceil((np.sqrt(1.0 + 4.0 * a) - 1.0) / 2.0))
    # guard the rounding of the square root: enforce the defining inequalities exactly
    k = np.where((k - 1.0) * k >= a * (1.0 + 1e-14), np.maximum(k - 1.0, 1.0), k)
    k = np.where(k * (k + 1.0) < a * (1.0 - 1e-14), k + 1.0, k)
    if k_max is not None:
        k = np.minimum(k, float(k_max))
    return k.astype(np.int64)


def _clipped_cycle(A, B, lower, upper) -> tuple[np.ndarray, np.ndarray]:
    """Minimiser of ``A/T + B T/2`` over ``[lower, upper]`` (convex: ``sqrt(2A/B)`` clipped) and its cost."""
    T = np.clip(np.sqrt(2.0 * A / B), lower, upper)
    return T, A / T + 0.5 * T * B


def exact_cyclic(major_cost: float, minor_cost, holding_demand) -> JointPolicy:
    """Exact optimum of ``TC(T, k)`` over all cyclic policies (T > 0, integer k >= 1).

    Parameters
    ----------
    major_cost : float
        ``S > 0``.
    minor_cost, holding_demand : array_like, shape (n,)
        ``s_i >= 0`` and ``H_i > 0``.

    Returns
    -------
    JointPolicy
        ``iterations`` = number of k(T) intervals swept; ``converged`` False only when the sweep had to be
        truncated at ``MAX_BREAKPOINTS``.

    Notes
    -----
    ``g(T) = min_k TC(T, k) = TC(T, k(T))`` with ``k(T)`` from :func:`optimal_multiples`; ``k_i(T)`` is a
    non-increasing step function whose steps (from ``j + 1`` down to ``j``) sit at
    ``T = sqrt(2 s_i / (H_i j (j + 1)))``. Between consecutive breakpoints ``k`` is constant and TC convex,
    so its minimum there is ``T*(k)`` clipped to the interval. The search is restricted to
    ``[T_lo, T_hi]``: for ``T >= T_hi = max(max_i sqrt(s_i/H_i), T*(1))`` every ``k_i(T) = 1`` and TC is
    increasing; and ``g(T) >= S/T + sum_i sqrt(2 s_i H_i)`` (each item's cost is at least its EOQ cost), so
    with an upper bound ``U`` (RAND) the optimum has ``T >= T_lo = S / (U - sum_i sqrt(2 s_i H_i))``.
    The sweep accumulates ``A = sum s_i/k_i`` and ``B = sum k_i H_i`` over the sorted breakpoints.

    References
    ----------
    Wildeman, R. E., Frenk, J. B. G., Dekker, R. (1997). An efficient optimal solution method for the joint
    replenishment problem. European Journal of Operational Research 99(2), 433-444.
    Viswanathan, S. (2002). On optimal algorithms for the joint replenishment problem. Journal of the
    Operational Research Society 53(11), 1286-1290.

    Examples
    --------
    >>> p = exact_cyclic(600.0, [120.0, 840.0, 300.0], [160.0, 20.0, 50.0])
    >>> p.multiples.tolist(), round(p.cost, 4)
    ([1, 3, 1], 837.8544)
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    ub = rand(S, s, H)
    eoq_sum = float(np.sum(np.sqrt(2.0 * s * H)))
    margin = ub.cost - eoq_sum
    T_lo = S / margin if margin > 0 else 0.0
    ones = np.ones_like(s)
    T_hi = max(float(np.max(np.sqrt(s / H))), float(optimal_cycle(ones, S, s, H)))
    T_lo = min(T_lo * (1.0 - 1e-9), T_hi)
    # breakpoints T_ij = sqrt(2 s_i / (H_i j (j+1))) in [T_lo, T_hi]: j from j_min to j_max
    ratio = 2.0 * s / H
    with np.errstate(divide="ignore"):
        a_lo = ratio / T_lo**2 if T_lo > 0 else np.full_like(ratio, np.inf)
    j_max = np.floor((np.sqrt(1.0 + 4.0 * a_lo) - 1.0) / 2.0)  # largest j with j(j+1) <= ratio/T_lo^2
    total = float(np.sum(np.maximum(j_max, 0.0)))
    converged = True
    if not np.isfinite(total) or total > MAX_BREAKPOINTS:
        # truncate: keep the breakpoints nearest T_hi (a heuristic answer, reported as not converged)
        converged = False
        cap = max(1.0, np.floor(MAX_BREAKPOINTS / s.size))
        j_max = np.minimum(j_max, cap)
    j_max = np.maximum(j_max, 0).astype(np.int64)
    k_top = np.ones_like(s)  # above every breakpoint (all lie at or below T_hi) every k_i = 1
    counts = j_max
    item = np.repeat(np.arange(s.size), counts)
    starts = np.cumsum(counts) - counts
    j = np.arange(item.size) - np.repeat(starts, counts) + 1  # j = 1..j_max per item
    bp = np.sqrt(ratio[item] / (j * (j + 1.0)))
    order = np.argsort(-bp, kind="stable")
    item, j, bp = item[order], j[order], bp[order]
    # crossing bp downward, item goes from k = j to k = j + 1
    dA = s[item] * (1.0 / (j + 1.0) - 1.0 / j)
    dB = H[item]
    A = S + float(np.sum(s / k_top)) + np.concatenate(([0.0], np.cumsum(dA)))
    B = float(np.sum(k_top * H)) + np.concatenate(([0.0], np.cumsum(dB)))
    upper = np.concatenate(([np.inf], bp))
    lower = np.concatenate((bp, [T_lo]))
    T_star, cost = _clipped_cycle(A, B, lower, upper)
    best = int(np.argmin(cost))
    k_best = optimal_multiples(float(T_star[best]), s, H)
    # T*(k) for the k actually returned: no worse than g at the interval optimum (ties at breakpoints)
    T_best = float(optimal_cycle(k_best, S, s, H))
    c_best = float(joint_cost(T_best, k_best, S, s, H))
    if ub.cost < c_best * (1.0 - REL_TOL):  # cannot happen when the sweep is complete
        return JointPolicy(ub.cycle, ub.multiples, ub.cost, "exact_cyclic", int(cost.size), False)
    return JointPolicy(T_best, k_best, c_best, "exact_cyclic", int(cost.size), converged)


def roundy_bound(major_cost: float, minor_cost, holding_demand) -> RoundyBound:
    """Roundy's (1985) lower bound on the cost of any joint replenishment policy.

    Parameters
    ----------
    major_cost, minor_cost, holding_demand
        See :func:`joint_cost`.

    Returns
    -------
    RoundyBound

    Notes
    -----
    ``LB = min S/T0 + sum_i (s_i/T_i + H_i T_i / 2)`` subject to ``T_i >= T0``. For given ``T0`` each
    ``T_i = max(T0, tau_i)``, ``tau_i = sqrt(2 s_i / H_i)``; the objective is convex in ``T0``. With items
    sorted by ``tau`` the items tied to ``T0`` form a prefix ``1..m``; for each ``m`` the minimiser
    ``sqrt(2 (S + sum_{<=m} s) / sum_{<=m} H)`` is clipped to ``[tau_m, tau_{m+1}]``.

    References
    ----------
    Roundy, R. (1985). 98%-effective integer-ratio lot-sizing for one-warehouse multi-retailer systems.
    Management Science 31(11), 1416-1430.

    Examples
    --------
    >>> round(roundy_bound(600.0, [120.0, 840.0, 300.0], [160.0, 20.0, 50.0]).cost, 3) <= 837.854
    True
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    tau = np.sqrt(2.0 * s / H)
    order = np.argsort(tau, kind="stable")
    ts, ss, hs = tau[order], s[order], H[order]
    n = s.size
    cs = np.concatenate(([0.0], np.cumsum(ss)))
    ch = np.concatenate(([0.0], np.cumsum(hs)))
    eoq = np.sqrt(2.0 * ss * hs)
    tail = np.concatenate((np.cumsum(eoq[::-1])[::-1], [0.0]))  # sum over items m+1..n
    # m = number of items tied to T0 (m >= 1: for T0 <= tau_1 the objective S/T0 + const is decreasing)
    lo = ts
    hi = np.concatenate((ts[1:], [np.inf]))
    with np.errstate(divide="ignore"):  # t0 = 0 only on empty ranges of zero-minor-cost items: cost inf
        t0, cost = _clipped_cycle(S + cs[1:], ch[1:], lo, hi)
    cost = cost + tail[1:]
    m = int(np.argmin(cost))
    T0 = float(t0[m])
    cyc = np.empty(n)
    cyc[order] = np.maximum(ts, T0)
    return RoundyBound(float(cost[m]), T0, cyc)


def power_of_two(
    major_cost: float, minor_cost, holding_demand, base_period: float | None = None
) -> JointPolicy:
    """Roundy's power-of-two policy: every item cycle is ``T_L * 2^m``.

    Parameters
    ----------
    major_cost, minor_cost, holding_demand
        See :func:`joint_cost`.
    base_period : float, optional
        Fixed base period ``T_L`` (years). When None, ``T_L`` is optimised (exactly, over one octave).

    Returns
    -------
    JointPolicy
        Cyclic form: ``cycle`` = the family's cycle, ``multiples`` powers of two. Cost at most
        ``1/(sqrt(2) ln 2) ~ 1.0201 x`` the :func:`roundy_bound` with the optimised base, at most
        ``3/(2 sqrt(2)) ~ 1.0607 x`` with a fixed base.

    Notes
    -----
    The relaxation's cycles (``T0`` for the family, ``T_i`` for items) are rounded geometrically to the
    nearest ``T_L 2^m`` (within a factor ``sqrt 2``). For a fixed ``T_L`` each cluster's cost
    ``a/T + bT``, at its optimum in the relaxation, rises at most by ``(sqrt2 + 1/sqrt2)/2``. With ``T_L``
    free the cost ``A(T_L)/T_L + B(T_L) T_L`` is piecewise of that form over one octave, the pieces split
    where a cycle crosses a rounding boundary, and each piece is minimised in closed form. The rounded
    family cycle is finally raised to the smallest item cycle if all items skip it (never adds cost).

    References
    ----------
    Roundy, R. (1985). 98%-effective integer-ratio lot-sizing for one-warehouse multi-retailer systems.
    Management Science 31(11), 1416-1430.

    Examples
    --------
    >>> p = power_of_two(600.0, [120.0, 840.0, 300.0], [160.0, 20.0, 50.0])
    >>> p.multiples.tolist()
    [1, 4, 1]
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    rb = roundy_bound(S, s, H)
    Te = np.concatenate(([rb.base_cycle], rb.item_cycles))  # entity 0 = the family order
    a = np.concatenate(([S], s))
    b = np.concatenate(([0.0], 0.5 * H))

    def exps(TL: float) -> np.ndarray:
        return np.floor(np.log2(Te / TL) + 0.5)

    if base_period is not None:
        TL = float(base_period)
        if not np.isfinite(TL) or TL <= 0:
            raise ValueError(f"base_period must be finite and > 0, got {base_period!r}")
        m = exps(TL)
        iters = 1
    else:
        T_ref = rb.base_cycle
        # T_L = T_ref 2^u, u in [0, 1): entity e's exponent drops by one where u passes u_e
        u_e = np.mod(np.log2(Te / T_ref) + 0.5, 1.0)
        m0 = exps(T_ref)
        order = np.argsort(u_e, kind="stable")
        p0 = 2.0**m0
        dA = a[order] / p0[order]  # a/(2^(m-1)) - a/2^m
        dB = -b[order] * p0[order] * 0.5
        A = np.concatenate(([np.sum(a / p0)], np.sum(a / p0) + np.cumsum(dA)))
        B = np.concatenate(([np.sum(b * p0)], np.sum(b * p0) + np.cumsum(dB)))
        u_sorted = u_e[order]
        lo = T_ref * 2.0 ** np.concatenate(([0.0], u_sorted))
        hi = T_ref * 2.0 ** np.concatenate((u_sorted, [1.0]))
        with np.errstate(divide="ignore"):
            tl = np.sqrt(A / B)
        tl = np.clip(tl, lo, hi)
        cost = A / tl + B * tl
        best = int(np.argmin(cost))
        TL = float(tl[best])
        m = m0.copy()
        m[order[:best]] -= 1.0
        iters = int(cost.size)
    m = m.astype(np.int64)
    m_items = m[1:]
    m_fam = int(m_items.min())  # raise the family cycle to the smallest item cycle (cost never rises)
    k = (2 ** (m_items - m_fam)).astype(np.int64)
    T = TL * 2.0**m_fam
    c = float(joint_cost(T, k, S, s, H))
    name = "power_of_two" + ("_fixed_base" if base_period is not None else "")
    return JointPolicy(T, k, c, name, iters, True)


def rand(major_cost: float, minor_cost, holding_demand, starts: int = RAND_STARTS) -> JointPolicy:
    """RAND heuristic: alternate ``k(T)`` and ``T*(k)`` from equally spaced starting cycles.

    Parameters
    ----------
    major_cost, minor_cost, holding_demand
        See :func:`joint_cost`.
    starts : int
        Number of starting cycles ``m``.

    Returns
    -------
    JointPolicy
        The best policy over all starts; ``iterations`` = the largest alternation count, ``converged``
        True when every start reached a fixed point within ``RAND_MAX_ITER``.

    Notes
    -----
    Starting cycles equally spaced in ``[min_i sqrt(2 s_i / H_i), sqrt(2 (S + sum s_i) / sum H_i)]``;
    from each, ``k = k(T)``, ``T = T*(k)`` until ``k`` repeats (TC never increases along the way).

    References
    ----------
    Kaspi, M., Rosenblatt, M. J. (1991). On the economic ordering quantity for jointly replenished items.
    International Journal of Production Research 29(1), 107-114.

    Examples
    --------
    >>> round(rand(600.0, [120.0, 840.0, 300.0], [160.0, 20.0, 50.0]).cost, 4)
    837.8544
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    if int(starts) < 1:
        raise ValueError(f"starts must be >= 1, got {starts!r}")
    t_min = float(np.min(np.sqrt(2.0 * s / H)))
    t_max = float(np.sqrt(2.0 * (S + s.sum()) / H.sum()))
    t_min = max(t_min, t_max * 1e-6)
    T = np.linspace(t_min, t_max, int(starts))
    k_prev = None
    it = 0
    done = np.zeros(T.size, dtype=bool)
    for it in range(1, RAND_MAX_ITER + 1):  # noqa: B007 - iteration count is reported
        k = optimal_multiples(T, s, H)
        if k_prev is not None:
            done = np.all(k == k_prev, axis=1)
            if np.all(done):
                break
        T = optimal_cycle(k, S, s, H)
        k_prev = k
    k = optimal_multiples(T, s, H)
    T = optimal_cycle(k, S, s, H)
    cost = joint_cost(T, k, S, s, H)
    best = int(np.argmin(cost))
    k_best = k[best].astype(np.int64)
    return JointPolicy(float(T[best]), k_best, float(cost[best]), "rand", it, bool(np.all(done)))


def silver(major_cost: float, minor_cost, holding_demand) -> JointPolicy:
    """Silver's (1976) closed-form heuristic for the joint replenishment problem.

    Parameters
    ----------
    major_cost, minor_cost, holding_demand
        See :func:`joint_cost`.

    Returns
    -------
    JointPolicy

    Notes
    -----
    The item ``j`` with least ``s_i / H_i`` gets ``k_j = 1``; every other item
    ``k_i = round(sqrt((s_i / H_i) * H_j / (S + s_j)))`` (at least 1); then ``T = T*(k)``.

    References
    ----------
    Silver, E. A. (1976). A simple method of determining order quantities in joint replenishments under
    deterministic demand. Management Science 22(12), 1351-1361.

    Examples
    --------
    >>> p = silver(600.0, [120.0, 840.0, 300.0], [160.0, 20.0, 50.0])
    >>> p.multiples.tolist(), round(p.cycle, 6)
    ([1, 3, 1], 3.103164)
    """
    S, s, H = _check_family(major_cost, minor_cost, holding_demand)
    r = s / H
    j = int(np.argmin(r))
    k = np.maximum(1.0, np.floor(np.sqrt(r * H[j] / (S + s[j])) + 0.5))
    k[j] = 1.0
    k = k.astype(np.int64)
    T = float(optimal_cycle(k, S, s, H))
    return JointPolicy(T, k, float(joint_cost(T, k, S, s, H)), "silver", 1, True)


# ----------------------------------------------------------------------- slow movers: reviews without orders
#: base cycles averaged over when the common period lcm(k) of a family's multiples is longer
JOINT_CYCLES_LIMIT = 100_000


def no_demand_rate(annual_demand, demand_var, model) -> np.ndarray:
    """Rate ``c`` (per year) with ``P(no demand in an interval tau) = exp(-c tau)``.

    Parameters
    ----------
    annual_demand : array_like, shape (n,)
        Mean demand per year ``lambda >= 0``.
    demand_var : array_like, shape (n,)
        Variance of demand per year ``sigma^2 >= 0`` (the variance over ``tau`` is ``sigma^2 tau``).
    model : array_like of int, shape (n,)
        ``models.demand`` codes: ``NORMAL`` (0; every review orders, ``c = inf``), ``POISSON`` (1),
        ``NEGBIN`` (2; where ``sigma^2 <= lambda`` it falls back to Poisson).

    Returns
    -------
    numpy.ndarray
        ``c``: ``lambda`` (Poisson); ``lambda^2 ln(sigma^2 / lambda) / (sigma^2 - lambda)`` (negative
        binomial); ``inf`` (normal); ``0`` where ``lambda = 0``.

    Notes
    -----
    Negative binomial counts over ``tau`` with mean ``m = lambda tau`` and variance ``v = sigma^2 tau`` have
    ``r = m^2 / (v - m)``, ``p = m / v`` and ``P(0) = p^r = exp(-tau lambda^2 ln(sigma^2/lambda) / (sigma^2 -
    lambda))`` -- exponential in ``tau`` as for Poisson, because compound Poisson demand with logarithmic
    sizes (the simulator's model) is negative binomial over every interval.

    References
    ----------
    Johnson, N. L., Kemp, A. W., Kotz, S. (2005). Univariate Discrete Distributions, 3rd ed., Wiley, ch. 5
    and 7.

    Examples
    --------
    >>> no_demand_rate([2.0, 2.0, 2.0], [2.0, 4.0, 2.0], [1, 2, 0]).round(6).tolist()
    [2.0, 1.386294, inf]
    """
    lam = np.asarray(annual_demand, dtype=float)
    var = np.asarray(demand_var, dtype=float)
    code = np.asarray(model)
    lam, var, code = np.broadcast_arrays(lam, var, code)
    if np.any(~(lam >= 0)) or np.any(~(var >= 0)):
        raise ValueError("annual_demand and demand_var must be >= 0 (and not NaN)")
    if np.any((code < 0) | (code > 2)):
        raise ValueError(f"model: codes are 0 (normal), 1 (Poisson), 2 (negative binomial); got {code}")
    over = (code == 2) & (var > lam) & (lam > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        nb = np.where(over, lam * lam * np.log(np.where(over, var / np.where(lam > 0, lam, 1.0), 2.0))
                      / np.where(over, var - lam, 1.0), 0.0)
    c = np.where(over, nb, lam)
    return np.where((code == 0) & (lam > 0), np.inf, c)


def order_probability(interval, annual_demand, demand_var, model) -> np.ndarray:
    """Probability that a periodic review orders: some demand arrived in the ``interval`` since the last one.

    Parameters
    ----------
    interval : array_like
        Review interval ``tau = k_i T`` (years), broadcast against the item arrays.
    annual_demand, demand_var, model : array_like, shape (n,)
        As in :func:`no_demand_rate`.

    Returns
    -------
    numpy.ndarray
        ``p_i(tau) = 1 - exp(-c_i tau)`` (1 for ``NORMAL``); the expected line cost per year of an
        order-up-to item is ``s_i p_i(tau) / tau``.

    Notes
    -----
    Under an order-up-to policy a review orders exactly when the position fell below the level, i.e. when
    there was demand since the last review. ``p / tau`` decreases in ``tau`` and ``p`` increases (``p`` is
    concave with ``p(0) = 0``), so the line cost keeps the monotonicity the grid tolerance of
    ``models.grouping_milp`` relies on.

    References
    ----------
    Johnson, N. L., Kemp, A. W., Kotz, S. (2005). Univariate Discrete Distributions, 3rd ed., Wiley.

    Examples
    --------
    >>> round(float(order_probability(0.5, 2.0, 2.0, 1)), 6)  # 1 - exp(-1)
    0.632121
    """
    c = no_demand_rate(annual_demand, demand_var, model)
    tau = np.asarray(interval, dtype=float)
    with np.errstate(invalid="ignore"):
        x = c * tau
    return np.where(np.isinf(c), 1.0, -np.expm1(-np.where(np.isinf(c), 0.0, x)))


def expected_joint_share(multiples, probability, limit: int = JOINT_CYCLES_LIMIT) -> float:
    """Expected share of base cycles in which a family orders (at least one due item orders).

    Parameters
    ----------
    multiples : array_like of int, shape (n,)
        ``k_i >= 1``; item ``i`` is due at base cycles ``m`` with ``k_i | m``.
    probability : array_like, shape (n,)
        ``p_i``: probability that item ``i`` orders when due (:func:`order_probability` at ``k_i T``).
    limit : int
        Base cycles averaged when the common period ``lcm(k)`` is longer.

    Returns
    -------
    float
        ``(1/L) sum_{m=1..L} [1 - prod_{i: k_i | m} (1 - p_i)]`` with ``L = lcm(k)`` (capped at ``limit``).
        Expected joint orders per year = share / T.

    Notes
    -----
    Items order independently (independent demand); the schedule repeats every ``lcm(k)`` base cycles.
    With ``p = 1`` this is the share of base cycles in which some item is due (1 when some ``k_i = 1``).

    Examples
    --------
    >>> expected_joint_share([1, 2], [0.5, 0.5])  # (0.5 + 0.75) / 2
    0.625
    """
    k = np.asarray(multiples, dtype=np.int64).ravel()
    p = np.broadcast_to(np.asarray(probability, dtype=float), k.shape)
    if k.size == 0:
        return 0.0
    if np.any(k < 1):
        raise ValueError(f"multiples must be >= 1, got {k.tolist()}")
    if np.any(~((p >= 0) & (p <= 1))):
        raise ValueError("probability must lie in [0, 1]")
    kv, inv = np.unique(k, return_inverse=True)
    q = np.ones(kv.size)
    np.multiply.at(q, inv, 1.0 - p)  # probability that no item of multiple kv orders when due
    period = int(np.lcm.reduce(kv))
    span = min(period if period > 0 else int(limit), int(limit))
    m = np.arange(1, span + 1)
    none = np.prod(np.where(m[:, None] % kv[None, :] == 0, q[None, :], 1.0), axis=1)
    return float(np.mean(1.0 - none))
