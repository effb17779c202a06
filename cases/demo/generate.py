"""Generate the demo case: Saltline Chandlery, an invented chain of boat-supply shops.

Saltline runs one central depot and six branch shops in harbour towns along a stretch of coast. The depot
buys from four suppliers (ropes, paints and coatings, electrical and safety gear, deck hardware) and delivers
to the branches by its own van. Ninety items: fast movers (cleaning supplies, cable ties, fuel filters),
middling ones and slow, lumpy ones (anchors, winch handles, life rafts) that sell a few times a year.

Everything here is invented. Run from the repository root to rewrite the CSV files:

    .venv/bin/python cases/demo/generate.py
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

SEED = 20261202
HERE = Path(__file__).resolve().parent

BRANCHES = [
    # site, transit days, transit sd, delivery cost per van run
    ("northquay", 1.0, 0.3, 32.0),
    ("gullhaven", 1.0, 0.4, 28.0),
    ("eastpier", 2.0, 0.5, 41.0),
    ("kestrel-bay", 2.0, 0.6, 45.0),
    ("lowmarsh", 3.0, 0.8, 52.0),
    ("pembry-docks", 1.0, 0.3, 30.0),
]
BRANCH_SIZE = {"northquay": 1.4, "gullhaven": 1.0, "eastpier": 0.8, "kestrel-bay": 0.7, "lowmarsh": 0.5,
               "pembry-docks": 1.2}  # fmt: skip

SUPPLIERS = [
    # supplier, lead days, lead sd, order cost, line cost, max volume m3, max weight kg, min order value
    # (a small lorry of 18-20 m3 for the near suppliers; anchorline ships a forty-foot container of 67 m3)
    ("ropecraft", 9.0, 2.0, 60.0, 1.5, 18.0, 5000.0, 400.0),
    ("hullguard-coatings", 14.0, 4.0, 85.0, 2.0, 14.0, 8000.0, 750.0),
    ("brightmark-safety", 6.0, 1.5, 45.0, 1.0, 20.0, 6000.0, 250.0),
    ("anchorline-hardware", 35.0, 8.0, 140.0, 3.0, 67.0, 26000.0, 1500.0),
]

# family, supplier, names, unit cost range, volume m3 range, weight kg range, speed
FAMILIES = [
    (
        "rope",
        "ropecraft",
        [
            "braid-8mm-20m",
            "braid-10mm-20m",
            "braid-12mm-30m",
            "dyneema-6mm-10m",
            "mooring-14mm-15m",
            "mooring-16mm-15m",
            "anchor-warp-12mm-50m",
            "shock-cord-6mm-25m",
            "whipping-twine",
            "fender-line-10mm-2m",
            "throwing-line-30m",
            "flag-halyard-4mm-25m",
        ],
        (4.0, 95.0),
        (0.002, 0.03),
        (0.2, 9.0),
        "mixed",
    ),
    (
        "coat",
        "hullguard-coatings",
        [
            "antifoul-red-2.5l",
            "antifoul-blue-2.5l",
            "antifoul-black-2.5l",
            "primer-750ml",
            "topcoat-white-750ml",
            "varnish-1l",
            "teak-oil-1l",
            "thinner-1l",
            "epoxy-kit-500g",
            "gelcoat-filler",
            "brush-set",
            "roller-kit",
            "masking-tape-50m",
            "sanding-discs-pk10",
            "hull-cleaner-1l",
            "deck-soap-1l",
            "osmosis-barrier-2.5l",
            "bilge-cleaner-1l",
        ],
        (3.0, 120.0),
        (0.001, 0.006),
        (0.2, 4.0),
        "seasonal",
    ),
    (
        "safe",
        "brightmark-safety",
        [
            "lifejacket-150n",
            "lifejacket-275n",
            "rearming-kit-auto",
            "flare-pack-coastal",
            "fire-extinguisher-1kg",
            "first-aid-kit",
            "nav-light-led-bicolour",
            "nav-light-led-stern",
            "bilge-pump-12v",
            "battery-switch",
            "fuse-kit-blade",
            "cable-ties-pk100",
            "heat-shrink-kit",
            "anchor-light-led",
            "vhf-antenna",
            "horn-canister",
            "torch-waterproof",
            "throw-bag",
            "epirb-battery",
            "life-raft-4p-service",
        ],
        (2.5, 480.0),
        (0.0005, 0.08),
        (0.05, 25.0),
        "mixed",
    ),
    (
        "hard",
        "anchorline-hardware",
        [
            "shackle-8mm",
            "shackle-10mm",
            "shackle-12mm",
            "swivel-10mm",
            "cleat-150mm",
            "cleat-200mm",
            "fairlead-pair",
            "snap-hook-75mm",
            "block-single-40mm",
            "block-double-40mm",
            "winch-handle-lock",
            "anchor-plough-10kg",
            "anchor-plough-16kg",
            "anchor-chain-8mm-30m",
            "fender-f3",
            "fender-f4",
            "boathook-telescopic",
            "deck-fill-cap",
            "hose-clamp-pk10",
            "fuel-filter-element",
            "impeller-kit-small",
            "impeller-kit-large",
            "zinc-anode-shaft-25mm",
            "zinc-anode-hull",
            "sealant-cartridge",
            "stainless-screws-pk50",
            "oar-pair-2m",
            "tiller-extension",
            "rowlock-pair",
            "bimini-fitting-kit",
        ],
        (1.5, 380.0),
        (0.0003, 0.09),
        (0.05, 32.0),
        "mixed",
    ),
]
N_EXTRA = 10  # a handful of low-value consumables from the safety supplier, all fast movers
EXTRA = [
    "sponge-pk5",
    "microfibre-cloth-pk3",
    "sunscreen-spf50",
    "electrolyte-gel",
    "spare-bulb-pk2",
    "stove-gas-cartridge",
    "water-taste-tablets",
    "seasick-bands",
    "hand-cleaner-500ml",
    "drybag-10l",
]


def _write(name: str, header: list[str], rows: list[list[object]]) -> None:
    with (HERE / name).open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        for row in rows:
            writer.writerow(["" if v is None else (f"{v:.4g}" if isinstance(v, float) else v) for v in row])


def main() -> None:
    rng = np.random.default_rng(SEED)
    _write(
        "sites.csv",
        ["site", "upstream", "transit_days", "transit_days_sd", "delivery_cost"],
        [["depot", "", None, None, None]] + [[s, "depot", t, sd, c] for s, t, sd, c in BRANCHES],
    )
    _write(
        "suppliers.csv",
        [
            "supplier",
            "lead_days",
            "lead_days_sd",
            "order_cost",
            "line_cost",
            "capacity_volume",
            "capacity_weight",
            "min_order_value",
        ],
        [list(s) for s in SUPPLIERS],
    )

    items: list[list[object]] = []
    demand: list[list[object]] = []
    speed_of: dict[str, str] = {}
    unit_of: dict[str, float] = {}
    for family, supplier, names, cost_range, vol_range, wt_range, _kind in FAMILIES:
        for name in names:
            item = f"{family}-{name}"
            unit = float(np.exp(rng.uniform(np.log(cost_range[0]), np.log(cost_range[1]))))
            volume = float(np.exp(rng.uniform(np.log(vol_range[0]), np.log(vol_range[1]))))
            weight = float(np.exp(rng.uniform(np.log(wt_range[0]), np.log(wt_range[1]))))
            # dear items sell slowly: speed class drawn with odds depending on price
            p_slow = min(0.85, 0.1 + unit / 300.0)
            speed = rng.choice(
                ["fast", "medium", "slow"], p=[(1 - p_slow) * 0.45, (1 - p_slow) * 0.55, p_slow]
            )
            speed_of[item], unit_of[item] = str(speed), unit
            backorder = round(unit * float(rng.uniform(0.25, 0.6)), 2)
            pack = int(rng.choice([6, 10, 12])) if (speed == "fast" and unit < 15) else None
            items.append([item, supplier, round(unit, 2), None, backorder, pack, volume, weight, None])
    for name in EXTRA:
        item = f"safe-{name}"
        unit = float(rng.uniform(1.5, 9.0))
        speed_of[item], unit_of[item] = "fast", unit
        items.append(
            [
                item,
                "brightmark-safety",
                round(unit, 2),
                None,
                round(unit * 0.4, 2),
                12,
                float(rng.uniform(0.0005, 0.004)),
                float(rng.uniform(0.05, 0.6)),
                None,
            ]
        )
    # safety-critical items: a higher shortage cost and an explicit count distribution
    for row in items:
        if str(row[0]).startswith(("safe-lifejacket", "safe-flare", "safe-fire", "safe-epirb")):
            row[4] = round(float(row[2]) * 1.5, 2)
    _write(
        "items.csv",
        [
            "item",
            "supplier",
            "unit_cost",
            "holding_cost",
            "backorder_cost",
            "pack_size",
            "volume",
            "weight",
            "distribution",
        ],
        items,
    )

    stocked: list[tuple[str, str]] = []
    for row in items:
        item = str(row[0])
        speed = speed_of[item]
        for site, _t, _sd, _c in BRANCHES:
            size = BRANCH_SIZE[site]
            if speed == "slow" and rng.random() < 0.35:
                continue  # not every branch carries every slow item
            if speed == "fast":
                mean = float(rng.uniform(2.0, 12.0)) * size
                sd = float(np.sqrt(mean) * rng.uniform(1.0, 1.8))
            elif speed == "medium":
                mean = float(rng.uniform(0.3, 2.0)) * size
                sd = float(np.sqrt(mean) * rng.uniform(1.0, 1.6))
            else:  # slow, lumpy: sells on few days, sometimes several at once
                mean = float(rng.uniform(0.01, 0.25)) * size
                sd = float(np.sqrt(mean) * rng.uniform(1.1, 2.5))
            demand.append([site, item, round(mean, 4), round(sd, 4)])
            stocked.append((site, item))
    # one item is new this season: listed, but no sales yet anywhere
    if ("northquay", "hard-bimini-fitting-kit") not in stocked:
        demand.append(["northquay", "hard-bimini-fitting-kit", 0.0, 0.0])
    else:
        for row in demand:
            if row[0] == "northquay" and row[1] == "hard-bimini-fitting-kit":
                row[2], row[3] = 0.0, 0.0
    _write("demand.csv", ["site", "item", "daily_mean", "daily_sd"], demand)

    # stocking rules: fixed van-load quantities for bulky fenders at branches, full pallets of antifouling at
    # the depot (five pallets of 48 tins), a higher shortage cost for life jackets at the two busiest branches
    rules: list[list[object]] = []
    for site, item, _m, _s in demand:
        if item.startswith("hard-fender") and site in ("lowmarsh", "kestrel-bay"):
            rules.append([site, item, 4, None, None, None])
    for row in items:
        if str(row[0]).startswith("coat-antifoul"):
            rules.append(["depot", row[0], 240, None, None, None])
    for site in ("northquay", "pembry-docks"):
        for item in ("safe-lifejacket-150n", "safe-lifejacket-275n"):
            if any(d[0] == site and d[1] == item for d in demand):
                unit = unit_of[item]
                rules.append([site, item, None, None, None, round(unit * 2.5, 2)])
    pairs = {(r[0], r[1]) for r in rules}
    full = []
    for (
        row
    ) in items:  # stocking.csv lists every stocked item-site: depot carries every item with branch demand
        item = str(row[0])
        if any(d[1] == item for d in demand) and ("depot", item) not in pairs:
            full.append(["depot", item, None, None, None, None])
    for site, item, _m, _s in demand:
        if (site, item) not in pairs:
            full.append([site, item, None, None, None, None])
    _write(
        "stocking.csv",
        ["site", "item", "order_quantity", "pack_size", "target", "backorder_cost"],
        rules + full,
    )

    # today's policies: rules of thumb the chain uses now -- a month of demand per order, reorder at
    # lead-time demand plus a week of cover; the depot the same on its branches' summed demand
    lead = {s[0]: s[1] for s in SUPPLIERS}
    supplier_of = {str(r[0]): str(r[1]) for r in items}
    transit = {s: t for s, t, _sd, _c in BRANCHES}
    total: dict[str, float] = {}
    policies = []
    for site, item, mean, _sd in demand:
        total[item] = total.get(item, 0.0) + float(mean)
        q = max(1, int(round(30 * float(mean))))
        r = int(round(float(mean) * (transit[site] + 7)))
        policies.append([site, item, r, q])
    for item, mean in total.items():
        q = max(1, int(round(45 * mean)))
        r = int(round(mean * (lead[supplier_of[item]] + 10)))
        policies.insert(0, ["depot", item, r, q])
    _write("policies.csv", ["site", "item", "reorder_point", "order_quantity"], policies)


if __name__ == "__main__":
    main()
