"""Eight Python threads fitting eight different systems at once, against the same fits one after
another: wall-clock ratios (parallel / sequential), with the BLAS thread pools as they come and
limited to one thread (threadpoolctl), and a check that the numbers are bit-identical.

    .venv/bin/python benchmarks/bench_threads.py            # ~1 minute
    .venv/bin/python benchmarks/bench_threads.py --full     # adds N=20, T=50,000 (~3 minutes)
    .venv/bin/python benchmarks/bench_threads.py --quick    # a few seconds

Ratios below 1 mean the threads overlap (the core releases the GIL); ratios above 1 mean they get
in each other's way. Each timing is the best of --repeats runs; only ratios measured in the same
run are meaningful.
"""

from __future__ import annotations

import argparse
import os
import platform
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits

import blocksur


def make_system(seed: int, n_eq: int, n_obs: int, k: int) -> dict:
    rng = np.random.default_rng(seed)
    eqs = {}
    shock = rng.standard_normal((n_obs, 2))
    for i in range(n_eq):
        x = np.column_stack([np.ones(n_obs), rng.standard_normal((n_obs, k - 1))])
        e = shock @ rng.uniform(-1, 1, 2) + rng.standard_normal(n_obs)
        eqs[f"eq{i}"] = (x @ rng.uniform(-1, 1, k) + e, x)
    return eqs


def fit_one(eqs: dict, method: str) -> tuple:
    fit = blocksur.EquationSystem(eqs).fit(method, max_iter=50)
    return fit.coef.to_numpy(), fit.se.to_numpy(), fit.omega.to_numpy()


def measure(systems: list, method: str, workers: int, repeats: int) -> dict:
    # warm-up of both paths (thread start-up, the allocator's per-thread arenas)
    for s in systems:
        fit_one(s, method)
    with ThreadPoolExecutor(workers) as pool:
        list(pool.map(lambda s: fit_one(s, method), systems))
    seq, par = [], []
    ref = out = None
    for _ in range(repeats):
        t0 = time.perf_counter()
        ref = [fit_one(s, method) for s in systems]
        t1 = time.perf_counter()
        with ThreadPoolExecutor(workers) as pool:
            out = list(pool.map(lambda s: fit_one(s, method), systems))
        t2 = time.perf_counter()
        seq.append(t1 - t0)
        par.append(t2 - t1)
    identical = all(all(np.array_equal(a, b) for a, b in zip(r, o)) for r, o in zip(ref, out))
    return {"seq": min(seq), "par": min(par), "ratio": min(par) / min(seq), "identical": identical}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--full", action="store_true")
    ap.add_argument("--repeats", type=int, default=None)
    args = ap.parse_args()
    repeats = args.repeats or (2 if args.quick else 5)
    sizes = [("small", 5, 500, 4), ("medium", 8, 20_000, 5), ("wide", 6, 20_000, 16)]
    if args.full:
        sizes.append(("large", 20, 50_000, 6))
    print(f"cores: {os.cpu_count()}  python: {platform.python_version()}  blocksur {blocksur.__version__}")
    for lib in threadpool_info():
        print(f"  BLAS pool {lib.get('internal_api')} {lib.get('version')} threads={lib.get('num_threads')} "
              f"({os.path.basename(lib.get('filepath', ''))})")
    print()
    print(f"{'case':<8} {'N':>3} {'T':>7} {'K_i':>4} {'method':<6} {'BLAS':<9} {'threads':>7} "
          f"{'sequential':>11} {'parallel':>10} {'par/seq':>8}  bit-identical")
    for label, n_eq, n_obs, k in sizes:
        systems = [make_system(seed, n_eq, n_obs, k) for seed in range(8)]
        for method in ("fgls", "ifgls"):
            for blas in ("default", "limit 1"):
                for workers in (2, 8):
                    if blas == "limit 1":
                        with threadpool_limits(1):
                            r = measure(systems, method, workers, repeats)
                    else:
                        r = measure(systems, method, workers, repeats)
                    print(f"{label:<8} {n_eq:>3} {n_obs:>7} {k:>4} {method:<6} {blas:<9} {workers:>7} "
                          f"{r['seq'] * 1e3:>9.1f}ms {r['par'] * 1e3:>8.1f}ms {r['ratio']:>7.2f}x  {r['identical']}")


if __name__ == "__main__":
    main()
