"""Small case folders for tests: a valid two-level case and a writer that changes one file at a time.

``write_case(folder, files)`` writes the base files below updated with ``files`` (``{file name: text}``;
``None`` drops a file). The base case is a warehouse ``wh`` feeding stores ``s1`` and ``s2``. Tests change one
file to break exactly one rule. All data here is invented. Imported by name (``from casefiles import ...``):
pytest puts this folder on the import path.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

BASE_FILES: dict[str, str] = {
    "case.toml": """\
        name = "tiny test network"
        currency = "EUR"
        days_per_year = 360
        holding_rate = 0.2
        distribution = "normal"

        [service]
        mode = "cost"
        backorder_basis = "per_unit"
        """,
    "sites.csv": """\
        site,upstream,transit_days,transit_days_sd,delivery_cost
        wh,,,,
        s1,wh,2,0.5,20
        s2,wh,3,0,25
        """,
    "suppliers.csv": """\
        supplier,lead_days,lead_days_sd,order_cost,line_cost
        sup1,10,2,50,5
        sup2,20,0,80,
        """,
    "items.csv": """\
        item,supplier,unit_cost,holding_cost,backorder_cost,pack_size,volume,weight,distribution
        a,sup1,10,,6,,0.01,1.5,
        b,sup1,4,1.5,3,,,,
        c,sup2,50,,30,,,,poisson
        """,
    "demand.csv": """\
        site,item,daily_mean,daily_sd
        s1,a,12,4
        s1,b,3,2
        s2,a,8,3
        s2,c,0.2,0.5
        """,
}


def write_case(folder: Path, files: dict[str, str | None] | None = None) -> Path:
    """Write a case folder: the base files updated with ``files`` (``None`` drops a file)."""
    folder.mkdir(parents=True, exist_ok=True)
    merged: dict[str, str | None] = dict(BASE_FILES)
    merged.update(files or {})
    for name, text in merged.items():
        if text is None:
            continue
        (folder / name).write_text(textwrap.dedent(text), encoding="utf-8")
    return folder
