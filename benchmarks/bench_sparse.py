"""Sparse (CSR) designs: memory against the dense form, and the transition cost at d = 100.

Logistic regression on an invented one-hot design: 10 categorical variables of 11 levels each,
treatment-coded (10 columns each, the first level dropped): d = 100 columns + intercept, at
most 10 non-zeros a row (about 9.1 on average). For each N the script measures, side by side
in one run:

* memory: the CSR arrays' bytes, the process's peak RSS growth over building the design, the
  model, set-up and sampling, against the dense form's N x 100 x 8 bytes (never allocated);
* set-up (mode, Laplace, control-variate cache) in full-data passes;
* penalty-mala with control variates (batch_size="auto"): seconds and data evaluations per
  transition;
* the bare cost of reading the rows a transition reads (a numba loop that draws a sorted
  batch, 3 times per transition, and reads each batch row's values and column indices): the
  floor a transition cannot beat; transition / floor is the figure of merit (target <= 2);
* with --dense, the same data as a dense array (only where it fits: N x 800 bytes) for the
  transition cost of the dense path beside the sparse one.

Ratios, not absolute times, are the result (this machine's timings are noisy).
Run:  .venv/bin/python benchmarks/bench_sparse.py [--sizes 1e6 1e7] [--quick] [--dense]
"""

import argparse
import resource
import time
import warnings

import numba
import numpy as np

import tallchain as tc
from bench_tall_data import time_full_pass   # this folder is the script's path
from tallchain.data import CSRDesign
from tallchain.mcmc import ess_bulk
from tallchain.mcmc._batches import draw_batch

N_VARS, LEVELS = 10, 11
D = N_VARS * (LEVELS - 1)


@numba.njit(cache=True, nogil=True)
def _read_csr_rows(data, indices, indptr, n_rows, rng, n_batch, n_reads, n_iter):
    """Draw a sorted batch and read its rows' values and column indices, n_reads times per
    iteration: the row-reading floor of a CSR design."""
    idx = np.empty(n_batch, dtype=np.int64)
    acc = 0.0
    for _ in range(n_iter):
        for _ in range(n_reads):
            draw_batch(rng, n_rows, idx)
            for k in range(n_batch):
                i = idx[k]
                for m in range(indptr[i], indptr[i + 1]):
                    acc += data[m] + indices[m]
    return acc


def peak_rss():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def make_data(n, rng, n_vars=N_VARS, levels=LEVELS):
    """The one-hot CSR design of ``n_vars`` categorical variables of ``levels`` levels (the
    first of each is the baseline; built without a dense intermediate) and a logistic
    response."""
    width = n_vars * (levels - 1)
    level = rng.integers(0, levels, size=(n, n_vars), dtype=np.int32)
    nz = level > 0
    counts = nz.sum(axis=1)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    cols = (np.arange(n_vars, dtype=np.int32) * (levels - 1))[None, :] + level - 1
    indices = cols[nz].astype(np.int32)   # row-major: sorted within each row
    del cols, nz
    data = np.ones(indices.shape[0])
    effects = np.linspace(-0.8, 0.8, width)
    eta = -0.5 + np.add.reduceat(effects[indices], indptr[:-1]) * (counts > 0)
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    return CSRDesign(data, indices, indptr, (n, width)), y


def transition_cost(model, chains, draws, warmup):
    r = tc.sample(model, method="penalty-mala", chains=chains, draws=draws, warmup=warmup,
                  seed=1, parallel=False)
    iters = chains * (draws + warmup)
    return r, r.sampling_seconds / iters, r.data_evaluations / iters


def floor_of(X, nb, read_iters=20_000, reads=3):
    g = np.random.default_rng(3)
    args = (X.data, X.indices, X.indptr, X.shape[0], g, nb, reads)
    _read_csr_rows(*args, 10)
    t = time.perf_counter()
    _read_csr_rows(*args, read_iters)
    return (time.perf_counter() - t) / read_iters


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", nargs="+", type=float, default=[1e6])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--dense", action="store_true", help="also time the dense path (N <= 1e6)")
    args = ap.parse_args()
    draws, warmup, chains = (600, 300, 2) if args.quick else (2000, 500, 4)
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(7)
    # Compile (or load from cache) every kernel before anything is timed.
    Xw, yw = make_data(3000, rng)
    for X in (Xw, np.asarray(Xw)):
        tc.sample(tc.LogisticRegression(X, yw), method="penalty-mala", chains=1, draws=50,
                  warmup=50, seed=0, parallel=False)
    floor_of(Xw, 32, 10)
    print(f"d = {D} one-hot columns + intercept, {N_VARS} categorical variables of {LEVELS} "
          "levels", flush=True)
    for n in (int(s) for s in args.sizes):
        base = peak_rss()
        X, y = make_data(n, rng)
        model = tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=10.0))
        t_pass = time_full_pass(model)
        # check: the CSR kernels' log-likelihood against scipy's CSR product and NumPy's
        # logistic log-likelihood at a random point (a sum of N terms: 1e-9 relative)
        beta = 0.1 * rng.standard_normal(model.n_coef)
        eta = beta[0] + X.to_scipy() @ beta[1:]
        ref = float(np.sum(y * eta - np.logaddexp(0.0, eta)))
        ok = abs(model.log_likelihood(beta) - ref) <= 1e-9 * abs(ref)
        print(f"check: CSR log-likelihood vs scipy/NumPy {'ok' if ok else 'FAILED'}", flush=True)
        if not ok:
            raise SystemExit(1)
        r, per_it, evals = transition_cost(model, chains, draws, warmup)
        grown = peak_rss() - base
        nb = r.tuned["batch_size"]
        floor3 = floor_of(X, nb)
        dense_bytes = n * D * 8
        ess = float(np.min(ess_bulk(r.draws)))
        print(f"N={n:>10,d}  nnz/row={X.nnz / n:.2f}  CSR={X.nbytes / 2**20:8.1f} MiB  "
              f"dense would be {dense_bytes / 2**20:8.1f} MiB  peak RSS growth "
              f"{grown / 2**20:8.1f} MiB ({grown / dense_bytes:.2f} of dense)", flush=True)
        print(f"   pass={t_pass * 1e3:8.1f} ms  setup={r.setup_seconds:6.2f} s "
              f"({r.setup_seconds / t_pass:5.1f} passes)  batch={nb}  evals/it={evals:.0f}  "
              f"s/it={per_it * 1e6:7.1f} us  floor={floor3 * 1e6:6.1f} us  "
              f"transition/floor={per_it / floor3:.2f}  ESS/s={ess / r.sampling_seconds:.1f}  "
              f"acc={r.acceptance_rate:.3f}", flush=True)
        if args.dense and n <= 10**6:
            dense = tc.LogisticRegression(np.asarray(X), y, prior=tc.GaussianPrior(sd=10.0))
            t_dpass = time_full_pass(dense)
            rd, per_d, _ = transition_cost(dense, chains, draws, warmup)
            print(f"   dense: pass={t_dpass * 1e3:8.1f} ms  s/it={per_d * 1e6:7.1f} us  "
                  f"(batch {rd.tuned['batch_size']})  sparse/dense per transition "
                  f"{per_it / per_d:.2f}, per pass {t_pass / t_dpass:.2f}", flush=True)
            del dense
        del X, y, model, r


if __name__ == "__main__":
    main()
