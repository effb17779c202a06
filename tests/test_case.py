"""Reading and validating case folders (optimiser.case).

Every bad-input rule of the case format is broken once, on purpose, in an otherwise valid case
(tests/conftest.py) and must be reported naming the file, the spreadsheet row (header = row 1), the column and
the rule, through ``load_case`` and through ``rqnet plan`` (exit code 2, nothing written). Expected rows are
counted by hand from the files below.
"""

from __future__ import annotations

import math
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from casefiles import BASE_FILES, write_case
from hypothesis import given, settings
from hypothesis import strategies as st

from optimiser.case import (
    HISTORY_COLUMNS,
    ITEMS_COLUMNS,
    POLICIES_COLUMNS,
    STOCKING_COLUMNS,
    _parse_cell,
    _parse_column,
    load_case,
    load_policies_for_case,
)
from optimiser.cli import main
from optimiser.errors import CaseError

SITES = BASE_FILES["sites.csv"]
SUPPLIERS = BASE_FILES["suppliers.csv"]
ITEMS = BASE_FILES["items.csv"]
DEMAND = BASE_FILES["demand.csv"]
TOML = BASE_FILES["case.toml"]


def edit(text: str, old: str, new: str) -> str:
    """Replace one line of a base file (the replacement must change something)."""
    assert old in text, old
    return text.replace(old, new, 1)


HISTORY_OK = """\
    date,site,item,quantity
    2025-03-01,s1,a,4
    2025-03-02,s1,a,6
    2025-03-02,s2,a,2
    2025-03-05,s1,b,1
    """

# (id, files, file named, row, column, words of the rule)
BAD_CASES = [
    ("missing-toml", {"case.toml": None}, "case.toml", None, None, "file is missing"),
    ("missing-sites", {"sites.csv": None}, "sites.csv", None, None, "file is missing"),
    ("missing-suppliers", {"suppliers.csv": None}, "suppliers.csv", None, None, "file is missing"),
    ("missing-items", {"items.csv": None}, "items.csv", None, None, "file is missing"),
    ("missing-demand", {"demand.csv": None}, "demand.csv", None, None, "file is missing"),
    (
        "missing-column",
        {
            "items.csv": ITEMS.replace(",unit_cost", "")
            .replace(",10,", ",")
            .replace(",4,", ",")
            .replace(",50,", ",")
        },
        "items.csv",
        1,
        "unit_cost",
        "required column",
    ),
    (
        "empty-required",
        {"items.csv": edit(ITEMS, "b,sup1,4,", "b,sup1,,")},
        "items.csv",
        3,
        "unit_cost",
        "a value is required",
    ),
    (
        "unknown-site",
        {"demand.csv": edit(DEMAND, "s2,a,8,3", "s9,a,8,3")},
        "demand.csv",
        4,
        "site",
        "unknown site",
    ),
    (
        "unknown-item",
        {"demand.csv": edit(DEMAND, "s2,c,0.2", "s2,zz,0.2")},
        "demand.csv",
        5,
        "item",
        "unknown item",
    ),
    (
        "unknown-supplier",
        {"items.csv": edit(ITEMS, "c,sup2,", "c,sup9,")},
        "items.csv",
        4,
        "supplier",
        "unknown supplier",
    ),
    (
        "unknown-upstream",
        {"sites.csv": edit(SITES, "s2,wh,3", "s2,hub,3")},
        "sites.csv",
        4,
        "upstream",
        "unknown upstream",
    ),
    ("duplicate-site", {"sites.csv": SITES + "        s1,wh,1,0,10\n"}, "sites.csv", 5, "site", "duplicate"),
    (
        "duplicate-item",
        {"items.csv": ITEMS + "        a,sup2,1,,1,,,,\n"},
        "items.csv",
        5,
        "item",
        "duplicate",
    ),
    ("duplicate-demand", {"demand.csv": DEMAND + "        s1,a,1,1\n"}, "demand.csv", 6, "item", "duplicate"),
    (
        "negative",
        {"items.csv": edit(ITEMS, "a,sup1,10,", "a,sup1,-10,")},
        "items.csv",
        2,
        "unit_cost",
        "must not be negative",
    ),
    (
        "non-numeric",
        {"suppliers.csv": edit(SUPPLIERS, "sup1,10,", "sup1,ten,")},
        "suppliers.csv",
        2,
        "lead_days",
        "not a number",
    ),
    ("nan", {"demand.csv": edit(DEMAND, "s1,b,3,2", "s1,b,3,nan")}, "demand.csv", 3, "daily_sd", "NaN"),
    (
        "infinite",
        {"suppliers.csv": edit(SUPPLIERS, "sup2,20,0,80", "sup2,20,0,inf")},
        "suppliers.csv",
        3,
        "order_cost",
        "finite",
    ),
    (
        "own-upstream",
        {"sites.csv": edit(SITES, "s1,wh,2", "s1,s1,2")},
        "sites.csv",
        3,
        "upstream",
        "its own upstream",
    ),
    (
        "cycle",
        {"sites.csv": edit(edit(SITES, "s1,wh,2", "s1,s2,2"), "s2,wh,3", "s2,s1,3")},
        "sites.csv",
        3,
        "upstream",
        "cycle",
    ),
    (
        "target-toml",
        {"case.toml": edit(TOML, 'mode = "cost"', 'mode = "fill_rate"\n        target = 1.2')},
        "case.toml",
        None,
        "service.target",
        "strictly between 0 and 1",
    ),
    (
        "target-stocking-zero",
        {
            "case.toml": edit(TOML, 'mode = "cost"', 'mode = "fill_rate"\n        target = 0.9'),
            "stocking.csv": "site,item,target\nwh,a,0.95\ns1,a,0\n",
        },
        "stocking.csv",
        3,
        "target",
        "strictly between 0 and 1",
    ),
    (
        "target-stocking-one",
        {"stocking.csv": "site,item,target\nwh,a,\ns1,a,1\n"},
        "stocking.csv",
        3,
        "target",
        "strictly between 0 and 1",
    ),
    (
        "bad-date",
        {"demand.csv": None, "history.csv": edit(HISTORY_OK, "2025-03-05", "2025-02-30")},
        "history.csv",
        5,
        "date",
        "not a date",
    ),
    (
        "date-format",
        {"demand.csv": None, "history.csv": edit(HISTORY_OK, "2025-03-02,s1", "02/03/2025,s1")},
        "history.csv",
        3,
        "date",
        "not a date",
    ),
    (
        "history-negative",
        {"demand.csv": None, "history.csv": edit(HISTORY_OK, "s2,a,2", "s2,a,-2")},
        "history.csv",
        4,
        "quantity",
        "must not be negative",
    ),
    (
        "history-unknown-item",
        {"demand.csv": None, "history.csv": edit(HISTORY_OK, "s1,b,1", "s1,q,1")},
        "history.csv",
        5,
        "item",
        "unknown item",
    ),
    ("both-demand-history", {"history.csv": HISTORY_OK}, "demand.csv", None, None, "not both"),
    (
        "stocking-upstream",
        {"stocking.csv": "site,item\nwh,a\ns1,a\ns1,b\n"},
        "stocking.csv",
        4,
        "item",
        "upstream",
    ),
    (
        "stocking-duplicate",
        {"stocking.csv": "site,item\nwh,a\ns1,a\nwh,a\n"},
        "stocking.csv",
        4,
        "item",
        "duplicate",
    ),
    (
        "policy-not-stocked",
        {"policies.csv": "site,item,reorder_point,order_quantity\ns1,a,30,40\ns2,b,3,5\n"},
        "policies.csv",
        3,
        "item",
        "not stocked",
    ),
    (
        "policy-zero-q",
        {"policies.csv": "site,item,reorder_point,order_quantity\ns1,a,30,0\n"},
        "policies.csv",
        2,
        "order_quantity",
        "greater than 0",
    ),
    (
        "root-transit",
        {"sites.csv": edit(SITES, "wh,,,,", "wh,,5,,")},
        "sites.csv",
        2,
        "transit_days",
        "only a site with an upstream",
    ),
    (
        "missing-transit",
        {"sites.csv": edit(SITES, "s1,wh,2,", "s1,wh,,")},
        "sites.csv",
        3,
        "transit_days",
        "needs its transit time",
    ),
    ("site-name", {"sites.csv": edit(SITES, "s2,wh", "s2/x,wh")}, "sites.csv", 4, "site", "folder names"),
    (
        "cost-without-backorder",
        {"items.csv": edit(ITEMS, "b,sup1,4,1.5,3,", "b,sup1,4,1.5,,")},
        "items.csv",
        3,
        "backorder_cost",
        "needs a backorder_cost",
    ),
    (
        "service-without-target",
        {"case.toml": edit(TOML, 'mode = "cost"', 'mode = "cycle_service"')},
        "case.toml",
        None,
        "service.target",
        "needs a target",
    ),
    (
        "bad-mode",
        {"case.toml": edit(TOML, 'mode = "cost"', 'mode = "cheapest"')},
        "case.toml",
        None,
        "service.mode",
        "must be one of",
    ),
    (
        "bad-store-model",
        {"case.toml": edit(TOML, 'distribution = "normal"',
                           'distribution = "normal"\n        store_model = "exact"')},
        "case.toml",
        None,
        "store_model",
        "must be one of",
    ),
    (
        "bad-distribution",
        {"items.csv": edit(ITEMS, "50,,30,,,,poisson", "50,,30,,,,gamma")},
        "items.csv",
        4,
        "distribution",
        "must be one of",
    ),
    (
        "zero-holding",
        {"items.csv": edit(ITEMS, "a,sup1,10,", "a,sup1,0,")},
        "items.csv",
        2,
        "unit_cost",
        "holding cost",
    ),
    ("bad-toml", {"case.toml": 'name = "x\n'}, "case.toml", None, None, "not valid TOML"),
    (
        "short-row",
        {"suppliers.csv": SUPPLIERS + "        sup3,1,2,3,4,5,6\n"},
        "suppliers.csv",
        4,
        None,
        "cells",
    ),
]


def _check_message(message: str, file: str, row: int | None, column: str | None, words: str) -> None:
    assert message.startswith(file), message
    if row is not None:
        assert f"row {row}" in message, message
    if column is not None:
        assert f"'{column}'" in message, message
    assert words in message, message


@pytest.mark.parametrize(
    ("files", "file", "row", "column", "words"), [c[1:] for c in BAD_CASES], ids=[c[0] for c in BAD_CASES]
)
def test_bad_input_is_named_and_nothing_written(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    files: dict,
    file: str,
    row: int | None,
    column: str | None,
    words: str,
) -> None:
    folder = write_case(tmp_path / "case", files)
    with pytest.raises(CaseError) as info:
        load_case(folder)
    err = info.value
    assert err.file == file
    assert err.row == row
    if column is not None:
        assert err.column == column
    _check_message(str(err), file, row, column, words)

    out = tmp_path / "out"
    code = main(["plan", str(folder), "--out", str(out), "--quiet"])
    captured = capsys.readouterr()
    assert code == 2
    _check_message(captured.err.split("problem: ", 1)[1], file, row, column, words)
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case"]  # no temporary folder left either


def test_missing_case_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["check", str(tmp_path / "nowhere")])
    assert code == 2
    assert "case folder does not exist" in capsys.readouterr().err


def test_evaluate_policies_file_must_cover_every_item_site(case_writer, tmp_path: Path) -> None:
    folder = case_writer()
    policies = tmp_path / "mine.csv"
    policies.write_text("site,item,reorder_point,order_quantity\ns1,a,30,40\n", encoding="utf-8")
    case = load_case(folder)
    with pytest.raises(CaseError) as info:
        load_policies_for_case(case, policies)
    assert info.value.file == "mine.csv"
    assert "no policy for stocked item" in str(info.value)


def test_optional_columns_get_documented_defaults(case_writer) -> None:
    folder = case_writer(
        {
            "sites.csv": "site,upstream,transit_days\nwh,,\ns1,wh,2\ns2,wh,3\n",
            "suppliers.csv": "supplier,lead_days,order_cost\nsup1,10,50\nsup2,20,80\n",
            "items.csv": "item,supplier,unit_cost,backorder_cost\na,sup1,10,6\nb,sup1,4,3\nc,sup2,50,30\n",
        }
    )
    case = load_case(folder)
    sites = case.sites.set_index("site")
    assert sites.loc["s1", "transit_days_sd"] == 0.0
    assert sites.loc["s1", "delivery_cost"] == 0.0
    sup = case.suppliers.set_index("supplier")
    assert sup.loc["sup1", "lead_days_sd"] == 0.0 and sup.loc["sup1", "line_cost"] == 0.0
    assert math.isnan(sup.loc["sup1", "capacity_volume"]) and sup.loc["sup1", "min_order_value"] == 0.0
    items = case.items.set_index("item")
    assert items.loc["a", "pack_size"] == 1.0
    assert math.isnan(items.loc["a", "holding_cost"]) and math.isnan(items.loc["a", "volume"])
    assert items.loc["a", "distribution"] == ""
    assert case.stocking is None and case.policies is None
    assert case.settings.mode == "cost" and case.settings.days_per_year == 360.0


def test_settings_defaults(case_writer) -> None:
    folder = case_writer({"case.toml": 'name = "defaults"\n', "items.csv": ITEMS})
    settings = load_case(folder).settings
    assert (
        settings.days_per_year,
        settings.holding_rate,
        settings.mode,
        settings.backorder_basis,
        settings.distribution,
        settings.target,
    ) == (365.0, 0.25, "cost", "per_unit", "auto", None)


def test_unknown_columns_and_keys_are_warned(case_writer) -> None:
    folder = case_writer(
        {
            "items.csv": ITEMS.replace("distribution\n", "distribution,colour\n", 1),
            "case.toml": TOML + "        currncy = 'EUR'\n",
        }
    )
    warnings = load_case(folder).warnings
    assert any("colour" in w for w in warnings)
    assert any("currncy" in w for w in warnings)


def test_blank_lines_keep_spreadsheet_row_numbers(case_writer) -> None:
    # a blank line is row 3 in a spreadsheet; the bad value after it is on row 4
    folder = case_writer({"demand.csv": "site,item,daily_mean,daily_sd\ns1,a,12,4\n\ns1,b,-3,2\n"})
    with pytest.raises(CaseError) as info:
        load_case(folder)
    assert info.value.row == 4 and info.value.column == "daily_mean"


def test_history_estimate_matches_numpy(case_writer) -> None:
    """Moments from history against numpy on the zero-filled daily series (days without a sale are zero)."""
    history = textwrap.dedent(HISTORY_OK) + "2025-03-05,s1,a,3\n2025-03-05,s1,a,2\n2025-03-10,s2,c,1\n"
    folder = case_writer({"demand.csv": None, "history.csv": history})
    case = load_case(folder)
    demand = case.demand.set_index(["site", "item"])
    # span 2025-03-01 .. 2025-03-10 = 10 days; two lines on 03-05 for s1/a add up to 5
    s1a = np.zeros(10)
    s1a[[0, 1, 4]] = [4, 6, 5]
    s2a = np.zeros(10)
    s2a[1] = 2
    assert demand.loc[("s1", "a"), "daily_mean"] == pytest.approx(s1a.mean(), rel=1e-12)
    assert demand.loc[("s1", "a"), "daily_sd"] == pytest.approx(s1a.std(ddof=1), rel=1e-12)
    assert demand.loc[("s2", "a"), "daily_sd"] == pytest.approx(s2a.std(ddof=1), rel=1e-12)
    assert int(demand["history_days"].iloc[0]) == 10
    # s1/a sells on 3 days of 10: ADI = 10/3 >= 1.32, not smooth (Syntetos & Boylan 2005, from memory)
    assert demand.loc[("s1", "a"), "demand_class"] in ("intermittent", "lumpy")
    assert demand.loc[("s1", "a"), "distribution"] in ("poisson", "negbin")
    assert any("only 10 days" in w for w in case.warnings)


def test_history_of_one_day_is_refused(case_writer) -> None:
    folder = case_writer({"demand.csv": None, "history.csv": "date,site,item,quantity\n2025-03-01,s1,a,4\n"})
    with pytest.raises(CaseError) as info:
        load_case(folder)
    assert info.value.file == "history.csv" and info.value.column == "date" and info.value.row == 2


def test_stocking_rows_decide_what_is_stocked(case_writer) -> None:
    folder = case_writer({"stocking.csv": "site,item,order_quantity\nwh,a,100\ns1,a,\n"})
    case = load_case(folder)
    # demand for s1/b, s2/a, s2/c is not stocked: warned, not silently dropped
    assert any("not in stocking.csv" in w and "3 item-site" in w for w in case.warnings)


def test_demo_and_quickstart_cases_are_valid() -> None:
    root = Path(__file__).resolve().parents[1] / "cases"
    for name in ("demo", "quickstart", "quickstart-history"):
        case = load_case(root / name)
        assert not [w for w in case.warnings if "not used" in w], (name, case.warnings)


TOKENS = [
    "",
    "1",
    "-1",
    "0",
    "0.5",
    "1.5",
    "2",
    "nan",
    "NaN",
    "inf",
    "-inf",
    "1e400",
    "1_000",
    "abc",
    "1,5",
    "+3",
    "1e-3",
    "0x10",
    "2025-02-30",
    "2025-03-01",
    "03/01/2025",
    "Normal",
    "poisson",
    "gamma",
    "AUTO",
]


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.sampled_from(TOKENS), min_size=1, max_size=12),
    st.sampled_from(
        [c for spec in (ITEMS_COLUMNS, STOCKING_COLUMNS, HISTORY_COLUMNS, POLICIES_COLUMNS) for c in spec]
    ),
)
def test_column_parser_agrees_with_cell_parser(cells: list[str], col) -> None:
    """The vectorised column parser refuses exactly the cells the cell parser refuses (brute force)."""
    values, bad = _parse_column(pd.Series(cells, dtype=object), col)
    for k, raw in enumerate(cells):
        try:
            expected = _parse_cell(raw, col, "f.csv", k + 2)
        except CaseError:
            assert bad[k], (raw, col.name)
            continue
        assert not bad[k], (raw, col.name)
        got = values[k] if not isinstance(values, pd.Series) else values.iloc[k]
        if isinstance(expected, float) and math.isnan(expected):
            assert math.isnan(got)
        else:
            assert got == expected, (raw, col.name)


def test_site_without_items_is_warned(case_writer) -> None:
    sites = BASE_FILES["sites.csv"] + "        s3,wh,1,,\n"
    warnings = load_case(case_writer({"sites.csv": sites})).warnings
    assert any("s3 stock no item" in w for w in warnings)


def test_store_model_setting(tmp_path):
    """case.toml store_model: default auto, "units" read and shown in the settings."""
    from optimiser.case import load_case

    case = load_case(write_case(tmp_path / "a"))
    assert case.settings.store_model == "auto"
    toml = edit(TOML, 'distribution = "normal"', 'distribution = "normal"\n        store_model = "units"')
    case = load_case(write_case(tmp_path / "b", {"case.toml": toml}))
    assert case.settings.store_model == "units" and case.settings.as_dict()["store_model"] == "units"
