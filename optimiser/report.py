"""Write the outputs of a plan or an evaluation into a folder, atomically.

Layout of the output folder::

    policies.csv              one row per stocked item-site (all sites)
    sites/<site>/policies.csv that site's rows
    sites/<site>/summary.md   a short readable summary of the site
    summary.json              totals per site and for the network, settings, tool version, warnings
    comparison.csv            today's against the recommended policies (only when the case gives today's)
    network_summary.csv       network method: per item, safety stock split and saving against planning alone
    groups.csv, families.csv  plan: items ordered together per supplier family (rqnet plan without
                              --no-grouping; summary.json "grouping" holds the per-family totals)
    cost_by_site.png          annual cost per site by component
    safety_stock_vs_service.png  safety stock in days of demand against fill rate per item-site

Everything is written into a temporary folder beside the target and renamed into place when complete; on an
error nothing is left behind. An existing target folder is replaced only when it is empty or was written by
rqnet (it holds a ``summary.json`` whose ``tool`` is ``"rqnet"``).
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from models import single_site as ss
from optimiser.errors import OutputError
from optimiser.itemsites import distribution_names
from optimiser.plan import PlanResult

__all__ = ["write_outputs", "tool_version", "note_words", "CAUTION"]

TOOL = "rqnet"
TOP_ITEMS = 5  # items named in a site summary as the ones that drive cost

CAUTION = (
    "These figures are decision support, computed from the demand, lead times and costs in the case; check "
    "them against what you know before acting. For critical stock such as medicines or safety equipment, "
    "follow local regulation and licensed practice, whatever this plan says."
)


BASIS_WORDS = {
    "per_unit": "backorder cost per unit short",
    "per_unit_year": "backorder cost per unit short per year",
}
METHOD_WORDS = {
    "network": "Sites were planned together: a store's lead time includes its expected wait upstream.",
    "single-site": "Each site was planned on its own.",
}


def tool_version() -> str:
    """Installed version of rqnet (``"unknown"`` when not installed as a package)."""
    try:
        return metadata.version(TOOL)
    except metadata.PackageNotFoundError:
        return "unknown"


def note_words(flags: int) -> str:
    """The note flags of one item-site in words (``""`` when there is none)."""
    if not flags:
        return ""
    words = ss.describe_notes(int(flags))
    if isinstance(words, str):
        return words
    return "; ".join(str(w) for w in words)


def _csv_frame(policies: pd.DataFrame) -> pd.DataFrame:
    """Policies frame as written to CSV: distribution names and notes in words."""
    out = policies.copy()
    if np.issubdtype(out["distribution"].dtype, np.number):
        out["distribution"] = distribution_names(out["distribution"].to_numpy())
    if not pd.api.types.is_object_dtype(out["note"]):
        words = {int(f): note_words(int(f)) for f in np.unique(out["note"].to_numpy())}
        out["note"] = out["note"].map(words)
    return out


def _text_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """Every cell as text: floats with 6 significant digits (empty for NaN), the rest as they are."""
    out: dict[str, Any] = {}
    for column in frame.columns:
        values = frame[column]
        if pd.api.types.is_float_dtype(values):
            # formatting number by number in Python beats pandas' float_format path several times over
            out[column] = ["" if v != v else f"{v + 0.0:.6g}" for v in values.tolist()]
        else:
            out[column] = values.to_numpy()
    return pd.DataFrame(out, index=frame.index)


def _with_current(frame: pd.DataFrame, current: pd.DataFrame | None) -> pd.DataFrame:
    if current is None:
        return frame
    keep = current[
        ["site", "item", "reorder_point", "order_quantity", "total_cost", "fill_rate", "cycle_service"]
    ].rename(columns=lambda c: c if c in ("site", "item") else f"current_{c}")
    return frame.merge(keep, on=["site", "item"], how="left")


def _json_number(value: Any) -> Any:
    if isinstance(value, float | np.floating):
        value = float(value)
        return None if not math.isfinite(value) else round(value, 6)
    if isinstance(value, np.integer):
        return int(value)
    return value


def _clean(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    return _json_number(obj)


def _summary_json(result: PlanResult, case_name: str, case_path: str) -> dict[str, Any]:
    sites = {
        row["site"]: {k: v for k, v in row.items() if k != "site"}
        for row in result.site_totals.to_dict(orient="records")
    }
    notes = _note_counts(result.policies)
    out: dict[str, Any] = {
        "tool": TOOL,
        "version": tool_version(),
        "command": result.command,
        "method": result.method,
        "created": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "case": {"name": case_name, "path": case_path},
        "settings": result.settings.as_dict(),
        "network": result.network,
        "sites": sites,
        "notes": notes,
        "warnings": list(result.warnings),
    }
    if result.network_summary is not None and len(result.network_summary):
        out["network_plan"] = _network_plan_totals(result)
    section = getattr(result, "grouping", None)
    if section is not None:
        out["grouping"] = _grouping_json(section)
    if result.comparison is not None:
        out["today"] = {
            row["site"]: {k: v for k, v in row.items() if k != "site"}
            for row in result.comparison.to_dict(orient="records")
        }
    return _clean(out)


def _grouping_json(section: Any) -> dict[str, Any]:
    """The plan's "ordering together" section: state, totals over the families, per family figures."""
    out: dict[str, Any] = {"state": section.state, "message": section.message}
    if section.result is None:
        return out
    out["totals"] = section.totals()
    fams = {}
    for rec in section.result.families.to_dict(orient="records"):
        fams[str(rec["family"])] = {
            "site": rec["site"], "supplier": rec["supplier"], "items": rec["items"], "status": rec["status"],
            "base_cycle_days": rec["base_cycle_days"], "independent_cost": rec["independent_cost"],
            "grouped_cost": rec["grouped_cost"], "savings": rec["savings"], "savings_pct": rec["savings_pct"],
            "binding": [b for b in str(rec["binding"]).split(",") if b], "gap": rec["gap"],
            "shared_run": rec["shared_run"], "demand_basis": rec.get("demand_basis", ""),
            "message": rec["message"],
        }
    out["families"] = fams
    out["warnings"] = list(section.result.warnings)
    return out


def _grouping_lines(result: PlanResult, site: str) -> list[str]:
    """The "Ordering together" section of a site's summary.md (sites that order from suppliers)."""
    section = getattr(result, "grouping", None)
    if section is None or result.command != "plan":
        return []
    if (result.itemsites.loc[result.itemsites["site"] == site, "upstream"] != "").all():
        return []  # the site orders from another site only
    lines = ["## Ordering together", ""]
    if section.result is None:
        return lines + [f"Not done: {section.message}.", ""]
    fam = section.result.families
    fam = fam[fam["site"].astype(str) == site]
    if fam.empty:
        return lines + ["No supplier family at this site.", ""]
    cur = result.settings.currency
    lines += [
        "Ordering a supplier's items on a common base cycle, each item every k cycles, shares the supplier's "
        "order cost. Per family (items in groups.csv):",
        "",
        "| family | base cycle (days) | grouped cost | ordering alone | savings | binds |",
        "|---|---|---|---|---|---|",
    ]
    for rec in fam.itertuples(index=False):
        cycle = f"{rec.base_cycle_days:,.1f}" if math.isfinite(rec.base_cycle_days) else "n/a"
        bind = ", ".join(b.replace("_", " ") for b in str(rec.binding).split(",") if b) or "none"
        if rec.status not in ("optimal", "time_limit", "not grouped", "no demand"):
            bind += f" ({rec.status})"
        lines.append(
            f"| {rec.family} | {cycle} | {_money(rec.grouped_cost, cur)} "
            f"| {_money(rec.independent_cost, cur)} | {_money(rec.savings, cur)} ({rec.savings_pct:.1f} %) "
            f"| {bind} |"
        )
    return lines + [""]


def _network_plan_totals(result: PlanResult) -> dict[str, dict[str, Any]]:
    """Per root site: network cost against planning each site alone, and the split of safety stock value."""
    summary = result.network_summary
    unit = result.itemsites.drop_duplicates("item").set_index("item")["unit_cost"]
    value = summary["item"].map(unit).to_numpy(dtype=float)
    out: dict[str, dict[str, Any]] = {}
    for root, idx in summary.groupby("root", sort=False).groups.items():
        part = summary.loc[idx]
        v = value[summary.index.get_indexer(idx)]
        wh = float((part["warehouse_safety_stock"] * v).sum())
        st = float((part["stores_safety_stock"] * v).sum())
        network, alone = float(part["network_cost"].sum()), float(part["single_site_network_cost"].sum())
        out[str(root)] = {
            "items": len(part),
            "network_cost": network,
            "single_site_network_cost": alone,
            "savings": alone - network,
            "savings_pct": 100.0 * (alone - network) / alone if alone > 0 else float("nan"),
            "warehouse_safety_stock_value": wh,
            "stores_safety_stock_value": st,
            "warehouse_share_of_safety_stock_value": wh / (wh + st) if wh + st != 0 else float("nan"),
        }
    return out


def _note_counts(policies: pd.DataFrame) -> dict[str, int]:
    counts: dict[str, int] = {}
    for flag, n in policies["note"].value_counts().items():
        words = note_words(int(flag)) if not isinstance(flag, str) else flag
        if words:
            counts[words] = counts.get(words, 0) + int(n)
    return counts


def _money(value: float, currency: str) -> str:
    if not math.isfinite(value):
        return "n/a"
    return f"{value:,.0f} {currency}".strip()


def _pct(value: float) -> str:
    return "n/a" if not math.isfinite(value) else f"{100 * value:.1f} %"


def _site_summary(result: PlanResult, site: str, totals: dict[str, Any], frame: pd.DataFrame) -> str:
    cur = result.settings.currency
    title = "Plan" if result.command == "plan" else "Evaluation of given policies"
    lines = [
        f"# {title} for site {site}",
        "",
        f"Case: {result.settings.name}. Service rule: {result.settings.mode.replace('_', ' ')}"
        + (f", target {result.settings.target:g}" if result.settings.target is not None else "")
        + (f", {BASIS_WORDS[result.settings.backorder_basis]}" if result.settings.mode == "cost" else "")
        + ". "
        + METHOD_WORDS.get(result.method, ""),
        "",
        "## Totals per year",
        "",
        "| | |",
        "|---|---|",
        f"| item-sites stocked | {totals['item_sites']} |",
        f"| orders placed | {totals['orders_per_year']:,.1f} |",
        f"| ordering cost | {_money(totals['ordering_cost'], cur)} |",
        f"| holding cost, cycle stock | {_money(totals['cycle_stock_cost'], cur)} |",
        f"| holding cost, safety stock | {_money(totals['safety_stock_cost'], cur)} |",
        f"| backorder cost | {_money(totals['backorder_cost'], cur)} |",
        f"| **total cost** | **{_money(totals['total_cost'], cur)}** |",
        f"| average stock value | {_money(totals['stock_value'], cur)} |",
        f"| safety stock value | {_money(totals['safety_stock_value'], cur)} |",
        "",
        "## Service",
        "",
        "Share of demand met at once from stock (fill rate, weighted by demand): "
        f"{_pct(totals['fill_rate'])}.",
        f"Share of replenishment cycles without a stockout (cycle service): {_pct(totals['cycle_service'])}.",
        "",
    ]
    if result.comparison is not None and site in set(result.comparison["site"]):
        row = result.comparison.set_index("site").loc[site]
        lines += [
            "## Today's policies against the recommended ones",
            "",
            f"On the {int(row['item_sites'])} item-sites with a policy today: today's total cost "
            f"{_money(row['current_total_cost'], cur)}, recommended "
            f"{_money(row['recommended_total_cost'], cur)} (saving {_money(row['saving'], cur)} a year); "
            f"fill rate today {_pct(row['current_fill_rate'])}, "
            f"recommended {_pct(row['recommended_fill_rate'])}.",
            "",
        ]
    if result.network_summary is not None and site in set(result.network_summary["root"].astype(str)):
        net = _network_plan_totals(result)[site]
        lines += [
            "## Planning the network together",
            "",
            f"For the {net['items']} items this site supplies to the sites below it, the network plan "
            f"costs {_money(net['network_cost'], cur)} a year against "
            f"{_money(net['single_site_network_cost'], cur)} when each site is planned alone (saving "
            f"{_money(net['savings'], cur)}). Safety stock value: "
            f"{_money(net['warehouse_safety_stock_value'], cur)} here, "
            f"{_money(net['stores_safety_stock_value'], cur)} at the sites below (negative where reorder "
            "points sit below the expected lead-time demand). Per item in network_summary.csv.",
            "",
        ]
    lines += _grouping_lines(result, site)
    top = frame.sort_values("total_cost", ascending=False).head(TOP_ITEMS)
    total = totals["total_cost"]
    lines += [
        "## Items that drive cost",
        "",
        "| item | R | Q | fill rate | total cost | share |",
        "|---|---|---|---|---|---|",
    ]
    for rec in top.itertuples(index=False):
        share = rec.total_cost / total if total > 0 else float("nan")
        lines.append(
            f"| {rec.item} | {rec.reorder_point:,.1f} | {rec.order_quantity:,.1f} | {_pct(rec.fill_rate)} "
            f"| {_money(rec.total_cost, cur)} | {_pct(share)} |"
        )
    notes = _note_counts(frame)
    if notes:
        lines += ["", "## Notes", ""] + [f"- {n} item(s): {words}" for words, n in notes.items()]
    site_warnings = [w for w in result.warnings if _concerns(w, site, result.site_totals["site"])]
    if site_warnings:
        lines += ["", "## Warnings", ""] + [f"- {w}" for w in site_warnings]
    lines += ["", "## Caution", "", CAUTION, ""]
    return "\n".join(lines)


def _concerns(warning: str, site: str, sites: pd.Series) -> bool:
    """A warning belongs in a site's summary when it names that site or names no site at all."""
    named = [s for s in sites if re.search(rf"(?<![\w-]){re.escape(str(s))}(?![\w-])", warning)]
    return not named or site in named


def _plots(result: PlanResult, folder: Path) -> list[str]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    written = []
    totals = result.site_totals
    fig, ax = plt.subplots(figsize=(max(5.0, 0.9 * len(totals) + 2), 4))
    # A component can be negative (safety-stock holding at a warehouse whose reorder point lies below its mean
    # lead-time demand): positive parts stack upwards from 0, negative parts downwards, and a black tick marks
    # each site's total.
    above = np.zeros(len(totals))
    below = np.zeros(len(totals))
    labels = {
        "ordering_cost": "ordering",
        "cycle_stock_cost": "holding, cycle stock",
        "safety_stock_cost": "holding, safety stock",
        "backorder_cost": "backorders",
    }
    for column, label in labels.items():
        values = totals[column].to_numpy(dtype=float)
        ax.bar(totals["site"], values, bottom=np.where(values >= 0, above, below), label=label)
        above += np.maximum(values, 0.0)
        below += np.minimum(values, 0.0)
    ax.scatter(totals["site"], totals["total_cost"], marker="_", s=400, color="black", zorder=3,
               label="total")
    if (below < 0).any():
        ax.axhline(0.0, color="black", linewidth=0.6)
    ax.set_ylabel(f"annual cost ({result.settings.currency})".replace(" ()", ""))
    ax.set_title("Annual cost per site by component")
    ax.legend(fontsize=8)
    ax.tick_params(axis="x", rotation=30)
    fig.tight_layout()
    fig.savefig(folder / "cost_by_site.png", dpi=110)
    plt.close(fig)
    written.append("cost_by_site.png")

    joined = result.policies.merge(result.itemsites[["site", "item", "annual_demand"]], on=["site", "item"])
    joined = joined[joined["annual_demand"] > 0]
    daily = joined["annual_demand"] / result.settings.days_per_year
    joined = joined.assign(cover_days=joined["safety_stock"] / daily)
    fig, ax = plt.subplots(figsize=(6.5, 4))
    for site, part in joined.groupby("site", sort=False):
        ax.scatter(part["cover_days"], part["fill_rate"], s=14, label=str(site), alpha=0.7)
    ax.set_xlabel("safety stock, days of demand")
    ax.set_ylabel("fill rate")
    ax.set_title("Safety stock against service, per item-site")
    if joined["site"].nunique() <= 10:
        ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(folder / "safety_stock_vs_service.png", dpi=110)
    plt.close(fig)
    written.append("safety_stock_vs_service.png")
    return written


def _check_target(out_dir: Path) -> None:
    if not out_dir.exists():
        return
    if not out_dir.is_dir():
        raise OutputError(f"{out_dir} exists and is not a folder; choose another --out")
    if not any(out_dir.iterdir()):
        return
    marker = out_dir / "summary.json"
    try:
        tool = json.loads(marker.read_text(encoding="utf-8")).get("tool")
    except (OSError, ValueError, AttributeError):
        tool = None
    if tool != TOOL:
        raise OutputError(
            f"{out_dir} holds files rqnet did not write; choose an empty or new folder for --out"
        )


@contextmanager
def atomic_folder(out_dir: str | Path) -> Iterator[Path]:
    """Write a results folder whole or not at all.

    Yields a temporary folder beside ``out_dir``; when the block ends normally the folder is moved into place
    (an earlier rqnet result there is replaced, and put back if the move fails); when the block raises, the
    temporary folder is removed and ``out_dir`` is left as it was.

    Raises
    ------
    OutputError
        When ``out_dir`` exists and holds files rqnet did not write.
    """
    target = Path(out_dir).resolve()
    _check_target(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    temp = Path(tempfile.mkdtemp(prefix=f".{target.name}.tmp-", dir=target.parent))
    try:
        yield temp
        os.chmod(temp, 0o755)
        if target.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=target.parent))
            old.rmdir()
            target.rename(old)
            try:
                temp.rename(target)
            except BaseException:
                old.rename(target)  # put the earlier results back
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            temp.rename(target)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise

def write_outputs(
    result: PlanResult, out_dir: str | Path, *, case_name: str = "", case_path: str = "", plots: bool = True
) -> list[str]:
    """Write every output of ``result`` into ``out_dir`` (atomically).

    Parameters
    ----------
    result : PlanResult
        From :func:`optimiser.plan.plan_case` or :func:`optimiser.plan.evaluate_case`.
    out_dir : str or Path
        Target folder; created, or replaced when it holds an earlier rqnet output.
    case_name, case_path : str
        Shown in ``summary.json``.
    plots : bool
        Also draw the PNG plots.

    Returns
    -------
    list of str
        Paths written, relative to ``out_dir``.

    Raises
    ------
    OutputError
        When ``out_dir`` exists and holds files rqnet did not write.
    """
    written: list[str] = []
    with atomic_folder(out_dir) as temp:
        frame = _csv_frame(result.policies)
        text = _text_frame(_with_current(frame, result.current))
        text.to_csv(temp / "policies.csv", index=False)
        written.append("policies.csv")
        totals = {row["site"]: row for row in result.site_totals.to_dict(orient="records")}
        for site, part in frame.groupby("site", sort=False):
            folder = temp / "sites" / str(site)
            folder.mkdir(parents=True)
            text.loc[part.index].to_csv(folder / "policies.csv", index=False)
            (folder / "summary.md").write_text(
                _site_summary(result, str(site), totals[site], part), encoding="utf-8"
            )
            written += [f"sites/{site}/policies.csv", f"sites/{site}/summary.md"]
        if result.network_summary is not None:
            _text_frame(result.network_summary).to_csv(temp / "network_summary.csv", index=False)
            written.append("network_summary.csv")
        if result.comparison is not None:
            _text_frame(result.comparison).to_csv(temp / "comparison.csv", index=False)
            written.append("comparison.csv")
        section = getattr(result, "grouping", None)
        if section is not None and section.result is not None:
            section.result.groups.to_csv(temp / "groups.csv", index=False, float_format="%.6g")
            section.result.families.to_csv(temp / "families.csv", index=False, float_format="%.6g")
            written += ["groups.csv", "families.csv"]
        summary = _summary_json(result, case_name or result.settings.name, case_path)
        (temp / "summary.json").write_text(
            json.dumps(summary, indent=2, ensure_ascii=False) + "\n", encoding="utf-8"
        )
        written.append("summary.json")
        if plots and len(result.policies):
            written += _plots(result, temp)
    return written
