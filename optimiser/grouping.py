"""Joint replenishment for a case: order families -> grouping model -> groups table and summary.

A *family* is what one site buys from one supplier (a site with no upstream): the supplier's ``order_cost`` is
the shared (major) cost, each item's ``line_cost`` (``items.csv``, else ``suppliers.csv``) the minor cost,
the supplier's ``capacity_volume``/``capacity_weight`` the capacity of one order and ``min_order_value`` its
minimum value (at ``unit_cost``). Optionally (``deliveries=True``) each store's deliveries from its upstream
form a family too, with the site's ``delivery_cost`` as the shared cost and no line cost.

Each family is solved by :func:`models.grouping_milp.solve_family` and compared with ordering every item
alone with its own (R, Q) (:func:`models.single_site.optimise_policy`, order cost = major + minor cost, normal
lead-time demand: the same stochastic basis as the grouped periodic policy).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from dataclasses import replace as dc_replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from models import grouping_milp as gm
from models import joint
from models import single_site as ss
from models.demand import NEGBIN, NORMAL, POISSON, lead_time_demand
from optimiser.case import Case
from optimiser.itemsites import build_itemsites, through_demand
from optimiser.simulate import POISSON_DISPERSION_TOL

GROUP_COLUMNS = [
    "family", "site", "supplier", "item", "base_cycle_days", "cycle_multiple", "order_interval_days",
    "order_up_to", "safety_factor", "annual_cost", "independent_cost", "status", "demand_basis",
    "window_demand_sd", "fill_rate", "expected_on_hand", "order_probability", "orders_per_year",
    "ordering_cost",
]
FAMILY_COLUMNS = [
    "family", "kind", "site", "supplier", "items", "status", "shared_run", "base_cycle_days",
    "independent_cost", "grouped_cost", "savings", "savings_pct", "binding", "gap", "candidates",
    "candidates_kept", "seconds", "tolerance_proven", "message", "demand_basis", "orders_per_year",
    "shared_cost", "line_cost", "ordering_cost",
]


@dataclass(frozen=True)
class GroupResult:
    """Outcome of :func:`group_case`.

    Attributes
    ----------
    groups : DataFrame
        One row per (family, item), columns :data:`GROUP_COLUMNS`.
    families : DataFrame
        One row per family, columns :data:`FAMILY_COLUMNS`.
    warnings : list of str
    settings : object
        The case settings.
    options : dict
        The options the model ran with.
    """

    groups: pd.DataFrame
    families: pd.DataFrame
    warnings: list[str] = field(default_factory=list)
    settings: Any = None
    options: dict = field(default_factory=dict)

    def totals(self) -> dict[str, float]:
        """Sum of independent and grouped cost and savings over the families that were solved."""
        ok = self.families[self.families["status"].isin(["optimal", "time_limit"])]
        ind = float(ok["independent_cost"].sum())
        grp = float(ok["grouped_cost"].sum())
        return {"families": int(len(self.families)), "solved": int(len(ok)), "independent_cost": ind,
                "grouped_cost": grp, "savings": ind - grp,
                "savings_pct": (ind - grp) / ind * 100.0 if ind > 0 else 0.0}


NO_ORDER_STEP_DAYS = 0.5  # grid of the tabulated chance that no site below orders over a review interval
NO_ORDER_SPAN_YEARS = 2.0  # its span (linear beyond)
NO_ORDER_P0_MIN = 1e-300  # floor before the logarithm
BATCH_PASSES = 2  # most solves of a family whose demand comes in batches from the sites below
BATCH_RESOLVE_TOL = 0.05  # re-solve while the batching variance moves by more than this share of the total


def store_order_quantities(case: Case, itemsites: pd.DataFrame, warnings: list[str] | None = None
                           ) -> pd.DataFrame:
    """Order quantities of every item-site when each site is planned alone (``rqnet group`` without a plan).

    Parameters
    ----------
    case : Case
    itemsites : DataFrame
        The item-site table of the case.
    warnings : list of str, optional
        Receives the single-site planner's warnings.

    Returns
    -------
    DataFrame
        ``site, item, order_quantity`` from :func:`optimiser.plan._plan_single_site` (each site alone, a
        warehouse facing the summed demand of the sites below it).

    Examples
    --------
    >>> store_order_quantities(case, build_itemsites(case))  # doctest: +SKIP

    Notes
    -----
    The network plan moves reorder points, not order quantities (they stay as seeded by the single-site
    plan), so these are the stores' batches the network plan would use as well.

    References
    ----------
    None (the single-site planner of this project).
    """
    from optimiser.plan import _plan_single_site

    pol = _plan_single_site(itemsites, case.settings, [] if warnings is None else warnings)
    return pol[["site", "item", "order_quantity"]].copy()


def batched_demand_variance(
    table: pd.DataFrame, order_quantity: np.ndarray, window_days: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Variance of the demand a site meets over a window when the sites below it order in batches.

    Parameters
    ----------
    table : DataFrame
        Item-site table (``site, item, upstream, daily_mean, daily_sd, lead_days_sd, distribution``).
    order_quantity : ndarray, (rows,)
        Order quantity of every row (the batch each site orders from its upstream; NaN where none).
    window_days : ndarray, (rows,)
        Window of every row in days (protection period: review interval + lead time).

    Returns
    -------
    variance : ndarray, (rows,)
        Variance of the units demanded from the row's site over the window, lead-time spread included
        (``Var`` of :func:`models.echelon.warehouse_demand` at lead time = window); for a row with no site
        below it, ``window * own variance + (daily mean * lead sd)**2``.
    batched : ndarray of bool, (rows,)
        Rows whose demand comes (at least partly) from sites below.

    Examples
    --------
    >>> t = pd.DataFrame({"site": ["wh", "s1"], "item": ["a", "a"], "upstream": ["", "wh"],
    ...                   "daily_mean": [0.0, 2.0], "daily_sd": [0.0, 1.5], "lead_days_sd": [0.0, 0.0],
    ...                   "distribution": [0, 0]})
    >>> v, b = batched_demand_variance(t, np.array([np.nan, 40.0]), np.array([30.0, 5.0]))
    >>> bool(b[0]), bool(v[0] > 30 * 2.25)
    (True, True)

    Notes
    -----
    The units a child site orders over a window of length w are ``Q floor((D(w) + U) / Q)``, ``D(w)`` its
    own (through) demand over the window, ``U`` its position in its batch; their variance is
    ``Var D(w) + E[r (Q - r)]``, r = (D(w) + U) mod Q (:func:`models.echelon.order_stream_variance`, used
    through :func:`models.echelon.warehouse_demand`, the same moments the network planner uses). The
    children's streams and the site's own customers add; a random lead time adds
    ``(total daily mean * lead sd)**2``. A child that is itself a warehouse counts with its through demand
    (a moment approximation for trees deeper than two levels).

    References
    ----------
    Axsäter, S., Inventory Control, 3rd ed., Springer, 2015, ch. 5 (demand at a warehouse from batch-ordering
    retailers).
    """
    from models.echelon import warehouse_demand

    mean_all, var_all = through_demand(table)
    n = len(table)
    window = np.asarray(window_days, dtype=float)
    q = np.asarray(order_quantity, dtype=float)
    own_mean = table["daily_mean"].fillna(0.0).to_numpy(float)
    own_sd = table["daily_sd"].fillna(0.0).to_numpy(float)
    lead_sd = table["lead_days_sd"].fillna(0.0).to_numpy(float)
    count = table["distribution"].to_numpy() != NORMAL
    key = pd.DataFrame({"site": table["site"].to_numpy(), "item": table["item"].to_numpy(),
                        "row": np.arange(n)})
    kids = pd.DataFrame({"site": table["upstream"].to_numpy(), "item": table["item"].to_numpy(),
                         "child": np.arange(n)})
    kids = kids[kids["site"] != ""].merge(key, on=["site", "item"], how="inner")
    batched = np.zeros(n, dtype=bool)
    var = window * own_sd**2 + (mean_all * lead_sd) ** 2
    if kids.empty:
        return var, batched
    kids["slot"] = kids.groupby("row").cumcount()
    rows = np.unique(kids["row"].to_numpy())
    pos = {r: i for i, r in enumerate(rows)}
    w_idx = np.array([pos[r] for r in kids["row"]], dtype=np.int64)
    m = int(kids["slot"].max()) + 1
    c = kids["child"].to_numpy()
    c_mean = mean_all[c]
    c_q = q[c]
    use = (c_mean > 0) & np.isfinite(c_q) & (c_q > 0)
    sm = np.zeros((rows.size, m))
    ssd = np.zeros((rows.size, m))
    sq = np.ones((rows.size, m))
    sc = np.ones((rows.size, m), dtype=bool)
    sl = kids["slot"].to_numpy()
    sm[w_idx[use], sl[use]] = c_mean[use]
    ssd[w_idx[use], sl[use]] = np.sqrt(var_all[c][use])
    sq[w_idx[use], sl[use]] = c_q[use]
    sc[w_idx[use], sl[use]] = count[c][use]
    wd = warehouse_demand(sm, ssd, sq, sc, window[rows], lead_sd[rows], own_mean[rows], own_sd[rows],
                          count[rows], max_support=0)
    var[rows] = wd.var
    batched[rows] = sm.sum(axis=1) > 0
    return var, batched


def _set_predictions(out: pd.DataFrame, active: np.ndarray, fam: gm.Family, cycle: float, multiples,
                     z) -> None:
    """Write the model's sd over the protection period, fill rate and mean on hand of each grouped item.

    Normal approximation of the periodic order-up-to policy (as the grouping model prices it): sigma over
    ``tau + L`` with ``tau = k T``, shortage per cycle ``sigma G(z)``, fill rate ``1 - sigma G(z) / (D tau)``,
    mean on hand ``sigma G(-z) + D tau / 2`` (Silver, Pyke & Peterson 1998, ch. 7).
    """
    from models.loss import normal_loss

    tau = cycle * np.asarray(multiples, dtype=float)
    sigma = np.sqrt(np.maximum((tau + fam.lead_time) * fam.demand_var
                               + fam.annual_demand**2 * fam.lead_time_sd**2, 0.0))
    z = np.asarray(z, dtype=float)
    per_cycle = fam.annual_demand * tau
    with np.errstate(divide="ignore", invalid="ignore"):
        fill = np.where(per_cycle > 0, 1.0 - sigma * normal_loss(z) / per_cycle, np.nan)
    out.loc[active, "window_demand_sd"] = sigma
    out.loc[active, "fill_rate"] = np.clip(fill, 0.0, 1.0)
    out.loc[active, "expected_on_hand"] = sigma * normal_loss(-z) + per_cycle / 2.0


def _no_order_model(table: pd.DataFrame, pos: np.ndarray, batched: np.ndarray,
                    dpy: float) -> tuple[np.ndarray, tuple[float, np.ndarray] | None]:
    """Chance that a review of the rows at ``pos`` finds no demand since the last one, for the grouping.

    Returns the rate ``c`` per year of the site's own customers, P(no customer demand over tau) =
    exp(-c tau), and for sites supplying others (``batched``, their order quantities in ``table["_q"]``)
    the table ``(step, log P0)`` of :func:`models.grouping_milp.make_family` holding, per row, the sum over
    the sites below of log P(that site places no order over tau).

    Notes
    -----
    Customer demand follows the simulator's rule (``demand_model="auto"``): Poisson where the daily
    variance is at most ``1 + POISSON_DISPERSION_TOL`` times the daily mean, else compound Poisson with
    logarithmic sizes, whose counts are negative binomial over any interval
    (:func:`models.joint.no_demand_rate`). A site below orders in batches of Q with its position uniform
    over the Q steps above its reorder point, so it places no order over tau with probability
    ``E[(Q - D(tau))+] / Q = (Q - mu + E[(D - Q)+]) / Q`` (``D`` its through demand over tau, same rule;
    Q rounded to whole units); the sites below order independently of each other.
    """
    from models.loss import loss

    own = table["daily_mean"].fillna(0.0).to_numpy(float)[pos]
    own_var = table["daily_sd"].fillna(0.0).to_numpy(float)[pos] ** 2
    code = np.where(own_var > own * (1.0 + POISSON_DISPERSION_TOL), NEGBIN, POISSON)
    rate = joint.no_demand_rate(own * dpy, own_var * dpy, code)
    if not batched.any() or "_q" not in table:
        return rate, None
    through, through_var = through_demand(table)
    q = table["_q"].to_numpy(float)
    key = pd.DataFrame({"site": table["site"].to_numpy(), "item": table["item"].to_numpy(),
                        "row": np.arange(len(table))})
    kids = pd.DataFrame({"site": table["upstream"].to_numpy(), "item": table["item"].to_numpy(),
                         "child": np.arange(len(table))})
    kids = kids[kids["site"] != ""].merge(key, on=["site", "item"], how="inner")
    local = {int(r): j for j, r in enumerate(pos)}
    ch = kids["child"].to_numpy()
    kids = kids[kids["row"].isin(list(local)).to_numpy() & np.isfinite(q[ch]) & (through[ch] > 0)]
    grid = np.arange(int(math.ceil(NO_ORDER_SPAN_YEARS * dpy / NO_ORDER_STEP_DAYS)) + 1) * NO_ORDER_STEP_DAYS
    log_p0 = np.zeros((pos.size, grid.size))
    if len(kids):
        c = kids["child"].to_numpy()
        qq = np.maximum(np.round(q[c]), 1.0)[:, None]
        d, v = through[c][:, None], through_var[c][:, None]
        dist = np.where(v > d * (1.0 + POISSON_DISPERSION_TOL), NEGBIN, POISSON)
        mu, var = d * grid[None, :], v * grid[None, :]
        p0 = (qq - mu + loss(qq, mu, np.sqrt(var), np.broadcast_to(dist, mu.shape))) / qq
        rows = np.array([local[int(r)] for r in kids["row"]], dtype=np.int64)
        np.add.at(log_p0, rows, np.log(np.clip(p0, NO_ORDER_P0_MIN, 1.0)))
    log_p0[:, 0] = 0.0
    return rate, (NO_ORDER_STEP_DAYS / dpy, np.minimum(log_p0, 0.0))


def _set_orders(out: pd.DataFrame, active: np.ndarray, rec: dict, fam: gm.Family, cycle: float,
                multiples: np.ndarray, item_cost: np.ndarray, shared_rate: float, joint_rate: float) -> None:
    """Expected orders and ordering costs of a grouped family; the shared cost spread by expected orders.

    Item ``i`` orders ``p_i / (k_i T)`` times a year (``p_i`` = chance that a review orders,
    :func:`models.grouping_milp.order_probabilities`); the family's expected shared cost a year
    ``shared_rate`` (``S`` x expected joint orders ``joint_rate``) is spread over the items in proportion to
    their expected orders (with every review ordering: in proportion to ``1 / k_i``, how often they come
    along).
    """
    p = gm.order_probabilities(fam, cycle, multiples)
    orders = p / (float(cycle) * np.asarray(multiples, dtype=float))
    line = fam.minor_cost * orders
    share = orders / np.sum(orders) if np.sum(orders) > 0 else np.full(orders.size, 1.0 / orders.size)
    out.loc[active, "order_probability"] = p
    out.loc[active, "orders_per_year"] = orders
    out.loc[active, "ordering_cost"] = line + shared_rate * share
    out.loc[active, "annual_cost"] = item_cost + shared_rate * share
    rec.update(orders_per_year=joint_rate, shared_cost=shared_rate, line_cost=float(line.sum()),
               ordering_cost=shared_rate + float(line.sum()))


def _batched_rows(table: pd.DataFrame, pos: np.ndarray, window: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Batched-demand variance over ``window`` for the rows at positions ``pos`` of ``table``."""
    full = np.full(len(table), 1.0)
    full[pos] = window
    var, batched = batched_demand_variance(table, table["_q"].to_numpy(float), full)
    return var[pos], batched[pos]


def _batch_excess(table, pos, window, var_rate, d_day, sl) -> np.ndarray:
    """C = Var_b(W) - W V - (d sd_L)**2 (>= 0) at the windows ``window`` of the rows at ``pos``."""
    v, batched = _batched_rows(table, pos, window)
    return np.where(batched, np.maximum(v - window * var_rate - (d_day * sl) ** 2, 0.0), 0.0)


def _finite_or_inf(value: float) -> float:
    """A capacity cell as a float, with a missing (NaN) capacity read as no limit."""
    return float(value) if np.isfinite(value) else math.inf


def _independent_costs(
    rows: pd.DataFrame, var_daily: np.ndarray, order_cost: np.ndarray, settings: Any,
    q_min: np.ndarray | None = None, q_max: np.ndarray | None = None,
) -> tuple[np.ndarray, int, int]:
    """Annual cost of ordering each item alone with its own (R, Q), normal lead-time demand.

    ``q_min``/``q_max`` bound each single-item order (the supplier's minimum value / the vehicle's capacity):
    where the free optimum breaks a bound, Q is fixed at that bound and R re-optimised. Returns the costs,
    the number of items so limited and the number that cannot meet both bounds alone (Q = ``q_max`` then).
    """
    d = rows["annual_demand"].to_numpy(float) / settings.days_per_year
    mu, sd = lead_time_demand(d, np.sqrt(var_daily), rows["lead_days"].to_numpy(float),
                              rows["lead_days_sd"].to_numpy(float))
    b = rows["backorder_cost"].to_numpy(float)
    kw: dict[str, Any] = {"distribution": NORMAL, "mode": settings.mode,
                          "backorder_basis": settings.backorder_basis}
    if settings.mode == "cost" or np.any(np.isfinite(b)):
        kw["backorder_cost"] = np.where(np.isfinite(b), b, 0.0)
    if settings.mode != "cost":
        kw["target"] = rows["target"].to_numpy(float)
    args = (rows["annual_demand"].to_numpy(float), mu, sd, order_cost, rows["holding_cost"].to_numpy(float))
    pol = ss.optimise_policy(*args, **kw)
    cost = np.asarray(pol.total_cost, dtype=float)
    n = cost.size
    lo = np.zeros(n) if q_min is None else q_min
    hi = np.full(n, np.inf) if q_max is None else q_max
    impossible = lo > hi
    q = np.asarray(pol.order_quantity, dtype=float)
    fixed = np.where(impossible | (q > hi), hi, np.where(q < lo, lo, np.nan))
    limited = np.isfinite(fixed)
    if np.any(limited):
        pol2 = ss.optimise_policy(*args, order_quantity=fixed, **kw)
        cost = np.where(limited, np.asarray(pol2.total_cost, dtype=float), cost)
    return cost, int(limited.sum()), int(impossible.sum())


def _families(case: Case, table: pd.DataFrame, deliveries: bool) -> list[dict[str, Any]]:
    sup = case.suppliers.set_index("supplier")
    sites = case.sites.set_index("site")
    item_line = case.items.set_index("item")["line_cost"] if "line_cost" in case.items else None
    shelf = case.items.set_index("item")["shelf_life_days"] if "shelf_life_days" in case.items else None
    fams = []
    root = table[table["upstream"] == ""]
    for (site, supplier), rows in root.groupby(["site", "supplier"], sort=True):
        srec = sup.loc[supplier]
        minor = np.full(len(rows), float(srec["line_cost"]))
        if item_line is not None:
            own = item_line.reindex(rows["item"]).to_numpy(float)
            minor = np.where(np.isfinite(own), own, minor)
        fams.append({
            "family": f"{site}/{supplier}", "kind": "supplier", "site": site, "supplier": supplier,
            "rows": rows,
            "major": float(srec["order_cost"]), "minor": minor,
            "cap_v": float(srec["capacity_volume"]) if np.isfinite(srec["capacity_volume"]) else math.inf,
            "cap_w": float(srec["capacity_weight"]) if np.isfinite(srec["capacity_weight"]) else math.inf,
            "min_value": float(srec["min_order_value"]),
            "shelf": None if shelf is None else shelf.reindex(rows["item"]).to_numpy(float),
        })
    if deliveries:
        below = table[table["upstream"] != ""]
        for (site, upstream), rows in below.groupby(["site", "upstream"], sort=True):
            fams.append({
                "family": f"{site}<-{upstream}", "kind": "delivery", "site": site, "supplier": upstream,
                "rows": rows, "major": float(sites.loc[site, "delivery_cost"]), "minor": np.zeros(len(rows)),
                "cap_v": math.inf, "cap_w": math.inf, "min_value": 0.0,
                "shelf": None if shelf is None else shelf.reindex(rows["item"]).to_numpy(float),
            })
    return fams


RUNS_FILE = "runs.csv"
RUN_COLUMNS = ("run", "site", "supplier", "run_cost", "capacity_volume", "capacity_weight", "join_cost")


def read_runs(case: Case) -> pd.DataFrame | None:
    """Read the optional ``runs.csv`` of a case: shared runs (consolidated pickups) suppliers may join.

    Parameters
    ----------
    case : Case
        The case; ``runs.csv`` is looked for in ``case.path``.

    Returns
    -------
    DataFrame or None
        One row per (run, supplier):
        ``run, site, supplier, run_cost, capacity_volume, capacity_weight, join_cost``
        (NaN capacities = none, join cost 0 by default); None when the file is absent.

    Raises
    ------
    CaseError
        Naming the row, column and rule: missing columns or cells, numbers that are not finite or are
        negative (capacities must be above 0), unknown sites or suppliers, a supplier the site does not buy
        from straight, a run given two sites or two different costs or capacities, a supplier twice in a run.

    Examples
    --------
    >>> read_runs(load_case("cases/demo"))  # doctest: +SKIP
    """
    import csv

    from optimiser.errors import CaseError

    path = Path(case.path) / RUNS_FILE
    if not path.is_file():
        return None
    try:
        with path.open(newline="", encoding="utf-8-sig") as handle:
            records = list(csv.reader(handle))
    except (UnicodeDecodeError, csv.Error) as exc:
        raise CaseError(RUNS_FILE, f"not a readable UTF-8 CSV file ({exc})") from None
    if not records:
        raise CaseError(RUNS_FILE, "file is empty: the first row must name the columns", row=1)
    header = [h.strip() for h in records[0]]
    for col in ("run", "site", "supplier", "run_cost"):
        if col not in header:
            raise CaseError(RUNS_FILE, "required column is missing from the header", row=1, column=col)
    pos = {h: i for i, h in enumerate(header)}
    root_sites = set(case.sites.loc[case.sites["upstream"] == "", "site"])
    suppliers = set(case.suppliers["supplier"])
    rows = []
    for rownum, rec in enumerate(records[1:], start=2):
        if not any(cell.strip() for cell in rec):
            continue
        cell = {h: (rec[i].strip() if i < len(rec) else "") for h, i in pos.items()}
        out: dict[str, Any] = {}
        for col in ("run", "site", "supplier"):
            if not cell[col]:
                raise CaseError(RUNS_FILE, "must not be empty", row=rownum, column=col)
            out[col] = cell[col]
        for col in ("run_cost", "capacity_volume", "capacity_weight", "join_cost"):
            text = cell.get(col, "")
            if text == "":
                out[col] = math.nan
                continue
            try:
                val = float(text)
            except ValueError:
                raise CaseError(RUNS_FILE, "must be a number", row=rownum, column=col, value=text) from None
            if not math.isfinite(val) or val < 0 or (col.startswith("max_") and val == 0):
                rule = "must be greater than 0" if col.startswith("max_") else "must not be negative"
                raise CaseError(RUNS_FILE, rule, row=rownum, column=col, value=text)
            out[col] = val
        if out["site"] not in root_sites:
            raise CaseError(RUNS_FILE, "must be a site supplied straight by suppliers (no upstream)",
                            row=rownum, column="site", value=out["site"])
        if out["supplier"] not in suppliers:
            raise CaseError(RUNS_FILE, "unknown supplier (not in suppliers.csv)", row=rownum,
                            column="supplier", value=out["supplier"])
        out["row"] = rownum
        rows.append(out)
    frame = pd.DataFrame(rows, columns=[*RUN_COLUMNS, "row"])
    for name, part in frame.groupby("run", sort=False):
        if part["site"].nunique() > 1:
            raise CaseError(RUNS_FILE, f"run {name!r} names more than one site", row=int(part["row"].iloc[1]),
                            column="site")
        if part["supplier"].duplicated().any():
            r = int(part.loc[part["supplier"].duplicated(), "row"].iloc[0])
            raise CaseError(RUNS_FILE, f"supplier listed twice in run {name!r}", row=r, column="supplier")
        for col in ("run_cost", "capacity_volume", "capacity_weight"):
            vals = part[col].dropna().unique()
            if len(vals) > 1:
                raise CaseError(RUNS_FILE, f"run {name!r} has two different values",
                                row=int(part["row"].iloc[-1]), column=col)
            if col == "run_cost" and len(vals) == 0:
                raise CaseError(RUNS_FILE, f"run {name!r} needs a run_cost", row=int(part["row"].iloc[0]),
                                column=col)
            frame.loc[part.index, col] = vals[0] if len(vals) else math.nan
    frame["join_cost"] = frame["join_cost"].fillna(0.0)
    return frame


def group_case(
    case: Case,
    itemsites: pd.DataFrame | None = None,
    *,
    deliveries: bool = False,
    powers_of_two: bool = False,
    k_max: int = gm.K_MAX,
    grid_ratio: float = gm.GRID_RATIO,
    time_limit: float = gm.TIME_LIMIT,
    use_runs: bool = True,
    progress: Callable[[str], None] | None = None,
    store_policies: pd.DataFrame | None = None,
    batch_basis: bool = True,
) -> GroupResult:
    """Group every family of a case under its shared order cost.

    Parameters
    ----------
    case : Case
        From :func:`optimiser.case.load_case`.
    itemsites : DataFrame, optional
        The item-site table (built from ``case`` when not given).
    deliveries : bool
        Also group each store's deliveries from its upstream (shared cost = ``delivery_cost``).
    powers_of_two : bool
        Multiples restricted to 1, 2, 4, ...
    k_max, grid_ratio, time_limit
        Passed to :func:`models.grouping_milp.solve_family`.
    use_runs : bool
        Consider the shared runs of the case's ``runs.csv`` (when present); see :func:`read_runs`.
    progress : callable, optional
        Called with a line of text per family.
    store_policies : DataFrame, optional
        ``site, item, order_quantity`` of the plan (``rqnet plan``): the batches in which the sites below an
        upstream site order from it. Without it (and with ``batch_basis``) the single-site plan's order
        quantities are used (:func:`store_order_quantities`).
    batch_basis : bool
        At a site that supplies other sites, take the variance of its demand from the order streams of the
        sites below (batches of their Q, :func:`batched_demand_variance`); False: the sum of their customer
        demand variances.

    Returns
    -------
    GroupResult

    Notes
    -----
    Items without demand are listed (status ``no demand``) but not ordered. A family without a shared cost
    (0) gains nothing from grouping and is reported as ``not grouped``. Independent cost: each item alone,
    order cost = shared + line cost, with its cost-optimal (or service-target) (R, Q) on normal lead-time
    demand; grouped cost: shared cost per cycle plus, per item, line cost per order, cycle stock and the
    safety stock and backorders of a periodic order-up-to policy over interval plus lead time.

    Demand basis at a site that supplies others: the units ordered by the sites below over a window w have
    variance ``Var_b(w) = sum_i [Var D_i(w) + E r_i (Q_i - r_i)]`` plus own customers plus
    ``(d sd_L)**2`` (:func:`batched_demand_variance`); the grouping model's variance over the protection
    period is ``(tau + L) V + D**2 sd_L**2``, so the batching excess ``C = Var_b(W) - W V - (d sd_L)**2``
    (V the customer variance rate) is carried by the lead-time-spread term (``sd_L**2 + C / d**2``),
    which makes the model's variance exact at window W. W starts at lead time + the site's own order cycle
    (Q / d) and is set to k_i T + L_i after each solve; the family is solved again (at most
    :data:`BATCH_PASSES` times) while C moves by more than :data:`BATCH_RESOLVE_TOL` of the variance.
    The independent (R, Q) comparison uses ``Var_b(L)`` over the lead time.

    Examples
    --------
    >>> result = group_case(load_case("cases/demo"))  # doctest: +SKIP
    >>> result.families[["family", "independent_cost", "grouped_cost", "savings"]]  # doctest: +SKIP
    """
    say = progress or (lambda _t: None)
    settings = case.settings
    table = build_itemsites(case) if itemsites is None else itemsites
    _, var_all = through_demand(table)
    table = table.assign(_var=var_all).reset_index(drop=True)
    dpy = float(settings.days_per_year)
    warnings: list[str] = []
    batch_q = None
    if batch_basis and (table["upstream"] != "").any():
        pol = store_policies if store_policies is not None else store_order_quantities(case, table)
        batch_q = (table[["site", "item"]].merge(pol[["site", "item", "order_quantity"]]
                                                 .drop_duplicates(["site", "item"]), on=["site", "item"],
                                                 how="left")["order_quantity"].to_numpy(float))
        table = table.assign(_q=batch_q)
    group_rows: list[pd.DataFrame] = []
    fam_rows: list[dict[str, Any]] = []
    fams = _families(case, table, deliveries)
    solved: dict[str, tuple[int, gm.Family, np.ndarray]] = {}  # family -> (position, model data, active)
    for f in fams:
        pos_all = table.index.get_indexer(f["rows"].index)
        rows = f["rows"].reset_index(drop=True)
        n = len(rows)
        active = rows["annual_demand"].to_numpy(float) > 0
        out = pd.DataFrame({"family": f["family"], "site": f["site"], "supplier": f["supplier"],
                            "item": rows["item"].to_numpy(), "base_cycle_days": np.nan,
                            "cycle_multiple": pd.array([pd.NA] * n, dtype="Int64"),
                            "order_interval_days": np.nan, "order_up_to": np.nan, "safety_factor": np.nan,
                            "annual_cost": 0.0, "independent_cost": 0.0, "status": "no demand",
                            "demand_basis": "", "window_demand_sd": np.nan, "fill_rate": np.nan,
                            "expected_on_hand": np.nan, "order_probability": np.nan,
                            "orders_per_year": np.nan, "ordering_cost": np.nan})
        rec: dict[str, Any] = {
            "family": f["family"], "kind": f["kind"], "site": f["site"], "supplier": f["supplier"],
            "items": int(active.sum()), "base_cycle_days": np.nan, "independent_cost": 0.0,
            "grouped_cost": 0.0, "savings": 0.0, "savings_pct": 0.0, "binding": "", "gap": np.nan,
            "candidates": 0, "candidates_kept": 0, "seconds": 0.0, "tolerance_proven": False,
            "shared_run": "", "demand_basis": "", "orders_per_year": np.nan, "shared_cost": np.nan,
            "line_cost": np.nan, "ordering_cost": np.nan,
        }
        act = rows[active]
        if not active.any():
            rec.update(status="no demand", message="no item of the family has demand")
            fam_rows.append(rec)
            group_rows.append(out)
            continue
        minor = f["minor"][active]
        with np.errstate(divide="ignore", invalid="ignore"):
            u = act["unit_cost"].to_numpy(float)
            q_min = np.where(u > 0, f["min_value"] / u, np.inf) if f["min_value"] > 0 else np.zeros(len(act))
            q_max = np.full(len(act), np.inf)
            for per_unit, cap in ((act["volume"].to_numpy(float), f["cap_v"]),
                                  (act["weight"].to_numpy(float), f["cap_w"])):
                if math.isfinite(cap):
                    q_max = np.minimum(q_max, np.where(per_unit > 0, cap / per_unit, np.inf))
        lead = act["lead_days"].to_numpy(float)
        d_day = act["annual_demand"].to_numpy(float) / dpy
        sl = act["lead_days_sd"].to_numpy(float)
        var_rate = act["_var"].to_numpy(float)
        batched = np.zeros(len(act), dtype=bool)
        ind_var = var_rate
        if batch_q is not None:
            v_lead, batched = _batched_rows(table, pos_all[active], lead)
            with np.errstate(divide="ignore", invalid="ignore"):
                ind_var = np.where(batched & (lead > 0), (v_lead - (d_day * sl) ** 2) / lead, var_rate)
        basis = np.where(batched, "store orders in batches", "customer demand")
        out.loc[active, "demand_basis"] = basis
        rec["demand_basis"] = ("store orders in batches" if batched.any() else "customer demand")
        ind, n_lim, n_imp = _independent_costs(act, np.maximum(ind_var, 0.0), f["major"] + minor, settings,
                                               q_min, q_max)
        out.loc[active, "independent_cost"] = ind
        rec["independent_cost"] = float(ind.sum())
        if f["major"] <= 0:
            rec.update(status="not grouped", grouped_cost=rec["independent_cost"],
                       message="no shared order cost: grouping cannot save anything")
            out.loc[active, "status"] = "not grouped"
            out.loc[active, "annual_cost"] = ind
            fam_rows.append(rec)
            group_rows.append(out)
            continue
        vol = act["volume"].to_numpy(float)
        wgt = act["weight"].to_numpy(float)
        for name, arr, cap in (("volume", vol, f["cap_v"]), ("weight", wgt, f["cap_w"])):
            if math.isfinite(cap) and np.any(~np.isfinite(arr)):
                warnings.append(f"family {f['family']}: {int(np.sum(~np.isfinite(arr)))} item(s) have no "
                                f"{name}; they are counted as 0 against the order capacity")
        no_order, no_order_table = _no_order_model(table, pos_all[active], batched, dpy)
        shelf = f["shelf"][active] / dpy if f["shelf"] is not None else np.full(len(act), np.inf)
        shelf = np.where(np.isfinite(shelf), shelf, np.inf)
        target = act["target"].to_numpy(float) if settings.mode != "cost" else None

        def build(lead_sd_days: np.ndarray, f=f, minor=minor, act=act, vol=vol, wgt=wgt, shelf=shelf,
                  target=target, no_order=no_order, no_order_table=no_order_table) -> gm.Family:
            return gm.make_family(
                f["major"], minor, act["holding_cost"].to_numpy(float), act["annual_demand"].to_numpy(float),
                demand_var=act["_var"].to_numpy(float) * dpy,
                lead_time=act["lead_days"].to_numpy(float) / dpy, lead_time_sd=lead_sd_days / dpy,
                backorder_cost=act["backorder_cost"].to_numpy(float),
                unit_value=act["unit_cost"].to_numpy(float),
                volume=np.nan_to_num(vol, nan=0.0), weight=np.nan_to_num(wgt, nan=0.0), max_interval=shelf,
                capacity_volume=f["cap_v"], capacity_weight=f["cap_w"], min_order_value=f["min_value"],
                backorder_basis=settings.backorder_basis, mode=settings.mode, target=target,
                no_demand_rate=no_order, no_order_table=no_order_table,
            )

        if n_lim:
            warnings.append(f"family {f['family']}: ordered alone, {n_lim} item(s) need an order quantity at "
                            "the supplier's minimum value or the vehicle's capacity (independent cost with Q "
                            "fixed there)" + (f"; {n_imp} cannot meet both alone (Q at capacity, below the "
                                              "minimum)" if n_imp else ""))
        say(f"grouping {f['family']}: {len(act)} item(s)")
        if batched.any():
            # the batching excess C enters through the lead-time-spread term; iterate on the window
            own_q = act["_q"].to_numpy(float)
            with np.errstate(divide="ignore", invalid="ignore"):
                cycle = np.where(np.isfinite(own_q) & (d_day > 0), own_q / np.where(d_day > 0, d_day, 1.0),
                                 0.0)
            window = lead + cycle
            excess = _batch_excess(table, pos_all[active], window, var_rate, d_day, sl)
            passes = 0
            while True:
                passes += 1
                with np.errstate(divide="ignore", invalid="ignore"):
                    spread = np.where(d_day > 0, excess / np.where(d_day > 0, d_day, 1.0) ** 2, 0.0)
                sl_eff = np.sqrt(sl**2 + spread)
                fam = build(sl_eff)
                sol = gm.solve_family(fam, k_max=k_max, powers_of_two=powers_of_two, grid_ratio=grid_ratio,
                                      time_limit=time_limit)
                window = sol.cycle * dpy * np.asarray(sol.multiples, dtype=float) + lead
                new = _batch_excess(table, pos_all[active], window, var_rate, d_day, sl)
                total = window * var_rate + (d_day * sl) ** 2 + new
                moved = np.max(np.abs(new - excess) / np.maximum(total, 1e-12))
                excess = new
                if moved <= BATCH_RESOLVE_TOL or passes >= BATCH_PASSES:
                    break
            # levels and costs of the chosen (T, k) at the variance of the windows they give
            spread = np.where(d_day > 0, excess / np.where(d_day > 0, d_day, 1.0) ** 2, 0.0)
            fam = build(np.sqrt(sl**2 + spread))
            item_cost, z_fin, up_fin = gm.policy_costs(fam, sol.cycle, np.asarray(sol.multiples))
            sol = dc_replace(sol, item_cost=item_cost, safety_factor=z_fin, order_up_to=up_fin,
                             total_cost=sol.major_cost_rate + float(np.sum(item_cost)),
                             expected_total_cost=sol.expected_major_cost_rate + float(np.sum(item_cost)))
            rec["demand_basis"] = (f"store orders in batches ({passes} solve(s); the last moved the batching "
                                   f"variance by {100 * moved:.1f}%; levels at the chosen windows)")
        else:
            fam = build(sl)
            sol = gm.solve_family(fam, k_max=k_max, powers_of_two=powers_of_two, grid_ratio=grid_ratio,
                                  time_limit=time_limit)
        T_days = sol.cycle * dpy
        _set_predictions(out, active, fam, sol.cycle, sol.multiples, sol.safety_factor)
        out.loc[active, "base_cycle_days"] = T_days
        out.loc[active, "cycle_multiple"] = sol.multiples
        out.loc[active, "order_interval_days"] = T_days * sol.multiples
        out.loc[active, "order_up_to"] = sol.order_up_to
        out.loc[active, "safety_factor"] = sol.safety_factor
        _set_orders(out, active, rec, fam, sol.cycle, np.asarray(sol.multiples), sol.item_cost,
                    sol.expected_major_cost_rate, sol.joint_orders_rate)
        out.loc[active, "status"] = sol.status
        grouped = sol.expected_total_cost
        rec.update(status=sol.status, base_cycle_days=T_days, grouped_cost=grouped,
                   savings=rec["independent_cost"] - grouped,
                   savings_pct=(rec["independent_cost"] - grouped) / rec["independent_cost"] * 100.0
                   if rec["independent_cost"] > 0 else 0.0,
                   binding=",".join(sol.binding), gap=sol.gap, candidates=sol.candidates,
                   candidates_kept=sol.candidates_kept, seconds=sol.seconds,
                   tolerance_proven=sol.tolerance_proven, message=sol.message)
        if sol.status not in ("optimal",):
            warnings.append(f"family {f['family']}: {sol.status}: {sol.message}")
        solved[f["family"]] = (len(fam_rows), fam, active)
        fam_rows.append(rec)
        group_rows.append(out)
    runs = read_runs(case) if use_runs else None
    if runs is not None and len(runs):
        _apply_runs(runs, solved, fam_rows, group_rows, dpy, k_max, time_limit, warnings, say)
    groups = pd.concat(group_rows, ignore_index=True) if group_rows else pd.DataFrame(columns=GROUP_COLUMNS)
    families = pd.DataFrame(fam_rows, columns=FAMILY_COLUMNS)
    options = {"deliveries": deliveries, "powers_of_two": powers_of_two, "k_max": k_max,
               "grid_ratio": grid_ratio, "time_limit_seconds": time_limit,
               "shared_runs": sorted(runs["run"].unique().tolist()) if runs is not None else []}
    return GroupResult(groups[GROUP_COLUMNS], families, warnings, settings, options)


def _apply_runs(runs: pd.DataFrame, solved: dict, fam_rows: list, group_rows: list, dpy: float, k_max: int,
                time_limit: float, warnings: list[str], say: Callable[[str], None]) -> None:
    """Solve the shared runs of each site and rewrite the rows of the families that ride one.

    A riding family's grouped cost = its join cost per order + its items' costs + an equal share of the
    run's cost among the families riding it.
    """
    for site, site_runs in runs.groupby("site", sort=True):
        names = [f"{site}/{s}" for s in site_runs["supplier"].unique()]
        missing = [n for n in names if n not in solved]
        for n in missing:
            warnings.append(f"runs.csv: {n} buys nothing (no demand) and cannot ride a run")
        names = [n for n in names if n in solved]
        if not names:
            continue
        local = {n: j for j, n in enumerate(names)}
        fam_objs = [solved[n][1] for n in names]
        shared, run_names = [], []
        member = site_runs["supplier"].map(lambda s, site=site, local=local: f"{site}/{s}" in local)
        for rn in site_runs["run"].unique():
            part = site_runs[(site_runs["run"] == rn) & member]
            if part.empty:
                continue
            run_names.append(rn)
            first = part.iloc[0]
            shared.append(gm.SharedRun(
                fixed_cost=float(first["run_cost"]),
                members=tuple(local[f"{site}/{s}"] for s in part["supplier"]),
                capacity_volume=_finite_or_inf(first["capacity_volume"]),
                capacity_weight=_finite_or_inf(first["capacity_weight"]),
                join_cost=tuple(float(x) for x in part["join_cost"]),
            ))
        say(f"shared runs at {site}: {len(shared)} run(s), {len(names)} supplier(s)")
        res = gm.solve_shared_runs(fam_objs, shared, k_max=k_max, time_limit=time_limit)
        if res.status != "optimal":
            warnings.append(f"shared runs at {site}: {res.status}: {res.message}")
        riders = {}
        for j, r in enumerate(res.joined):
            if r >= 0:
                riders.setdefault(int(r), []).append(j)
        for r, members in riders.items():
            run_name = run_names[r]
            share = res.run_cost[r] / len(members)
            for j in members:
                pos, fam, active = solved[names[j]]
                T, k = float(res.cycle[j]), res.multiples[j]
                item_cost, z, up = gm.policy_costs(fam, T, k)
                major = res.family_cost[j] - float(item_cost.sum()) + share
                out = group_rows[pos]
                out.loc[active, "base_cycle_days"] = T * dpy
                out.loc[active, "cycle_multiple"] = k
                out.loc[active, "order_interval_days"] = T * dpy * k
                out.loc[active, "order_up_to"] = up
                out.loc[active, "safety_factor"] = z
                _set_predictions(out, active, fam, T, k, z)
                # a rider pays its join cost and run share every run cycle (the model's charge)
                _set_orders(out, active, fam_rows[pos], fam, T, np.asarray(k), item_cost, major,
                            gm.expected_shared_rate(fam, T, np.asarray(k)))
                out.loc[active, "status"] = res.status
                rec = fam_rows[pos]
                grouped = float(item_cost.sum()) + major
                rec.update(status=res.status, shared_run=run_name, base_cycle_days=T * dpy,
                           grouped_cost=grouped, savings=rec["independent_cost"] - grouped,
                           savings_pct=(rec["independent_cost"] - grouped) / rec["independent_cost"] * 100.0
                           if rec["independent_cost"] > 0 else 0.0,
                           binding="", gap=res.gap, message=f"rides shared run {run_name}: {res.message}")


def write_groups(
    result: GroupResult, out_dir: str | Path, *, case_name: str = "", case_path: str = ""
) -> list[str]:
    """Write ``groups.csv``, ``families.csv`` and ``summary.json`` into ``out_dir`` (atomically).

    Parameters
    ----------
    result : GroupResult
        From :func:`group_case`.
    out_dir : str or Path
        Target folder; created, or replaced when it holds an earlier rqnet output (never otherwise).
    case_name, case_path : str
        Shown in ``summary.json``.

    Returns
    -------
    list of str
        Files written, relative to ``out_dir``.

    Notes
    -----
    Everything is written into a temporary folder beside the target and renamed into place when complete.

    Examples
    --------
    >>> write_groups(group_case(load_case("cases/demo")), "out/groups")  # doctest: +SKIP
    """
    from optimiser.report import TOOL, _clean, atomic_folder, tool_version

    written: list[str] = []
    with atomic_folder(out_dir) as temp:
        result.groups.to_csv(temp / "groups.csv", index=False, float_format="%.6g")
        result.families.to_csv(temp / "families.csv", index=False, float_format="%.6g")
        written += ["groups.csv", "families.csv"]
        fams = []
        for rec in result.families.to_dict(orient="records"):
            rec["binding"] = [b for b in str(rec["binding"]).split(",") if b]
            fams.append(rec)
        summary = {
            "tool": TOOL,
            "version": tool_version(),
            "command": "group",
            "created": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "case": {"name": case_name, "path": case_path},
            "options": result.options,
            "totals": result.totals(),
            "families": fams,
            "warnings": result.warnings,
        }
        (temp / "summary.json").write_text(json.dumps(_clean(summary), indent=2, ensure_ascii=False) + "\n",
                                           encoding="utf-8")
        written.append("summary.json")
    return written


# ============================================================================================================
# the `rqnet group` subcommand (registered in optimiser/cli.py)
# ============================================================================================================

COMMAND_HELP = "group items that share a supplier's order cost and compare with ordering each item alone"
COMMAND_DESCRIPTION = (
    "For every site and supplier it buys from, choose a base cycle and for each item how many cycles pass "
    "between its orders, so that the supplier's order cost is shared, orders fit the supplier's "
    "capacity_volume and capacity_weight, reach its min_order_value, and no item waits longer than its "
    "shelf_life_days. Each item "
    "gets an order-up-to level for its interval plus lead time. groups.csv lists per item the base cycle, "
    "the multiple, the interval, the order-up-to level and its annual cost; families.csv and summary.json "
    "give per family the cost of ordering each item alone with its own reorder point and order quantity, "
    "the grouped cost, the saving and the constraint that binds."
)


def add_arguments(parser) -> None:
    """Arguments of ``rqnet group``."""
    parser.add_argument("case", metavar="CASE", type=Path, help="the case folder")
    parser.add_argument("--out", metavar="DIR", type=Path, required=True,
                        help="folder for the results; created, or replaced if it holds earlier rqnet results")
    parser.add_argument("--deliveries", action="store_true",
                        help="also group each branch's deliveries from its upstream (shared delivery_cost)")
    parser.add_argument("--powers-of-two", action="store_true",
                        help="intervals of 1, 2, 4, 8 ... base cycles only (nested schedules)")
    parser.add_argument("--max-multiple", metavar="K", type=int, default=gm.K_MAX,
                        help=f"longest interval in base cycles (default {gm.K_MAX})")
    parser.add_argument("--time-limit", metavar="SEC", type=float, default=gm.TIME_LIMIT,
                        help=f"solver time per family in seconds (default {gm.TIME_LIMIT:g})")


def run(args) -> int:
    """Run ``rqnet group``; returns the exit code."""
    from optimiser.case import load_case
    from optimiser.cli import EXIT_OK, progress_printer
    from optimiser.errors import CaseError

    say = progress_printer(args)
    if args.max_multiple < 1:
        raise CaseError("--max-multiple", "must be a whole number of at least 1", value=args.max_multiple)
    if not args.time_limit > 0:
        raise CaseError("--time-limit", "must be above 0 seconds", value=args.time_limit)
    say(f"reading case {args.case}")
    case = load_case(args.case)
    result = group_case(case, deliveries=args.deliveries, powers_of_two=args.powers_of_two,
                        k_max=args.max_multiple, time_limit=args.time_limit, progress=say)
    write_groups(result, args.out, case_name=case.settings.name, case_path=str(args.case))
    tot = result.totals()
    cur = case.settings.currency
    print(f"{tot['families']} families ({tot['solved']} solved): ordering alone "
          f"{tot['independent_cost']:,.2f} {cur}, grouped {tot['grouped_cost']:,.2f} {cur} a year, "
          f"saving {tot['savings']:,.2f} {cur} ({tot['savings_pct']:.1f}%)")
    for w in result.warnings:
        print(f"warning: {w}")
    print(f"written to {args.out}")
    return EXIT_OK
