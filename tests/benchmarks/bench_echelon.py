"""Benchmark: network planning of one warehouse, 50 stores and 10,000 items (count and normal demand mixed).

Run: ``python -m tests.benchmarks.bench_echelon [n_items] [n_stores]``. Prints the wall time of the full
network optimisation (``models.echelon.optimise_two_level``: single-site seeds, warehouse reorder-point search
with the stores re-optimised per candidate, final refinement under the delay mixture) run in two worker
processes over the items, its CPU time, item-sites per second, peak memory (resident, this process plus two
workers at their peak), and the ratio to a baseline measured in the same run: single-site planning of the same
item-sites in one process (``models.single_site.optimise_policy``, what planning without the network does).
Target (issue 4): under 2 minutes on 2 cores and under 4 GB. Data are invented and seeded.
"""

from __future__ import annotations

import os
import resource
import sys
import time

import numpy as np

from models import echelon as ech
from models import single_site as ss
from models.demand import NEGBIN, NORMAL, POISSON


def make_inputs(n: int, m: int, seed: int = 2026) -> ech.TwoLevelInputs:
    rng = np.random.default_rng(seed)
    count = rng.random(n) < 0.5  # half the items slow movers with count demand
    rate = np.where(count[:, None], rng.uniform(0.02, 1.5, (n, m)), rng.uniform(2.0, 60.0, (n, m)))
    disp = np.where(count[:, None], rng.choice([1.0, 1.0, 1.6], (n, m)), rng.uniform(1.0, 3.0, (n, m)))
    sd = np.sqrt(rate * disp)
    h = rng.uniform(0.5, 20.0, n)
    b = rng.uniform(5.0, 60.0, n)

    def grid(v):
        return np.broadcast_to(np.asarray(v, dtype=float), (n, m)).copy()

    return ech.TwoLevelInputs(
        store_active=np.ones((n, m), dtype=bool),
        store_mean=rate,
        store_sd=sd,
        store_lead=rng.uniform(1.0, 5.0, (n, m)),
        store_lead_sd=grid(0.0),
        store_count=np.repeat(count[:, None], m, axis=1),
        store_order_cost=rng.uniform(5.0, 40.0, (n, m)),
        store_holding_cost=grid(h[:, None]),
        store_backorder_cost=grid(b[:, None]),
        store_target=grid(np.nan),
        store_fixed_q=grid(np.nan),
        store_pack=grid(1.0),
        warehouse_lead=rng.uniform(5.0, 40.0, n),
        warehouse_lead_sd=np.where(rng.random(n) < 0.2, rng.uniform(1.0, 5.0, n), 0.0),
        warehouse_own_mean=np.zeros(n),
        warehouse_own_sd=np.zeros(n),
        warehouse_count=count,
        warehouse_order_cost=rng.uniform(50.0, 400.0, n),
        warehouse_holding_cost=0.8 * h,
        warehouse_backorder_cost=np.zeros(n),
        warehouse_target=np.full(n, np.nan),
        warehouse_fixed_q=np.full(n, np.nan),
        warehouse_pack=np.ones(n),
        days_per_year=365.0,
        mode="cost",
        backorder_basis="per_unit",
    )


def cpu_seconds() -> float:
    """CPU time (user + system) of this process and its finished worker processes."""
    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def peak_rss_gb() -> float:
    """Upper bound of the peak resident memory: this process plus two worker processes at their peak."""
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2
    child = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024**2
    return own + 2 * child


def main(n: int = 10_000, m: int = 50) -> None:
    inp = make_inputs(n, m)
    load0 = os.getloadavg()[0]
    sites = n * (m + 1)
    # baseline: every item-site planned alone (stores on transit time, warehouse on the summed demand)
    t0 = time.perf_counter()
    act = inp.store_active
    codes = np.where(
        inp.store_count[act],
        np.where(inp.store_sd[act] ** 2 > inp.store_mean[act] * 1.000001, NEGBIN, POISSON),
        NORMAL,
    ).astype(np.int8)
    ss.optimise_policy(
        inp.store_mean[act] * 365,
        inp.store_mean[act] * inp.store_lead[act],
        inp.store_sd[act] * np.sqrt(inp.store_lead[act]),
        inp.store_order_cost[act],
        inp.store_holding_cost[act],
        distribution=codes,
        backorder_cost=inp.store_backorder_cost[act],
    )
    base = time.perf_counter() - t0
    t0 = time.perf_counter()
    c0 = cpu_seconds()
    res, seed = ech.optimise_two_level(inp, workers=2)
    full = time.perf_counter() - t0
    cpu = cpu_seconds() - c0
    exact = int(np.sum(res.demand_method == 1))
    print(
        f"items {n}, stores {m}, item-sites {sites} ({int(inp.store_count[:, 0].sum())} count items, "
        f"{exact} with the exact convolution at the warehouse)"
    )
    print(f"baseline single-site planning: {base:8.2f} s  ({sites / base:,.0f} item-sites/s)")
    print(
        f"network optimisation:          {full:8.2f} s  ({sites / full:,.0f} item-sites/s)  "
        f"ratio to baseline {full / base:.1f}x"
    )
    print(f"CPU time of the network optimisation: {cpu:.1f} s (2 processes; load average before/after "
          f"{load0:.1f}/{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)")
    print(f"search rounds per item: mean {res.iterations.mean():.1f}, converged {res.converged.mean():.1%}")
    print(
        "network cost vs each site planned alone: "
        f"{res.network_cost.sum() / seed.network_cost.sum() - 1:+.2%}"
    )
    print(f"peak memory (resident, this process + 2 x largest worker): {peak_rss_gb():.2f} GB")
    print(
        f"targets: < 120 s -> {'met' if full < 120 else 'NOT met'}; < 4 GB -> "
        f"{'met' if peak_rss_gb() < 4 else 'NOT met'}"
    )


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:]]
    main(*args)
