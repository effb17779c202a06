"""The item-site table (optimiser.itemsites): which site stocks what, and with which inputs.

Expected values are worked out by hand from the small case in tests/conftest.py (invented data); lead-time
demand moments for the ``auto`` distribution rule use d·L and L·σ_d² + d²·σ_L² (Hadley & Whitin 1963,
Analysis of Inventory Systems).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from casefiles import BASE_FILES

from models import demand as md
from optimiser.case import load_case
from optimiser.itemsites import ITEMSITE_COLUMNS, build_itemsites, through_demand


def _table(case_writer, files=None):
    table = build_itemsites(load_case(case_writer(files)))
    return table, table.set_index(["site", "item"])


def test_columns_and_stocked_pairs(case_writer) -> None:
    table, rows = _table(case_writer)
    assert list(table.columns) == ITEMSITE_COLUMNS
    # demand at s1: a, b; at s2: a, c -> the warehouse stocks a, b, c
    assert set(rows.index) == {
        ("wh", "a"),
        ("wh", "b"),
        ("wh", "c"),
        ("s1", "a"),
        ("s1", "b"),
        ("s2", "a"),
        ("s2", "c"),
    }
    assert list(table["site"]) == ["wh"] * 3 + ["s1"] * 2 + ["s2"] * 2  # sites in the order of sites.csv


def test_values_worked_by_hand(case_writer) -> None:
    _, rows = _table(case_writer)
    wa, s1a, s2c, wc, wb = (
        rows.loc[("wh", "a")],
        rows.loc[("s1", "a")],
        rows.loc[("s2", "c")],
        rows.loc[("wh", "c")],
        rows.loc[("wh", "b")],
    )
    # warehouse: no own demand; all demand through it: (12 + 8) per day x 360 days
    assert (wa["daily_mean"], wa["daily_sd"], wa["annual_demand"]) == (0.0, 0.0, 7200.0)
    assert wa["upstream"] == "" and wa["supplier"] == "sup1"
    assert (wa["lead_days"], wa["lead_days_sd"]) == (10.0, 2.0)  # supplier lead time at a root site
    assert wa["order_cost"] == 55.0  # order_cost 50 + line_cost 5
    assert wa["holding_cost"] == pytest.approx(0.2 * 10.0)  # holding_rate x unit_cost
    assert wa["backorder_cost"] == 6.0
    assert wc["order_cost"] == 80.0 and wc["lead_days"] == 20.0  # blank line_cost counts as 0
    assert wb["holding_cost"] == 1.5  # items.holding_cost overrides the rate
    # store: own demand, its transit time, the delivery cost
    assert (s1a["daily_mean"], s1a["daily_sd"], s1a["annual_demand"]) == (12.0, 4.0, 4320.0)
    assert (s1a["lead_days"], s1a["lead_days_sd"], s1a["order_cost"]) == (2.0, 0.5, 20.0)
    assert s1a["upstream"] == "wh"
    assert s2c["distribution"] == md.POISSON  # items.csv says poisson
    assert s1a["distribution"] == md.NORMAL  # case.toml default
    assert math.isnan(s1a["target"]) and math.isnan(s1a["order_quantity"]) and s1a["pack_size"] == 1.0
    assert s1a["volume"] == 0.01 and s1a["weight"] == 1.5 and math.isnan(rows.loc[("wh", "b"), "volume"])


def test_through_demand_adds_means_and_variances(case_writer) -> None:
    table, _ = _table(case_writer)
    mean, var = through_demand(table)
    at = {(s, i): k for k, (s, i) in enumerate(zip(table["site"], table["item"], strict=True))}
    assert mean[at[("wh", "a")]] == 20.0 and var[at[("wh", "a")]] == 4.0**2 + 3.0**2
    assert mean[at[("s1", "b")]] == 3.0 and var[at[("s1", "b")]] == 4.0


def test_stocking_overrides_and_limits(case_writer) -> None:
    stocking = (
        "site,item,order_quantity,pack_size,target,backorder_cost\nwh,a,100,5,,9\ns1,a,,,,\nwh,b,,,,\ns1,b,,2,,\n"
    )
    table, rows = _table(case_writer, {"stocking.csv": stocking})
    assert len(table) == 4
    wa = rows.loc[("wh", "a")]
    assert (wa["order_quantity"], wa["pack_size"], wa["backorder_cost"]) == (100.0, 5.0, 9.0)
    assert wa["annual_demand"] == 12.0 * 360  # s2 does not stock a here, so its demand does not pass
    assert rows.loc[("s1", "a"), "backorder_cost"] == 6.0  # from items.csv
    assert rows.loc[("s1", "b"), "pack_size"] == 2.0


def test_targets_in_service_mode(case_writer) -> None:
    toml = BASE_FILES["case.toml"].replace('mode = "cost"', 'mode = "fill_rate"\n        target = 0.95')
    stocking = "site,item,target\nwh,a,\ns1,a,0.99\ns2,a,\n"
    _, rows = _table(case_writer, {"case.toml": toml, "stocking.csv": stocking})
    assert rows.loc[("s1", "a"), "target"] == 0.99
    assert rows.loc[("s2", "a"), "target"] == 0.95


def test_auto_distribution_uses_lead_time_demand(case_writer) -> None:
    toml = BASE_FILES["case.toml"].replace('distribution = "normal"', 'distribution = "auto"')
    items = BASE_FILES["items.csv"].replace(",poisson", ",")
    _, rows = _table(case_writer, {"case.toml": toml, "items.csv": items})

    def expected(d: float, sd: float, lead: float, lead_sd: float) -> int:
        mean = d * lead
        var = lead * sd**2 + d**2 * lead_sd**2
        if mean >= md.AUTO_NORMAL_MIN_MEAN:
            return md.NORMAL
        return md.NEGBIN if var > (1 + md.AUTO_OVERDISPERSION) * mean else md.POISSON

    assert rows.loc[("s1", "a"), "distribution"] == expected(12, 4, 2, 0.5) == md.NORMAL
    assert rows.loc[("s1", "b"), "distribution"] == expected(3, 2, 2, 0.5)
    assert rows.loc[("s2", "c"), "distribution"] == expected(0.2, 0.5, 3, 0)
    assert rows.loc[("wh", "c"), "distribution"] == expected(0.2, 0.5, 20, 0)
    assert rows.loc[("wh", "a"), "distribution"] == expected(20, 5, 10, 2)


def test_zero_demand_item_site_is_kept(case_writer) -> None:
    demand = BASE_FILES["demand.csv"] + "        s2,b,0,0\n"
    _, rows = _table(case_writer, {"demand.csv": demand})
    s2b = rows.loc[("s2", "b")]
    assert (s2b["daily_mean"], s2b["annual_demand"]) == (0.0, 0.0)
    assert rows.loc[("wh", "b"), "annual_demand"] == 3.0 * 360


def test_single_site_case_has_no_upstream(case_writer) -> None:
    files = {
        "sites.csv": "site,upstream\nshop,\n",
        "demand.csv": "site,item,daily_mean,daily_sd\nshop,a,5,2\nshop,c,0.1,0.3\n",
    }
    table, rows = _table(case_writer, files)
    assert (table["upstream"] == "").all() and len(table) == 2
    assert rows.loc[("shop", "a"), "lead_days"] == 10.0
    assert np.isclose(rows.loc[("shop", "a"), "annual_demand"], 1800.0)


def test_three_levels_pass_demand_up_the_chain(case_writer) -> None:
    files = {
        "sites.csv": "site,upstream,transit_days,delivery_cost\nwh,,,\nhub,wh,4,60\nshop,hub,1,15\n",
        "demand.csv": "site,item,daily_mean,daily_sd\nhub,a,2,1\nshop,a,5,2\n",
    }
    table, rows = _table(case_writer, files)
    assert set(rows.index) == {("wh", "a"), ("hub", "a"), ("shop", "a")}
    assert rows.loc[("wh", "a"), "annual_demand"] == (2 + 5) * 360
    assert rows.loc[("hub", "a"), "annual_demand"] == (2 + 5) * 360
    assert rows.loc[("shop", "a"), "annual_demand"] == 5 * 360
    assert (rows.loc[("hub", "a"), "lead_days"], rows.loc[("hub", "a"), "order_cost"]) == (4.0, 60.0)
    mean, var = through_demand(table)
    assert mean.tolist() == [7.0, 7.0, 5.0] and var.tolist() == [5.0, 5.0, 4.0]
