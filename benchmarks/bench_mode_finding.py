"""Mode finding: damped Newton (find_mode) against L-BFGS-B on the same objective.

Logistic and Poisson regression, d = 10 coefficients (9 features + intercept), invented data,
on standardised columns and on raw-scale ones (column 0 an income in dollars ~6e4, column 1 a
share in [0, 1]). For each case, side by side in one run: full-data passes (log-likelihood +
gradient, and Hessian for Newton), seconds (median of interleaved repeats), and how far each
mode lies from Newton's in posterior sds. L-BFGS-B is scipy's, on the same passes, with the
stop rule find_mode used before Newton (gradient tolerance 1e-9 of the starting gradient).

Run:  .venv/bin/python benchmarks/bench_mode_finding.py [--rows 1e6] [--quick]
"""

import argparse
import time

import numpy as np
from scipy import optimize, special

import tallchain as tc

D_FEATURES = 9


def data(family, n, raw, rng):
    X = rng.standard_normal((n, D_FEATURES))
    beta = np.linspace(-0.3, 0.3, D_FEATURES)
    if raw:
        X[:, 0] = rng.lognormal(np.log(6e4), 0.5, n)
        X[:, 1] = rng.random(n)
        beta[0] = 1e-5
    eta = -0.5 + X @ beta
    if family == "logistic":
        return tc.LogisticRegression(X, (rng.random(n) < special.expit(eta)).astype(float))
    return tc.PoissonRegression(X, rng.poisson(np.exp(eta)).astype(float))


def lbfgs(model):
    """(mode or None, passes): scipy L-BFGS-B with find_mode's former stop rule."""
    passes = 0

    def neg(beta):
        nonlocal passes
        passes += 1
        ll, g = model.log_likelihood_grad(beta)
        r = beta - model.prior_mean
        val = -(ll - 0.5 * r @ model.prior_prec @ r)
        return (val, -(g - model.prior_prec @ r)) if np.isfinite(val) else (np.inf, 0 * beta)

    x0 = model.prior_mean.copy()
    gtol = 1e-9 * max(1.0, float(np.max(np.abs(neg(x0)[1]))))
    res = optimize.minimize(neg, x0, jac=True, method="L-BFGS-B",
                            options={"maxiter": 1000, "gtol": gtol, "ftol": 0.0, "maxcor": 20})
    ok = np.max(np.abs(res.jac)) <= max(gtol, 1e-6 * max(1.0, abs(res.fun)))
    return (res.x if ok else None), passes + 1   # + the Hessian at the mode


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=float, default=1e6)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    n = int(1e5 if args.quick else args.rows)
    repeats = 1 if args.quick else args.repeats
    rng = np.random.default_rng(0)
    print(f"N = {n}, d = {D_FEATURES + 1}; passes, median seconds of {repeats}; "
          "distance from Newton's mode in posterior sds")
    print(f"{'case':<18}{'newton passes':>14}{'s':>8}{'lbfgs passes':>14}{'s':>8}"
          f"{'lbfgs/newton s':>16}{'lbfgs off (sd)':>16}")
    for family in ("logistic", "poisson"):
        for raw in (False, True):
            model = data(family, n, raw, rng)
            tc.find_mode(model)   # compile
            tn, tl = [], []
            for _ in range(repeats):
                t = time.perf_counter()
                lap = tc.find_mode(model)
                tn.append(time.perf_counter() - t)
                t = time.perf_counter()
                mode, lpasses = lbfgs(model)
                tl.append(time.perf_counter() - t)
            off = ("failed" if mode is None else
                   f"{np.max(np.abs(mode - lap.mode) / np.sqrt(np.diag(lap.cov))):.1e}")
            mn, ml = np.median(tn), np.median(tl)
            case = f"{family} {'raw' if raw else 'std'}"
            print(f"{case:<18}{lap.n_evaluations:>14}{mn:>8.3f}{lpasses:>14}{ml:>8.3f}"
                  f"{ml / mn:>16.2f}{off:>16}")


if __name__ == "__main__":
    main()
