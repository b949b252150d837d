"""Wall time of a 24-point sweep on a Dask LocalCluster with 1 and 2 workers, side by side.

Logistic regression (invented data, N = 20,000, d = 4), penalty-mala and sgld at 12 step sizes
each (24 grid points), each point 2 chains x (300 warmup + 1500 draws). The reference run is
made once and cached before timing. Prints both wall times and their ratio; the sweep tables
of both runs must be equal (timings aside), which the script checks.

Then the chains of one run as tasks: full-data MALA, 2 chains, N = 200,000 (the same kind of
data), in threads of this process and on dask-local with 1 and 2 workers (cluster start-up
included); the draws must be equal bit for bit, which the script checks.
Run:  .venv/bin/python benchmarks/bench_dask_sweep.py [--quick]
"""

import argparse
import tempfile
import time
import warnings

import numpy as np

import tallchain as tc
from tallchain.checks import sweep


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(4)
    n = 20_000
    X = rng.standard_normal((n, 3))
    y = (rng.random(n) < 1 / (1 + np.exp(-(X @ [0.6, -0.3, 0.2])))).astype(float)
    model = tc.LogisticRegression(X, y)
    steps = list(np.geomspace(0.1, 4.0, 12))
    draws = 500 if args.quick else 1500
    grid = dict(methods=["penalty-mala", "sgld"], step_sizes=steps, draws=draws, warmup=300,
                chains=2, seed=3)
    with tempfile.TemporaryDirectory() as cache:
        sweep(model, scheduler="serial", cache_dir=cache, **dict(grid, step_sizes=steps[:1],
                                                               methods=["sgld"]))
        walls, tables = {}, {}
        for workers in (1, 2):
            t = time.perf_counter()
            res = sweep(model, scheduler="dask-local", workers=workers, cache_dir=cache, **grid)
            walls[workers] = time.perf_counter() - t
            tables[workers] = [(r["method"], r["step_size"], r["ks_max"], r["acceptance_rate"])
                               for r in res.rows]
    same = tables[1] == tables[2]
    print(f"24-point sweep, dask-local: 1 worker {walls[1]:.1f} s, 2 workers {walls[2]:.1f} s")
    print(f"check: tables equal with 1 and 2 workers: {'ok' if same else 'FAILED'}")
    print(f"ratio (wall 1 worker / wall 2 workers): {walls[1] / walls[2]:.2f}")

    n_big = 200_000
    Xb = rng.standard_normal((n_big, 3))
    yb = (rng.random(n_big) < 1 / (1 + np.exp(-(Xb @ [0.6, -0.3, 0.2])))).astype(float)
    big = tc.LogisticRegression(Xb, yb)
    run = dict(method="mala", chains=2, draws=800 if args.quick else 2500, warmup=300, seed=5)
    tc.sample(big, **dict(run, draws=30, warmup=30))   # compile before timing
    chain_walls, chain_draws = {}, {}
    for where, workers in (("threads", None), ("dask-local", 1), ("dask-local", 2)):
        t = time.perf_counter()
        r = tc.sample(big, scheduler=where, workers=workers, **run)
        chain_walls[(where, workers)] = time.perf_counter() - t
        chain_draws[(where, workers)] = r.draws
    same_chains = all(np.array_equal(d, chain_draws[("threads", None)])
                      for d in chain_draws.values())
    t_thr, t1, t2 = (chain_walls[k] for k in (("threads", None), ("dask-local", 1),
                                               ("dask-local", 2)))
    print(f"2-chain MALA run, N = {n_big:,d}: threads {t_thr:.1f} s, dask-local 1 worker "
          f"{t1:.1f} s, 2 workers {t2:.1f} s")
    print(f"check: draws equal in threads and on 1 and 2 workers: "
          f"{'ok' if same_chains else 'FAILED'}")
    print(f"ratio (1 worker / 2 workers): {t1 / t2:.2f}; (2 workers / threads): {t2 / t_thr:.2f}")
    if not (same and same_chains):
        raise SystemExit(1)


if __name__ == "__main__":
    main()
