"""The site forest and network planning: a warehouse and the stores it supplies, planned together.

* :func:`build_forest` / :func:`forest_from_itemsites` check that the supply links form a forest fed by
  suppliers (every chain of upstream sites ends at a site with no upstream) and give levels (roots first),
  children and depth. Errors are :class:`~optimiser.errors.CaseError` naming the sites.
* :func:`plan_network` plans every item of a case with upstream sites: single-site seeds, then the warehouse
  reorder point searched with the stores' reorder points re-optimised for each candidate
  (:func:`models.echelon.optimise_two_level`). Trees deeper than two levels are planned level by level with
  the same step (:func:`models.echelon.optimise_tree`). Sites with neither upstream nor downstream sites are
  planned alone.
* :func:`evaluate_network` evaluates given policies the same way.
* :func:`network_summary` (also ``plan_network(..., return_summary=True)``): per item and root site, how
  safety stock splits between the warehouse and the stores, and what the network plan saves against planning
  each site alone.

The policies frame has the columns of ``policies.csv`` (DEVELOPERS.md); stores carry ``expected_delay_days``
(the mean wait at their upstream site) and their ``lead_time_days`` includes it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import pandas as pd

from models import demand as md
from models import echelon as ech
from models import single_site as ss
from optimiser import plan as pl
from optimiser.errors import CaseError

__all__ = [
    "SiteForest",
    "build_forest",
    "forest_from_itemsites",
    "plan_network",
    "evaluate_network",
    "network_summary",
    "POLICY_COLUMNS",
]

POLICY_COLUMNS = pl.POLICY_COLUMNS  # the columns of policies.csv (one list, kept in optimiser.plan)

SUMMARY_COLUMNS = [
    "root", "item", "stores", "warehouse_safety_stock", "stores_safety_stock", "warehouse_share",
    "network_cost", "single_site_cost", "single_site_network_cost", "savings", "savings_pct",
    "mean_delay_days", "single_site_mean_delay_days", "store_fill_rate", "single_site_store_fill_rate",
]  # fmt: skip


# ----------------------------------------------------------------------------------------------- the forest
@dataclass(frozen=True)
class SiteForest:
    """Sites as nodes, supply links ``upstream -> site`` as edges; checked to be a forest.

    Attributes
    ----------
    graph : networkx.DiGraph
        Edge ``u -> v`` when site ``u`` supplies site ``v``.
    parent : dict
        Upstream site of each site (``""`` for a site fed by a supplier).
    levels : list of list of str
        Sites by depth, roots first (each level sorted).
    """

    graph: nx.DiGraph
    parent: dict[str, str]
    levels: list[list[str]] = field(default_factory=list)

    @property
    def roots(self) -> list[str]:
        return list(self.levels[0]) if self.levels else []

    def children(self, site: str) -> list[str]:
        """Sites supplied by ``site`` (sorted)."""
        return sorted(self.graph.successors(site))

    def depth(self, site: str) -> int:
        """0 for a root, 1 for a site it supplies, ..."""
        d = 0
        while self.parent[site]:
            site = self.parent[site]
            d += 1
        return d

    def root_of(self, site: str) -> str:
        while self.parent[site]:
            site = self.parent[site]
        return site

    @property
    def height(self) -> int:
        """Number of levels."""
        return len(self.levels)


def build_forest(sites, upstream, *, file: str = "sites.csv") -> SiteForest:
    """Check the supply links and build the site forest.

    Parameters
    ----------
    sites : sequence of str
        Site names (each once, or repeated with the same upstream).
    upstream : sequence of str
        Upstream site of each, ``""`` (or NaN/None) for a site fed by a supplier.
    file : str
        File named in errors.

    Returns
    -------
    SiteForest

    Raises
    ------
    CaseError
        A site supplied by itself, by an unknown site, by two different sites, or a cycle of sites.

    Examples
    --------
    >>> f = build_forest(["WH", "S1", "S2"], ["", "WH", "WH"])
    >>> f.levels, f.children("WH")
    ([['WH'], ['S1', 'S2']], ['S1', 'S2'])
    """
    names = [str(s) for s in sites]
    ups = ["" if (u is None or (isinstance(u, float) and np.isnan(u))) else str(u) for u in upstream]
    if len(names) != len(ups):
        raise ValueError(f"sites and upstream differ in length ({len(names)} != {len(ups)})")
    parent: dict[str, str] = {}
    for s, u in zip(names, ups, strict=True):
        if s in parent and parent[s] != u:
            raise CaseError(
                file,
                f"site {s!r} is supplied by two sites ({parent[s]!r} and {u!r}); "
                "each site must have one upstream",
                column="upstream",
                value=u,
            )
        parent[s] = u
    graph = nx.DiGraph()
    graph.add_nodes_from(parent)
    for s, u in parent.items():
        if not u:
            continue
        if u == s:
            raise CaseError(file, f"site {s!r} is its own upstream", column="upstream", value=u)
        if u not in parent:
            raise CaseError(
                file, f"site {s!r} has an unknown upstream site {u!r}", column="upstream", value=u
            )
        graph.add_edge(u, s)
    try:
        cycle = nx.find_cycle(graph)
    except nx.NetworkXNoCycle:
        cycle = None
    if cycle:
        loop = [e[0] for e in cycle]
        raise CaseError(
            file,
            "the supply links form a cycle: "
            + " -> ".join(loop + [loop[0]])
            + " (every chain of upstream sites must end at a site fed by a supplier)",
            column="upstream",
        )
    levels: list[list[str]] = []
    current = sorted(s for s, u in parent.items() if not u)
    while current:
        levels.append(current)
        current = sorted(c for s in current for c in graph.successors(s))
    return SiteForest(graph=graph, parent=parent, levels=levels)


def forest_from_itemsites(itemsites: pd.DataFrame) -> SiteForest:
    """The site forest of an item-site table (``site``, ``upstream``) and a check that upstream sites stock.

    Raises
    ------
    CaseError
        As :func:`build_forest`; and when an item is stocked at a site but not at its upstream site.
    """
    pairs = itemsites[["site", "upstream"]].drop_duplicates()
    forest = build_forest(pairs["site"].tolist(), pairs["upstream"].fillna("").tolist())
    up = itemsites["upstream"].fillna("").astype(str)
    below = itemsites.loc[up != "", ["site", "item", "upstream"]]
    if len(below):
        stocked = set(zip(itemsites["site"].astype(str), itemsites["item"].astype(str), strict=True))
        missing = [
            (s, i, u) for s, i, u in below.astype(str).itertuples(index=False) if (u, i) not in stocked
        ]
        if missing:
            s, i, u = missing[0]
            raise CaseError(
                "stocking.csv",
                f"item {i!r} is stocked at {s!r} but not at its upstream site {u!r} "
                f"({len(missing)} such item-site(s))",
                column="site",
                value=s,
            )
    return forest


# ----------------------------------------------------------------------------------------------- arrays
@dataclass
class _Block:
    """Item-sites of one tree shape arranged as arrays: ``n`` (item, root) trees x ``S`` sites."""

    rows: np.ndarray  # (n, S) row index into the item-site table, -1 where not stocked
    parent: np.ndarray  # (S,) parent slot, -1 for the root
    sites: list[str]
    items: np.ndarray  # (n,) item names
    root: str


def _blocks(itemsites: pd.DataFrame, forest: SiteForest) -> list[_Block]:
    """One block per root site: all items stocked at that root, with every site of its tree as a slot."""
    table = itemsites.reset_index(drop=True)
    roots_of = table["site"].astype(str).map(forest.root_of)
    out = []
    for root in forest.roots:
        tree_sites = [root] + sorted(nx.descendants(forest.graph, root), key=lambda s: (forest.depth(s), s))
        slot = {s: k for k, s in enumerate(tree_sites)}
        part = table[roots_of == root]
        if part.empty:
            continue
        items = pd.unique(part.loc[part["site"].astype(str) == root, "item"])
        if len(items) == 0:
            continue
        item_pos = {it: k for k, it in enumerate(items)}
        rows = np.full((len(items), len(tree_sites)), -1, dtype=np.int64)
        sel = part[part["item"].isin(item_pos)]
        ii = sel["item"].map(item_pos).to_numpy()
        ss = sel["site"].astype(str).map(slot).to_numpy()
        rows[ii, ss] = sel.index.to_numpy()
        parent = np.array([-1 if not forest.parent[s] else slot[forest.parent[s]] for s in tree_sites])
        out.append(_Block(rows=rows, parent=parent, sites=tree_sites, items=np.asarray(items), root=root))
    return out


def _col(table: pd.DataFrame, rows: np.ndarray, name: str, fill: float = 0.0) -> np.ndarray:
    values = table[name].to_numpy(dtype=float)
    return np.where(rows >= 0, values[np.maximum(rows, 0)], fill)


def _settings_value(settings, name, default):
    return getattr(settings, name, default) if settings is not None else default


def _with_target_and_backorder(table: pd.DataFrame, settings) -> pd.DataFrame:
    """``table`` plus ``_target`` (the row's target, else the case's) and ``_back`` (backorder cost or 0)."""
    target_default = _settings_value(settings, "target", None)
    target = table["target"].to_numpy(dtype=float) if "target" in table else np.full(len(table), np.nan)
    if target_default is not None:
        target = np.where(np.isfinite(target), target, float(target_default))
    back = table["backorder_cost"].to_numpy(dtype=float)
    return table.assign(_target=target, _back=np.where(np.isfinite(back), back, 0.0))


def _two_level_inputs(table: pd.DataFrame, rows: np.ndarray, settings) -> ech.TwoLevelInputs:
    """Inputs for blocks whose slot 0 is the warehouse and slots 1.. are its stores."""
    wh = rows[:, 0]
    st = rows[:, 1:]
    active = st >= 0
    code = table["distribution"].to_numpy(dtype=np.int64)
    mode = _settings_value(settings, "mode", "cost")
    basis = _settings_value(settings, "backorder_basis", "per_unit")
    days = float(_settings_value(settings, "days_per_year", 365.0))
    table = _with_target_and_backorder(table, settings)

    def store(name, fill=0.0):
        return _col(table, st, name, fill)

    def house(name, fill=0.0):
        return _col(table, wh, name, fill)

    return ech.TwoLevelInputs(
        store_active=active,
        store_mean=np.where(active, store("daily_mean"), 0.0),
        store_sd=store("daily_sd"),
        store_lead=store("lead_days"),
        store_lead_sd=store("lead_days_sd"),
        store_count=np.where(active, code[np.maximum(st, 0)] != md.NORMAL, False),
        store_order_cost=store("order_cost"),
        store_holding_cost=store("holding_cost"),
        store_backorder_cost=store("_back"),
        store_target=store("_target", np.nan) if mode != "cost" else np.full(st.shape, np.nan),
        store_fixed_q=store("order_quantity", np.nan),
        store_pack=store("pack_size", 1.0),
        warehouse_lead=house("lead_days"),
        warehouse_lead_sd=house("lead_days_sd"),
        warehouse_own_mean=house("daily_mean"),
        warehouse_own_sd=house("daily_sd"),
        warehouse_count=code[wh] != md.NORMAL,
        warehouse_order_cost=house("order_cost"),
        warehouse_holding_cost=house("holding_cost"),
        warehouse_backorder_cost=house("_back"),
        warehouse_target=house("_target", np.nan) if mode != "cost" else np.full(wh.shape, np.nan),
        warehouse_fixed_q=house("order_quantity", np.nan),
        warehouse_pack=house("pack_size", 1.0),
        days_per_year=days,
        mode=mode,
        backorder_basis=basis,
    )


def _frame_two_level(
    table: pd.DataFrame, rows: np.ndarray, res: ech.TwoLevelResult, inp: ech.TwoLevelInputs
) -> pd.DataFrame:
    """Policies frame rows (warehouses then stores) of a two-level result."""
    n = rows.shape[0]
    wh = rows[:, 0]
    act = inp.store_active
    st_rows = rows[:, 1:][act]
    pol = res.store_policy
    days = inp.days_per_year
    q0 = res.warehouse_order_quantity
    h0 = inp.warehouse_holding_cost
    cycle0 = h0 * q0 / 2.0
    ss0 = res.warehouse_reorder_point - res.warehouse_ltd_mean
    sd0 = res.warehouse_ltd_sd
    z0 = np.where(sd0 > 0, ss0 / np.where(sd0 > 0, sd0, 1.0), np.nan)
    through = (np.where(act, inp.store_mean, 0.0).sum(axis=1) + inp.warehouse_own_mean) * days
    total0 = res.warehouse_ordering_cost + res.warehouse_holding_cost + res.warehouse_backorder_cost
    code = table["distribution"].to_numpy(dtype=np.int64)
    warehouse = pd.DataFrame(
        {
            "site": table["site"].to_numpy(dtype=object)[wh],
            "item": table["item"].to_numpy(dtype=object)[wh],
            "order_quantity": q0,
            "reorder_point": res.warehouse_reorder_point,
            "safety_stock": ss0,
            "lead_time_days": inp.warehouse_lead,
            "lead_time_demand_mean": res.warehouse_ltd_mean,
            "lead_time_demand_sd": sd0,
            "cycle_service": res.warehouse_cycle_service,
            "fill_rate": res.warehouse_fill_rate,
            "expected_on_hand": res.warehouse_on_hand,
            "expected_backorders": res.warehouse_backorders,
            "orders_per_year": np.where(q0 > 0, through / np.maximum(q0, 1e-12), 0.0),
            "ordering_cost": res.warehouse_ordering_cost,
            "holding_cost": res.warehouse_holding_cost,
            "backorder_cost": res.warehouse_backorder_cost,
            "total_cost": total0,
            "cycle_stock_cost": cycle0,
            "safety_stock_cost": res.warehouse_holding_cost - cycle0,
            "z": z0,
            "distribution": code[wh].astype(np.int8),
            "expected_delay_days": np.zeros(n),
            "note": np.zeros(n, dtype=np.int64),
        }
    )
    delay = res.store_delay[act]
    stores = pl._policy_frame(
        table.iloc[st_rows], pol, inp.store_lead[act] + delay, res.store_ltd_mean[act], res.store_ltd_sd[act]
    ).assign(expected_delay_days=delay)
    return pd.concat([warehouse, stores], ignore_index=True)[POLICY_COLUMNS]


def _summary_frame(
    table, rows, root, stores, ss_wh, ss_st, res_cost, seed_cost, nominal, figures
) -> pd.DataFrame:
    """Summary rows of one block: safety stock split, costs and savings; ``figures`` the demand-weighted
    store figures (``mean_delay_days, single_site_mean_delay_days, store_fill_rate,
    single_site_store_fill_rate``)."""
    tot = ss_wh + ss_st
    savings = seed_cost - res_cost
    return pd.DataFrame(
        {
            "root": root,
            "item": table["item"].to_numpy(dtype=object)[rows[:, 0]],
            "stores": stores,
            "warehouse_safety_stock": ss_wh,
            "stores_safety_stock": ss_st,
            "warehouse_share": np.where(np.abs(tot) > 0, ss_wh / np.where(np.abs(tot) > 0, tot, 1.0), np.nan),
            "network_cost": res_cost,
            "single_site_cost": nominal,
            "single_site_network_cost": seed_cost,
            "savings": savings,
            "savings_pct": np.where(
                seed_cost > 0, 100.0 * savings / np.where(seed_cost > 0, seed_cost, 1.0), np.nan
            ),
            **figures,
        }
    )[SUMMARY_COLUMNS]


def _summary_two_level(table, rows, res, seed, inp, root, seed_nominal) -> pd.DataFrame:
    act = inp.store_active
    item_of_store = np.nonzero(act)[0]
    n = rows.shape[0]
    ss_st = np.bincount(
        item_of_store, weights=np.asarray(res.store_policy.safety_stock, dtype=float), minlength=n
    )
    ss_wh = res.warehouse_reorder_point - res.warehouse_ltd_mean
    demand = inp.store_mean[act]

    def fill(r):
        f = np.asarray(r.store_policy.fill_rate, dtype=float)
        w = np.bincount(item_of_store, weights=demand, minlength=n)
        return np.bincount(item_of_store, weights=f * demand, minlength=n) / np.where(w > 0, w, 1.0)

    figures = {
        "mean_delay_days": res.mean_delay,
        "single_site_mean_delay_days": seed.mean_delay,
        "store_fill_rate": fill(res),
        "single_site_store_fill_rate": fill(seed),
    }
    return _summary_frame(
        table, rows, root, act.sum(axis=1), ss_wh, ss_st, res.network_cost, seed.network_cost, seed_nominal,
        figures,
    )


def _single_site_frame(table: pd.DataFrame, settings) -> pd.DataFrame:
    """Sites with neither upstream nor downstream sites: the single-site plan."""
    return pl._plan_single_site(table.reset_index(drop=True), settings, [])


def plan_network(itemsites: pd.DataFrame, settings, *, return_summary: bool = False, progress=None):
    """Plan every item of a network: policies for every stocked site, the network delay included.

    Parameters
    ----------
    itemsites : DataFrame
        The item-site table (DEVELOPERS.md).
    settings : Settings
        Case settings (``mode``, ``target``, ``backorder_basis``, ``days_per_year``).
    return_summary : bool
        Also return the per-item summary (:data:`SUMMARY_COLUMNS`).
    progress : callable, optional
        Called with a line of text now and then (long plans).

    Returns
    -------
    DataFrame, or (DataFrame, DataFrame)
        The policies frame (:data:`POLICY_COLUMNS`, in the row order of ``itemsites``) and, when asked, the
        summary.

    Examples
    --------
    See ``tests/test_network.py``.
    """
    return _run(itemsites, settings, None, return_summary, progress)


def evaluate_network(itemsites: pd.DataFrame, policies: pd.DataFrame, settings) -> pd.DataFrame:
    """Evaluate given policies (``site, item, reorder_point, order_quantity``) across the network.

    Parameters
    ----------
    itemsites : DataFrame
        Item-site table; every site of an evaluated item must have a policy.
    policies : DataFrame
        Columns ``site, item, reorder_point, order_quantity``.
    settings : Settings

    Returns
    -------
    DataFrame
        Policies frame (:data:`POLICY_COLUMNS`) in the row order of ``itemsites``.
    """
    given = policies[["site", "item", "reorder_point", "order_quantity"]].copy()
    given["site"] = given["site"].astype(str)
    given["item"] = given["item"].astype(str)
    key = itemsites[["site", "item"]].astype(str).merge(given, on=["site", "item"], how="left")
    if key["reorder_point"].isna().any() or key["order_quantity"].isna().any():
        bad = key[key["reorder_point"].isna() | key["order_quantity"].isna()].iloc[0]
        raise CaseError(
            "policies.csv",
            f"no policy for site {bad['site']!r}, item {bad['item']!r}: the network "
            "evaluation needs a policy at every stocked site of an item",
            column="reorder_point",
        )
    return _run(itemsites, settings, key[["reorder_point", "order_quantity"]].to_numpy(dtype=float), False)


def network_summary(itemsites: pd.DataFrame, settings) -> pd.DataFrame:
    """Per item and root: safety stock split, network cost and savings against planning each site alone."""
    return plan_network(itemsites, settings, return_summary=True)[1]


def _store_method(settings) -> str:
    """``models.echelon`` store method for the case setting ``store_model`` (auto / units / moments)."""
    return {"auto": "auto", "units": "units", "moments": "moments"}[getattr(settings, "store_model", "auto")]


def _run(itemsites: pd.DataFrame, settings, given: np.ndarray | None, return_summary: bool, progress=None):
    table = itemsites.reset_index(drop=True)
    forest = forest_from_itemsites(table)
    frames = []
    summaries = []
    covered = np.zeros(len(table), dtype=bool)
    for block in _blocks(table, forest):
        depth = len(set(forest.depth(s) for s in block.sites))
        stocked_below = (
            (block.rows[:, 1:] >= 0).any(axis=1)
            if block.rows.shape[1] > 1
            else np.zeros(block.rows.shape[0], dtype=bool)
        )
        if depth == 1 or not stocked_below.any():
            continue  # lone sites: single-site below
        rows = block.rows[stocked_below]
        if depth == 2:
            inp = _two_level_inputs(table, rows, settings)
            if given is None:
                if progress is not None:
                    progress(f"network below {block.root}: {len(rows)} items")
                workers = min(2, os.cpu_count() or 1)
                res, seed = ech.optimise_two_level(
                    inp, workers=workers, progress=progress, store_method=_store_method(settings)
                )
                frames.append(_frame_two_level(table, rows, res, inp))
                if return_summary:
                    nominal = _seed_nominal_cost(inp)
                    summaries.append(_summary_two_level(table, rows, res, seed, inp, block.root, nominal))
            else:
                st = rows[:, 1:]
                sr = np.where(st >= 0, given[np.maximum(st, 0), 0], 0.0)
                sq = np.where(st >= 0, given[np.maximum(st, 0), 1], 1.0)
                res = ech.evaluate_two_level(inp, sr, sq, given[rows[:, 0], 0], given[rows[:, 0], 1],
                                             workers=min(2, os.cpu_count() or 1),
                                             store_method=_store_method(settings))
                frames.append(_frame_two_level(table, rows, res, inp))
        else:
            frames.append(_tree(table, rows, block, settings, given, summaries if return_summary else None))
        covered[rows[rows >= 0]] = True
    rest = table[~covered]
    if len(rest):
        if given is None:
            frames.append(_single_site_frame(rest, settings))
        else:
            frames.append(
                pl._evaluate_single_site(
                    rest.reset_index(drop=True), settings, given[~covered, 0], given[~covered, 1], []
                )
            )
    out = pd.concat(frames, ignore_index=True)[POLICY_COLUMNS]
    order = (
        table[["site", "item"]]
        .astype(str)
        .reset_index()
        .merge(
            out.assign(site=out["site"].astype(str), item=out["item"].astype(str)),
            on=["site", "item"],
            how="left",
        )
    )
    out = order.sort_values("index").drop(columns="index").reset_index(drop=True)[POLICY_COLUMNS]
    # The network step holds store order quantities while it searches reorder points, and the single-site
    # kernels flag such a Q as fixed; only a quantity fixed in the case (stocking.csv) deserves that note.
    by_case = np.isfinite(table["order_quantity"].to_numpy(dtype=float))
    note = out["note"].to_numpy(dtype=np.int64)
    out["note"] = np.where(by_case, note, note & ~np.int64(ss.NOTE_FIXED_Q))
    if return_summary:
        summary = (
            pd.concat(summaries, ignore_index=True) if summaries else pd.DataFrame(columns=SUMMARY_COLUMNS)
        )
        return out, summary
    return out


def _seed_nominal_cost(inp: ech.TwoLevelInputs) -> np.ndarray:
    """Sum of the sites' own planned costs when each is planned alone (what single-site planning promises)."""
    n = inp.n
    zero = np.zeros(n)
    rows, _, _, _, pol = ech._optimise_stores(inp, zero, zero, inp.store_fixed_q)
    store = np.bincount(rows, weights=np.asarray(pol.total_cost, dtype=float), minlength=n)
    _, _, r0, q0, demand = ech.single_site_seed(inp)
    state = ech.warehouse_moments(ech._lattice_q0(demand, q0), r0, q0)
    ordering, holding, back, _ = ech._warehouse_rows(inp, demand, state, q0)
    return store + ordering + holding + back


def _tree_inputs(table: pd.DataFrame, rows: np.ndarray, parent: np.ndarray, settings) -> ech.TreeInputs:
    active = rows >= 0
    code = table["distribution"].to_numpy(dtype=np.int64)
    mode = _settings_value(settings, "mode", "cost")
    table = _with_target_and_backorder(table, settings)

    def col(name, fill=0.0):
        return _col(table, rows, name, fill)

    return ech.TreeInputs(
        parent=parent,
        active=active,
        mean=np.where(active, col("daily_mean"), 0.0),
        sd=col("daily_sd"),
        lead=col("lead_days"),
        lead_sd=col("lead_days_sd"),
        count=np.where(active, code[np.maximum(rows, 0)] != md.NORMAL, False),
        order_cost=col("order_cost"),
        holding_cost=col("holding_cost"),
        backorder_cost=col("_back"),
        target=col("_target", np.nan) if mode != "cost" else np.full(rows.shape, np.nan),
        fixed_q=col("order_quantity", np.nan),
        pack=col("pack_size", 1.0),
        days_per_year=float(_settings_value(settings, "days_per_year", 365.0)),
        mode=mode,
        backorder_basis=_settings_value(settings, "backorder_basis", "per_unit"),
    )


def _frame_tree(
    table: pd.DataFrame, rows: np.ndarray, res: ech.TreeResult, inp: ech.TreeInputs
) -> pd.DataFrame:
    act = rows >= 0
    idx = rows[act]
    lead = inp.lead + res.delay
    frame = pd.DataFrame(
        {
            "site": table["site"].to_numpy(dtype=object)[idx],
            "item": table["item"].to_numpy(dtype=object)[idx],
            "order_quantity": res.order_quantity[act],
            "reorder_point": res.reorder_point[act],
            "safety_stock": res.safety_stock[act],
            "lead_time_days": lead[act],
            "lead_time_demand_mean": res.ltd_mean[act],
            "lead_time_demand_sd": res.ltd_sd[act],
            "cycle_service": res.cycle_service[act],
            "fill_rate": res.fill_rate[act],
            "expected_on_hand": res.on_hand[act],
            "expected_backorders": res.backorders[act],
            "orders_per_year": res.orders_per_year[act],
            "ordering_cost": res.ordering_cost[act],
            "holding_cost": res.cycle_stock_cost[act] + res.safety_stock_cost[act],
            "backorder_cost": res.backorder_cost[act],
            "total_cost": res.total_cost[act],
            "cycle_stock_cost": res.cycle_stock_cost[act],
            "safety_stock_cost": res.safety_stock_cost[act],
            "z": res.z[act],
            "distribution": table["distribution"].to_numpy(dtype=np.int8)[idx],
            "expected_delay_days": res.delay[act],
            "note": res.note[act],
        }
    )
    return frame[POLICY_COLUMNS]


def _summary_tree(table, rows, res, seed, inp, root) -> pd.DataFrame:
    leaf = res.leaf
    internal = (rows >= 0) & ~leaf
    demand = np.where(leaf, inp.mean, 0.0)
    w = demand.sum(axis=1)
    w = np.where(w > 0, w, 1.0)
    ss_wh = np.nansum(np.where(internal, res.safety_stock, 0.0), axis=1)
    ss_st = np.nansum(np.where(leaf, res.safety_stock, 0.0), axis=1)

    def weighted(values):
        return (np.where(leaf, values, 0.0) * demand).sum(axis=1) / w

    figures = {
        "mean_delay_days": weighted(res.delay),
        "single_site_mean_delay_days": weighted(seed.delay),
        "store_fill_rate": weighted(res.fill_rate),
        "single_site_store_fill_rate": weighted(seed.fill_rate),
    }
    return _summary_frame(
        table, rows, root, leaf.sum(axis=1), ss_wh, ss_st, res.network_cost, seed.network_cost,
        np.full(rows.shape[0], np.nan), figures,
    )


def _tree(table, rows, block, settings, given, summaries):
    inp = _tree_inputs(table, rows, block.parent, settings)
    if given is None:
        res, seed = ech.optimise_tree(inp)
        if summaries is not None:
            summaries.append(_summary_tree(table, rows, res, seed, inp, block.root))
    else:
        r = np.where(rows >= 0, given[np.maximum(rows, 0), 0], 0.0)
        q = np.where(rows >= 0, given[np.maximum(rows, 0), 1], np.nan)
        res = ech.evaluate_tree(inp, r, q)
    return _frame_tree(table, rows, res, inp)
