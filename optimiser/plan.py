"""The planning pipeline: a case in, a policy for every stocked item at every site out.

:func:`plan_case` optimises; :func:`evaluate_case` evaluates given policies. Both return a :class:`PlanResult`
holding the policies frame (columns in DEVELOPERS.md), totals per site and for the network, and warnings.
When the case gives today's policies (``policies.csv``), :func:`plan_case` also evaluates them so that the
outputs show today's cost and service beside the recommended ones.
"""

from __future__ import annotations

import importlib
import importlib.util
import inspect
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from models import demand as md
from models import single_site as ss
from optimiser.case import Case, Settings
from optimiser.errors import CaseError, SolverError
from optimiser.itemsites import build_itemsites, through_demand

__all__ = ["PlanResult", "plan_case", "evaluate_case", "POLICY_COLUMNS", "site_totals", "network_totals"]

POLICY_COLUMNS = [
    "site", "item", "order_quantity", "reorder_point", "safety_stock", "lead_time_days",
    "lead_time_demand_mean", "lead_time_demand_sd", "cycle_service", "fill_rate", "expected_on_hand",
    "expected_backorders", "orders_per_year", "ordering_cost", "holding_cost", "backorder_cost", "total_cost",
    "cycle_stock_cost", "safety_stock_cost", "z", "distribution", "expected_delay_days", "note",
]  # fmt: skip

COST_COLUMNS = [
    "ordering_cost",
    "cycle_stock_cost",
    "safety_stock_cost",
    "holding_cost",
    "backorder_cost",
    "total_cost",
]

NETWORK_DELAY_WARNING = (
    "the network delay is not included: each site was planned alone, a warehouse facing the summed demand of "
    "the sites it supplies and each store its transit time only (the wait when the warehouse is out of stock "
    "is ignored)"
)


@dataclass(frozen=True)
class PlanResult:
    """Everything a plan or an evaluation produced.

    Attributes
    ----------
    command : str
        ``"plan"`` or ``"evaluate"``.
    settings : Settings
        The case settings used.
    itemsites : DataFrame
        The item-site table (DEVELOPERS.md contract).
    policies : DataFrame
        One row per stocked item-site, columns :data:`POLICY_COLUMNS`.
    site_totals : DataFrame
        One row per site (see :func:`site_totals`).
    network : dict
        Totals over every site (see :func:`network_totals`).
    warnings : list of str
        Warnings from reading the case and from planning.
    current : DataFrame or None
        Today's policies evaluated (same columns as ``policies``), where the case gives them.
    comparison : DataFrame or None
        Per site and for the network (site ``"(network)"``): today's and the recommended cost and service on
        the item-sites today's policies cover.
    method : str
        ``"single-site"`` or ``"network"``.
    network_summary : DataFrame or None
        From the network method, per item and root site: how safety stock splits between the warehouse and
        the stores, and the network cost against planning each site alone (``optimiser.network``).
    grouping : GroupingSection or None
        The plan's "ordering together" section (:func:`plan_grouping`); None for an evaluation.
    """

    command: str
    settings: Settings
    itemsites: pd.DataFrame
    policies: pd.DataFrame
    site_totals: pd.DataFrame
    network: dict[str, Any]
    warnings: list[str] = field(default_factory=list)
    current: pd.DataFrame | None = None
    comparison: pd.DataFrame | None = None
    method: str = "single-site"
    network_summary: pd.DataFrame | None = None
    grouping: GroupingSection | None = None


@dataclass(frozen=True)
class GroupingSection:
    """Joint replenishment run after a plan.

    Attributes
    ----------
    state : str
        ``"done"``, ``"skipped"`` (``--no-grouping``) or ``"failed"`` (the plan stands; ``message`` says
        what failed).
    message : str
        What happened, in words.
    result : GroupResult or None
        From :func:`optimiser.grouping.group_case` when ``state == "done"``.
    """

    state: str
    message: str = ""
    result: Any = None

    def totals(self) -> dict[str, Any]:
        """Sums over every family listed (``families, independent_cost, grouped_cost, savings``)."""
        if self.result is None:
            return {}
        fam = self.result.families
        ind = float(np.nansum(fam["independent_cost"].to_numpy(float)))
        grp = float(np.nansum(fam["grouped_cost"].to_numpy(float)))
        return {"families": int(len(fam)),
                "solved": int(fam["status"].isin(["optimal", "time_limit"]).sum()),
                "independent_cost": ind, "grouped_cost": grp, "savings": ind - grp,
                "savings_pct": 100.0 * (ind - grp) / ind if ind > 0 else 0.0}


def plan_grouping(case: Case, itemsites: pd.DataFrame, policies: pd.DataFrame, *,
                  progress: Callable[[str], None] | None = None, **options: Any) -> GroupingSection:
    """Group the items each site orders from its suppliers, on the demand basis of a plan.

    Parameters
    ----------
    case : Case
    itemsites : DataFrame
        The item-site table of the plan.
    policies : DataFrame
        The plan's policies; their ``order_quantity`` is the batch in which every site below an upstream
        site orders from it (the upstream's demand basis, see :func:`optimiser.grouping.group_case`).
    progress : callable, optional
    **options
        Passed to :func:`optimiser.grouping.group_case` (``k_max``, ``time_limit``, ...).

    Returns
    -------
    GroupingSection
        ``state="done"`` with the result, or ``"failed"`` with the reason: a failure of the grouping
        (solver, model) never loses the plan.

    Examples
    --------
    >>> section = plan_grouping(case, result.itemsites, result.policies)  # doctest: +SKIP

    Notes
    -----
    The grouping model falls back to RAND by itself when the MILP solver fails for a family and says so
    in the family's status and message; only a failure outside it makes the section ``failed``.

    References
    ----------
    See :func:`optimiser.grouping.group_case`.
    """
    from optimiser.grouping import group_case

    try:
        res = group_case(case, itemsites, store_policies=policies[["site", "item", "order_quantity"]],
                         progress=progress, **options)
    except (SolverError, ArithmeticError, ValueError, RuntimeError, ImportError, OSError, KeyError) as exc:
        # the plan stands without its grouping section; the reason goes into the outputs
        return GroupingSection("failed", f"grouping failed ({type(exc).__name__}): {exc}")
    fam = res.families
    fallback = fam[~fam["status"].isin(["optimal", "time_limit", "not grouped", "no demand"])]
    message = f"{len(fam)} famil{'y' if len(fam) == 1 else 'ies'} grouped"
    if len(fallback):
        message += "; " + "; ".join(f"{r.family}: {r.status} ({r.message})" for r in fallback.itertuples())
    return GroupingSection("done", message, res)


# --------------------------------------------------------------------------------------------- helpers


def _network_function(name: str) -> Callable[..., pd.DataFrame] | None:
    """``optimiser.network.<name>`` when that module exists and defines it, else None."""
    if importlib.util.find_spec("optimiser.network") is None:
        return None
    module = importlib.import_module("optimiser.network")
    return getattr(module, name, None)


def _has_upstream(itemsites: pd.DataFrame) -> bool:
    return bool((itemsites["upstream"] != "").any())


def _lead_time_moments(
    daily_mean: np.ndarray, daily_var: np.ndarray, lead: np.ndarray, lead_sd: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Lead-time demand mean and sd (Hadley & Whitin 1963): d·L and sqrt(L·σ_d² + d²·σ_L²)."""
    mean, sd = md.lead_time_demand(daily_mean, np.sqrt(daily_var), lead, lead_sd)
    return np.asarray(mean, dtype=float), np.asarray(sd, dtype=float)


def _single_site_inputs(itemsites: pd.DataFrame) -> dict[str, np.ndarray]:
    """Arrays for the single-site models; a site with sites below it faces the summed demand through it."""
    mean, var = through_demand(itemsites)
    lead = itemsites["lead_days"].to_numpy(dtype=float)
    lead_sd = itemsites["lead_days_sd"].to_numpy(dtype=float)
    ltd_mean, ltd_sd = _lead_time_moments(mean, var, lead, lead_sd)
    backorder = itemsites["backorder_cost"].to_numpy(dtype=float)
    return {
        "annual_demand": itemsites["annual_demand"].to_numpy(dtype=float),
        "ltd_mean": ltd_mean,
        "ltd_sd": ltd_sd,
        "order_cost": itemsites["order_cost"].to_numpy(dtype=float),
        "holding_cost": itemsites["holding_cost"].to_numpy(dtype=float),
        "distribution": itemsites["distribution"].to_numpy(dtype=np.int8),
        "backorder_cost": np.where(np.isnan(backorder), 0.0, backorder),
        "lead": lead,
    }


def _policy_frame(
    itemsites: pd.DataFrame, policy: ss.SitePolicy, lead: np.ndarray, ltd_mean: np.ndarray, ltd_sd: np.ndarray
) -> pd.DataFrame:
    cycle = np.asarray(policy.cycle_stock_cost, dtype=float)
    safety = np.asarray(policy.safety_stock_cost, dtype=float)
    frame = pd.DataFrame(
        {
            "site": itemsites["site"].to_numpy(dtype=object),
            "item": itemsites["item"].to_numpy(dtype=object),
            "order_quantity": np.asarray(policy.order_quantity, dtype=float),
            "reorder_point": np.asarray(policy.reorder_point, dtype=float),
            "safety_stock": np.asarray(policy.safety_stock, dtype=float),
            "lead_time_days": lead,
            "lead_time_demand_mean": ltd_mean,
            "lead_time_demand_sd": ltd_sd,
            "cycle_service": np.asarray(policy.cycle_service, dtype=float),
            "fill_rate": np.asarray(policy.fill_rate, dtype=float),
            "expected_on_hand": np.asarray(policy.expected_on_hand, dtype=float),
            "expected_backorders": np.asarray(policy.expected_backorders, dtype=float),
            "orders_per_year": np.asarray(policy.orders_per_year, dtype=float),
            "ordering_cost": np.asarray(policy.ordering_cost, dtype=float),
            "holding_cost": cycle + safety,
            "backorder_cost": np.asarray(policy.backorder_cost, dtype=float),
            "total_cost": np.asarray(policy.total_cost, dtype=float),
            "cycle_stock_cost": cycle,
            "safety_stock_cost": safety,
            "z": np.asarray(policy.z, dtype=float),
            "distribution": itemsites["distribution"].to_numpy(dtype=np.int8),
            "expected_delay_days": np.zeros(len(itemsites)),
            "note": np.asarray(policy.note).astype(np.int64),
        }
    )
    return frame


def _check_converged(policy: ss.SitePolicy, itemsites: pd.DataFrame, warnings: list[str]) -> None:
    converged = np.asarray(policy.converged, dtype=bool)
    if not converged.all():
        bad = itemsites.loc[~converged, ["site", "item"]]
        shown = ", ".join(f"{s}/{i}" for s, i in bad.head(5).itertuples(index=False))
        warnings.append(
            f"{int((~converged).sum())} item-site(s) did not converge; their policies are the last "
            f"iterate: {shown}"
        )
    total = np.asarray(policy.total_cost, dtype=float)
    if not np.isfinite(total).all():
        bad = itemsites.loc[~np.isfinite(total), ["site", "item"]].head(5)
        shown = ", ".join(f"{s}/{i}" for s, i in bad.itertuples(index=False))
        raise SolverError(f"non-finite cost for {int((~np.isfinite(total)).sum())} item-site(s): {shown}")


def _pack_sizes(itemsites: pd.DataFrame) -> np.ndarray:
    """Pack sizes for the models: NaN (no rounding) where the pack is a single unit."""
    pack = itemsites["pack_size"].to_numpy(dtype=float)
    return np.where(pack == 1.0, np.nan, pack)


def _plan_single_site(itemsites: pd.DataFrame, settings: Settings, warnings: list[str]) -> pd.DataFrame:
    arrays = _single_site_inputs(itemsites)
    mode = settings.mode
    policy = ss.optimise_policy(
        arrays["annual_demand"],
        arrays["ltd_mean"],
        arrays["ltd_sd"],
        arrays["order_cost"],
        arrays["holding_cost"],
        distribution=arrays["distribution"],
        mode=mode,
        backorder_cost=arrays["backorder_cost"] if mode == "cost" else None,
        backorder_basis=settings.backorder_basis,
        target=itemsites["target"].to_numpy(dtype=float) if mode != "cost" else None,
        order_quantity=itemsites["order_quantity"].to_numpy(dtype=float),
        pack_size=_pack_sizes(itemsites),
    )
    _check_converged(policy, itemsites, warnings)
    return _policy_frame(itemsites, policy, arrays["lead"], arrays["ltd_mean"], arrays["ltd_sd"])


def _evaluate_single_site(
    itemsites: pd.DataFrame,
    settings: Settings,
    reorder_point: np.ndarray,
    order_quantity: np.ndarray,
    warnings: list[str],
) -> pd.DataFrame:
    arrays = _single_site_inputs(itemsites)
    policy = ss.evaluate_policy(
        arrays["annual_demand"],
        arrays["ltd_mean"],
        arrays["ltd_sd"],
        arrays["order_cost"],
        arrays["holding_cost"],
        reorder_point,
        order_quantity,
        distribution=arrays["distribution"],
        backorder_cost=arrays["backorder_cost"],
        backorder_basis=settings.backorder_basis,
    )
    _check_converged(policy, itemsites, warnings)
    return _policy_frame(itemsites, policy, arrays["lead"], arrays["ltd_mean"], arrays["ltd_sd"])


def _align_policies(itemsites: pd.DataFrame, given: pd.DataFrame, label: str) -> pd.DataFrame:
    """Given policies in the row order of ``itemsites`` (item-sites missing in ``given`` left out).

    Checks what needs the item-site table: whole numbers for count demand, and an order quantity above 0
    wherever there is demand (0 is accepted only for an item-site without demand). Rows named in errors come
    from ``given.attrs["rows"]`` (spreadsheet rows) when the reader kept them.
    """
    rows = given.attrs.get("rows")
    keyed = given[["site", "item", "reorder_point", "order_quantity"]].assign(
        given_row=rows if rows is not None and len(rows) == len(given) else 0
    )
    merged = (
        itemsites[["site", "item", "distribution", "annual_demand"]]
        .reset_index()
        .merge(keyed, on=["site", "item"], how="inner")
    )

    def fail(mask: np.ndarray, column: str, rule: str) -> None:
        rec = merged[mask].iloc[0]
        raise CaseError(
            label,
            f"item {rec['item']!r} at site {rec['site']!r}: {rule}",
            row=int(rec["given_row"]) or None,
            column=column,
            value=rec[column],
        )

    counts = merged["distribution"].to_numpy() != md.NORMAL
    for column in ("reorder_point", "order_quantity"):
        values = merged[column].to_numpy(dtype=float)
        bad = counts & (values != np.round(values))
        if bad.any():
            fail(
                bad,
                column,
                "planned with count demand (Poisson or negative binomial), so give a whole number",
            )
    empty = (merged["order_quantity"].to_numpy() <= 0) & (merged["annual_demand"].to_numpy() > 0)
    if empty.any():
        fail(empty, "order_quantity", "must be greater than 0 where there is demand")
    return merged.sort_values("index")


def _evaluate(
    itemsites: pd.DataFrame, given: pd.DataFrame, settings: Settings, label: str, warnings: list[str]
) -> tuple[pd.DataFrame, str]:
    """Evaluate the given policies on the item-sites they cover; network evaluation where it applies."""
    aligned = _align_policies(itemsites, given, label)
    subset = itemsites.loc[aligned["index"].to_numpy()].reset_index(drop=True)
    if _has_upstream(itemsites):
        evaluate_network = _network_function("evaluate_network")
        if evaluate_network is not None:
            # the network evaluation needs every site of an item: keep the items fully covered
            covered = itemsites.assign(_given=itemsites.index.isin(aligned["index"])).groupby("item")[
                "_given"
            ]
            full_items = set(covered.all()[lambda s: s].index)
            keep = subset["item"].isin(full_items).to_numpy()
            if not keep.all():
                warnings.append(
                    f"{label}: {int((~keep).sum())} item-site(s) belong to items whose policies are "
                    "not given at every site; they are left out of the network evaluation"
                )
            subset = subset[keep].reset_index(drop=True)
            pols = aligned[keep].reset_index(drop=True)[["site", "item", "reorder_point", "order_quantity"]]
            frame = evaluate_network(subset, pols, settings)
            return frame[POLICY_COLUMNS].reset_index(drop=True), "network"
        warnings.append(NETWORK_DELAY_WARNING)
    frame = _evaluate_single_site(
        subset,
        settings,
        aligned["reorder_point"].to_numpy(dtype=float),
        aligned["order_quantity"].to_numpy(dtype=float),
        warnings,
    )
    return frame, "single-site"


# --------------------------------------------------------------------------------------------- totals


def _weighted(values: pd.Series, weights: pd.Series) -> float:
    w = weights.to_numpy(dtype=float)
    v = values.to_numpy(dtype=float)
    total = w.sum()
    return float(np.dot(v, w) / total) if total > 0 else float("nan")


def site_totals(policies: pd.DataFrame, itemsites: pd.DataFrame) -> pd.DataFrame:
    """Totals per site: annual costs, stock value, and demand-weighted service.

    Service at a site is weighted by the annual demand passing through each item-site (for a warehouse: the
    service it gives the sites it supplies).
    """
    joined = policies.merge(
        itemsites[["site", "item", "annual_demand", "unit_cost", "daily_mean"]],
        on=["site", "item"],
        how="left",
    )
    joined["safety_stock_value"] = joined["safety_stock"] * joined["unit_cost"]
    joined["stock_value"] = joined["expected_on_hand"] * joined["unit_cost"]
    rows = []
    order = list(dict.fromkeys(itemsites["site"]))
    for site in order:
        part = joined[joined["site"] == site]
        if part.empty:
            continue
        row: dict[str, Any] = {"site": site, "item_sites": len(part)}
        for column in COST_COLUMNS:
            row[column] = float(part[column].sum())
        row["orders_per_year"] = float(part["orders_per_year"].sum())
        row["annual_demand"] = float(part["annual_demand"].sum())
        row["safety_stock_value"] = float(part["safety_stock_value"].sum())
        row["stock_value"] = float(part["stock_value"].sum())
        row["expected_backorders"] = float(part["expected_backorders"].sum())
        row["fill_rate"] = _weighted(part["fill_rate"], part["annual_demand"])
        row["cycle_service"] = _weighted(part["cycle_service"], part["annual_demand"])
        rows.append(row)
    return pd.DataFrame(rows)


def network_totals(policies: pd.DataFrame, itemsites: pd.DataFrame) -> dict[str, Any]:
    """Totals over every site; service is weighted by end-customer demand (the sites' own daily demand)."""
    joined = policies.merge(
        itemsites[["site", "item", "unit_cost", "daily_mean"]], on=["site", "item"], how="left"
    )
    out: dict[str, Any] = {"sites": int(joined["site"].nunique()), "item_sites": len(joined)}
    for column in COST_COLUMNS:
        out[column] = float(joined[column].sum())
    out["orders_per_year"] = float(joined["orders_per_year"].sum())
    out["safety_stock_value"] = float((joined["safety_stock"] * joined["unit_cost"]).sum())
    out["stock_value"] = float((joined["expected_on_hand"] * joined["unit_cost"]).sum())
    out["expected_backorders"] = float(joined["expected_backorders"].sum())
    out["customer_fill_rate"] = _weighted(joined["fill_rate"], joined["daily_mean"])
    out["customer_cycle_service"] = _weighted(joined["cycle_service"], joined["daily_mean"])
    return out


def _comparison(recommended: pd.DataFrame, current: pd.DataFrame, itemsites: pd.DataFrame) -> pd.DataFrame:
    """Today's against the recommended policies, per site and for the network, on the item-sites covered."""
    keys = current[["site", "item"]]
    rec = recommended.merge(keys, on=["site", "item"], how="inner")
    now = site_totals(current, itemsites).set_index("site")
    new = site_totals(rec, itemsites).set_index("site")
    rows = []
    for site in now.index:
        rows.append(
            {
                "site": site,
                "item_sites": int(now.at[site, "item_sites"]),
                "current_total_cost": now.at[site, "total_cost"],
                "recommended_total_cost": new.at[site, "total_cost"],
                "current_stock_value": now.at[site, "stock_value"],
                "recommended_stock_value": new.at[site, "stock_value"],
                "current_fill_rate": now.at[site, "fill_rate"],
                "recommended_fill_rate": new.at[site, "fill_rate"],
            }
        )
    net_now, net_new = network_totals(current, itemsites), network_totals(rec, itemsites)
    rows.append(
        {
            "site": "(network)",
            "item_sites": net_now["item_sites"],
            "current_total_cost": net_now["total_cost"],
            "recommended_total_cost": net_new["total_cost"],
            "current_stock_value": net_now["stock_value"],
            "recommended_stock_value": net_new["stock_value"],
            "current_fill_rate": net_now["customer_fill_rate"],
            "recommended_fill_rate": net_new["customer_fill_rate"],
        }
    )
    frame = pd.DataFrame(rows)
    frame["saving"] = frame["current_total_cost"] - frame["recommended_total_cost"]
    return frame


# --------------------------------------------------------------------------------------------- public


def plan_case(case: Case, *, progress: Callable[[str], None] | None = None, grouping: bool = True,
              grouping_options: dict[str, Any] | None = None) -> PlanResult:
    """Recommend a reorder point and order quantity for every stocked item at every site.

    Parameters
    ----------
    case : Case
        From :func:`optimiser.case.load_case`.
    progress : callable, optional
        Called with a short line of text before each long step.
    grouping : bool
        After the (R, Q) plan, group the items each site orders from a supplier under the shared order cost
        (:func:`plan_grouping`); False records the section as skipped.
    grouping_options : dict, optional
        Passed to :func:`optimiser.grouping.group_case`.

    Returns
    -------
    PlanResult

    Notes
    -----
    Sites fed by suppliers only: one vectorised call of :func:`models.single_site.optimise_policy` over all
    item-sites. With upstream sites: :func:`optimiser.network.plan_network` where it exists; otherwise each
    site alone, a warehouse facing the summed daily mean and variance of the sites below it, with a warning.

    Examples
    --------
    >>> result = plan_case(load_case("cases/quickstart"))  # doctest: +SKIP
    >>> result.network["total_cost"]  # doctest: +SKIP
    """
    say = progress or (lambda _text: None)
    warnings = list(case.warnings)
    say("building the item-site table")
    itemsites = build_itemsites(case)
    say(f"planning {len(itemsites)} item-sites at {itemsites['site'].nunique()} site(s)")
    method = "single-site"
    network_summary = None
    if _has_upstream(itemsites):
        plan_network = _network_function("plan_network")
        if plan_network is not None:
            params = inspect.signature(plan_network).parameters
            if "return_summary" in params:
                extra = {"progress": say} if "progress" in params else {}
                policies, network_summary = plan_network(
                    itemsites, case.settings, return_summary=True, **extra
                )
            else:
                policies = plan_network(itemsites, case.settings)
            policies = policies[POLICY_COLUMNS].reset_index(drop=True)
            method = "network"
        else:
            warnings.append(NETWORK_DELAY_WARNING)
            policies = _plan_single_site(itemsites, case.settings, warnings)
    else:
        policies = _plan_single_site(itemsites, case.settings, warnings)

    current = comparison = None
    if case.policies is not None:
        say("evaluating today's policies")
        today = case.policies.copy()
        today.attrs["rows"] = case.rows.get("policies.csv")
        current, _ = _evaluate(itemsites, today, case.settings, "policies.csv", warnings)
        comparison = _comparison(policies, current, itemsites)
    if grouping:
        say("grouping the items ordered together from each supplier")
        section = plan_grouping(case, itemsites, policies, progress=say, **(grouping_options or {}))
        if section.state == "failed":
            warnings.append(f"ordering together: {section.message}; the plan above is complete without it")
    else:
        section = GroupingSection("skipped", "grouping skipped (--no-grouping)")
    warnings = list(dict.fromkeys(warnings))
    return PlanResult(
        command="plan",
        settings=case.settings,
        itemsites=itemsites,
        policies=policies,
        site_totals=site_totals(policies, itemsites),
        network=network_totals(policies, itemsites),
        warnings=warnings,
        current=current,
        comparison=comparison,
        method=method,
        network_summary=network_summary,
        grouping=section,
    )


def evaluate_case(
    case: Case,
    policies_df: pd.DataFrame,
    *,
    label: str = "policies",
    progress: Callable[[str], None] | None = None,
) -> PlanResult:
    """Evaluate given policies (``site, item, reorder_point, order_quantity``) without optimising.

    Parameters
    ----------
    case : Case
        From :func:`optimiser.case.load_case`.
    policies_df : DataFrame
        One row per stocked item-site (see :func:`optimiser.case.load_policies_for_case`).
    label : str
        File name used in error messages.
    progress : callable, optional
        Called with a short line of text before each long step.

    Returns
    -------
    PlanResult
        ``policies`` holds the evaluated policies.
    """
    say = progress or (lambda _text: None)
    warnings = list(case.warnings)
    itemsites = build_itemsites(case)
    say(f"evaluating {len(policies_df)} policies at {itemsites['site'].nunique()} site(s)")
    frame, method = _evaluate(itemsites, policies_df, case.settings, label, warnings)
    warnings = list(dict.fromkeys(warnings))
    return PlanResult(
        command="evaluate",
        settings=case.settings,
        itemsites=itemsites,
        policies=frame,
        site_totals=site_totals(frame, itemsites),
        network=network_totals(frame, itemsites),
        warnings=warnings,
        method=method,
    )
