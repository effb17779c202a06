"""Generate the history variant of the quickstart case: a year of daily sales instead of demand.csv.

The workshop, suppliers and items are those of ``cases/quickstart``; ``history.csv`` lists the quantity sold
per day and item (days without a sale are simply absent). Sales are drawn, seeded, from invented processes:
Poisson for steady sellers, and for sporadic ones a sale on a few days with a size of one to several units.

    .venv/bin/python cases/quickstart-history/generate.py
"""

from __future__ import annotations

import csv
import datetime as dt
import shutil
from pathlib import Path

import numpy as np

SEED = 7310
HERE = Path(__file__).resolve().parent
SOURCE = HERE.parent / "quickstart"
START = dt.date(2025, 1, 6)
DAYS = 364

# item: (probability of a sale on a day, mean size of a sale); steady sellers have probability 1 (Poisson)
PROCESSES = {
    "inner-tube-700c": (1.0, 6.5),
    "inner-tube-26in": (1.0, 2.2),
    "brake-pads-disc": (0.75, 2.4),
    "chain-11speed": (0.35, 1.7),
    "tyre-700x28": (0.55, 2.0),
    "rim-tape-roll": (0.25, 1.6),
    "hub-bearing-kit": (0.06, 1.3),
}


def main() -> None:
    rng = np.random.default_rng(SEED)
    for name in ("sites.csv", "suppliers.csv", "items.csv"):
        shutil.copyfile(SOURCE / name, HERE / name)
    # the history counts every day of the year (zeros on days without a sale), so a year has 365 days here
    toml = (SOURCE / "case.toml").read_text(encoding="utf-8")
    toml = toml.replace(
        "days_per_year = 310        # open six days a week",
        "days_per_year = 365        # history.csv counts every day, zeros included",
    )
    (HERE / "case.toml").write_text(
        toml.replace(
            'name = "Canal Street cycle workshop"',
            'name = "Canal Street cycle workshop (from sales history)"',
        ),
        encoding="utf-8",
    )
    rows = []
    for day in range(DAYS):
        date = START + dt.timedelta(days=day)
        for item, (p_sale, size) in PROCESSES.items():
            if p_sale >= 1.0:
                qty = int(rng.poisson(size))
            elif rng.random() < p_sale:
                qty = 1 + int(rng.poisson(size - 1.0))
            else:
                qty = 0
            if qty > 0:
                rows.append([date.isoformat(), "workshop", item, qty])
    with (HERE / "history.csv").open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(["date", "site", "item", "quantity"])
        writer.writerows(rows)


if __name__ == "__main__":
    main()
