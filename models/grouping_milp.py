"""Grouping items under shared order costs: a mixed-integer model (pyomo, solved by HiGHS).

One *family* (the items one site buys from one supplier) shares a major order cost ``S``. The model picks a
base cycle ``T`` from a finite candidate set and a multiple ``k_i`` per item (item ``i`` ordered every ``k_i
T``). Each (item, interval) carries, besides its minor order cost and cycle stock, the safety-stock holding
and backorder cost of a periodic order-up-to policy with review interval ``k_i T`` and the item's lead time,
so that grouping can be compared with ordering every item alone on the same stochastic basis.

Constraints (each optional):

* vehicle capacity per order, by volume and by weight. The largest order is the one in which all items come
  together, of mean size ``sum_i D_i k_i T v_i``;
* supplier minimum order value. The smallest order holds only the items with ``k_i = 1`` (at base-cycle
  times ``t = 1, 1 + lcm(k), ...`` no other item is due), of mean value ``sum_{k_i = 1} D_i T u_i``;
* maximum interval per item (shelf life): ``k_i T <= L_i``.

Slow movers
-----------
A review orders only if demand came since the last one. With a demand model (``make_family(order_model=..)``)
the line cost of (item, interval ``tau``) is ``s_i p_i(tau) / tau``, ``p_i = 1 - exp(-c_i tau)``
(:func:`models.joint.order_probability`): a constant per candidate, so the objective stays linear and exact.
The family's shared cost is paid only in base cycles in which some due item orders, a chance ``1 - prod (1 -
p_i)`` that is not linear in the multiples; the objective keeps ``S / T`` (an upper bound) and the solution
reports the expected shared cost (:func:`expected_shared_rate`). ``p`` is concave with ``p(0) = 0``, so
``s p(tau) / tau`` decreases and ``s p(tau)`` increases in ``tau``: the tolerance proof below holds unchanged
(for a site supplying others, ``p = 1 - prod_j E[(Q_j - D_j)+] / Q_j`` is concave too, as each factor is
decreasing and convex; there it is tabulated, so up to the interpolation).

Candidate set and its tolerance
-------------------------------
Candidates are a geometric grid ``T_j = T_lo * rho^j`` over a range ``[T_lo, T_hi]`` that provably contains
the optimum, plus special points: the deterministic exact cyclic optimum, the RAND cycle, the ends of the
feasible range, shelf-life breakpoints ``L_i / k`` and the capacity breakpoints ``C / sum_i D_i k_i(T_j)
v_i`` of the unconstrained multiples at every grid point. After the solve the chosen multiples are held
fixed and ``T`` is re-optimised continuously inside its feasible interval (so a binding capacity puts ``T``
exactly on its breakpoint ``C / sum D k v``).

*Claim.* If no minimum order value applies (only capacity and shelf life, which for fixed ``k`` admit every
smaller ``T``) or no capacity/shelf-life limit applies (only a minimum value, which admits every larger
``T``), the cost returned is at most ``rho`` times the cost of the best cyclic policy with multiples in the
allowed set. *Proof.* Let ``(T*, k*)`` be optimal and ``T'`` the nearest grid point below ``T*`` (resp.
above); then ``T*/rho <= T' <= T*`` (resp. ``T* <= T' <= rho T*``) and ``(T', k*)`` is feasible. Its terms
change as follows: ``A/T' <= rho A/T*``, ``B T' <= rho B T*`` (resp. the mirror image); the safety-stock
term has the form ``sigma(tau) * h * m(b / (h tau))`` with ``sigma`` increasing in the interval ``tau`` and
``m(r)`` a minimum of functions linear in ``r`` (hence concave, ``m(0) >= 0``, so ``m(rho r) <= rho m(r)``);
under a cycle-service target it is ``sigma(tau)`` times a constant; in both cases it grows by at most
``rho``. The model's optimum over the candidates is no worse than ``(T', k*)``, and the final continuous
re-optimisation never raises the cost. When both kinds of constraint bind at once, or under a fill-rate
target, no grid bound is claimed: the answer is then the proven optimum over the candidate set (plus the
re-optimisation), reported as such.

The range: every policy with cycle ``T`` costs at least ``S/T + sum_i sqrt(2 s_i H_i)`` (each item at least
its EOQ cost, safety stock >= 0) and at least ``T sum_i H_i / 2`` (``k_i >= 1``); with any feasible cost
``U`` the optimum lies in ``[S / (U - sum sqrt(2 s H)), 2 U / sum H]``. Candidates whose lower bound ``S/T +
sum_i min_k cost_i(k, T)`` exceeds ``U`` are dropped before the model is built (exact pruning), as are
multiples above each item's unconstrained best at that candidate (dominated: higher cost, larger load, no
help with the minimum value, tighter shelf life)."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import minimize_scalar
from scipy.special import erfc, ndtri

from models import joint

#: default largest multiple k_i
K_MAX = 32
#: default ratio of consecutive grid candidates (the proven tolerance of the candidate set, see module doc)
GRID_RATIO = 1.002
#: hard cap on the number of grid candidates (the ratio is widened, and reported, to respect it)
MAX_GRID = 4000
#: default relative MIP gap asked of HiGHS (a smaller gap than this is reported as optimal)
MIP_GAP = 1e-7
#: HiGHS threads per solve
HIGHS_THREADS = 1
#: default solver time limit in seconds
TIME_LIMIT = 60.0
#: z limits of the normal approximation
Z_MIN, Z_MAX = -8.0, 8.0
#: relative slack when checking constraints of a returned solution
CHECK_TOL = 1e-7
#: Lagrangian bounds: bisection steps per multiplier, coordinate sweeps when several constraints are priced
LAGRANGE_BISECT = 48
LAGRANGE_SWEEPS = 3
#: bisection steps for the fill-rate safety factor
FILL_BISECT = 60

#: include the special candidates (exact/RAND cycles, breakpoints); off only to test the bare grid's tolerance
_SPECIAL_POINTS = True

MODES = ("cost", "cycle_service", "fill_rate")
BASES = ("per_unit", "per_unit_year")


# --------------------------------------------------------------------------- stochastic part
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)


def _std_loss(z: np.ndarray) -> np.ndarray:
    """Standard normal first-order loss ``G(z) = phi(z) - z (1 - Phi(z))`` (upper tail by erfc)."""
    return np.exp(-0.5 * z * z) * _INV_SQRT_2PI - z * 0.5 * erfc(z / math.sqrt(2.0))


def periodic_review_cost(
    interval,
    annual_demand,
    demand_var,
    lead_time,
    lead_time_sd,
    holding_cost,
    backorder_cost,
    *,
    backorder_basis: str = "per_unit",
    mode: str = "cost",
    target=None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Safety-stock and backorder cost of a periodic order-up-to policy (normal approximation).

    Parameters
    ----------
    interval : array_like
        Review interval ``tau`` (years); broadcast with the item arrays.
    annual_demand, demand_var : array_like
        Mean ``D`` and variance ``V`` of demand per year (daily variance times days per year).
    lead_time, lead_time_sd : array_like
        Mean and standard deviation of the lead time (years).
    holding_cost : array_like
        ``h`` per unit per year.
    backorder_cost : array_like
        ``b`` per unit short (``per_unit``) or ``p`` per unit-year (``per_unit_year``); NaN = none (0).
    backorder_basis : {"per_unit", "per_unit_year"}
    mode : {"cost", "cycle_service", "fill_rate"}
        ``cost``: the cost-optimal level; otherwise the level meeting ``target``.
    target : array_like, optional
        Cycle service or fill rate in (0, 1) for the service modes.

    Returns
    -------
    cost : numpy.ndarray
        ``h sigma E[(z - Z)^+] + backorder cost`` per year (cycle stock ``h D tau / 2`` not included).
    z : numpy.ndarray
        Safety factor.
    sigma : numpy.ndarray
        Standard deviation of demand over ``tau + L``.

    Notes
    -----
    Protection period ``tau + L``: ``sigma^2 = (tau + L) V + D^2 sd_L^2``; order-up-to level
    ``D (tau + L) + z sigma``. Expected on hand at the end of a cycle ``sigma G(-z)``, expected shortage per
    cycle ``sigma G(z)`` (``G`` the standard normal loss function). Per unit short the cost per year is
    ``h sigma G(-z) + (b / tau) sigma G(z)``, minimised at ``Phi(z) = b / (b + h tau)``; per unit-year
    ``h sigma G(-z) + p sigma G(z)``, minimised at ``Phi(z) = p / (p + h)``. Fill rate ``beta``:
    ``sigma G(z) = (1 - beta) D tau``.

    References
    ----------
    Silver, E. A., Pyke, D. F., Peterson, R. (1998). Inventory Management and Production Planning and
    Scheduling, 3rd ed., Wiley, ch. 7 (periodic review, order-up-to level).
    Atkins, D. R., Iyogun, P. O. (1988). Periodic versus "can-order" policies for coordinated multi-item
    inventory systems. Management Science 34(6), 791-796.

    Examples
    --------
    >>> c, z, s = periodic_review_cost(0.1, 100.0, 100.0, 0.0, 0.0, 1.0, float("nan"),
    ...                                mode="cycle_service", target=0.5)
    >>> round(float(c), 4), float(z)
    (1.2616, 0.0)
    """
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}, got {mode!r}")
    if backorder_basis not in BASES:
        raise ValueError(f"backorder_basis must be one of {BASES}, got {backorder_basis!r}")
    tau = np.asarray(interval, dtype=float)
    D = np.asarray(annual_demand, dtype=float)
    V = np.asarray(demand_var, dtype=float)
    L = np.asarray(lead_time, dtype=float)
    sL = np.asarray(lead_time_sd, dtype=float)
    h = np.asarray(holding_cost, dtype=float)
    b = np.asarray(backorder_cost, dtype=float)
    b = np.where(np.isfinite(b), b, 0.0)
    sigma = np.sqrt(np.maximum((tau + L) * V + D**2 * sL**2, 0.0))
    shape = np.broadcast_shapes(tau.shape, D.shape, V.shape, L.shape, sL.shape, h.shape, b.shape)
    if mode == "cost":
        if backorder_basis == "per_unit":
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(b > 0, b / (b + h * tau), 0.0)
        else:
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(b > 0, b / (b + h), 0.0)
        z = np.clip(ndtri(np.clip(ratio, 0.0, 1.0)), Z_MIN, Z_MAX)
    elif mode == "cycle_service":
        t = np.asarray(target, dtype=float)
        if t.size == 0 or np.any(~(t > 0) | ~(t < 1)):
            raise ValueError(f"target must lie in (0, 1) for mode 'cycle_service', got {target!r}")
        z = np.clip(ndtri(t), Z_MIN, Z_MAX)
    else:
        t = np.asarray(target, dtype=float)
        if t.size == 0 or np.any(~(t > 0) | ~(t < 1)):
            raise ValueError(f"target must lie in (0, 1) for mode 'fill_rate', got {target!r}")
        with np.errstate(divide="ignore", invalid="ignore"):
            want = np.where(sigma > 0, (1.0 - t) * D * tau / sigma, np.inf)
        want = np.broadcast_to(want, shape)
        lo = np.full(shape, Z_MIN)
        hi = np.full(shape, Z_MAX)
        for _ in range(FILL_BISECT):  # G is decreasing: find G(z) = want
            mid = 0.5 * (lo + hi)
            above = _std_loss(mid) > want
            lo = np.where(above, mid, lo)
            hi = np.where(above, hi, mid)
        z = 0.5 * (lo + hi)
    z = np.broadcast_to(z, shape)
    short = sigma * _std_loss(z)
    on_hand = sigma * _std_loss(-z)
    if backorder_basis == "per_unit":
        with np.errstate(divide="ignore", invalid="ignore"):
            back = np.where(b > 0, b * short / tau, 0.0)
    else:
        back = b * short
    cost = h * on_hand + back
    return np.broadcast_to(cost, shape).copy(), np.asarray(z).copy(), np.broadcast_to(sigma, shape).copy()


# --------------------------------------------------------------------------- data and result
@dataclass(frozen=True)
class Family:
    """One order family: arrays of shape (n,), times in years, costs per year.

    ``demand_var`` is the variance of demand per year; ``unit_value`` the value per unit counted towards
    the minimum order value; ``volume``/``weight`` per unit; ``max_interval`` the longest allowed interval
    (inf = none); capacities inf = none; ``min_order_value`` 0 = none.
    """

    major_cost: float
    minor_cost: np.ndarray
    holding_cost: np.ndarray
    annual_demand: np.ndarray
    demand_var: np.ndarray
    lead_time: np.ndarray
    lead_time_sd: np.ndarray
    backorder_cost: np.ndarray
    unit_value: np.ndarray
    volume: np.ndarray
    weight: np.ndarray
    max_interval: np.ndarray
    capacity_volume: float = math.inf
    capacity_weight: float = math.inf
    min_order_value: float = 0.0
    backorder_basis: str = "per_unit"
    mode: str = "cost"
    target: np.ndarray | None = None
    no_demand_rate: np.ndarray | None = None  # c_i: P(review orders) = 1 - exp(-c_i tau); None = always
    no_order_table: tuple | None = None  # (step, log P0 (n, G)) on tau = 0, step, ...: extra log P(no order)


def make_family(
    major_cost: float,
    minor_cost,
    holding_cost,
    annual_demand,
    *,
    demand_var=0.0,
    lead_time=0.0,
    lead_time_sd=0.0,
    backorder_cost=np.nan,
    unit_value=0.0,
    volume=0.0,
    weight=0.0,
    max_interval=np.inf,
    capacity_volume: float = math.inf,
    capacity_weight: float = math.inf,
    min_order_value: float = 0.0,
    backorder_basis: str = "per_unit",
    mode: str = "cost",
    target=None,
    order_model=None,
    no_demand_rate=None,
    no_order_table=None,
) -> Family:
    """Validate and broadcast the data of one family.

    Parameters
    ----------
    major_cost : float
        ``S > 0`` per family order.
    minor_cost, holding_cost, annual_demand : array_like, shape (n,)
        ``s_i >= 0``, ``h_i > 0``, ``D_i > 0`` (drop zero-demand items before grouping).
    demand_var, lead_time, lead_time_sd, backorder_cost, unit_value, volume, weight, max_interval
        Per-item arrays or scalars (see :class:`Family`).
    capacity_volume, capacity_weight, min_order_value : float
        Per-order limits.
    backorder_basis, mode, target
        See :func:`periodic_review_cost`.
    order_model : array_like of int, optional
        Demand model per item for the chance that a review orders (``models.demand`` codes: ``NORMAL`` =
        every review orders, ``POISSON``, ``NEGBIN``; :func:`models.joint.order_probability`). None: every
        review orders (the classical model). With it an item's line cost per year is ``s_i p_i(tau) / tau``.
    no_demand_rate : array_like, optional
        Instead of ``order_model``: the rate ``c_i >= 0`` per year (``inf`` = every review orders) with
        ``P(no demand in tau) = exp(-c_i tau)`` given directly (e.g. the order rate of the sites below).
    no_order_table : tuple (float, array_like of shape (n, G)), optional
        ``(step, log_p0)``: a further factor of ``P(no order in tau)`` tabulated at ``tau = 0, step, ...,
        (G - 1) step`` years (``log_p0 <= 0``, linear between the points and beyond the last two), for an
        item whose demand is the batch orders of the sites below (needs ``no_demand_rate`` or
        ``order_model``). ``p = 1 - exp(-c tau + log_p0(tau))``.

    Returns
    -------
    Family

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> make_family(10.0, [1.0, 2.0], 1.0, 5.0).minor_cost.tolist()
    [1.0, 2.0]
    """
    s = np.atleast_1d(np.asarray(minor_cost, dtype=float))
    n = s.size
    if n == 0:
        raise ValueError("minor_cost must hold at least one item")

    def arr(name: str, x, lo: float, lo_open: bool = False, allow_nan: bool = False) -> np.ndarray:
        a = np.broadcast_to(np.asarray(x, dtype=float), (n,)).astype(float)
        bad = np.isnan(a) if not allow_nan else np.zeros(n, dtype=bool)
        vals = np.where(np.isnan(a), np.inf, a)
        bad |= (vals <= lo) if lo_open else (vals < lo)
        if np.any(bad):
            i = int(np.argmax(bad))
            rule = f"> {lo}" if lo_open else f">= {lo}"
            raise ValueError(f"{name} must be {rule} for every item; item {i} has {a[i]!r}")
        return a

    S = float(major_cost)
    if not math.isfinite(S) or S <= 0:
        raise ValueError(f"major_cost must be finite and > 0, got {major_cost!r}")
    fam = Family(
        major_cost=S,
        minor_cost=arr("minor_cost", s, 0.0),
        holding_cost=arr("holding_cost", holding_cost, 0.0, lo_open=True),
        annual_demand=arr("annual_demand", annual_demand, 0.0, lo_open=True),
        demand_var=arr("demand_var", demand_var, 0.0),
        lead_time=arr("lead_time", lead_time, 0.0),
        lead_time_sd=arr("lead_time_sd", lead_time_sd, 0.0),
        backorder_cost=arr("backorder_cost", backorder_cost, 0.0, allow_nan=True),
        unit_value=arr("unit_value", unit_value, 0.0),
        volume=arr("volume", volume, 0.0),
        weight=arr("weight", weight, 0.0),
        max_interval=arr("max_interval", max_interval, 0.0, lo_open=True),
        capacity_volume=float(capacity_volume),
        capacity_weight=float(capacity_weight),
        min_order_value=float(min_order_value),
        backorder_basis=backorder_basis,
        mode=mode,
        target=None if target is None else np.broadcast_to(np.asarray(target, dtype=float), (n,)).copy(),
    )
    if no_demand_rate is not None:
        fam = replace(fam, no_demand_rate=arr("no_demand_rate", no_demand_rate, 0.0))
    elif order_model is not None:
        codes = np.broadcast_to(np.asarray(order_model), (n,))
        fam = replace(fam, no_demand_rate=joint.no_demand_rate(fam.annual_demand, fam.demand_var, codes))
    if no_order_table is not None:
        step, table = float(no_order_table[0]), np.asarray(no_order_table[1], dtype=float)
        if fam.no_demand_rate is None:
            raise ValueError("no_order_table needs no_demand_rate or order_model")
        if not (step > 0 and math.isfinite(step)):
            raise ValueError(f"no_order_table: step must be finite and > 0, got {step!r}")
        if table.ndim != 2 or table.shape[0] != n or table.shape[1] < 2 or np.any(~(table <= 0)):
            raise ValueError(f"no_order_table: log_p0 must have shape ({n}, G >= 2) with values <= 0")
        fam = replace(fam, no_order_table=(step, table))
    for name in ("capacity_volume", "capacity_weight"):
        v = getattr(fam, name)
        if math.isnan(v) or v <= 0:
            raise ValueError(f"{name} must be > 0 (inf = none), got {v!r}")
    if not math.isfinite(fam.min_order_value) or fam.min_order_value < 0:
        raise ValueError(f"min_order_value must be finite and >= 0, got {min_order_value!r}")
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}, got {mode!r}")
    if backorder_basis not in BASES:
        raise ValueError(f"backorder_basis must be one of {BASES}, got {backorder_basis!r}")
    if mode != "cost" and fam.target is None:
        raise ValueError(f"mode {mode!r} needs a target")
    return fam


@dataclass(frozen=True)
class FamilySolution:
    """Result of :func:`solve_family`.

    Attributes
    ----------
    status : str
        ``"optimal"`` (proven optimal over the candidate set, then re-optimised in T), ``"time_limit"``
        (best solution found, with ``gap``), ``"fallback"`` (solver failed: RAND used; not optimal) or
        ``"infeasible"`` (no cycle meets the constraints; the unconstrained RAND policy is returned and the
        violated constraints are named in ``message``).
    message : str
    cycle : float
        Base cycle T (years).
    multiples : numpy.ndarray of int64
    order_up_to, safety_factor : numpy.ndarray
    item_cost : numpy.ndarray
        Per item per year: minor order cost + cycle stock + safety stock + backorders.
    major_cost_rate : float
        ``S / T``.
    total_cost : float
    candidate_cost : float
        Model objective at the chosen candidate (before the continuous re-optimisation of T).
    bound : float
        Lower bound proven by the solver over the candidate set (NaN when none).
    gap : float
        ``(candidate_cost - bound) / candidate_cost`` (NaN when no bound).
    binding : tuple of str
        Constraints holding with equality at the answer.
    feasible : bool
        Independent numpy check of all constraints on the returned policy.
    candidates, candidates_kept, variables : int
    grid_ratio : float
        Ratio of the grid actually used (tolerance of the candidate set, see module notes).
    tolerance_proven : bool
        True when the grid tolerance claim applies to this family's constraints and mode.
    seconds : float
    order_probability : numpy.ndarray
        ``p_i(k_i T)``, the chance that a review of item ``i`` orders (:func:`order_probabilities`).
    joint_orders_rate : float
        Expected joint orders per year (:func:`expected_shared_rate`).
    expected_major_cost_rate : float
        ``S x joint_orders_rate``: the expected shared cost a year (``<= major_cost_rate``, which the model
        charges as an upper bound).
    expected_total_cost : float
        ``expected_major_cost_rate + sum(item_cost)``.
    """

    status: str
    message: str
    cycle: float
    multiples: np.ndarray
    order_up_to: np.ndarray
    safety_factor: np.ndarray
    item_cost: np.ndarray
    major_cost_rate: float
    total_cost: float
    candidate_cost: float
    bound: float
    gap: float
    binding: tuple[str, ...]
    feasible: bool
    candidates: int
    candidates_kept: int
    variables: int
    grid_ratio: float
    tolerance_proven: bool
    seconds: float
    extra: dict = field(default_factory=dict)
    order_probability: np.ndarray | None = None
    joint_orders_rate: float = math.nan
    expected_major_cost_rate: float = math.nan
    expected_total_cost: float = math.nan


# --------------------------------------------------------------------------- helpers
def _k_set(k_max: int, powers_of_two: bool) -> np.ndarray:
    if powers_of_two:
        return 2 ** np.arange(int(math.floor(math.log2(k_max))) + 1)
    return np.arange(1, k_max + 1)


def _ss_cost_at(fam: Family, tau: np.ndarray, item: np.ndarray) -> np.ndarray:
    """Safety-stock and backorder cost of items ``item`` at intervals ``tau`` (flat arrays)."""
    cost, _, _ = periodic_review_cost(
        tau, fam.annual_demand[item], fam.demand_var[item], fam.lead_time[item], fam.lead_time_sd[item],
        fam.holding_cost[item], fam.backorder_cost[item], backorder_basis=fam.backorder_basis, mode=fam.mode,
        target=None if fam.target is None else fam.target[item],
    )
    return cost


def _order_prob(fam: Family, tau: np.ndarray, items: np.ndarray) -> np.ndarray | float:
    """Probability that a review at interval ``tau`` orders (1.0 when the family has no order model);
    ``items`` gives the item of each element of ``tau`` (broadcast)."""
    if fam.no_demand_rate is None:
        return 1.0
    rate = fam.no_demand_rate[items]
    inf = np.isinf(rate)
    with np.errstate(invalid="ignore"):
        x = np.where(inf, 0.0, rate) * tau
        if fam.no_order_table is not None:
            step, table = fam.no_order_table
            u = np.asarray(tau, dtype=float) / step
            i = np.clip(np.floor(u), 0, table.shape[1] - 2).astype(np.int64)
            f = u - i
            x = x - ((1.0 - f) * table[items, i] + f * table[items, i + 1])
        return np.where(inf, 1.0, -np.expm1(-np.maximum(x, 0.0)))


def order_probabilities(fam: Family, T: float, k: np.ndarray) -> np.ndarray:
    """Probability ``p_i(k_i T)`` that item ``i`` orders at a review (all ones without an order model).

    Parameters
    ----------
    fam : Family
    T : float
        Base cycle (years).
    k : numpy.ndarray of int
        Multiples.

    Returns
    -------
    numpy.ndarray
        ``1 - exp(-c_i k_i T)`` (:func:`models.joint.order_probability`).

    Examples
    --------
    >>> f = make_family(10.0, [1.0], [1.0], [2.0], demand_var=2.0, order_model=1)
    >>> round(float(order_probabilities(f, 0.5, np.array([1]))[0]), 6)
    0.632121
    """
    tau = float(T) * np.asarray(k, dtype=float)
    p = np.asarray(_order_prob(fam, tau, np.arange(fam.minor_cost.size)), dtype=float)
    return np.broadcast_to(p, tau.shape).copy()


def expected_shared_rate(fam: Family, T: float, k: np.ndarray) -> float:
    """Expected joint orders per year of a cyclic policy: base cycles in which some due item orders, / T.

    Parameters
    ----------
    fam : Family
    T : float
        Base cycle (years).
    k : numpy.ndarray of int
        Multiples.

    Returns
    -------
    float
        ``share / T`` with the share of :func:`models.joint.expected_joint_share`; at most ``1 / T`` (the
        model charges ``S / T``, an upper bound on the expected shared cost ``S x`` this rate).

    Examples
    --------
    >>> f = make_family(10.0, [1.0, 1.0], 1.0, 2.0, demand_var=2.0, order_model=1)
    >>> round(expected_shared_rate(f, 0.5, np.array([1, 1])), 6)  # (1 - exp(-2)) / 0.5
    1.729329
    """
    return joint.expected_joint_share(k, order_probabilities(fam, T, k)) / float(T)


def _deterministic_costs(fam: Family, T: np.ndarray, ks: np.ndarray) -> np.ndarray:
    """Minor order cost + cycle stock of (candidate, item, multiple), inf beyond the shelf life."""
    tau = T[:, None, None] * ks[None, None, :]
    H = (fam.holding_cost * fam.annual_demand)[None, :, None]
    items = np.arange(fam.minor_cost.size)[None, :, None]
    det = fam.minor_cost[None, :, None] * _order_prob(fam, tau, items) / tau + 0.5 * tau * H
    return np.where(tau <= fam.max_interval[None, :, None] * (1 + 1e-12), det, np.inf)


def _item_costs(fam: Family, T: np.ndarray, ks: np.ndarray, det: np.ndarray | None = None) -> np.ndarray:
    """Costs of (candidate, item, multiple), shape (c, n, K); inf where not allowed or dominated.

    The safety-stock part (>= 0) is evaluated only where it can matter: for every multiple up to the
    deterministic best ``kd`` and for larger ones whose deterministic cost alone stays below the total at
    ``kd``; any other larger multiple costs more than ``kd`` while loading the vehicle more, so it is
    dominated (set to inf).
    """
    if det is None:
        det = _deterministic_costs(fam, T, ks)
    c, n, K = det.shape
    sigma0 = (fam.demand_var == 0) & (fam.lead_time_sd == 0)
    if np.all(sigma0):
        return det
    kd = np.argmin(det, axis=2)
    det_kd = np.take_along_axis(det, kd[:, :, None], axis=2)[:, :, 0]
    ci, ii = np.nonzero(np.isfinite(det_kd))
    ss_kd = np.zeros((c, n))
    ss_kd[ci, ii] = _ss_cost_at(fam, T[ci] * ks[kd[ci, ii]], ii)
    kidx = np.arange(K)[None, None, :]
    need = np.isfinite(det) & ~sigma0[None, :, None]
    need &= (kidx <= kd[:, :, None]) | (det <= (det_kd + ss_kd)[:, :, None] * (1 + 1e-12))
    cost = np.where((kidx > kd[:, :, None]) & ~need & ~sigma0[None, :, None], np.inf, det)
    cc, jj, kk = np.nonzero(need)
    cost[cc, jj, kk] = det[cc, jj, kk] + _ss_cost_at(fam, T[cc] * ks[kk], jj)
    return cost


def _policy_cost(fam: Family, T: float, k: np.ndarray):
    """Per-item cost, z, sigma of one policy."""
    tau = T * k
    det = (fam.minor_cost * _order_prob(fam, tau, np.arange(fam.minor_cost.size)) / tau
           + 0.5 * tau * fam.holding_cost * fam.annual_demand)
    ss, z, sig = periodic_review_cost(
        tau, fam.annual_demand, fam.demand_var, fam.lead_time, fam.lead_time_sd, fam.holding_cost,
        fam.backorder_cost, backorder_basis=fam.backorder_basis, mode=fam.mode, target=fam.target,
    )
    return det + ss, z, sig


def policy_costs(fam: Family, T: float, k: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-item annual cost, safety factor and order-up-to level of a given cyclic policy.

    Parameters
    ----------
    fam : Family
    T : float
        Base cycle (years).
    k : numpy.ndarray of int
        Multiples.

    Returns
    -------
    item_cost, z, order_up_to : numpy.ndarray
        ``s_i/(k_i T) + h_i D_i k_i T/2 +`` safety and backorder cost (:func:`periodic_review_cost`); the
        order-up-to level ``D_i (k_i T + L_i) + z_i sigma_i``. The family's own order cost is not included.

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.
    Silver, E. A., Pyke, D. F., Peterson, R. (1998). Inventory Management and Production Planning and
    Scheduling, 3rd ed., Wiley, ch. 7 (periodic review, order-up-to level).

    Examples
    --------
    >>> c, z, up = policy_costs(make_family(10.0, [1.0], [2.0], [100.0]), 0.1, np.array([1]))
    >>> round(float(c[0]), 6), round(float(up[0]), 6)
    (20.0, 10.0)
    """
    k = np.asarray(k)
    c, z, sig = _policy_cost(fam, float(T), k)
    return c, z, fam.annual_demand * (T * k + fam.lead_time) + z * sig


def _loads(fam: Family):
    return fam.annual_demand * fam.volume, fam.annual_demand * fam.weight, fam.annual_demand * fam.unit_value


def check_policy(fam: Family, T: float, k: np.ndarray) -> tuple[bool, tuple[str, ...], list[str]]:
    """Check a policy against the family's constraints.

    Parameters
    ----------
    fam : Family
    T : float
        Base cycle (years).
    k : numpy.ndarray of int
        Multiples.

    Returns
    -------
    feasible : bool
    binding : tuple of str
        Constraints met with equality (relative ``CHECK_TOL * 100``).
    violations : list of str
        One sentence per violated constraint.

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> f = make_family(10.0, [1.0], 1.0, 10.0, volume=1.0, capacity_volume=5.0)
    >>> check_policy(f, 1.0, np.array([1]))[0]
    False
    """
    dv, dw, du = _loads(fam)
    k = np.asarray(k)
    viol: list[str] = []
    bind: list[str] = []
    tight = 100 * CHECK_TOL
    for name, load, cap in (
        ("capacity_volume", float(np.sum(dv * k) * T), fam.capacity_volume),
        ("capacity_weight", float(np.sum(dw * k) * T), fam.capacity_weight),
    ):
        if math.isfinite(cap):
            if load > cap * (1 + CHECK_TOL):
                viol.append(f"{name}: largest order {load:.6g} exceeds {cap:.6g}")
            elif load >= cap * (1 - tight):
                bind.append(name)
    if fam.min_order_value > 0:
        val = float(np.sum(du[k == 1]) * T)
        if val < fam.min_order_value * (1 - CHECK_TOL):
            viol.append(f"min_order_value: smallest order worth {val:.6g} is below {fam.min_order_value:.6g}")
        elif val <= fam.min_order_value * (1 + tight):
            bind.append("min_order_value")
    ivl = T * k
    over = ivl > fam.max_interval * (1 + CHECK_TOL)
    if np.any(over):
        i = int(np.argmax(over))
        viol.append(f"shelf_life: item {i} interval {ivl[i]:.6g} exceeds {fam.max_interval[i]:.6g}")
    if np.any(np.isfinite(fam.max_interval) & (ivl >= fam.max_interval * (1 - tight))):
        bind.append("shelf_life")
    return not viol, tuple(bind), viol


def _feasible_range(fam: Family) -> tuple[float, float, list[str]]:
    """Cycles admitting at least one feasible policy (all k = 1 minimises load, maximises order value)."""
    dv, dw, du = _loads(fam)
    lo, hi = 0.0, math.inf
    why = []
    if fam.min_order_value > 0:
        tot = float(du.sum())
        lo = fam.min_order_value / tot if tot > 0 else math.inf
        why.append("min_order_value")
    for name, load, cap in (("capacity_volume", dv.sum(), fam.capacity_volume),
                            ("capacity_weight", dw.sum(), fam.capacity_weight)):
        if math.isfinite(cap) and load > 0:
            hi = min(hi, cap / float(load))
            why.append(name)
    if np.any(np.isfinite(fam.max_interval)):
        hi = min(hi, float(np.min(fam.max_interval)))
        why.append("shelf_life")
    return lo, hi, why


def _repair(fam: Family, T: np.ndarray, k_unc: np.ndarray, ks: np.ndarray) -> np.ndarray:
    """Heuristic feasible multiples per candidate (c, n): cap k uniformly for capacity, force k = 1 on the
    most valuable items for the minimum value; all ones as the last resort (feasible inside the range)."""
    dv, dw, du = _loads(fam)
    k = k_unc.astype(float)
    capv, capw = fam.capacity_volume, fam.capacity_weight

    def cap_ok(kk):
        ok = np.ones(kk.shape[0], dtype=bool)
        if math.isfinite(capv):
            ok &= (kk @ dv) * T <= capv * (1 + 1e-12)
        if math.isfinite(capw):
            ok &= (kk @ dw) * T <= capw * (1 + 1e-12)
        return ok

    if math.isfinite(capv) or math.isfinite(capw):
        best = np.ones_like(k)
        done = cap_ok(k)
        best[done] = k[done]
        for kap in ks[::-1]:  # largest uniform cap that fits
            kk = np.minimum(k, kap)
            ok = cap_ok(kk) & ~done
            best[ok] = kk[ok]
            done |= ok
        k = best
    if fam.min_order_value > 0:
        val = ((k == 1) * du[None, :]).sum(axis=1) * T
        short = val < fam.min_order_value
        if np.any(short):
            order = np.argsort(-du)
            need = fam.min_order_value / T[short]
            forced = k[short].copy()
            is1 = forced == 1
            # add items (most valuable first) until the value of the k = 1 items reaches the minimum
            base = (is1 * du[None, :]).sum(axis=1)
            extra = np.cumsum(np.where(is1[:, order], 0.0, du[order][None, :]), axis=1)
            take = (base[:, None] + np.concatenate((np.zeros((extra.shape[0], 1)), extra[:, :-1]), axis=1)
                    < need[:, None])
            cols = order[None, :].repeat(forced.shape[0], axis=0)
            rows = np.arange(forced.shape[0])[:, None].repeat(order.size, axis=1)
            forced[rows[take], cols[take]] = 1.0
            k[short] = forced
    # last resort: all ones where still infeasible
    bad = ~cap_ok(k)
    if fam.min_order_value > 0:
        bad |= ((k == 1) * du[None, :]).sum(axis=1) * T < fam.min_order_value * (1 - 1e-12)
    k[bad] = 1.0
    return k.astype(np.int64)


def _interval_for(fam: Family, k: np.ndarray) -> tuple[float, float]:
    dv, dw, du = _loads(fam)
    lo, hi = 0.0, math.inf
    if fam.min_order_value > 0:
        v = float(du[k == 1].sum())
        lo = fam.min_order_value / v if v > 0 else math.inf
    for load, cap in ((float(dv @ k), fam.capacity_volume), (float(dw @ k), fam.capacity_weight)):
        if math.isfinite(cap) and load > 0:
            hi = min(hi, cap / load)
    if np.any(np.isfinite(fam.max_interval)):
        hi = min(hi, float(np.min(fam.max_interval / k)))
    return lo, hi


def _polish(fam: Family, T0: float, k: np.ndarray, t_cap: float) -> float:
    """Re-optimise T for fixed k within its feasible interval; never worse than T0."""
    lo, hi = _interval_for(fam, k)
    hi = min(hi, t_cap)
    if not (lo <= T0 * (1 + 1e-12) and T0 <= hi * (1 + 1e-12)):
        return T0

    def f(x: float) -> float:
        c, _, _ = _policy_cost(fam, x, k)
        return fam.major_cost / x + float(c.sum())

    cands = [T0]
    a, b = max(lo, T0 * 1e-3), min(hi, T0 * 1e3)
    if a < b:
        r = minimize_scalar(lambda u: f(math.exp(u)), bounds=(math.log(a), math.log(b)), method="bounded",
                            options={"xatol": 1e-10})
        cands.append(math.exp(float(r.x)))
        cands.extend([a, b])
    vals = [f(x) for x in cands]
    return cands[int(np.argmin(vals))]


def _feasible_rows(fam: Family, T: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Row-wise constraint check of multiples ``k`` (c, n) at cycles ``T`` (c,)."""
    dv, dw, du = _loads(fam)
    ok = np.ones(T.size, dtype=bool)
    if math.isfinite(fam.capacity_volume):
        ok &= (k @ dv) * T <= fam.capacity_volume * (1 + 1e-12)
    if math.isfinite(fam.capacity_weight):
        ok &= (k @ dw) * T <= fam.capacity_weight * (1 + 1e-12)
    if fam.min_order_value > 0:
        ok &= ((k == 1) @ du) * T >= fam.min_order_value * (1 - 1e-12)
    ok &= np.all(T[:, None] * k <= fam.max_interval[None, :] * (1 + 1e-12), axis=1)
    return ok


@dataclass(frozen=True)
class _Lagrange:
    bound: np.ndarray  # (c,) best Lagrangian bound per candidate
    reduced_cost: np.ndarray  # (c, n, K) at the multipliers of the best bound
    incumbent: tuple | None  # (candidate index, multiples) of the best feasible Lagrangian solution
    incumbent_cost: float
    iterations: int


def _lagrangian(fam: Family, T: np.ndarray, cost: np.ndarray, kvals: np.ndarray, ub: float) -> _Lagrange:
    """Lagrangian bounds per candidate: capacity and minimum value constraints priced by multipliers >= 0.

    ``L_c(lam) = S/T_c + sum_i min_k [cost_cik + sum_j lam_j a_jcik] - sum_j lam_j b_j`` is a lower bound
    on every policy with cycle ``T_c`` for any ``lam >= 0`` (weak duality); the multipliers are chosen by
    coordinate ascent (bisection on each multiplier's subgradient), for all candidates at once. A
    candidate leaves the computation as soon as one of its bounds exceeds the incumbent.
    """
    dv, dw, du = _loads(fam)
    S = fam.major_cost
    # constraint j: coefficient a_jcik = T_c * item_j[i] * kpat_j[k]; "sum a x <= b"
    cons: list[tuple[np.ndarray, np.ndarray, float]] = []
    kf = kvals.astype(float)
    if math.isfinite(fam.capacity_volume):
        cons.append((dv, kf, fam.capacity_volume))
    if math.isfinite(fam.capacity_weight):
        cons.append((dw, kf, fam.capacity_weight))
    if fam.min_order_value > 0:
        cons.append((-du, (kvals == 1).astype(float), -fam.min_order_value))
    c = T.size
    base = S / T + np.min(cost, axis=2).sum(axis=1)
    if not cons:
        return _Lagrange(base, cost, None, math.inf, 0)
    m = len(cons)
    rhs = np.array([b for _, _, b in cons])
    state = {"best_L": base.copy(), "best_lam": np.zeros((c, m)), "inc": None, "inc_cost": math.inf,
             "evals": 0}

    def reduced(rows: np.ndarray, lam: np.ndarray) -> np.ndarray:
        rc = cost[rows].copy()
        for j, (item, kpat, _) in enumerate(cons):
            rc += (lam[:, j] * T[rows])[:, None, None] * item[None, :, None] * kpat[None, None, :]
        return rc

    def evaluate(rows: np.ndarray, lam: np.ndarray) -> np.ndarray:
        """Bound and subgradient on the given rows; records best bounds and feasible solutions."""
        rc = reduced(rows, lam)
        km = np.argmin(rc, axis=2)
        L = S / T[rows] + np.min(rc, axis=2).sum(axis=1) - lam @ rhs
        g = np.empty((rows.size, m))
        for j, (item, kpat, b) in enumerate(cons):
            g[:, j] = (kpat[km] @ item) * T[rows] - b
        better = L > state["best_L"][rows]
        state["best_L"][rows[better]] = L[better]
        state["best_lam"][rows[better]] = lam[better]
        feas = np.all(g <= 1e-12 * (1.0 + np.abs(rhs))[None, :], axis=1)
        if np.any(feas):
            fr = rows[feas]
            pc = S / T[fr] + np.take_along_axis(cost[fr], km[feas][:, :, None], axis=2)[:, :, 0].sum(axis=1)
            j = int(np.argmin(pc))
            if pc[j] < state["inc_cost"]:
                state["inc_cost"] = float(pc[j])
                state["inc"] = (int(fr[j]), kvals[km[feas][j]].astype(np.int64))
        state["evals"] += 1
        return g

    def alive() -> np.ndarray:
        return state["best_L"] <= min(ub, state["inc_cost"]) * (1 + 1e-9)

    # coordinate ascent: along each multiplier the dual is concave with a decreasing subgradient g_j, so its
    # maximiser is where g_j changes sign, found by bisection on log(lambda_j)
    scale = np.max(np.where(np.isfinite(cost), cost, 0.0), axis=(1, 2)) * cost.shape[1] + 1.0
    lam = np.zeros((c, m))
    for _sweep in range(LAGRANGE_SWEEPS if m > 1 else 1):
        for j in range(m):
            item, kpat, _ = cons[j]
            lam[:, j] = 0.0
            rows = np.nonzero(alive())[0]
            if rows.size == 0:
                break
            g0 = evaluate(rows, lam[rows])[:, j]
            rows = rows[g0 > 0]
            span = T * (np.abs(item).max() * np.abs(kpat).max()) + 1e-300
            hi = np.log(scale / span) + 5.0
            lo = hi - 60.0
            for _ in range(LAGRANGE_BISECT):
                rows = rows[alive()[rows]]
                if rows.size == 0:
                    break
                mid = 0.5 * (lo[rows] + hi[rows])
                trial = lam[rows].copy()
                trial[:, j] = np.exp(mid)
                pos = evaluate(rows, trial)[:, j] > 0
                lo[rows] = np.where(pos, mid, lo[rows])
                hi[rows] = np.where(pos, hi[rows], mid)
            if rows.size:
                lam[rows, j] = np.exp(hi[rows])
                evaluate(rows, lam[rows])
    best_L, best_lam, inc = state["best_L"], state["best_lam"], state["inc"]
    rc = reduced(np.arange(c), best_lam)
    return _Lagrange(best_L, rc, inc, state["inc_cost"], state["evals"])


# --------------------------------------------------------------------------- the model
def build_model(S: float, T: np.ndarray, index: list, cost: dict, load_v: dict, load_w: dict, val1: dict,
                fam: Family):
    """The pyomo model of one family over the kept candidate cycles.

    Parameters
    ----------
    S : float
        Major cost per family order.
    T : numpy.ndarray
        Candidate cycles (years), indexed ``c = 0 .. len(T) - 1``.
    index : list of tuple
        The allowed ``(c, i, k)`` triples (shelf life and dominance already applied).
    cost, load_v, load_w, val1 : dict
        Per triple: annual item cost; volume and weight of the item in the largest order; value of the item
        in the smallest order (used where ``k = 1``).
    fam : Family
        For the limits (capacities, minimum order value).

    Returns
    -------
    pyomo.environ.ConcreteModel

    Notes
    -----
    Sets ``C``, ``X``, ``CI``; parameters ``T[c]``, ``cost[c,i,k]``; binary variables ``y[c]`` (the base
    cycle) and ``x[c,i,k]`` (item i every k cycles under c). Objective: ``sum S/T[c] y[c] + sum cost x``.
    Constraints, one rule per family: ``one_cycle``, ``one_multiple``, ``capacity_volume``,
    ``capacity_weight``, ``min_order_value``.

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> f = make_family(10.0, [1.0], [1.0], [10.0])
    >>> m = build_model(10.0, np.array([1.0]), [(0, 0, 1)], {(0, 0, 1): 6.0}, {}, {}, {}, f)
    >>> len(m.x)
    1
    """
    import pyomo.environ as pyo

    m = pyo.ConcreteModel(name="grouping")
    C = list(range(T.size))
    items = sorted({i for (_, i, _) in index})
    m.C = pyo.Set(initialize=C)
    m.X = pyo.Set(initialize=index, dimen=3)
    m.CI = pyo.Set(initialize=[(c, i) for c in C for i in items], dimen=2)
    m.T = pyo.Param(m.C, initialize={c: float(T[c]) for c in C})
    m.cost = pyo.Param(m.X, initialize=cost)
    m.y = pyo.Var(m.C, domain=pyo.Binary)
    m.x = pyo.Var(m.X, domain=pyo.Binary)
    by_ci: dict = {}
    by_c: dict = {c: [] for c in C}
    for t in index:
        by_ci.setdefault((t[0], t[1]), []).append(t)
        by_c[t[0]].append(t)

    def objective(m):
        return sum(S / m.T[c] * m.y[c] for c in m.C) + sum(m.cost[t] * m.x[t] for t in m.X)

    m.objective = pyo.Objective(rule=objective, sense=pyo.minimize)

    def one_cycle(m):
        return sum(m.y[c] for c in m.C) == 1

    m.one_cycle = pyo.Constraint(rule=one_cycle)

    def one_multiple(m, c, i):
        return sum(m.x[t] for t in by_ci[(c, i)]) == m.y[c]

    m.one_multiple = pyo.Constraint(m.CI, rule=one_multiple)

    if math.isfinite(fam.capacity_volume):
        def capacity_volume(m, c):
            return sum(load_v[t] * m.x[t] for t in by_c[c]) <= fam.capacity_volume * m.y[c]
        m.capacity_volume = pyo.Constraint(m.C, rule=capacity_volume)
    if math.isfinite(fam.capacity_weight):
        def capacity_weight(m, c):
            return sum(load_w[t] * m.x[t] for t in by_c[c]) <= fam.capacity_weight * m.y[c]
        m.capacity_weight = pyo.Constraint(m.C, rule=capacity_weight)
    if fam.min_order_value > 0:
        def min_order_value(m, c):
            return sum(val1[t] * m.x[t] for t in by_c[c] if t[2] == 1) >= fam.min_order_value * m.y[c]
        m.min_order_value = pyo.Constraint(m.C, rule=min_order_value)
    # shelf life: (c, i, k) with k T_c > L_i are not generated (see module notes), checked after the solve
    return m


def _solve(m, time_limit: float, mip_gap: float, solver: str, warm: bool = False):
    """Run the solver; returns (termination name, objective, bound, loaded?)."""
    if solver != "appsi_highs":
        raise RuntimeError(f"unknown solver {solver!r} (only 'appsi_highs' is wired in)")
    from pyomo.contrib.appsi.solvers import Highs

    opt = Highs()
    if not opt.available():
        raise RuntimeError("HiGHS (highspy) is not available to pyomo")
    opt.config.load_solution = False
    opt.config.time_limit = float(time_limit)
    opt.config.mip_gap = float(mip_gap)
    opt.config.warmstart = bool(warm)
    # one thread: the models left after pruning are small, and starting HiGHS's thread pool costs more
    opt.highs_options = {"threads": HIGHS_THREADS}
    res = opt.solve(m)
    tc = res.termination_condition.name
    has = res.best_feasible_objective is not None
    if has:
        res.solution_loader.load_vars()
    bound = res.best_objective_bound
    return tc, res.best_feasible_objective, (float(bound) if bound is not None else math.nan), has


def solve_family(
    fam: Family,
    *,
    k_max: int = K_MAX,
    powers_of_two: bool = False,
    grid_ratio: float = GRID_RATIO,
    time_limit: float = TIME_LIMIT,
    mip_gap: float = MIP_GAP,
    solver: str = "appsi_highs",
) -> FamilySolution:
    """Choose the base cycle and the multiples of one family by the mixed-integer model.

    Parameters
    ----------
    fam : Family
        From :func:`make_family`.
    k_max : int
        Largest multiple.
    powers_of_two : bool
        Restrict multiples to 1, 2, 4, ... (nested schedules).
    grid_ratio : float
        Ratio ``rho > 1`` between grid candidates (the tolerance, see the module notes).
    time_limit : float
        Seconds for the solver; at the limit the best solution and its gap are returned.
    mip_gap : float
        Relative gap under which the solver's answer counts as proven optimal.
    solver : str
        ``"appsi_highs"``.

    Returns
    -------
    FamilySolution

    Notes
    -----
    ``min sum_c (S / T_c) y_c + sum_{c,i,k} cost_cik x_cik`` subject to ``sum_c y_c = 1``,
    ``sum_k x_cik = y_c``, ``sum_{i,k} D_i v_i k T_c x_cik <= C_v y_c`` (and weight),
    ``sum_i D_i u_i T_c x_ci1 >= M y_c``, ``x_cik = 0`` when ``k T_c > L_i``;
    ``cost_cik = s_i p_i(k T_c) / (k T_c) + h_i D_i k T_c / 2 + safety/backorder cost(k T_c)`` (``p = 1``
    without an order model).

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.
    Kaspi, M., Rosenblatt, M. J. (1991). On the economic ordering quantity for jointly replenished items.
    International Journal of Production Research 29(1), 107-114 (the fallback).

    Examples
    --------
    >>> f = make_family(600.0, [120.0, 840.0, 300.0], [160.0, 20.0, 50.0], [1.0, 1.0, 1.0])
    >>> r = solve_family(f)
    >>> r.status, r.multiples.tolist(), round(r.total_cost, 4)
    ('optimal', [1, 3, 1], 837.8544)
    """
    t_start = time.perf_counter()
    if not (grid_ratio > 1.0):
        raise ValueError(f"grid_ratio must be > 1, got {grid_ratio!r}")
    if int(k_max) < 1:
        raise ValueError(f"k_max must be >= 1, got {k_max!r}")
    ks = _k_set(int(k_max), powers_of_two)
    S = fam.major_cost
    s = fam.minor_cost
    H = fam.holding_cost * fam.annual_demand
    n = s.size
    rnd = joint.rand(S, s, H)
    ex = joint.exact_cyclic(S, s, H)
    t_lo, t_hi, _ = _feasible_range(fam)

    def finish(status, message, T, k, cand_cost, bound, gap, cands, kept, nvar, tol_ok, extra=None):
        k = np.asarray(k, dtype=np.int64)
        c, z, sig = _policy_cost(fam, T, k)
        feas, bind, viol = check_policy(fam, T, k)
        if np.any(k >= ks.max()):  # an item sits at the largest multiple allowed: the limit may bind
            bind = (*bind, "max_multiple")
        if viol and status in ("optimal", "time_limit"):  # never pass on an answer that breaks a limit
            return rand_fallback("fallback", "solver answer failed the independent check ("
                                 + "; ".join(viol) + "); RAND heuristic used, not proven optimal")
        oupt = fam.annual_demand * (T * k + fam.lead_time) + z * sig
        p_ord = order_probabilities(fam, T, k)
        share = joint.expected_joint_share(k, p_ord)
        jrate = share / T
        return FamilySolution(
            status=status, message=message, cycle=float(T), multiples=k, order_up_to=oupt, safety_factor=z,
            item_cost=c, major_cost_rate=S / T, total_cost=S / T + float(c.sum()), candidate_cost=cand_cost,
            bound=bound, gap=gap, binding=bind, feasible=feas, candidates=cands, candidates_kept=kept,
            variables=nvar, grid_ratio=grid_ratio, tolerance_proven=tol_ok,
            seconds=time.perf_counter() - t_start, extra=extra or {}, order_probability=p_ord,
            joint_orders_rate=jrate, expected_major_cost_rate=S * share / T,
            expected_total_cost=S * share / T + float(c.sum()),
        )

    def rand_fallback(status, message):
        T = rnd.cycle
        k = np.minimum(rnd.multiples, ks.max())
        if powers_of_two:
            k = 2 ** np.floor(np.log2(k)).astype(np.int64)
        if t_lo <= t_hi:  # pull into the feasible range and repair so the fallback respects the constraints
            T = min(max(T, t_lo), t_hi)
            k = _repair(fam, np.array([T]), k[None, :], ks)[0]
            feas, _, _ = check_policy(fam, T, k)
            if not feas:
                k = np.ones(n, dtype=np.int64)
        c, _, _ = _policy_cost(fam, T, k)
        cost = S / T + float(c.sum())
        return finish(status, message, T, k, cost, math.nan, math.nan, 0, 0, 0, False)

    if t_lo > t_hi * (1 + 1e-12):
        _, _, why = _feasible_range(fam)
        msg = (f"no base cycle meets the constraints ({', '.join(why)}): the minimum order value needs "
               f"T >= {t_lo:.6g} years but capacity/shelf life allow at most {t_hi:.6g}; "
               "the unconstrained RAND policy is shown and it violates them")
        T, k = rnd.cycle, np.minimum(rnd.multiples, ks.max())
        c, _, _ = _policy_cost(fam, T, k)
        return finish("infeasible", msg, T, k, S / T + float(c.sum()), math.nan, math.nan, 0, 0, 0, False)

    # ---- an upper bound from a few heuristic points, then the proven range
    probe = np.array([x for x in (ex.cycle, rnd.cycle, t_lo, t_hi) if math.isfinite(x) and x > 0])
    probe = np.unique(np.clip(probe, max(t_lo, 1e-12), t_hi))
    cost_p = _item_costs(fam, probe, ks)
    k_unc_p = ks[np.argmin(cost_p, axis=2)]
    k_p = _repair(fam, probe, k_unc_p, ks)
    ub = math.inf
    for j in range(probe.size):
        c, _, _ = _policy_cost(fam, float(probe[j]), k_p[j])
        if check_policy(fam, float(probe[j]), k_p[j])[0]:
            ub = min(ub, S / probe[j] + float(c.sum()))
    # each item costs at least its EOQ cost when every review orders; a slow mover's line cost s p(tau)/tau
    # can be lower, so it contributes only 0 (>= 0) to this bound
    always = np.ones(n, dtype=bool) if fam.no_demand_rate is None else np.isinf(fam.no_demand_rate)
    eoq = float(np.sum(np.sqrt(2.0 * s * H)[always]))
    r_lo = S / (ub - eoq) if ub > eoq else t_lo
    r_lo = max(r_lo * (1 - 1e-9), t_lo)
    r_hi = min(2.0 * ub / float(H.sum()) * (1 + 1e-9), t_hi)
    if not math.isfinite(ub) or not (r_lo <= r_hi):
        return rand_fallback("fallback", "no feasible starting policy for the candidate range; RAND used")
    ratio = float(grid_ratio)
    n_grid = int(math.ceil(math.log(r_hi / r_lo) / math.log(ratio))) + 1 if r_hi > r_lo else 1
    if n_grid > MAX_GRID:
        ratio = (r_hi / r_lo) ** (1.0 / (MAX_GRID - 1))
        n_grid = MAX_GRID
    grid = r_lo * ratio ** np.arange(n_grid)
    grid = grid[grid <= r_hi * (1 + 1e-12)]
    # special points: exact/RAND cycles, range ends, shelf-life and capacity breakpoints
    special = [ex.cycle, rnd.cycle, r_lo, r_hi] if _SPECIAL_POINTS else [r_lo, r_hi]
    if _SPECIAL_POINTS and np.any(np.isfinite(fam.max_interval)):
        L = fam.max_interval[np.isfinite(fam.max_interval)]
        special.extend((L[:, None] / ks[None, :]).ravel().tolist())
    dv, dw, du = _loads(fam)
    k_grid = joint.optimal_multiples(grid, s, H, k_max=int(ks.max()))
    if powers_of_two:
        k_grid = 2 ** np.floor(np.log2(k_grid)).astype(np.int64)
    for load, cap in ((dv, fam.capacity_volume), (dw, fam.capacity_weight)):
        if _SPECIAL_POINTS and math.isfinite(cap):
            lk = k_grid @ load
            special.extend((cap / lk[lk > 0]).tolist())
    if _SPECIAL_POINTS and fam.min_order_value > 0:
        v1 = (k_grid == 1) @ du
        special.extend((fam.min_order_value / v1[v1 > 0]).tolist())
    special = np.asarray(special, dtype=float)
    special = special[(special >= r_lo * (1 - 1e-12)) & (special <= r_hi * (1 + 1e-12))]
    if _SPECIAL_POINTS:  # the probe points are candidates too, so their cost may prune the others
        inside = (probe >= r_lo * (1 - 1e-12)) & (probe <= r_hi * (1 + 1e-12))
        special = np.concatenate((special, probe[inside]))
    T = np.unique(np.concatenate((grid, special)))
    n_cand = T.size

    # ---- costs, dominance, Lagrangian bounds, pruning
    det = _deterministic_costs(fam, T, ks)
    if _SPECIAL_POINTS and math.isfinite(ub):
        # safety stock >= 0: S/T + sum_i min_k (deterministic cost) bounds every policy at T from below
        lb0 = S / T + np.min(det, axis=2).sum(axis=1)
        first = lb0 <= ub * (1 + 1e-9) + 1e-12
        if np.any(first):
            T, det = T[first], det[first]
    cost = _item_costs(fam, T, ks, det)  # (c, n, K)
    del det
    kbest = np.argmin(cost, axis=2)  # first minimiser = the unconstrained best multiple
    K_use = int(kbest.max()) + 1
    cost = cost[:, :, :K_use]
    # multiples above the unconstrained best are dominated (module notes)
    cost = np.where(np.arange(K_use)[None, None, :] <= kbest[:, :, None], cost, np.inf)
    k_heur = _repair(fam, T, ks[kbest], ks)
    kidx = np.searchsorted(ks, k_heur)
    ub_c = S / T + np.take_along_axis(cost, kidx[:, :, None], axis=2)[:, :, 0].sum(axis=1)
    feas_c = np.isfinite(ub_c) & _feasible_rows(fam, T, k_heur)
    # pruning uses incumbents among the candidates only (the probe points above served the range alone)
    inc, ub_cand = None, math.inf
    if np.any(feas_c):
        j = int(np.argmin(np.where(feas_c, ub_c, np.inf)))
        ub_cand, inc = float(ub_c[j]), (j, k_heur[j].copy())
    lag = _lagrangian(fam, T, cost, ks[:K_use], ub_cand)
    if lag.incumbent is not None and lag.incumbent_cost < ub_cand:
        ub_cand, inc = lag.incumbent_cost, lag.incumbent
    slack = ub_cand * (1 + 1e-9) + 1e-12
    keep = np.isfinite(lag.bound) & (lag.bound <= slack)
    # reduced-cost fixing: x_cik = 1 would force the bound above the incumbent
    rc = lag.reduced_cost
    allowed = np.isfinite(cost) & (lag.bound[:, None, None] + rc - np.min(rc, axis=2)[:, :, None] <= slack)
    allowed &= keep[:, None, None]
    if inc is not None:  # the incumbent always stays available
        keep[inc[0]] = True
        allowed[inc[0], np.arange(n), np.searchsorted(ks, inc[1])] = True
    kept_idx = np.nonzero(keep)[0]
    if kept_idx.size == 0:
        return rand_fallback("fallback", "no candidate cycle admits a feasible policy; RAND heuristic used")
    Tk = T[kept_idx]
    cost_k = cost[kept_idx]
    allowed = allowed[kept_idx]
    cc, ii, kk = np.nonzero(allowed)
    kv = ks[kk]
    index = list(zip(cc.tolist(), ii.tolist(), kv.tolist(), strict=True))
    vals = cost_k[cc, ii, kk]
    costd = dict(zip(index, vals.tolist(), strict=True))
    tck = Tk[cc] * kv
    load_v = dict(zip(index, (dv[ii] * tck).tolist(), strict=True))
    load_w = dict(zip(index, (dw[ii] * tck).tolist(), strict=True))
    val1 = dict(zip(index, (du[ii] * Tk[cc]).tolist(), strict=True))
    start = None
    if inc is not None:
        c_inc = int(np.searchsorted(kept_idx, inc[0]))
        start = (c_inc, {(c_inc, i, int(inc[1][i])) for i in range(n)})
    nvar = len(index) + Tk.size
    both = (math.isfinite(fam.capacity_volume) or math.isfinite(fam.capacity_weight)
            or np.any(np.isfinite(fam.max_interval))) and fam.min_order_value > 0
    tol_ok = (not both) and fam.mode != "fill_rate" and ratio == grid_ratio
    info = {"upper_bound_heuristic": ub_cand, "range": (r_lo, r_hi), "lagrange_iterations": lag.iterations,
            "lagrange_bound": float(np.min(lag.bound))}

    try:
        m = build_model(S, Tk, index, costd, load_v, load_w, val1, fam)
        if start is not None:
            for c in range(Tk.size):
                m.y[c].value = 1.0 if c == start[0] else 0.0
            for tpl in index:
                m.x[tpl].value = 1.0 if tpl in start[1] else 0.0
        tc, obj, bound, has = _solve(m, time_limit, mip_gap, solver, warm=start is not None)
    except Exception as exc:  # noqa: BLE001 - any solver failure leads to the reported fallback
        return rand_fallback("fallback", f"solver failed ({type(exc).__name__}: {exc}); RAND heuristic used, "
                             "not proven optimal")
    if not has:
        return rand_fallback("fallback", f"solver ended '{tc}' without a solution; RAND heuristic used, "
                             "not proven optimal")
    ysel = [c for c in range(Tk.size) if (m.y[c].value or 0.0) > 0.5]
    if len(ysel) != 1:
        return rand_fallback("fallback", f"solver returned {len(ysel)} selected cycles; RAND heuristic used")
    c0 = ysel[0]
    k_sol = np.zeros(n, dtype=np.int64)
    for (c, i, k) in index:
        if c == c0 and (m.x[(c, i, k)].value or 0.0) > 0.5:
            k_sol[i] = k
    if np.any(k_sol == 0):
        return rand_fallback("fallback", "solver returned an item without a multiple; RAND heuristic used")
    cand_cost = float(obj)
    gap = (cand_cost - bound) / abs(cand_cost) if math.isfinite(bound) and cand_cost != 0 else math.nan
    T_fin = _polish(fam, float(Tk[c0]), k_sol, math.inf)
    if tc == "optimal" and (math.isnan(gap) or gap <= max(mip_gap, 1e-9) * 1.0001):
        status = "optimal"
        msg = (f"proven optimal over {Tk.size} kept of {n_cand} candidate cycles (gap {gap:.2e}); "
               f"T re-optimised for the chosen multiples")
    elif tc in ("optimal", "maxTimeLimit", "maxIterations", "interrupted", "objectiveLimit"):
        status = "time_limit"
        msg = f"solver stopped '{tc}' with relative gap {gap:.3g}: best solution found, not proven optimal"
    else:
        return rand_fallback("fallback", f"solver ended '{tc}'; RAND heuristic used, not proven optimal")
    info["candidate_cycle"] = float(Tk[c0])
    return finish(status, msg, T_fin, k_sol, cand_cost, bound, gap, n_cand, int(Tk.size), nvar, tol_ok, info)


# --------------------------------------------------------------------------- shared runs
@dataclass(frozen=True)
class SharedRun:
    """A consolidated pickup several families (suppliers) may join.

    Attributes
    ----------
    fixed_cost : float
        Cost of one run (per base cycle while at least one family has joined).
    members : tuple of int
        Indices of the families allowed to join.
    capacity_volume, capacity_weight : float
        Capacity of the run's vehicle (inf = none); a joined family's own capacity no longer applies.
    join_cost : tuple of float, optional
        Per member, the order cost it still pays per order when it rides the run (default 0: the run
        replaces the supplier's own order cost).
    """

    fixed_cost: float
    members: tuple[int, ...]
    capacity_volume: float = math.inf
    capacity_weight: float = math.inf
    join_cost: tuple[float, ...] | None = None


@dataclass(frozen=True)
class SharedRunSolution:
    """Result of :func:`solve_shared_runs`.

    Attributes
    ----------
    status, message : str
        As in :class:`FamilySolution`; ``"fallback"`` means every family was solved alone.
    cycle : numpy.ndarray
        Base cycle per family (years).
    multiples : list of numpy.ndarray
    joined : numpy.ndarray of int
        Run index per family, -1 = orders alone.
    run_cycle : numpy.ndarray
        Cycle of each run (NaN when nobody joins it).
    family_cost : numpy.ndarray
        Per family: its own (or join) order cost per year + its items' costs (the run's cost excluded).
    run_cost : numpy.ndarray
        Per run: fixed cost per year.
    total_cost, standalone_cost : float
        Whole answer, and every family alone by :func:`solve_family` (the baseline, same run).
    bound, gap : float
        Solver bound and relative gap over the candidate set.
    feasible : bool
        Independent check of every constraint.
    seconds : float
    """

    status: str
    message: str
    cycle: np.ndarray
    multiples: list
    joined: np.ndarray
    run_cycle: np.ndarray
    family_cost: np.ndarray
    run_cost: np.ndarray
    total_cost: float
    standalone_cost: float
    bound: float
    gap: float
    feasible: bool
    seconds: float


def _group_check(fams: list[Family], ks: list[np.ndarray], T: float, run: SharedRun | None,
                 members: list[int]) -> tuple[bool, list[str]]:
    """Constraints of families sharing one cycle T (a run: run capacity replaces their own)."""
    viol = []
    for f in members:
        fam = fams[f]
        if run is not None:
            fam = Family(**{**fam.__dict__, "capacity_volume": math.inf, "capacity_weight": math.inf})
        ok, _, v = check_policy(fam, T, ks[f])
        viol.extend(f"family {f}: {x}" for x in v)
    if run is not None:
        for name, cap, attr in (("run capacity_volume", run.capacity_volume, "volume"),
                                ("run capacity_weight", run.capacity_weight, "weight")):
            if math.isfinite(cap):
                load = sum(float(np.sum(fams[f].annual_demand * getattr(fams[f], attr) * ks[f])) * T
                           for f in members)
                if load > cap * (1 + CHECK_TOL):
                    viol.append(f"{name}: combined largest order {load:.6g} exceeds {cap:.6g}")
    return not viol, viol


def _group_polish(fams: list[Family], ks: list[np.ndarray], members: list[int], major: float, T0: float,
                  run: SharedRun | None) -> float:
    """Re-optimise the common cycle of ``members`` for fixed multiples within its feasible interval."""
    lo, hi = 0.0, math.inf
    for f in members:
        fam = fams[f]
        if run is not None:
            fam = Family(**{**fam.__dict__, "capacity_volume": math.inf, "capacity_weight": math.inf})
        a, b = _interval_for(fam, ks[f])
        lo, hi = max(lo, a), min(hi, b)
    if run is not None:
        for cap, attr in ((run.capacity_volume, "volume"), (run.capacity_weight, "weight")):
            load = sum(float(np.sum(fams[f].annual_demand * getattr(fams[f], attr) * ks[f])) for f in members)
            if math.isfinite(cap) and load > 0:
                hi = min(hi, cap / load)
    if not (lo <= T0 * (1 + 1e-12) and T0 <= hi * (1 + 1e-12)):
        return T0

    def total(x: float) -> float:
        return major / x + sum(float(_policy_cost(fams[f], x, ks[f])[0].sum()) for f in members)

    cands = [T0]
    a, b = max(lo, T0 * 1e-3), min(hi, T0 * 1e3)
    if a < b:
        r = minimize_scalar(lambda u: total(math.exp(u)), bounds=(math.log(a), math.log(b)), method="bounded",
                            options={"xatol": 1e-10})
        cands += [math.exp(float(r.x)), a, b]
    return cands[int(np.argmin([total(x) for x in cands]))]


def solve_shared_runs(
    fams: list[Family],
    runs: list[SharedRun],
    *,
    k_max: int = K_MAX,
    grid_ratio: float = 1.01,
    time_limit: float = TIME_LIMIT,
    mip_gap: float = MIP_GAP,
) -> SharedRunSolution:
    """Decide which families join which shared run, with every family's cycle and multiples.

    Parameters
    ----------
    fams : list of Family
        From :func:`make_family`.
    runs : list of SharedRun
    k_max : int
        Largest multiple.
    grid_ratio : float
        Ratio between neighbouring candidate cycles of the common grid.
    time_limit, mip_gap
        As in :func:`solve_family`.

    Returns
    -------
    SharedRunSolution

    Notes
    -----
    Binary ``own[f,c]`` (family f orders alone every ``T_c``), ``w[f,r,c]`` (f rides run r every ``T_c``),
    ``z[r,c]`` (run r goes every ``T_c``), ``x[f,i,c,k]``. Objective: ``S_f/T_c own + J_f/T_c w +
    F_r/T_c z + cost x``. Constraints: one mode and cycle per family; one multiple per item under it;
    ``w <= z``; at most one cycle per run; the family's own capacity unless it rides a run (big-M: its
    largest possible load at ``T_c``); the run capacity over the families riding it (same big-M for members
    at ``T_c`` that do not ride); the minimum order value in every mode; shelf life by construction. The
    candidate grid is common to all families and holds each family's own optimal cycle, so the answer is
    never worse than every family alone; no grid tolerance is claimed here. Candidates whose bound cannot
    beat the all-alone answer are dropped; afterwards each group's common cycle is re-optimised for the
    chosen multiples.

    References
    ----------
    Goyal, S. K. (1974). Determination of optimum packaging frequency of items jointly replenished.
    Management Science 21(4), 436-443.

    Examples
    --------
    >>> a = make_family(100.0, [5.0], [2.0], [300.0])
    >>> b = make_family(100.0, [5.0], [2.0], [200.0])
    >>> r = solve_shared_runs([a, b], [SharedRun(fixed_cost=120.0, members=(0, 1))])
    >>> r.joined.tolist(), r.total_cost < r.standalone_cost
    ([0, 0], True)
    """
    t_start = time.perf_counter()
    nf = len(fams)
    if nf == 0:
        raise ValueError("fams must hold at least one family")
    for r_i, run in enumerate(runs):
        if not run.members or any(not (0 <= m < nf) for m in run.members):
            raise ValueError(f"run {r_i}: members must be indices of families, got {run.members!r}")
        if not (math.isfinite(run.fixed_cost) and run.fixed_cost >= 0):
            raise ValueError(f"run {r_i}: fixed_cost must be finite and >= 0, got {run.fixed_cost!r}")
        if run.join_cost is not None and len(run.join_cost) != len(run.members):
            raise ValueError(f"run {r_i}: join_cost needs one value per member")
    ks = _k_set(int(k_max), False)
    alone = [solve_family(f, k_max=k_max, time_limit=time_limit, mip_gap=mip_gap) for f in fams]
    standalone = float(sum(a.total_cost for a in alone))

    def fallback(msg: str) -> SharedRunSolution:
        fc = np.array([a.total_cost for a in alone])
        return SharedRunSolution(
            "fallback", msg, np.array([a.cycle for a in alone]), [a.multiples for a in alone],
            np.full(nf, -1), np.full(len(runs), np.nan), fc, np.zeros(len(runs)), standalone, standalone,
            math.nan, math.nan, all(a.feasible for a in alone), time.perf_counter() - t_start)

    if not runs:
        return fallback("no shared runs given: every family orders alone")
    join = {}
    for r_i, run in enumerate(runs):
        jc = run.join_cost or tuple(0.0 for _ in run.members)
        for m, j in zip(run.members, jc, strict=True):
            join[(m, r_i)] = float(j)
    # common candidate grid for the runs: spans every family's range, lowered for cheaper majors when riding
    lo = min(a.extra.get("range", (a.cycle, a.cycle))[0] for a in alone) / 4.0
    hi = max(max(a.extra.get("range", (a.cycle, a.cycle))[1], a.cycle) for a in alone)
    n_grid = min(MAX_GRID, int(math.ceil(math.log(hi / lo) / math.log(grid_ratio))) + 1)
    T = np.unique(np.concatenate((np.geomspace(lo, hi, n_grid), [a.cycle for a in alone])))
    C = T.size
    A = np.array([a.total_cost for a in alone])
    riders = sorted({f for run in runs for f in run.members})
    costs: dict[int, np.ndarray] = {}
    kb: dict[int, np.ndarray] = {}
    ride_lb = np.full((nf, C), np.inf)
    for f in riders:
        c3 = _item_costs(fams[f], T, ks)
        kbest = np.argmin(c3, axis=2)
        costs[f] = np.where(np.arange(ks.size)[None, None, :] <= kbest[:, :, None], c3, np.inf)
        kb[f] = kbest
        ride_lb[f] = np.min(c3, axis=2).sum(axis=1)  # + join cost per run below
    # a run at T_c is worth modelling only if its bound beats its members ordering alone: ordering alone a
    # family's best is its own optimum (cost A_f, fixed), so only riding needs the candidate grid
    RC = []
    for r, run in enumerate(runs):
        mem = list(run.members)
        lbr = run.fixed_cost / T + sum(np.minimum(A[f], join[(f, r)] / T + ride_lb[f]) for f in mem)
        for c in np.nonzero(lbr < A[mem].sum() * (1 - 1e-9))[0]:
            RC.append((r, int(c)))
    if not RC:
        sol = fallback("no run can beat its members ordering alone (bound check): every family orders alone")
        ok = all(a.status == "optimal" for a in alone)
        return replace(sol, status="optimal" if ok else "fallback")
    import pyomo.environ as pyo

    m = pyo.ConcreteModel(name="shared_runs")
    FRC = [(f, r, c) for (r, c) in RC for f in runs[r].members if np.isfinite(ride_lb[f, c])]
    FC = sorted({(f, c) for (f, _, c) in FRC})
    X = [(f, c, i, kk) for (f, c) in FC for i in range(fams[f].minor_cost.size)
         for kk in range(int(kb[f][c, i]) + 1) if np.isfinite(costs[f][c, i, kk])]
    m.F = pyo.Set(initialize=range(nf))
    m.RC = pyo.Set(initialize=RC, dimen=2)
    m.FRC = pyo.Set(initialize=FRC, dimen=3)
    m.X = pyo.Set(initialize=X, dimen=4)
    m.own = pyo.Var(m.F, domain=pyo.Binary)
    m.w = pyo.Var(m.FRC, domain=pyo.Binary)
    m.z = pyo.Var(m.RC, domain=pyo.Binary)
    m.x = pyo.Var(m.X, domain=pyo.Binary)
    x_by_fci: dict = {}
    for tt in X:
        x_by_fci.setdefault(tt[:3], []).append(tt)
    w_by_fc: dict = {}
    for tt in FRC:
        w_by_fc.setdefault((tt[0], tt[2]), []).append(tt)
    w_by_f: dict = {}
    for tt in FRC:
        w_by_f.setdefault(tt[0], []).append(tt)

    def load(f, c, attr, tt):
        return float(fams[f].annual_demand[tt[2]] * getattr(fams[f], attr)[tt[2]] * T[c] * ks[tt[3]])

    def big_m(f, c, attr):
        return sum(max(load(f, c, attr, tt) for tt in x_by_fci[(f, c, i)])
                   for i in range(fams[f].minor_cost.size))

    def objective(m):
        e = sum(float(A[f]) * m.own[f] for f in m.F)
        e += sum(join[(f, r)] / T[c] * m.w[f, r, c] for (f, r, c) in m.FRC)
        e += sum(runs[r].fixed_cost / T[c] * m.z[r, c] for (r, c) in m.RC)
        return e + sum(float(costs[tt[0]][tt[1], tt[2], tt[3]]) * m.x[tt] for tt in m.X)

    m.objective = pyo.Objective(rule=objective, sense=pyo.minimize)

    def one_mode(m, f):
        return m.own[f] + sum(m.w[tt] for tt in w_by_f.get(f, [])) == 1

    m.one_mode = pyo.Constraint(m.F, rule=one_mode)

    def one_multiple(m, f, c, i):
        return sum(m.x[tt] for tt in x_by_fci[(f, c, i)]) == sum(m.w[tt] for tt in w_by_fc[(f, c)])

    m.FCI = pyo.Set(initialize=[(f, c, i) for (f, c) in FC for i in range(fams[f].minor_cost.size)], dimen=3)
    m.one_multiple = pyo.Constraint(m.FCI, rule=one_multiple)

    def ride_with_run(m, f, r, c):
        return m.w[f, r, c] <= m.z[r, c]

    m.ride_with_run = pyo.Constraint(m.FRC, rule=ride_with_run)

    def one_run_cycle(m, r):
        return sum(m.z[rc] for rc in RC if rc[0] == r) <= 1

    m.one_run_cycle = pyo.Constraint(sorted({r for r, _ in RC}), rule=one_run_cycle)
    m.run_capacity = pyo.ConstraintList()
    for (r, c) in RC:
        run = runs[r]
        mem = [f for f in run.members if (f, c) in w_by_fc]
        for attr, cap in (("volume", run.capacity_volume), ("weight", run.capacity_weight)):
            if not math.isfinite(cap) or not mem:
                continue
            lhs = sum(load(f, c, attr, tt) * m.x[tt] for f in mem for i in range(fams[f].minor_cost.size)
                      for tt in x_by_fci[(f, c, i)])
            relax = sum(big_m(f, c, attr) * sum(m.w[tt] for tt in w_by_fc[(f, c)] if tt[1] != r) for f in mem)
            m.run_capacity.add(lhs <= cap * m.z[r, c] + relax)

    def min_order_value(m, f, c):
        val = sum(float(fams[f].annual_demand[tt[2]] * fams[f].unit_value[tt[2]] * T[c]) * m.x[tt]
                  for i in range(fams[f].minor_cost.size) for tt in x_by_fci[(f, c, i)] if tt[3] == 0)
        return val >= fams[f].min_order_value * sum(m.w[tt] for tt in w_by_fc[(f, c)])

    m.MFC = pyo.Set(initialize=[fc for fc in FC if fams[fc[0]].min_order_value > 0], dimen=2)
    m.min_order_value = pyo.Constraint(m.MFC, rule=min_order_value)
    for v in m.component_data_objects(pyo.Var):  # warm start: every family alone
        v.value = 0.0
    for f in range(nf):
        m.own[f].value = 1.0
    try:
        tc, obj, bound, has = _solve(m, time_limit, mip_gap, "appsi_highs", warm=True)
    except Exception as exc:  # noqa: BLE001 - reported fallback
        return fallback(f"solver failed ({type(exc).__name__}: {exc}); every family solved alone")
    if not has:
        return fallback(f"solver ended '{tc}' without a solution; every family solved alone")
    cyc = np.array([a.cycle for a in alone])
    mult: list = [a.multiples.copy() for a in alone]
    joined = np.full(nf, -1)
    for (f, r, c) in FRC:
        if (m.w[f, r, c].value or 0) > 0.5:
            cyc[f], joined[f] = T[c], r
            k = np.zeros(fams[f].minor_cost.size, dtype=np.int64)
            for i in range(k.size):
                for tt in x_by_fci[(f, c, i)]:
                    if (m.x[tt].value or 0) > 0.5:
                        k[i] = ks[tt[3]]
            mult[f] = k
    if any(np.any(k == 0) for k in mult):
        return fallback("solver returned an incomplete assignment; every family solved alone")
    run_cycle = np.full(len(runs), np.nan)
    feasible = True
    viol: list[str] = []
    for r, run in enumerate(runs):
        mem = [f for f in range(nf) if joined[f] == r]
        if mem:
            major = run.fixed_cost + sum(join[(f, r)] for f in mem)
            Tn = _group_polish(fams, mult, mem, major, float(cyc[mem[0]]), run)
            cyc[mem] = Tn
            run_cycle[r] = Tn
            ok, v = _group_check(fams, mult, Tn, run, mem)
            feasible &= ok
            viol += v
    for f in range(nf):
        if joined[f] < 0:
            feasible &= alone[f].feasible
    fcost = np.array([(alone[f].total_cost if joined[f] < 0 else
                       join[(f, int(joined[f]))] / cyc[f]
                       + float(_policy_cost(fams[f], float(cyc[f]), mult[f])[0].sum())) for f in range(nf)])
    rcost = np.array([runs[r].fixed_cost / run_cycle[r] if np.isfinite(run_cycle[r]) else 0.0
                      for r in range(len(runs))])
    total = float(fcost.sum() + rcost.sum())
    gap = (float(obj) - bound) / abs(float(obj)) if math.isfinite(bound) and obj else math.nan
    if not feasible:
        return fallback("solver answer failed the independent check: " + "; ".join(viol))
    if tc == "optimal" and (math.isnan(gap) or gap <= max(mip_gap, 1e-9) * 1.0001):
        status = "optimal"
        msg = (f"proven optimal over the common candidate grid ({len(RC)} run cycles kept of {C}, ratio "
               f"{grid_ratio}); run cycles re-optimised for the chosen multiples")
    elif tc in ("optimal", "maxTimeLimit", "maxIterations", "interrupted", "objectiveLimit"):
        status = "time_limit"
        msg = f"solver stopped '{tc}' with relative gap {gap:.3g}: best solution found, not proven optimal"
    else:
        return fallback(f"solver ended '{tc}'; every family solved alone")
    if total > standalone * (1 + 1e-9):  # cannot happen with the warm start in the model; kept as a guard
        return fallback("the shared-run answer cost more than every family alone; every family solved alone")
    return SharedRunSolution(status, msg, cyc, mult, joined, run_cycle, fcost, rcost, total, standalone,
                             bound, gap, feasible, time.perf_counter() - t_start)
