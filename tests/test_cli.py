"""The ``rqnet`` command: plan, check and evaluate end to end, outputs, exit codes, atomic writing.

The demo and quickstart cases are invented (cases/*/generate.py). Totals are checked against sums of the
written rows; evaluation of a plan's own policies must give back the plan's costs.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

import optimiser.report as report_module
from optimiser.case import load_case, stocked_pairs
from optimiser.cli import COMMANDS, Command, build_parser, main

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "cases" / "demo"
QUICK = ROOT / "cases" / "quickstart"
QUICK_HISTORY = ROOT / "cases" / "quickstart-history"


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "out"
    assert main(["plan", str(DEMO), "--out", str(out), "--quiet"]) == 0
    return out


def test_demo_plan_has_a_policy_for_every_stocked_item_site(demo_out: Path) -> None:
    case = load_case(DEMO)
    pairs = stocked_pairs(case.sites, case.demand, case.stocking)
    policies = pd.read_csv(demo_out / "policies.csv", keep_default_na=False)
    assert len(policies) == len(pairs) == len(case.stocking)
    assert set(zip(policies["site"], policies["item"], strict=True)) == set(
        zip(pairs["site"], pairs["item"], strict=True)
    )
    for column in (
        "order_quantity",
        "reorder_point",
        "safety_stock",
        "lead_time_days",
        "lead_time_demand_mean",
        "lead_time_demand_sd",
        "cycle_service",
        "fill_rate",
        "expected_on_hand",
        "expected_backorders",
        "orders_per_year",
        "ordering_cost",
        "holding_cost",
        "backorder_cost",
        "total_cost",
    ):
        values = pd.to_numeric(policies[column])
        assert values.notna().all(), column
    assert policies["fill_rate"].between(0, 1).all()
    assert policies["distribution"].isin(["normal", "poisson", "negbin"]).all()
    # today's policies are in the case: their figures sit beside the recommended ones
    assert {"current_reorder_point", "current_order_quantity", "current_total_cost"} <= set(policies.columns)


def test_demo_totals_add_up_and_summary_fields(demo_out: Path) -> None:
    policies = pd.read_csv(demo_out / "policies.csv", keep_default_na=False)
    summary = json.loads((demo_out / "summary.json").read_text(encoding="utf-8"))
    assert summary["tool"] == "rqnet" and summary["command"] == "plan" and summary["version"]
    assert summary["settings"]["name"] == "Saltline Chandlery" and summary["settings"]["mode"] == "cost"
    assert isinstance(summary["warnings"], list)
    case = load_case(DEMO)
    assert set(summary["sites"]) == set(case.sites["site"])
    by_site = policies.groupby("site")[
        ["ordering_cost", "holding_cost", "backorder_cost", "total_cost"]
    ].sum()
    for site, totals in summary["sites"].items():
        for column in by_site.columns:
            assert totals[column] == pytest.approx(by_site.loc[site, column], rel=1e-4), (site, column)
        assert totals["item_sites"] == int((policies["site"] == site).sum())
    network = summary["network"]
    assert network["total_cost"] == pytest.approx(
        sum(s["total_cost"] for s in summary["sites"].values()), rel=1e-9
    )
    assert network["item_sites"] == len(policies)
    assert summary["today"]["(network)"]["item_sites"] == len(policies)


def test_demo_site_folders_and_plots(demo_out: Path) -> None:
    case = load_case(DEMO)
    for site in case.sites["site"]:
        folder = demo_out / "sites" / site
        rows = pd.read_csv(folder / "policies.csv", keep_default_na=False)
        assert (rows["site"] == site).all() and len(rows) > 0
        text = (folder / "summary.md").read_text(encoding="utf-8")
        assert site in text and "Items that drive cost" in text and "Caution" in text
        assert "medicines or safety equipment" in text
    for name in ("cost_by_site.png", "safety_stock_vs_service.png", "comparison.csv"):
        assert (demo_out / name).stat().st_size > 0
    assert (demo_out / "cost_by_site.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_check_prints_what_was_read(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(DEMO)]) == 0
    out = capsys.readouterr().out
    assert "case: Saltline Chandlery" in out
    assert "sites: 7 (1 supplied by suppliers, 6 by another site)" in out
    assert f"item-sites to plan: {len(load_case(DEMO).stocking)} (" in out
    assert "the case is valid" in out


def test_check_on_history_case(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(QUICK_HISTORY)]) == 0
    out = capsys.readouterr().out
    assert "estimated from history.csv over 364 days for 7 site-item series" in out


def test_evaluate_gives_back_the_plan(tmp_path: Path) -> None:
    plan_out, eval_out = tmp_path / "plan", tmp_path / "eval"
    assert main(["plan", str(QUICK), "--out", str(plan_out), "-q", "--no-plots"]) == 0
    assert (
        main(
            [
                "evaluate",
                str(QUICK),
                "--policies",
                str(plan_out / "policies.csv"),
                "--out",
                str(eval_out),
                "-q",
                "--no-plots",
            ]
        )
        == 0
    )
    planned = json.loads((plan_out / "summary.json").read_text(encoding="utf-8"))
    evaluated = json.loads((eval_out / "summary.json").read_text(encoding="utf-8"))
    assert evaluated["command"] == "evaluate"
    # policies.csv keeps 6 significant digits; at an optimum the cost is flat, so totals agree closely
    assert evaluated["network"]["total_cost"] == pytest.approx(planned["network"]["total_cost"], rel=1e-5)
    rows = pd.read_csv(eval_out / "policies.csv")
    assert len(rows) == planned["network"]["item_sites"]


def test_evaluate_rejects_incomplete_policies(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    policies = tmp_path / "today.csv"
    policies.write_text(
        "site,item,reorder_point,order_quantity\nworkshop,chain-11speed,4,20\n", encoding="utf-8"
    )
    out = tmp_path / "out"
    code = main(["evaluate", str(QUICK), "--policies", str(policies), "--out", str(out), "-q"])
    assert code == 2
    assert "today.csv" in capsys.readouterr().err
    assert not out.exists()


def test_out_folder_with_foreign_files_is_left_alone(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("keep me", encoding="utf-8")
    assert main(["plan", str(QUICK), "--out", str(out), "-q"]) == 2
    assert "did not write" in capsys.readouterr().err
    assert [p.name for p in out.iterdir()] == ["notes.txt"]


def test_earlier_results_are_replaced(tmp_path: Path) -> None:
    out = tmp_path / "out"
    assert main(["plan", str(QUICK), "--out", str(out), "-q", "--no-plots"]) == 0
    (out / "sites" / "stale-site").mkdir()
    assert main(["plan", str(QUICK), "--out", str(out), "-q", "--no-plots"]) == 0
    assert not (out / "sites" / "stale-site").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # no temporary or old folder left


def test_failure_while_writing_leaves_nothing(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(*_args, **_kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(report_module, "_plots", broken)
    out = tmp_path / "out"
    with pytest.raises(OSError):
        report_module.write_outputs(_quick_result(), out)
    assert list(tmp_path.iterdir()) == []


def _quick_result():
    from optimiser.plan import plan_case

    return plan_case(load_case(QUICK))


def test_help_for_every_command(capsys: pytest.CaptureFixture[str]) -> None:
    parser = build_parser()
    names = [(c if isinstance(c, Command) else c()).name for c in COMMANDS]
    assert {"plan", "check", "evaluate"} <= set(names)
    for name in names:
        with pytest.raises(SystemExit) as info:
            parser.parse_args([name, "--help"])
        assert info.value.code == 0
        assert f"rqnet {name}" in capsys.readouterr().out


def test_module_entry_point_reports_bad_case(tmp_path: Path) -> None:
    bad = tmp_path / "bad"
    bad.mkdir()
    done = subprocess.run(
        [sys.executable, "-m", "optimiser.cli", "check", str(bad)],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=120,
    )
    assert done.returncode == 2
    assert "case.toml: file is missing" in done.stderr


def test_notes_are_written_in_words(tmp_path: Path) -> None:
    from models.single_site import NOTE_ZERO_DEMAND, describe_notes

    out = tmp_path / "out"
    assert main(["plan", str(QUICK), "--out", str(out), "-q", "--no-plots"]) == 0
    rows = pd.read_csv(out / "policies.csv", keep_default_na=False).set_index("item")
    words = "; ".join(describe_notes(NOTE_ZERO_DEMAND))
    assert words and words in rows.loc["wheel-truing-spoke-set", "note"]  # zero demand in demand.csv
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert any(words in note for note in summary["notes"])
    assert words in (out / "sites" / "workshop" / "summary.md").read_text(encoding="utf-8")


def test_demo_network_plan_summary(demo_out: Path) -> None:
    summary = json.loads((demo_out / "summary.json").read_text(encoding="utf-8"))
    if summary["method"] != "network":
        pytest.skip("the network method is not available")
    rows = pd.read_csv(demo_out / "network_summary.csv")
    depot = summary["network_plan"]["depot"]
    assert depot["items"] == len(rows)
    assert depot["network_cost"] == pytest.approx(rows["network_cost"].sum(), rel=1e-4)
    alone = depot["single_site_network_cost"]
    assert depot["savings"] == pytest.approx(alone - depot["network_cost"], rel=1e-9)
    # the network cost is the cost of the written policies of every site (the stores' and the depot's)
    assert depot["network_cost"] == pytest.approx(summary["network"]["total_cost"], rel=1e-4)
    assert "Planning the network together" in (demo_out / "sites" / "depot" / "summary.md").read_text()


# ----------------------------------------------------------------------------------------------------------
# the plan's "ordering together" section (joint replenishment per supplier family)
# ----------------------------------------------------------------------------------------------------------
def test_demo_plan_writes_the_grouping_section(demo_out: Path) -> None:
    groups = pd.read_csv(demo_out / "groups.csv", keep_default_na=False)
    for column in ("family", "item", "base_cycle_days", "cycle_multiple", "order_interval_days",
                   "order_up_to", "annual_cost"):
        assert column in groups.columns
    families = pd.read_csv(demo_out / "families.csv", keep_default_na=False)
    case = load_case(DEMO)
    # one family per supplier the depot (the only site fed by suppliers) buys from
    assert set(families["family"]) == {f"depot/{s}" for s in case.items["supplier"].unique()}
    summary = json.loads((demo_out / "summary.json").read_text(encoding="utf-8"))
    grouping = summary["grouping"]
    assert grouping["state"] == "done"
    fams = grouping["families"]
    assert set(fams) == set(families["family"])
    for name in ("independent_cost", "grouped_cost", "savings"):
        assert grouping["totals"][name] == pytest.approx(sum(f[name] for f in fams.values()), rel=1e-9)
    for rec in fams.values():
        assert rec["savings"] == pytest.approx(rec["independent_cost"] - rec["grouped_cost"], rel=1e-9)
    # the grouped cost of a family is the sum of its items' annual costs in groups.csv
    per_family = groups.groupby("family")["annual_cost"].apply(lambda v: pd.to_numeric(v).sum())
    for name, rec in fams.items():
        assert rec["grouped_cost"] == pytest.approx(per_family[name], rel=1e-4)
    # the depot's summary names every family; a store (ordering from the depot) has no such section
    text = (demo_out / "sites" / "depot" / "summary.md").read_text(encoding="utf-8")
    assert "## Ordering together" in text
    for name in fams:
        assert f"| {name} |" in text
    store = case.sites.loc[case.sites["upstream"] != "", "site"].iloc[0]
    assert "Ordering together" not in (demo_out / "sites" / store / "summary.md").read_text(encoding="utf-8")


def test_plan_no_grouping_writes_none(tmp_path: Path) -> None:
    out = tmp_path / "out"
    assert main(["plan", str(QUICK), "--out", str(out), "-q", "--no-plots", "--no-grouping"]) == 0
    assert not (out / "groups.csv").exists() and not (out / "families.csv").exists()
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["grouping"]["state"] == "skipped" and "families" not in summary["grouping"]


def test_plan_survives_a_grouping_failure(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import optimiser.grouping as grouping
    from optimiser.errors import SolverError

    def broken(*_args, **_kwargs):
        raise SolverError("the MILP solver is not available")

    monkeypatch.setattr(grouping, "group_case", broken)
    out = tmp_path / "out"
    assert main(["plan", str(QUICK), "--out", str(out), "-q", "--no-plots"]) == 0
    assert (out / "policies.csv").exists() and not (out / "groups.csv").exists()
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["grouping"]["state"] == "failed"
    assert "the MILP solver is not available" in summary["grouping"]["message"]
    assert any("ordering together" in w for w in summary["warnings"])
