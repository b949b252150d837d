"""Which estimate of the log-ratio noise variance should the penalty method use?

Compares the three `log_ratio_variance` settings of penalty-mala ("same-batch", "independent-batch",
"pooled") on problems with a known posterior, without control variates so the noise is real:

* linear regression, N = 3,000, exact Gaussian posterior (Bishop PRML eqs. 3.53-3.54);
* logistic regression, N = 3,000, reference = a long full-data MALA run made in this script.

Reports, per setting, the bias of the posterior mean and of the posterior sd in units of the
exact posterior sd (averaged over coefficients and over replicate seeds, with its Monte Carlo
standard error), the largest KS distance over its noise floor, ESS per second and data
evaluations per draw. Run:  .venv/bin/python benchmarks/bench_noise_variance.py [--quick]
"""

import argparse
import time
import warnings

import numpy as np

import tallchain as tc
from tallchain.checks import ks_check
from tallchain.mcmc import ess_bulk

SETTINGS = ("same-batch", "independent-batch", "pooled")


def problems(rng):
    n = 3000
    X = rng.standard_normal((n, 2)) @ np.array([[1.0, 0.5], [0.0, 1.0]])
    lin = tc.LinearRegression(X, 0.3 + X @ [1.0, -0.5] + rng.standard_normal(n), noise_sd=1.0)
    post = tc.conjugate_posterior(lin)
    yield "linear", lin, post.mean, post.sd, post
    eta = -0.4 + X @ [1.0, -0.7]
    logit = tc.LogisticRegression(X, (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float))
    ref = tc.sample(logit, method="mala", chains=4, draws=25_000, warmup=1000, seed=99)
    flat = ref.draws.reshape(-1, ref.draws.shape[2])
    yield "logistic", logit, flat.mean(0), flat.std(0), flat


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer replicates and draws")
    args = ap.parse_args()
    reps = 2 if args.quick else 5
    draws = 3000 if args.quick else 8000
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(2026)
    print(f"{'problem':9s} {'log_ratio_variance':18s} {'mean bias/sd':>14s} {'sd bias/sd':>12s} "
          f"{'max KS/floor':>12s} {'ESS/s':>8s} {'evals/draw':>10s}")
    for name, model, mean, sd, ref in problems(rng):
        for setting in SETTINGS:
            mb, sb, ks, eps, epd = [], [], [], [], []
            for rep in range(reps):
                t = time.perf_counter()
                r = tc.sample(model, method="penalty-mala", control_variates=False,
                              batch_size=300, log_ratio_variance=setting, chains=4, draws=draws,
                              warmup=1000, seed=1000 + rep)
                flat = r.draws.reshape(-1, r.draws.shape[2])
                mb.append(np.mean((flat.mean(0) - mean) / sd))
                sb.append(np.mean(flat.std(0) / sd - 1))
                k = ks_check(r.draws, ref) if not isinstance(ref, np.ndarray) else ks_check(r.draws, ref)
                ks.append(np.max(k.ratio))
                eps.append(np.min(ess_bulk(r.draws)) / (time.perf_counter() - t))
                epd.append(r.data_evaluations / (r.n_chains * (draws + 1000)))
            se = lambda v: np.std(v, ddof=1) / np.sqrt(len(v))
            print(f"{name:9s} {setting:18s} {np.mean(mb):+8.3f}±{se(mb):.3f} "
                  f"{np.mean(sb):+7.3f}±{se(sb):.3f} {np.mean(ks):12.2f} {np.mean(eps):8.1f} "
                  f"{np.mean(epd):10.0f}", flush=True)


if __name__ == "__main__":
    main()
