"""Families with a sampled parameter: set-up passes and ESS per second, penalty-mala vs mala.

Linear regression with its noise sd sampled and negative-binomial (NB2) regression with its
dispersion sampled, d = 10 coefficients + 1 family parameter, invented data, N = 10^5 (mid
size; `--rows` to change). Side by side in one run, per family: the full-data passes of the
set-up (mode by Newton, with its Hessian passes; the row cache and the proxy sums are three
more), and for penalty-mala (second-order control variates, batch_size="auto") and full-data
mala: seconds of sampling, the smallest bulk ESS over all parameters (the family parameter
included), ESS per second, and the ratio. Chains run serially (`parallel=False`).

Run:  .venv/bin/python benchmarks/bench_family_params.py [--rows 1e5] [--quick]
"""

import argparse
import warnings

import numpy as np

import tallchain as tc
from tallchain.mcmc import ess_bulk

D_FEATURES = 10


def models(n, rng):
    X = rng.standard_normal((n, D_FEATURES)) @ (np.eye(D_FEATURES) + 0.2)
    beta = np.linspace(-0.3, 0.3, D_FEATURES)
    yield "linear, sd sampled", tc.LinearRegression(
        X, 1.0 + X @ beta + 1.7 * rng.standard_normal(n))
    mu = np.exp(0.5 + 0.5 * X @ beta)
    y = rng.poisson(mu * rng.gamma(1 / 0.6, 0.6, n)).astype(float)
    yield "NB2, dispersion sampled", tc.NegativeBinomialRegression(X, y)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=float, default=1e5)
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    n = int(2e4 if args.quick else args.rows)
    draws = 300 if args.quick else 1000
    rng = np.random.default_rng(0)
    print(f"N = {n}, {D_FEATURES + 1} coefficients + 1 family parameter, 2 chains x {draws} draws")
    print(f"{'family':<26}{'mode passes':>14}{'method':>14}{'s':>8}{'min ESS':>9}"
          f"{'ESS/s':>9}")
    for label, model in models(n, rng):
        lap = tc.find_mode(model)
        ess_s = {}
        for method in ("penalty-mala", "mala"):
            kw = dict(method=method, chains=2, draws=draws, warmup=500, seed=1, parallel=False)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                tc.sample(model, **{**kw, "draws": 10, "warmup": 50})   # compile, untimed
                result = tc.sample(model, **kw)
                ess = float(np.min(ess_bulk(result.draws)))
            ess_s[method] = ess / result.sampling_seconds
            print(f"{label:<26}{lap.n_evaluations:>14}{method:>14}"
                  f"{result.sampling_seconds:>8.2f}{ess:>9.0f}{ess_s[method]:>9.0f}")
        print(f"{'':<26}{'':>14}{'penalty/mala':>14}{'':>8}{'':>9}"
              f"{ess_s['penalty-mala'] / ess_s['mala']:>9.1f}")


if __name__ == "__main__":
    main()
