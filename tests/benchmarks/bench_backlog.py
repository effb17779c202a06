"""Benchmark: the unit-level store evaluation (``models.backlog``) against the moment model, same items.

Run: ``python -m tests.benchmarks.bench_backlog [n_items] [n_stores]``. Items: one warehouse and ``n_stores``
stores, all with count demand (slow movers, Poisson or negative binomial), a third with a random warehouse
lead time. Prints the wall time of ``models.echelon.optimise_two_level`` with ``store_method="moments"`` (the
baseline: the golden-section search of the warehouse reorder point under the three-point delay mixture) and
with ``store_method="backlog"`` (the same, then the unit-level search around it), store-items per second, the
ratio, and how far the two plans' network costs differ (each evaluated by the unit model). Data are invented
and seeded.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from models import echelon as ech
from tests.benchmarks.bench_echelon import make_inputs


def main(n: int = 200, m: int = 8) -> None:
    from dataclasses import replace

    inp = make_inputs(n, m, seed=7)
    rng = np.random.default_rng(8)
    # every store with count demand, slow movers
    rate = rng.uniform(0.05, 1.0, (n, m))
    inp = replace(
        inp,
        store_count=np.ones((n, m), dtype=bool),
        store_mean=rate,
        store_sd=np.sqrt(rate * rng.choice([1.0, 1.0, 1.5], (n, m))),
        warehouse_lead_sd=np.where(rng.random(n) < 1 / 3, 0.25 * inp.warehouse_lead, 0.0),
    )
    t0 = time.perf_counter()
    mom, _ = ech.optimise_two_level(inp, store_method="moments")
    t_mom = time.perf_counter() - t0
    t0 = time.perf_counter()
    unit, _ = ech.optimise_two_level(inp, store_method="backlog")
    t_unit = time.perf_counter() - t0
    used = int((unit.store_method == 1).sum())
    again = ech.evaluate_two_level(inp, mom.store_reorder_point, mom.store_order_quantity,
                                   mom.warehouse_reorder_point, mom.warehouse_order_quantity,
                                   store_method="backlog")
    saving = 1.0 - unit.network_cost.sum() / again.network_cost.sum()
    si = n * m
    print(f"items {n}, stores {m}, store-items {si} (unit model used on {used})")
    print(f"moment model (baseline):  {t_mom:7.2f} s  ({si / t_mom:9,.0f} store-items/s)")
    print(f"unit model:               {t_unit:7.2f} s  ({si / t_unit:9,.0f} store-items/s)  "
          f"ratio {t_unit / t_mom:.1f}x")
    print(f"network cost of the unit-model plan vs the moment-model plan (both by the unit model): "
          f"{-100 * saving:+.2f}%")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    main(*args)
