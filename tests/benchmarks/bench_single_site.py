"""Speed and memory of the single-site optimiser.

Run: ``python -m tests.benchmarks.bench_single_site [--normal N] [--poisson N] [--sample N]``

Times ``models.single_site.optimise_policy`` on N normal item-sites (cost per unit short, Hadley-Whitin)
and N Poisson item-sites (cost per unit per year, Federgruen-Zheng), and, as the baseline measured in the same
run, a straightforward per-item loop on a sample of the same cases: ``scipy.optimize.minimize`` on G(Q, R)
for normal items, and the Federgruen-Zheng steps item by item with ``scipy.stats.poisson`` for Poisson items.
Prints item-sites per second, the ratio, the largest cost difference between the two answers, and peak
memory (tracemalloc peak of the vectorised call, and the process's peak resident set size).
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc

import numpy as np
from scipy import optimize, stats

from models.demand import POISSON
from models.single_site import optimise_policy


def normal_cases(n: int, seed: int = 2026):
    rng = np.random.default_rng(seed)
    D = rng.uniform(50, 5000, n)
    A = rng.uniform(5, 200, n)
    h = rng.uniform(0.5, 20, n)
    mu = rng.uniform(5, 500, n)
    sd = mu * rng.uniform(0.05, 0.6, n)
    b = h * rng.uniform(2, 80, n)
    return D, mu, sd, A, h, b


def poisson_cases(n: int, seed: int = 2027):
    rng = np.random.default_rng(seed)
    D = rng.uniform(5, 500, n)
    A = rng.uniform(5, 100, n)
    h = rng.uniform(0.5, 10, n)
    mu = rng.uniform(0.1, 20, n)
    p = h * rng.uniform(2, 50, n)
    return D, mu, np.sqrt(mu), A, h, p


def loop_normal(D, mu, sd, A, h, b):
    """Per-item scipy.optimize.minimize (L-BFGS-B) of Hadley-Whitin's G(Q, R), R >= 0."""
    out = np.empty(len(D))
    for i in range(len(D)):
        def G(x, i=i):
            q, r = x
            z = (r - mu[i]) / sd[i]
            n_r = sd[i] * (stats.norm.pdf(z) - z * stats.norm.sf(z))
            return h[i] * (q / 2 + r - mu[i]) + A[i] * D[i] / q + b[i] * D[i] * n_r / q
        eoq = np.sqrt(2 * A[i] * D[i] / h[i])
        res = optimize.minimize(G, x0=[eoq, mu[i] + sd[i]], method="L-BFGS-B",
                                bounds=[(1e-6 * eoq, None), (0.0, None)],
                                options={"ftol": 1e-15, "gtol": 1e-10})
        out[i] = res.fun
    return out


def loop_poisson(D, mu, A, h, p):
    """Per-item Federgruen-Zheng steps with scipy.stats.poisson (one item at a time)."""
    out = np.empty(len(D))
    for i in range(len(D)):
        dist = stats.poisson(mu[i])

        def g(y, i=i, dist=dist):
            n_y = mu[i] * dist.sf(y - 1) - y * dist.sf(y)   # E[(X - y)^+]
            return h[i] * (y - mu[i]) + (h[i] + p[i]) * n_y
        y = int(dist.ppf(p[i] / (h[i] + p[i])))
        while g(y - 1) < g(y):
            y -= 1
        r, q, total = y - 1, 1, g(y)
        gl, gr = g(r), g(r + 2)
        while True:
            c = (A[i] * D[i] + total) / q
            m = min(gl, gr)
            if m > c:
                break
            total += m
            q += 1
            if gl <= gr:
                r -= 1
                gl = g(r)
            else:
                gr = g(r + q + 1)
        out[i] = (A[i] * D[i] + total) / q
    return out


def timed(fn, *args, **kw):
    t0 = time.perf_counter()
    res = fn(*args, **kw)
    return res, time.perf_counter() - t0


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--normal", type=int, default=1_000_000)
    ap.add_argument("--poisson", type=int, default=100_000)
    ap.add_argument("--sample", type=int, default=300, help="items in the per-item loop baselines")
    args = ap.parse_args(argv)

    # ---------------------------------------------------------- normal, Hadley-Whitin per unit short
    D, mu, sd, A, h, b = normal_cases(args.normal)
    optimise_policy(D[:1000], mu[:1000], sd[:1000], A[:1000], h[:1000], backorder_cost=b[:1000])  # warm-up
    pol, t_vec = timed(optimise_policy, D, mu, sd, A, h, backorder_cost=b)
    s = slice(0, args.sample)
    loop_cost, t_loop = timed(loop_normal, D[s], mu[s], sd[s], A[s], h[s], b[s])
    rate_vec, rate_loop = args.normal / t_vec, args.sample / t_loop
    tracemalloc.start()
    optimise_policy(D, mu, sd, A, h, backorder_cost=b)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"normal  vectorised : {args.normal:>9,d} item-sites in {t_vec:7.3f} s = {rate_vec:12,.0f} /s "
          f"(mean iterations {pol.iterations.mean():.2f}, converged {pol.converged.mean():.4%})")
    print(f"normal  scipy loop : {args.sample:>9,d} item-sites in {t_loop:7.3f} s = {rate_loop:12,.0f} /s")
    print(f"normal  ratio      : {rate_vec / rate_loop:,.0f} x   tracemalloc peak of the vectorised call: "
          f"{peak / 2**20:,.0f} MiB")
    rel = (pol.total_cost[s] - loop_cost) / loop_cost
    print(f"normal  cost vectorised vs loop: max {rel.max():+.2e}, min {rel.min():+.2e} "
          f"(negative = vectorised cheaper)")

    # ---------------------------------------------------------- Poisson, Federgruen-Zheng per unit-year
    D, mu, sd, A, h, p = poisson_cases(args.poisson)
    pol, t_vec = timed(optimise_policy, D, mu, sd, A, h, distribution=POISSON, backorder_cost=p,
                       backorder_basis="per_unit_year")
    m = min(args.sample, 300)
    s = slice(0, m)
    loop_cost, t_loop = timed(loop_poisson, D[s], mu[s], A[s], h[s], p[s])
    rate_vec, rate_loop = args.poisson / t_vec, m / t_loop
    tracemalloc.start()
    optimise_policy(D, mu, sd, A, h, distribution=POISSON, backorder_cost=p, backorder_basis="per_unit_year")
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"poisson vectorised : {args.poisson:>9,d} item-sites in {t_vec:7.3f} s = {rate_vec:12,.0f} /s "
          f"(mean steps {pol.iterations.mean():.1f})")
    print(f"poisson item loop  : {m:>9,d} item-sites in {t_loop:7.3f} s = {rate_loop:12,.0f} /s")
    print(f"poisson ratio      : {rate_vec / rate_loop:,.0f} x   tracemalloc peak of the vectorised call: "
          f"{peak / 2**20:,.0f} MiB")
    rel = np.abs(pol.total_cost[s] - loop_cost) / loop_cost
    print(f"poisson cost vectorised vs loop: max |rel diff| {rel.max():.1e}")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"process peak resident memory: {rss:,.0f} MiB")


if __name__ == "__main__":
    main()
