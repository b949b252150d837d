"""Wide designs and the time to an answer: penalty-mala (control variates) against full-data MALA.

Logistic regression with d coefficients (intercept + d - 1 features with AR(1) correlation 0.5,
so the Laplace covariance has structure), invented data, dense X. For each d and N the script
measures, side by side in one run:

* loading: building the model (its checks read X once); the data are made in memory, not read
  from a file, so file reading is not in it (see bench_table_formula.py for that);
* set-up: `tallchain.prepare` (Newton mode, Laplace, second-order row cache) in seconds and in
  full-data passes (the mode's passes + the row cache's: 1 when Newton's last passes give the
  gradient and Hessian at the mode, else 3);
* per mass matrix ("laplace" dense, "laplace-lowrank", "laplace-diagonal") and, with the
  dense one, per gradient_batch ("fresh": batch gradients; "proxy": the drift of the control
  variates' quadratic proxy, one batch per step): penalty-mala's
  ESS per sampling second (min bulk ESS over coefficients), seconds per transition, the
  bare row-reading floor of the rows it reads (a numba loop drawing sorted batches and
  summing their rows, nothing else), and the end-to-end ESS per second (loading + set-up +
  sampling);
* full-data MALA: its ESS per transition is measured at the reference size (--reference-size,
  default 10^5 rows; a full MALA run at 10^6-10^7 rows takes hours) and its seconds per
  transition at each N by timing a few transitions there: the ESS per second at N is the
  product, an extrapolation by the measured linear cost. The output says so.
* the end-to-end ratio is the time MALA needs from the start to the same ESS (loading, the
  mode for its Laplace mass, and ESS / its ESS per second) over penalty-mala's whole time;
* peak resident memory of the process (ru_maxrss, the largest so far) over the size of X.

With --sparse the design is bench_sparse.py's one-hot CSR design instead (by default 10
categorical variables of 11 levels, d = 101 coefficients, about 9.1 non-zeros a row; --dims 10
and 500 give 3 variables of 4 levels, d = 10, and 10 variables of 51 levels, d = 501) and
the floor reads a batch row's non-zeros and column indices (as many batches as the transition
reads).

Run:  python benchmarks/bench_wide.py [--quick] [--sizes 1e6 1e7] [--dims 10 100 500]
      [--reference-size 1e5] [--max-gib 6] [--sparse] [--draws 2000]
      [--gradient-batches fresh proxy] [--masses laplace laplace-lowrank laplace-diagonal]
Configurations whose X would exceed --max-gib are skipped with a line saying so.
"""

import argparse
import resource
import sys
import time
import warnings

import numpy as np

import tallchain as tc
from tallchain.checks import ks_check
from tallchain.checks._ks import KS_CRITICAL, family_threshold
from tallchain.mcmc import ess_bulk, prepare
from tallchain.models._passes import PARALLEL_MIN_ROWS
from tallchain.posterior import cache_passes

from bench_sparse import LEVELS, N_VARS
from bench_sparse import floor_of as csr_floor_of
from bench_tall_data import _read_rows

MASSES = ("laplace", "laplace-lowrank", "laplace-diagonal")


def make_data(n, d, rng, block=200_000):
    """X (n, d - 1) with AR(1) correlation 0.5 between features, made block by block; y
    logistic with a linear predictor of sd about 1."""
    p = d - 1
    lag = np.arange(p)
    chol = np.linalg.cholesky(0.5 ** np.abs(lag[:, None] - lag[None, :]))
    beta = rng.normal(0.0, 1.0 / np.sqrt(p), p)
    X, y = np.empty((n, p)), np.empty(n)
    for lo in range(0, n, block):
        hi = min(n, lo + block)
        X[lo:hi] = rng.standard_normal((hi - lo, p)) @ chol.T
        eta = 0.2 + X[lo:hi] @ beta
        y[lo:hi] = rng.random(hi - lo) < 1.0 / (1.0 + np.exp(-eta))
    return X, y


# One-hot designs for --sparse: d coefficients -> (variables, levels), d - 1 = variables x
# (levels - 1) one-hot columns (bench_sparse.py's own design is the d = 100 entry: 101
# coefficients, about 9.1 non-zeros a row).
ONE_HOT = {10: (3, 4), 100: (N_VARS, LEVELS), 500: (10, 51)}


def make_design(n, d, rng, sparse):
    """(X, y): the dense AR(1) design of `make_data`, or with ``sparse`` the one-hot CSR design
    of bench_sparse.py with the shape ONE_HOT gives for d (the nearest entry)."""
    if sparse:
        from bench_sparse import make_data as one_hot

        n_vars, levels = ONE_HOT[min(ONE_HOT, key=lambda k: abs(k - d))]
        return one_hot(n, rng, n_vars, levels)
    return make_data(n, d, rng)


def coef_count(d, sparse):
    """The model's coefficients for a --dims entry: d for dense, 1 + the one-hot columns."""
    if not sparse:
        return d
    n_vars, levels = ONE_HOT[min(ONE_HOT, key=lambda k: abs(k - d))]
    return 1 + n_vars * (levels - 1)


def peak_gib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def mala_reference(d, n_ref, rng, draws, warmup, sparse=False):
    """Full-data MALA at the reference size: (ESS per transition, its tuned step, whether the
    check passed). The check:
    penalty-mala (default mass) on the same data against these draws, two-sample KS beside
    its floor 1.358 sqrt(1/ESS + 1/ESS_ref) (`ks_check`), family-wise over the coefficients."""
    X, y = make_design(n_ref, d, rng, sparse)
    model = tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=10.0))
    d = model.n_coef
    r = tc.sample(model, method="mala", chains=2, draws=draws, warmup=warmup, seed=2,
                  parallel=False)
    ess = float(np.min(ess_bulk(r.draws)))
    pen = tc.sample(model, method="penalty-mala", chains=2, draws=2 * draws, warmup=warmup,
                    seed=4, parallel=False)
    check = ks_check(pen.draws, r.draws.reshape(-1, d))
    # the reference draws are autocorrelated: their ESS, not their count, in the floor
    worst = float(np.max(check.ks / (KS_CRITICAL * np.sqrt(1 / check.ess + 1 / ess))))
    limit = family_threshold(0.05, d)[0]
    print(f"check: d={d}, N={n_ref:,d}: penalty-mala vs full-data MALA, largest KS "
          f"{worst:.2f} two-sample floors (family-wise 5% threshold {limit:.2f}): "
          f"{'ok' if worst <= limit else 'FAILED'}", flush=True)
    return ess / (2 * draws), float(np.mean(r.tuned["step_size"])), worst <= limit


def mala_seconds_per_transition(model, prep, step, n_iter):
    r = tc.sample(model, method="mala", step_size=step, chains=1, warmup=0, draws=n_iter,
                  init="mode", preparation=prep, seed=3, parallel=False)
    return r.sampling_seconds / n_iter


def floor_seconds(X, n_batch, reads):
    g = np.random.default_rng(3)
    n_iter = 2000
    _read_rows(X, g, n_batch, reads, 10)
    t = time.perf_counter()
    _read_rows(X, g, n_batch, reads, n_iter)
    return (time.perf_counter() - t) / n_iter


def variants(args):
    """(mass matrix, gradient_batch) pairs to time: the proxy drift needs the dense Laplace
    mass matrix."""
    return [(kind, drift) for kind in args.masses for drift in args.gradient_batches
            if drift != "proxy" or kind == "laplace"]


def run_config(n, d, rng, args, mala_ess_per_it, mala_step):
    X, y = make_design(n, d, rng, args.sparse)
    t = time.perf_counter()
    model = tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=10.0))
    load = time.perf_counter() - t
    t = time.perf_counter()
    prep = prepare(model, proxy_orders=(2,))
    t_prep = time.perf_counter() - t
    passes = prep.laplace.n_evaluations + cache_passes(2, prep.laplace.loglik_derivatives)
    mala_it = mala_seconds_per_transition(model, prep, mala_step, args.mala_iters)
    mala_ess_s = mala_ess_per_it / mala_it
    rows = []
    for kind, drift in variants(args):
        r = tc.sample(model, method="penalty-mala", mass_matrix=kind, chains=2, draws=args.draws,
                      warmup=args.warmup, seed=1, parallel=False, preparation=prep,
                      gradient_batch=drift)
        iters = 2 * (args.draws + args.warmup)
        per_it = r.sampling_seconds / iters
        nb = r.tuned["batch_size"]
        reads = max(1, round(float(np.mean(r.stats["rows_read"])) / nb))
        ess = float(np.min(ess_bulk(r.draws)))
        total = load + t_prep + r.setup_seconds + r.sampling_seconds
        mala_total = load + t_prep + ess / mala_ess_s
        rows.append(dict(n=n, d=d, kind=kind, drift=drift, batch=nb, per_it=per_it,
                         floor=(csr_floor_of(X, nb, reads=reads) if args.sparse
                                else floor_seconds(X, nb, reads)), ess=ess,
                         ess_s=ess / r.sampling_seconds, ess_total=ess / total,
                         vs_mala=ess / r.sampling_seconds / mala_ess_s,
                         vs_mala_total=mala_total / total, load=load, setup=t_prep,
                         passes=passes, acc=r.acceptance_rate))
        print(f"N={n:>10,d} d={d:>3} {kind:<17} {drift:<6} batch={nb:<4} ESS={ess:6.0f} "
              f"us/transition={per_it * 1e6:8.1f} (floor x{per_it / rows[-1]['floor']:.2f}) "
              f"ESS/s={rows[-1]['ess_s']:9.1f} vs MALA x{rows[-1]['vs_mala']:.0f}; end to end "
              f"x{rows[-1]['vs_mala_total']:.0f}", flush=True)
    print(f"N={n:>10,d} d={d:>3} loading {load:.2f} s, set-up {t_prep:.2f} s = {passes} full "
          f"passes; MALA {mala_it * 1e3:.1f} ms/transition at this N, ESS/s {mala_ess_s:.3g} "
          f"(ESS per transition from N = {args.reference_size:,d}, extrapolated by the measured "
          f"cost); peak memory {peak_gib():.2f} GiB = {peak_gib() * 2**30 / X.nbytes:.2f}x X",
          flush=True)
    return rows


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--sizes", nargs="+", type=float, default=[1e6, 1e7])
    ap.add_argument("--dims", nargs="+", type=int, default=[10, 100, 500])
    ap.add_argument("--masses", nargs="+", default=list(MASSES))
    ap.add_argument("--reference-size", type=float, default=1e5)
    ap.add_argument("--draws", type=int, default=2000,
                    help="penalty-mala's draws per chain (2 chains; 500 warmup)")
    ap.add_argument("--max-gib", type=float, default=6.0)
    ap.add_argument("--gradient-batches", nargs="+", default=["fresh", "proxy"],
                    help="penalty-mala's gradient_batch settings to time side by side")
    ap.add_argument("--sparse", action="store_true",
                    help="the one-hot CSR design of bench_sparse.py (d = 101) instead")
    args = ap.parse_args()
    if args.quick:
        args.sizes, args.dims, args.reference_size = [1e5], [10, 50], 2e4
    if args.sparse and args.dims == [10, 100, 500] and not args.quick:
        args.dims = [100]   # bench_sparse.py's design; --dims 10 100 500 asks for all three
    args.reference_size = int(args.reference_size)
    args.draws, args.warmup, args.mala_iters = ((500, 300, 5) if args.quick
                                                else (args.draws, 500, 5))
    m_draws, m_warm = (500, 200) if args.quick else (2000, 300)
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(7)
    # Compile (or load from the cache) every kernel before anything is timed.
    Xw, yw = make_design(2000, 5, rng, args.sparse)
    warm = tc.LogisticRegression(Xw, yw)
    for kind, drift in variants(args):
        tc.sample(warm, method="penalty-mala", mass_matrix=kind, chains=1, draws=50, warmup=50,
                  seed=0, parallel=False, gradient_batch=drift)
    tc.sample(warm, method="mala", chains=1, draws=20, warmup=20, seed=0, parallel=False)
    if args.sparse:
        csr_floor_of(Xw, 32, 10)
    else:
        _read_rows(Xw, np.random.default_rng(0), 32, 3, 2)
    # and the parallel set-up passes, which tall data take (models/_passes.PARALLEL_MIN_ROWS)
    Xw, yw = make_design(PARALLEL_MIN_ROWS, 5, rng, args.sparse)
    prepare(tc.LogisticRegression(Xw, yw), proxy_orders=(2,))
    del Xw, yw
    rows, checks = [], []
    for d in (coef_count(d, args.sparse) for d in args.dims):
        ess_it, step, ok = mala_reference(d, args.reference_size, rng, m_draws, m_warm,
                                          args.sparse)
        checks.append(ok)
        print(f"d={d}: full-data MALA at N = {args.reference_size:,d}: ESS per transition "
              f"{ess_it:.3f}, tuned step {step:.3g}", flush=True)
        for n in (int(s) for s in args.sizes):
            # a one-hot row holds n_vars (1 - 1/levels) non-zeros: 12 bytes each (value, index)
            n_vars, levels = ONE_HOT[min(ONE_HOT, key=lambda k: abs(k - d))]
            gib = n * (n_vars * (1 - 1 / levels) * 12 if args.sparse else (d - 1) * 8) / 2**30
            if gib > args.max_gib:
                print(f"N={n:,d} d={d}: skipped, X would take {gib:.1f} GiB > --max-gib "
                      f"{args.max_gib}")
                continue
            rows += run_config(n, d, rng, args, ess_it, step)
    print()
    print("| N | d | mass | gradient_batch | batch | us/transition | over floor | ESS/s | "
          "x MALA (sampling) | ESS/s end to end | x MALA (end to end) | set-up passes |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['n']:,d} | {r['d']} | {r['kind']} | {r['drift']} | {r['batch']} | {r['per_it'] * 1e6:.1f} | "
              f"{r['per_it'] / r['floor']:.2f} | {r['ess_s']:.1f} | {r['vs_mala']:.0f} | "
              f"{r['ess_total']:.1f} | {r['vs_mala_total']:.0f} | {r['passes']} |")
    print("\nMALA's ESS per second at each N: its ESS per transition at the reference size times "
          "its measured seconds per transition at that N (an extrapolation, not a full run).")
    return 0 if all(checks) else 1


if __name__ == "__main__":
    sys.exit(main())
