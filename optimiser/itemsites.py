"""Turn a validated case into the item-site table: one row per stocked (site, item).

The columns are the contract in DEVELOPERS.md ("Item-site table"). Everything the numerical models need per
item-site is resolved here once: which lead time applies, which order cost, which holding and backorder cost,
which distribution, which target, fixed order quantity and pack size.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from models import demand as md
from optimiser.case import Case, ancestors, stocked_pairs
from optimiser.errors import CaseError

__all__ = [
    "build_itemsites",
    "through_demand",
    "ITEMSITE_COLUMNS",
    "DISTRIBUTION_CODES",
    "distribution_names",
]

ITEMSITE_COLUMNS = [
    "site", "item", "supplier", "upstream", "daily_mean", "daily_sd", "lead_days", "lead_days_sd",
    "annual_demand", "order_cost", "holding_cost", "backorder_cost", "distribution", "target",
    "order_quantity", "pack_size", "unit_cost", "volume", "weight",
]  # fmt: skip

DISTRIBUTION_CODES = {"normal": int(md.NORMAL), "poisson": int(md.POISSON), "negbin": int(md.NEGBIN)}


def distribution_names(codes: np.ndarray) -> np.ndarray:
    """Names (``normal``, ``poisson``, ``negbin``) of an array of distribution codes.

    Examples
    --------
    >>> distribution_names(np.array([0, 2], dtype=np.int8)).tolist()
    ['normal', 'negbin']
    """
    table = np.empty(max(DISTRIBUTION_CODES.values()) + 1, dtype=object)
    for name, code in DISTRIBUTION_CODES.items():
        table[code] = name
    return table[np.asarray(codes, dtype=np.int64)]


def through_demand(itemsites: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Daily demand mean and variance passing through each item-site: its own plus every stocked site below.

    Demands of different sites are taken as independent, so variances add.

    Parameters
    ----------
    itemsites : DataFrame
        Needs ``site, item, upstream, daily_mean, daily_sd``.

    Returns
    -------
    mean, var : ndarray
        Arrays aligned with the rows of ``itemsites``.

    Examples
    --------
    >>> t = pd.DataFrame({"site": ["wh", "s1", "s2"], "item": ["a"] * 3, "upstream": ["", "wh", "wh"],
    ...                   "daily_mean": [0.0, 2.0, 3.0], "daily_sd": [0.0, 1.0, 2.0]})
    >>> [m.tolist() for m in through_demand(t)]
    [[5.0, 2.0, 3.0], [5.0, 1.0, 4.0]]
    """
    upstream = dict(zip(itemsites["site"], itemsites["upstream"], strict=True))
    own = itemsites[["site", "item", "daily_mean"]].copy()
    own["var"] = itemsites["daily_sd"].to_numpy(dtype=float) ** 2
    parts = [own]
    for site, rows in own.groupby("site", sort=False):  # a loop over sites, each step over whole arrays
        parts += [rows.assign(site=above) for above in ancestors(upstream, str(site))]
    total = (
        pd.concat(parts, ignore_index=True).groupby(["site", "item"], sort=False)[["daily_mean", "var"]].sum()
    )
    key = pd.MultiIndex.from_frame(itemsites[["site", "item"]])
    aligned = total.reindex(key)
    return aligned["daily_mean"].to_numpy(dtype=float), aligned["var"].to_numpy(dtype=float)


def build_itemsites(case: Case) -> pd.DataFrame:
    """Build the item-site table of a case.

    Parameters
    ----------
    case : Case
        A case from :func:`optimiser.case.load_case`.

    Returns
    -------
    DataFrame
        One row per stocked (site, item) with the columns of :data:`ITEMSITE_COLUMNS`.

    Notes
    -----
    * Stocked: the rows of ``stocking.csv``; without it every (site, item) in the demand table and, for each,
      every site above it.
    * ``lead_days``: the supplier's lead time at a site with no upstream, the site's transit time below.
    * ``annual_demand`` = (own daily mean + daily means of every stocked site below) × ``days_per_year``.
    * ``order_cost``: supplier ``order_cost + line_cost`` at a root site (the item's ``line_cost`` in
      ``items.csv`` overrides the supplier's), the site's ``delivery_cost`` below.
    * ``holding_cost``: ``items.holding_cost`` or ``holding_rate × unit_cost``.
    * ``backorder_cost``, ``order_quantity``, ``pack_size``, ``target``: ``stocking.csv`` overrides
      ``items.csv`` overrides ``case.toml``; targets apply only in the service modes.
    * ``distribution``: ``items.csv``, else the history estimate, else ``case.toml``; ``auto`` is resolved by
      :func:`models.demand.choose_distribution` on the lead-time demand passing through the site (and, for
      demand estimated from history, its intermittency class).

    Examples
    --------
    >>> table = build_itemsites(load_case("cases/quickstart"))  # doctest: +SKIP
    """
    settings = case.settings
    pairs = stocked_pairs(case.sites, case.demand, case.stocking)
    frame = pairs.merge(
        case.sites[["site", "upstream", "transit_days", "transit_days_sd", "delivery_cost"]],
        on="site",
        how="left",
    )
    frame = frame.merge(
        case.items.rename(
            columns={
                "pack_size": "item_pack",
                "backorder_cost": "item_backorder",
                "distribution": "item_distribution",
                "line_cost": "item_line_cost",
            }
        ),
        on="item",
        how="left",
    )
    frame = frame.merge(
        case.suppliers[["supplier", "lead_days", "lead_days_sd", "order_cost", "line_cost"]],
        on="supplier",
        how="left",
    )
    demand = case.demand[["site", "item", "daily_mean", "daily_sd", "distribution", "demand_class"]].rename(
        columns={"distribution": "estimated_distribution"}
    )
    frame = frame.merge(demand, on=["site", "item"], how="left")
    if case.stocking is not None:
        stock = case.stocking.rename(
            columns={c: f"stock_{c}" for c in ("order_quantity", "pack_size", "target", "backorder_cost")}
        )
        rows = case.rows.get("stocking.csv") or [0] * len(stock)
        frame = frame.merge(stock.assign(stock_row=rows), on=["site", "item"], how="left")
    else:
        for c in ("order_quantity", "pack_size", "target", "backorder_cost"):
            frame[f"stock_{c}"] = np.nan

    n = len(frame)
    root = (frame["upstream"] == "").to_numpy()
    out = pd.DataFrame(
        {
            "site": frame["site"].astype(object),
            "item": frame["item"].astype(object),
            "supplier": frame["supplier"].astype(object),
            "upstream": frame["upstream"].astype(object),
            "daily_mean": frame["daily_mean"].fillna(0.0).to_numpy(dtype=float),
            "daily_sd": frame["daily_sd"].fillna(0.0).to_numpy(dtype=float),
            "lead_days": np.where(root, frame["lead_days"], frame["transit_days"]).astype(float),
            "lead_days_sd": np.where(root, frame["lead_days_sd"], frame["transit_days_sd"]).astype(float),
        }
    )
    mean, var = through_demand(out)
    out["annual_demand"] = mean * settings.days_per_year
    out["order_cost"] = np.where(
        root, frame["order_cost"] + frame["item_line_cost"].fillna(frame["line_cost"]), frame["delivery_cost"]
    ).astype(float)
    holding = frame["holding_cost"].to_numpy(dtype=float)
    out["holding_cost"] = np.where(np.isnan(holding), settings.holding_rate * frame["unit_cost"], holding)
    out["backorder_cost"] = (
        frame["stock_backorder_cost"].fillna(frame["item_backorder"]).to_numpy(dtype=float)
    )

    # distribution: items.csv, else the estimate, else case.toml; "auto" resolved on the through-demand
    names = frame["item_distribution"].fillna("").astype(str).to_numpy(dtype=object)
    estimated = frame["estimated_distribution"].fillna("").astype(str).to_numpy(dtype=object)
    names = np.where(names == "", estimated, names)
    names = np.where(names == "", settings.distribution, names)
    codes = np.zeros(n, dtype=np.int8)
    for name, code in DISTRIBUTION_CODES.items():
        codes[names == name] = code
    auto = names == "auto"
    if auto.any():
        ltd_mean, ltd_sd = md.lead_time_demand(mean, np.sqrt(var), out["lead_days"], out["lead_days_sd"])
        class_codes = {name: code for code, name in md.CLASS_NAMES.items()}
        demand_class = frame["demand_class"].map(class_codes).fillna(-1).to_numpy(dtype=np.int64)
        chosen = md.choose_distribution(
            ltd_mean[auto], ltd_sd[auto] ** 2, "auto", demand_class=demand_class[auto]
        )
        codes[auto] = np.asarray(chosen, dtype=np.int8)
    out["distribution"] = codes

    if settings.mode == "cost":
        out["target"] = np.nan
    else:
        default = np.nan if settings.target is None else settings.target
        out["target"] = frame["stock_target"].fillna(default).to_numpy(dtype=float)
    fixed = frame["stock_order_quantity"].to_numpy(dtype=float)
    fractional = (codes != md.NORMAL) & np.isfinite(fixed) & (fixed != np.round(fixed))
    if fractional.any():
        first = int(np.flatnonzero(fractional)[0])
        raise CaseError(
            "stocking.csv",
            f"item {frame['item'].iloc[first]!r} at site {frame['site'].iloc[first]!r} is planned with count "
            "demand (Poisson or negative binomial): a fixed order quantity must be a whole number",
            row=int(frame["stock_row"].iloc[first]) or None,
            column="order_quantity",
            value=fixed[first],
        )
    out["order_quantity"] = fixed
    out["pack_size"] = frame["stock_pack_size"].fillna(frame["item_pack"]).fillna(1.0).to_numpy(dtype=float)
    out["unit_cost"] = frame["unit_cost"].to_numpy(dtype=float)
    out["volume"] = frame["volume"].to_numpy(dtype=float)
    out["weight"] = frame["weight"].to_numpy(dtype=float)
    return out[ITEMSITE_COLUMNS].reset_index(drop=True)
