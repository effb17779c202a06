"""Checks of optimiser.network: the site forest, and network plans against the project's simulator.

Sources: networkx as the reference for graph facts; the project's event simulator (``optimiser.simulate``, an
independent implementation of the (R, Q) mechanics with FCFS allocation at the warehouse) as the yardstick for
the METRIC-type network figures. Acceptance limits (store fill rates within 2 percentage points, network cost
within 5%) are those set by the issue, not published values. All data are invented and seeded.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest

from models.demand import NEGBIN, POISSON
from optimiser import network as nw
from optimiser.errors import CaseError
from optimiser.simulate import simulate_policies

FILL_LIMIT = 0.02  # issue 4: store fill rates within 2 percentage points of the simulator
COST_LIMIT = 0.05  # issue 4: network costs within 5% of the simulator


@dataclass(frozen=True)
class Settings:
    """The fields of optimiser.case.Settings the network code reads."""

    days_per_year: float = 365.0
    mode: str = "cost"
    target: float | None = None
    backorder_basis: str = "per_unit"
    name: str = "test"
    currency: str = "EUR"
    holding_rate: float = 0.2
    distribution: str = "auto"


def _finish(rows: list[dict]) -> pd.DataFrame:
    t = pd.DataFrame(rows)
    t["supplier"] = "sup"
    for c, v in (
        ("target", np.nan),
        ("order_quantity", np.nan),
        ("pack_size", 1.0),
        ("unit_cost", 1.0),
        ("volume", 0.0),
        ("weight", 0.0),
    ):
        if c not in t:
            t[c] = v
    through = t.groupby("item")["daily_mean"].sum()
    t["annual_demand"] = np.where(t["upstream"] == "", t["item"].map(through), t["daily_mean"]) * 365.0
    return t


def random_two_level(seed: int, n_items: int, n_stores: int, speed: str, basis: str) -> pd.DataFrame:
    """An invented warehouse with ``n_stores`` stores; slow movers Poisson, fast movers negative binomial."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_items):
        item = f"item{i}"
        h = rng.uniform(1.0, 10.0)
        b = rng.uniform(5.0, 50.0) if basis == "per_unit" else rng.uniform(20.0, 200.0)
        rows.append(
            dict(
                site="WH",
                item=item,
                upstream="",
                daily_mean=0.0,
                daily_sd=0.0,
                lead_days=rng.uniform(5.0, 30.0),
                lead_days_sd=0.0,
                order_cost=rng.uniform(50.0, 300.0),
                holding_cost=0.8 * h,
                backorder_cost=np.nan,
                distribution=POISSON,
            )
        )
        for s in range(n_stores):
            if speed == "slow":
                d = rng.uniform(0.02, 0.5)
                sd, dist = np.sqrt(d), POISSON
            else:
                d = rng.uniform(5.0, 40.0)
                sd, dist = np.sqrt(d) * rng.uniform(1.0, 2.0), NEGBIN
            rows.append(
                dict(
                    site=f"S{s + 1:02d}",
                    item=item,
                    upstream="WH",
                    daily_mean=d,
                    daily_sd=sd,
                    lead_days=rng.uniform(1.0, 5.0),
                    lead_days_sd=0.0,
                    order_cost=rng.uniform(5.0, 40.0),
                    holding_cost=h,
                    backorder_cost=b,
                    distribution=dist,
                )
            )
    return _finish(rows)


def simulate_against(table: pd.DataFrame, settings: Settings, *, years: float, reps: int, seed: int = 7):
    """Plan, simulate the plan; return (merged frame, network-cost errors per item, fill differences)."""
    pol = nw.plan_network(table, settings)
    sim_pol = pol.assign(order_quantity=pol["order_quantity"].clip(lower=1.0))
    sim = simulate_policies(
        table, sim_pol, settings, years=years, warmup_years=1.0, replications=reps, seed=seed
    )
    m = pol.merge(sim, on=["site", "item"], suffixes=("", "_sim"))
    store = (m["site"] != "WH") & ~m["site"].isin(["C", "H1", "H2"])
    # network cost = ordering and holding everywhere + the stores' backorder costs (issue 4)
    m["network_sim"] = (
        m["ordering_cost_sim"] + m["holding_cost_sim"] + np.where(store, m["backorder_cost_sim"], 0.0)
    )
    net = m.groupby("item")[["total_cost", "network_sim"]].sum()
    cost_err = (net["total_cost"] / net["network_sim"] - 1.0).to_numpy()
    fill_diff = (m.loc[store, "fill_rate"] - m.loc[store, "fill_rate_sim"]).to_numpy()
    return m, cost_err, fill_diff


# ------------------------------------------------------------------------------------------------- forest
def test_levels_of_three_level_tree():
    f = nw.build_forest(["C", "H1", "H2", "A", "B", "D", "X"], ["", "C", "C", "H1", "H1", "H2", ""])
    assert f.levels == [["C", "X"], ["H1", "H2"], ["A", "B", "D"]]
    assert f.children("H1") == ["A", "B"] and f.children("A") == []
    assert f.depth("D") == 2 and f.root_of("D") == "C" and f.height == 3
    # networkx as the reference: the graph is a forest whose roots are the sites without upstream
    import networkx as nx

    assert (
        nx.is_forest(f.graph.to_undirected())
        and sorted(n for n, d in f.graph.in_degree() if d == 0) == f.roots
    )


@pytest.mark.parametrize(
    "sites, ups, words",
    [
        (["A", "B"], ["", "B"], "its own upstream"),
        (["A", "B"], ["", "Z"], "unknown upstream site 'Z'"),
        (["A", "B", "C"], ["C", "A", "B"], "cycle"),
        (["A", "B", "B"], ["", "A", ""], "supplied by two sites"),
    ],
)
def test_forest_errors_name_the_sites(sites, ups, words):
    with pytest.raises(CaseError) as err:
        nw.build_forest(sites, ups)
    assert words in str(err.value)
    if words == "cycle":
        assert (
            "A -> B -> C -> A" in str(err.value)
            or "B -> C -> A -> B" in str(err.value)
            or "C -> A -> B -> C" in str(err.value)
        )


def test_item_not_stocked_upstream_is_an_error():
    t = random_two_level(1, 2, 2, "slow", "per_unit")
    t = t[~((t["site"] == "WH") & (t["item"] == "item1"))]
    with pytest.raises(CaseError, match="item 'item1' is stocked at 'S01' but not at its upstream site 'WH'"):
        nw.forest_from_itemsites(t)


# ------------------------------------------------------------------------------------------------- plans
def test_plan_frame_and_summary():
    t = random_two_level(3, 3, 4, "slow", "per_unit")
    pol, summary = nw.plan_network(t, Settings(), return_summary=True)
    assert list(pol.columns) == nw.POLICY_COLUMNS
    assert list(pol["site"]) == list(t["site"]) and list(pol["item"]) == list(t["item"])
    wh = pol["site"] == "WH"
    assert np.all(pol.loc[wh, "expected_delay_days"] == 0.0)
    assert np.all(pol.loc[~wh, "expected_delay_days"] > 0.0)
    # a store's lead time is its transit time plus the delay
    np.testing.assert_allclose(
        pol.loc[~wh, "lead_time_days"],
        t.loc[~wh, "lead_days"] + pol.loc[~wh, "expected_delay_days"],
        rtol=1e-12,
    )
    assert list(summary.columns) == nw.SUMMARY_COLUMNS and len(summary) == 3
    # the plan is no worse than each site planned alone (both evaluated in the network model)
    assert np.all(summary["network_cost"] <= summary["single_site_network_cost"] * (1 + 1e-9))
    tot = pol.groupby("item")["total_cost"].sum().reindex(summary["item"]).to_numpy()
    np.testing.assert_allclose(tot, summary["network_cost"], rtol=1e-9)


def test_fixed_quantity_note_only_where_the_case_fixes_it():
    # The "order quantity fixed by the case" note must follow stocking.csv, not the network search, which
    # holds the stores' Q internally (a planner reads the note as a statement about their data).
    from models.single_site import NOTE_FIXED_Q

    t = random_two_level(3, 3, 4, "slow", "per_unit")
    fixed_row = int(np.nonzero(t["upstream"].to_numpy() != "")[0][0])
    t.loc[fixed_row, "order_quantity"] = 3.0
    pol = nw.plan_network(t, Settings())
    flagged = (pol["note"].to_numpy(dtype=np.int64) & NOTE_FIXED_Q) != 0
    assert flagged[fixed_row] and pol.loc[fixed_row, "order_quantity"] == 3.0
    assert not np.delete(flagged, fixed_row).any()


def test_evaluate_reproduces_plan():
    t = random_two_level(4, 3, 5, "fast", "per_unit_year")
    s = Settings(backorder_basis="per_unit_year")
    pol = nw.plan_network(t, s)
    again = nw.evaluate_network(t, pol[["site", "item", "reorder_point", "order_quantity"]], s)
    for c in ("total_cost", "fill_rate", "expected_backorders", "expected_delay_days"):
        np.testing.assert_allclose(again[c], pol[c], rtol=1e-7, atol=1e-9)


def test_service_mode_meets_targets_in_the_model():
    t = random_two_level(5, 3, 4, "fast", "per_unit")
    s = Settings(mode="fill_rate", target=0.97)
    pol = nw.plan_network(t, s)
    stores = pol[pol["site"] != "WH"]
    assert np.all(stores["fill_rate"] >= 0.97 - 1e-6)


# ------------------------------------------------------------------------------------------------- simulator
DEFAULT_NETWORKS = [  # (seed, items, stores, speed, basis)
    (11, 4, 2, "slow", "per_unit"),
    (12, 3, 12, "fast", "per_unit_year"),
    (13, 3, 30, "slow", "per_unit_year"),
]
# History (measured 2026-12-02): with the stores evaluated by the three-point delay mixture alone, two
# networks of the slow set missed - seed 21 ("2 stores, fast": network cost +13.9%, the wait tail overstated
# when the warehouse backlog is one or two store batches) and seed 23 ("8 stores, slow", warehouse kept below
# zero: a store's fill rate 2.9 points low; the model took a part-shipped order as wholly delayed). The stores
# are now evaluated from the units each one has unshipped at the warehouse (models.backlog) wherever every
# store has count demand and the warehouse lead time is constant: worst figures over the eleven networks
# (seeds 11-13 default, 21-28 slow) 0.6% cost and 1.1 points of fill, where the mixture reached 13.9% and 2.9.
SLOW_NETWORKS = [
    (21, 6, 2, "fast", "per_unit"),
    (22, 6, 5, "slow", "per_unit"),
    (23, 6, 8, "slow", "per_unit_year"),
    (24, 6, 15, "fast", "per_unit_year"),
    (25, 6, 20, "slow", "per_unit"),
    (26, 6, 30, "fast", "per_unit"),
    (27, 6, 30, "slow", "per_unit_year"),
    (28, 6, 10, "fast", "per_unit"),
]


def _check_against_simulator(seed, items, stores, speed, basis, years, reps, lead_cv=0.0):
    t = random_two_level(seed, items, stores, speed, basis)
    t["lead_days_sd"] = lead_cv * t["lead_days"]
    _, cost_err, fill_diff = simulate_against(t, Settings(backorder_basis=basis), years=years, reps=reps)
    print(
        f"\n{stores} stores, {speed}, {basis}, lead CV {lead_cv}: network cost error max "
        f"{100 * np.max(np.abs(cost_err)):.2f}%, store fill max {100 * np.max(np.abs(fill_diff)):.2f} points"
    )
    assert np.max(np.abs(cost_err)) <= COST_LIMIT
    assert np.max(np.abs(fill_diff)) <= FILL_LIMIT


@pytest.mark.parametrize("seed, items, stores, speed, basis", DEFAULT_NETWORKS)
def test_two_level_against_simulator(seed, items, stores, speed, basis):
    _check_against_simulator(
        seed, items, stores, speed, basis, years=60.0 if speed == "slow" else 6.0, reps=6
    )


@pytest.mark.slow
@pytest.mark.parametrize("seed, items, stores, speed, basis", SLOW_NETWORKS)
def test_two_level_against_simulator_more(seed, items, stores, speed, basis):
    _check_against_simulator(
        seed, items, stores, speed, basis, years=100.0 if speed == "slow" else 10.0, reps=8
    )


@pytest.mark.slow
@pytest.mark.parametrize("seed, items, stores, speed, basis", [(23, 6, 8, "slow", "per_unit_year"),
                                                               (22, 6, 5, "slow", "per_unit")])
def test_two_level_random_lead_times_against_simulator(seed, items, stores, speed, basis):
    """Gamma lead times (coefficient of variation 0.25 at the warehouse and the stores; the simulator's orders
    do not cross): the same limits."""
    _check_against_simulator(seed, items, stores, speed, basis, years=100.0, reps=8, lead_cv=0.25)


def three_level(seed: int, n_items: int) -> pd.DataFrame:
    """Invented: central C -> hubs H1, H2 -> three stores each, Poisson demand."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_items):
        item, h, b = f"item{i}", rng.uniform(1.0, 10.0), rng.uniform(5.0, 50.0)
        rows.append(
            dict(
                site="C",
                item=item,
                upstream="",
                daily_mean=0.0,
                daily_sd=0.0,
                lead_days=20.0,
                lead_days_sd=0.0,
                order_cost=200.0,
                holding_cost=0.7 * h,
                backorder_cost=np.nan,
                distribution=POISSON,
            )
        )
        for hub in ("H1", "H2"):
            rows.append(
                dict(
                    site=hub,
                    item=item,
                    upstream="C",
                    daily_mean=0.0,
                    daily_sd=0.0,
                    lead_days=4.0,
                    lead_days_sd=0.0,
                    order_cost=60.0,
                    holding_cost=0.85 * h,
                    backorder_cost=np.nan,
                    distribution=POISSON,
                )
            )
            for k in range(3):
                d = rng.uniform(0.2, 3.0)
                rows.append(
                    dict(
                        site=f"{hub}S{k}",
                        item=item,
                        upstream=hub,
                        daily_mean=d,
                        daily_sd=np.sqrt(d),
                        lead_days=2.0,
                        lead_days_sd=0.0,
                        order_cost=15.0,
                        holding_cost=h,
                        backorder_cost=b,
                        distribution=POISSON,
                    )
                )
    return _finish(rows)


def test_three_level_plan_levels_and_delays():
    t = three_level(3, 2)
    assert nw.forest_from_itemsites(t).levels == [
        ["C"],
        ["H1", "H2"],
        ["H1S0", "H1S1", "H1S2", "H2S0", "H2S1", "H2S2"],
    ]
    pol, summary = nw.plan_network(t, Settings(), return_summary=True)
    assert np.all(pol.loc[pol["site"] == "C", "expected_delay_days"] == 0.0)
    assert np.all(pol.loc[pol["site"] != "C", "expected_delay_days"] > 0.0)
    assert len(summary) == 2 and np.all(summary["savings"] >= -1e-9 * summary["network_cost"])


@pytest.mark.slow
def test_three_level_against_simulator():
    """Three levels by the level-by-level step: stores within 2 points, network cost within 8% (ours)."""
    t = three_level(3, 4)
    _, cost_err, fill_diff = simulate_against(t, Settings(), years=60.0, reps=6)
    print(
        f"\nthree levels: cost error max {100 * np.max(np.abs(cost_err)):.2f}%, "
        f"fill max {100 * np.max(np.abs(fill_diff)):.2f} points"
    )
    assert np.max(np.abs(cost_err)) <= 0.08
    assert np.max(np.abs(fill_diff)) <= FILL_LIMIT


# ------------------------------------------------------------------------------- warehouse with own customers
def with_own_customers(table: pd.DataFrame, share: float, compound: bool, seed: int) -> pd.DataFrame:
    """``table`` with customers of its own at the warehouse: ``share`` of all the item's demand, Poisson or
    compound Poisson (sd 1.2-1.8 x the Poisson sd), backorder cost the stores' mean (invented)."""
    t = table.copy()
    rng = np.random.default_rng(seed)
    wh = (t["upstream"] == "").to_numpy()
    stores = t.loc[~wh].groupby("item")["daily_mean"].sum()
    own = t.loc[wh, "item"].map(stores).to_numpy() * share / (1.0 - share)
    t.loc[wh, "daily_mean"] = own
    t.loc[wh, "daily_sd"] = np.sqrt(own) * (rng.uniform(1.2, 1.8, own.size) if compound else 1.0)
    t.loc[wh, "distribution"] = NEGBIN if compound else POISSON
    t.loc[wh, "backorder_cost"] = t.loc[wh, "item"].map(t.loc[~wh].groupby("item")["backorder_cost"].mean())
    through = t.groupby("item")["daily_mean"].sum()
    t["annual_demand"] = np.where(wh, t["item"].map(through), t["daily_mean"]) * 365.0
    return t


def own_customer_errors(seed, items, stores, speed, basis, share, compound, years, reps):
    """Plan and simulate a warehouse with own customers; per item: network cost error (the warehouse's
    backorder cost counted: its customers' shortages), largest store fill difference, the warehouse's
    customer fill difference, relative errors of the own customers' backorders (per unit-year basis; NaN
    where fewer than 0.3 units are simulated) and of the demand-weighted store delay (NaN below 0.1 days)."""
    t = with_own_customers(random_two_level(seed, items, stores, speed, basis), share, compound, seed + 1000)
    s = Settings(backorder_basis=basis)
    pol = nw.plan_network(t, s)
    sim = simulate_policies(t, pol.assign(order_quantity=pol["order_quantity"].clip(lower=1.0)), s,
                            years=years, warmup_years=1.0, replications=reps, seed=7)
    m = pol.merge(sim, on=["site", "item"], suffixes=("", "_sim")).merge(
        t[["site", "item", "daily_mean"]].assign(p=t["backorder_cost"]), on=["site", "item"]
    )
    m["network_sim"] = m["ordering_cost_sim"] + m["holding_cost_sim"] + m["backorder_cost_sim"]
    net = m.groupby("item")[["total_cost", "network_sim"]].sum()
    wh = m[m["site"] == "WH"].set_index("item")
    st = m[m["site"] != "WH"].assign(fill_diff=lambda x: (x["fill_rate"] - x["fill_rate_sim"]).abs())
    st = st.assign(
        w_model=st["expected_delay_days"] * st["daily_mean"], w_sim=st["store_delay_days"] * st["daily_mean"]
    )
    per = st.groupby("item")[["w_model", "w_sim", "daily_mean"]].sum()
    delay_sim = per["w_sim"] / per["daily_mean"]
    own_sim = wh["backorder_cost_sim"] / wh["p"]
    return pd.DataFrame(
        {
            "cost_err": net["total_cost"] / net["network_sim"] - 1.0,
            "store_fill": st.groupby("item")["fill_diff"].max(),
            "wh_fill": (wh["fill_rate"] - wh["customer_fill_rate"]).abs(),
            "own_backorders": np.where(
                (basis == "per_unit_year") & (own_sim >= 0.3),
                wh["backorder_cost"] / wh["p"] / own_sim - 1.0,
                np.nan,
            ),
            "delay": np.where(delay_sim >= 0.1, per["w_model"] / per["w_sim"] - 1.0, np.nan),
            # rqnet simulate flags a warehouse's planned fill rate against its customers' simulated fill rate
            # (the all-units fill rate also counts store orders): flagged exactly when outside that interval
            "wh_fill_flag_ok": (wh["outside_interval"].str.contains("fill_rate"))
            == ((wh["fill_rate"] - wh["customer_fill_rate"]).abs() > wh["customer_fill_rate_ci"]),
        }
    )


# Measured (model against 6 replications of 60 years, slow movers, or 6 years, fast movers; before -> after
# the own-customer terms of models.echelon: FCFS share of the backorders, unit stock-out P(X >= y), store
# delay (E[B0] - E[B_own]) / (lambda0 - own rate)):
#   networks 33 and 35 below (8 items), largest errors: own-customer backorders 105% / 41% -> 24% / 23%,
#   store delay 33% / 13% -> 14% / 10%, warehouse customer fill 0.34 / 0.46 -> 0.27 / 0.19 points, network
#   cost 2.5% / 2.0% -> 1.4% / 1.5%, store fill 0.70 / 0.71 -> 0.64 / 0.88 points;
#   the twelve networks of the slow check (48 items): own-customer backorders mean |error| 10.7% -> 7.1%,
#   max 37% -> 31%; store delay mean |error| 13.8% -> 8.2%, max 33% -> 48% (seed 48, slow Poisson stores,
#   where E[B0] itself is 30-60% high at fill rates near 99%); warehouse customer fill max 1.0 -> 0.6 points;
#   network cost max 3.0% both; store fill max 0.9 -> 1.0 points.
OWN_FILL_LIMIT = 0.015  # warehouse customers' fill rate, points (measured max 0.6; ours)
OWN_BACKORDER_LIMIT = 0.35  # own-customer backorders, relative, where >= 0.3 units simulated (max 31%; ours)
DELAY_LIMIT = 0.25  # demand-weighted store delay, relative, where >= 0.1 days (33, 35 below: max 14%; ours)
DELAY_LIMIT_WIDE = 0.5  # the same over the twelve networks of the slow check (max 48%; ours)


def _check_own_customers(errors: pd.DataFrame, delay_limit: float) -> None:
    print(
        f"\ncost {100 * errors['cost_err'].abs().max():.2f}%, "
        f"store fill {100 * errors['store_fill'].max():.2f} points, "
        f"warehouse customer fill {100 * errors['wh_fill'].max():.2f} points, own backorders "
        f"{100 * errors['own_backorders'].abs().max():.1f}%, delay {100 * errors['delay'].abs().max():.1f}%"
    )
    assert errors["cost_err"].abs().max() <= COST_LIMIT
    assert errors["store_fill"].max() <= FILL_LIMIT
    assert errors["wh_fill"].max() <= OWN_FILL_LIMIT
    assert not (errors["own_backorders"].abs() > OWN_BACKORDER_LIMIT).any()
    assert not (errors["delay"].abs() > delay_limit).any()
    assert errors["wh_fill_flag_ok"].all()


@pytest.mark.parametrize(
    "seed, stores, share, compound", [(33, 4, 0.5, False), (35, 6, 0.4, True)]
)
def test_warehouse_with_own_customers_against_simulator(seed, stores, share, compound):
    """A warehouse that also serves customers of its own (FCFS with the store orders, as the simulator)."""
    errors = own_customer_errors(seed, 4, stores, "slow", "per_unit_year", share, compound, 60.0, 6)
    assert errors["own_backorders"].notna().sum() >= 3 and errors["delay"].notna().sum() >= 3
    _check_own_customers(errors, DELAY_LIMIT)


def _own_customer_network(seed: int):
    rng = np.random.default_rng(seed)
    speed = ["slow", "fast"][seed % 2]
    basis = ["per_unit", "per_unit_year"][(seed // 2) % 2]
    stores = int(rng.integers(2, 13))
    share = float(rng.choice([0.2, 0.4, 0.6]))
    return seed, 4, stores, speed, basis, share, seed % 3 == 0, 60.0 if speed == "slow" else 6.0, 6


@pytest.mark.slow
def test_warehouse_with_own_customers_random_networks():
    """Twelve random networks (2-12 stores, slow and fast, both bases, Poisson or compound own customers)."""
    errors = pd.concat([own_customer_errors(*_own_customer_network(seed)) for seed in range(41, 53)])
    _check_own_customers(errors, DELAY_LIMIT_WIDE)
