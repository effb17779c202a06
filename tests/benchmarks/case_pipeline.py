"""Benchmark of the application layer: read a case, build the item-site table, plan, write the outputs.

A synthetic case (invented, seeded) of one warehouse and S stores with M items each is written to a temporary
folder. Baselines measured in the same run: pandas ``read_csv`` of the same files (reading without any
checks) and pandas ``to_csv`` with ``float_format="%.6g"`` of the same policies frame (writing without our
formatting). The plan step uses each site alone (the network method is switched off) so that the figures are
those of this layer and the single-site engine.

    .venv/bin/python -m tests.benchmarks.case_pipeline [--stores 50] [--items 2000]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd


def write_case(folder: Path, stores: int, items: int, seed: int = 11) -> None:
    rng = np.random.default_rng(seed)
    (folder / "case.toml").write_text('name = "benchmark"\ncurrency = "EUR"\n', encoding="utf-8")
    sites = ["site,upstream,transit_days,delivery_cost", "wh,,,"] + [f"s{i},wh,2,20" for i in range(stores)]
    (folder / "sites.csv").write_text("\n".join(sites) + "\n", encoding="utf-8")
    (folder / "suppliers.csv").write_text("supplier,lead_days,order_cost\nsup,10,50\n", encoding="utf-8")
    cost = rng.uniform(1, 100, items)
    lines = ["item,supplier,unit_cost,backorder_cost"] + [f"i{j},sup,{cost[j]:.2f},5" for j in range(items)]
    (folder / "items.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    with (folder / "demand.csv").open("w", encoding="utf-8") as handle:
        handle.write("site,item,daily_mean,daily_sd\n")
        for i in range(stores):
            mean, sd = rng.uniform(0, 5, items), rng.uniform(0, 3, items)
            handle.write("".join(f"s{i},i{j},{mean[j]:.3f},{sd[j]:.3f}\n" for j in range(items)))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stores", type=int, default=50)
    parser.add_argument("--items", type=int, default=2000)
    args = parser.parse_args()

    import optimiser.plan as plan_module
    from optimiser.case import load_case
    from optimiser.itemsites import build_itemsites
    from optimiser.report import _csv_frame, write_outputs

    plan_module._network_function = lambda name: None  # single-site figures only
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "case"
        folder.mkdir()
        write_case(folder, args.stores, args.items)

        t = time.perf_counter()
        for name in ("sites.csv", "suppliers.csv", "items.csv", "demand.csv"):
            pd.read_csv(folder / name)
        t_read_base = time.perf_counter() - t
        t = time.perf_counter()
        case = load_case(folder)
        t_read = time.perf_counter() - t

        t = time.perf_counter()
        table = build_itemsites(case)
        t_table = time.perf_counter() - t
        n = len(table)

        t = time.perf_counter()
        result = plan_module.plan_case(case)
        t_plan = time.perf_counter() - t

        t = time.perf_counter()
        frame = _csv_frame(result.policies)
        frame.to_csv(Path(tmp) / "baseline.csv", index=False, float_format="%.6g")
        for _site, part in frame.groupby("site", sort=False):
            part.to_csv(Path(tmp) / "baseline_site.csv", index=False, float_format="%.6g")
        t_write_base = time.perf_counter() - t
        t = time.perf_counter()
        write_outputs(result, Path(tmp) / "out", plots=False)
        t_write = time.perf_counter() - t

    print(f"item-sites: {n:,} ({args.stores} stores + warehouse, {args.items:,} items)")
    print(f"read + check case    {t_read:7.2f} s   (pandas read_csv, no checks: {t_read_base:.2f} s; "
          f"ratio {t_read / t_read_base:.1f}x)")
    print(f"item-site table      {t_table:7.2f} s   ({n / t_table:,.0f} item-sites/s)")
    print(f"plan (single-site)   {t_plan:7.2f} s   ({n / t_plan:,.0f} item-sites/s, table included)")
    print(f"write outputs        {t_write:7.2f} s   (pandas to_csv %.6g, same files: {t_write_base:.2f} s; "
          f"ratio {t_write_base / t_write:.1f}x faster)")


if __name__ == "__main__":
    main()
