"""Cost of a draw against N: penalty-mala with control variates versus full-data MALA.

Logistic regression, d = 10 coefficients (9 features + intercept), invented data. For each N
the script measures, side by side in one run:

* one full-data pass (log-likelihood + gradient), the unit for set-up costs;
* set-up: mode finding (Newton) + Laplace preconditioner + control-variate cache, as a
  multiple of one full pass;
* penalty-mala + control variates (batch_size="auto"): seconds per transition, data
  evaluations per transition, ESS per second;
* the bare cost of reading the rows a transition reads (a numba loop that draws a sorted
  batch and sums its rows, nothing else): the floor a transition cannot beat;
* at the reference N (the largest N up to 10^6 unless --reference-size says otherwise),
  full-data MALA: ESS per second, and it serves as the long reference run for the KS check of
  penalty-mala (two-sample floor 1.358 sqrt(1/ESS + 1/ESS_ref)). Larger N (10^7 needs about
  1.5 GiB) get the penalty-mala columns only: full-data MALA there takes hours.

Ratios, not absolute times, are the result (this machine's timings are noisy).
Run:  .venv/bin/python benchmarks/bench_tall_data.py [--sizes 1e4 1e5 1e6 1e7] [--quick]
      [--reference-size 1e6]
"""

import argparse
import time
import warnings

import numba
import numpy as np

import tallchain as tc
from tallchain.mcmc._batches import draw_batch
from tallchain.checks import ks_check
from tallchain.mcmc import ess_bulk
from tallchain.models import _kernels

D_FEATURES = 9


@numba.njit(cache=True, nogil=True)
def _read_rows(X, rng, n_batch, n_reads, n_iter):
    """Draw a sorted batch and sum its rows, n_reads times per iteration: the row-reading floor."""
    idx = np.empty(n_batch, dtype=np.int64)
    acc = 0.0
    for _ in range(n_iter):
        for _ in range(n_reads):
            draw_batch(rng, X.shape[0], idx)
            for k in range(n_batch):
                i = idx[k]
                for j in range(X.shape[1]):
                    acc += X[i, j]
    return acc


def make_data(n, rng):
    X = rng.standard_normal((n, D_FEATURES))
    beta = np.linspace(-1.0, 1.0, D_FEATURES + 1) * 0.5
    eta = beta[0] + X @ beta[1:]
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    return X, y


def time_full_pass(model, repeats=5):
    beta = np.zeros(model.n_coef)
    grad = np.empty(model.n_coef)
    data = model.glm_data
    _kernels.full_loglik_grad(data, beta, grad, True, 0, model.n_rows)
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        _kernels.full_loglik_grad(data, beta, grad, True, 0, model.n_rows)
        times.append(time.perf_counter() - t)
    return float(np.median(times))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", nargs="+", type=float, default=[1e4, 1e5, 1e6])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--reference-size", type=float, default=None)
    args = ap.parse_args()
    sizes = [int(s) for s in args.sizes]
    ref_n = (int(args.reference_size) if args.reference_size
             else max([n for n in sizes if n <= 10**6] or [min(sizes)]))
    draws, warmup, chains = (1000, 500, 2) if args.quick else (4000, 1000, 4)
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(7)
    rows = []
    last = None
    # Compile (or load from cache) every kernel before anything is timed.
    Xw, yw = make_data(2000, rng)
    warm = tc.LogisticRegression(Xw, yw)
    tc.sample(warm, method="penalty-mala", chains=1, draws=50, warmup=50, seed=0, parallel=False)
    tc.sample(warm, method="mala", chains=1, draws=20, warmup=20, seed=0, parallel=False)
    _read_rows(Xw, np.random.default_rng(0), 32, 3, 2)
    for n in sizes:
        X, y = make_data(n, rng)
        model = tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=10.0))
        t_pass = time_full_pass(model)
        t = time.perf_counter()
        r = tc.sample(model, method="penalty-mala", chains=chains, draws=draws, warmup=warmup,
                      seed=1, parallel=False)
        wall = time.perf_counter() - t
        iters = chains * (draws + warmup)
        per_it = r.sampling_seconds / iters
        nb = r.tuned["batch_size"]
        # Floor: as many batches as a transition reads (one with the proxy's drift, the
        # default; three with fresh gradient batches), drawn and summed with nothing else done.
        reads = max(1, round(float(np.mean(r.stats["rows_read"])) / nb))
        read_iters = 20_000
        g = np.random.default_rng(3)
        _read_rows(X, g, nb, reads, 10)
        t = time.perf_counter()
        _read_rows(X, g, nb, reads, read_iters)
        floor3 = (time.perf_counter() - t) / read_iters
        ess = float(np.min(ess_bulk(r.draws)))
        rows.append(dict(n=n, t_pass=t_pass, setup=r.setup_seconds, per_it=per_it,
                         evals=r.data_evaluations / iters, batch=nb,
                         ess_s=ess / r.sampling_seconds, floor3=floor3,
                         sd=float(np.nanmean(r.stats["log_ratio_sd"])), acc=r.acceptance_rate,
                         wall=wall))
        if n == ref_n:
            last = (model, r)
            ref_row = rows[-1]
        del X, y, model
        print(f"N={n:>9,d}  pass={t_pass * 1e3:8.2f} ms  setup={r.setup_seconds:6.2f} s "
              f"({r.setup_seconds / t_pass:6.1f} passes)  batch={nb}  "
              f"evals/it={rows[-1]['evals']:.0f}  s/it={per_it * 1e6:7.1f} us  "
              f"floor={floor3 * 1e6:6.1f} us  ESS/s={rows[-1]['ess_s']:9.1f}  "
              f"acc={r.acceptance_rate:.3f}  sd={rows[-1]['sd']:.3g}", flush=True)

    model, r_pen = last
    m_draws, m_warm = (500, 200) if args.quick else (3000, 300)
    ref = tc.sample(model, method="mala", chains=chains, draws=m_draws, warmup=m_warm, seed=2,
                    parallel=False)
    ess_m = float(np.min(ess_bulk(ref.draws)))
    mala_ess_s = ess_m / ref.sampling_seconds
    check = ks_check(r_pen.draws, ref.draws.reshape(-1, ref.draws.shape[2]))
    # The reference draws are autocorrelated: use their ESS, not their count, in the floor.
    ess_pen = check.ess
    floor = 1.358 * np.sqrt(1.0 / ess_pen + 1.0 / ess_m)
    ratio = check.ks / floor

    first, big = rows[0], ref_row
    print()
    print("| N | batch | evals/transition | us/transition | floor us (its batch reads) | "
          "transition/floor | setup (full passes) | ESS/s |")
    print("|---|---|---|---|---|---|---|---|")
    for row in rows:
        print(f"| {row['n']:,d} | {row['batch']} | {row['evals']:.0f} | {row['per_it'] * 1e6:.1f} | "
              f"{row['floor3'] * 1e6:.1f} | {row['per_it'] / row['floor3']:.2f} | "
              f"{row['setup'] / row['t_pass']:.1f} | {row['ess_s']:.1f} |")
    print()
    print(f"evals/transition N={big['n']:,d} vs N={first['n']:,d}: "
          f"{big['evals'] / first['evals']:.2f}x (target <= 1.2)")
    print(f"seconds/transition N={big['n']:,d} vs N={first['n']:,d}: "
          f"{big['per_it'] / first['per_it']:.2f}x (target <= 3)")
    for row in rows:
        if row["n"] > big["n"]:
            print(f"seconds/transition N={row['n']:,d} vs N={first['n']:,d}: "
                  f"{row['per_it'] / first['per_it']:.2f}x, evals {row['evals'] / first['evals']:.2f}x"
                  " (no full-data reference at this N)")
    print(f"full-data mala at N={big['n']:,d}: ESS/s={mala_ess_s:.2f} (min ESS {ess_m:.0f} in "
          f"{ref.sampling_seconds:.1f} s)")
    print(f"ESS/s penalty-mala+cv / mala at N={big['n']:,d}: {big['ess_s'] / mala_ess_s:.0f}x "
          "(target >= 300)")
    print(f"KS(penalty-mala vs mala reference)/floor per coefficient: "
          f"{np.array2string(ratio, precision=2)} (target <= 1.5)")


if __name__ == "__main__":
    main()
