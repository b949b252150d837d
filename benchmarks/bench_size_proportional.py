"""Would size-proportional subsampling help with rare events? An offline measurement.

Probability-proportional-to-size subsampling for the difference estimator (Quiroz, Kohn,
Villani & Tran, JASA 2019): draw rows with replacement with probabilities p_i proportional to
a bound on the control-variate residual |D_i|, and estimate sum_i D_i by the Hansen-Hurwitz
mean of D_i / p_i. It is not built into the sampler; this script measures what it would give on
the rare-event case of `bench_rare_events.py` (10^6 rows), exactly, over the whole population,
without sampling: for 20 moves theta -> theta' drawn around the mode (theta from the Laplace
approximation, theta' = theta + 0.7 x a Laplace draw), the per-draw terms' moments under
simple random sampling (t = N D_i, uniform) and under PPS (t = D_i / p_i with probability p_i),
and from them the log-ratio sd and the penalty's residual error err(n) (mcmc/_noise_shape.py).

The bound: the second-order proxy leaves the third-order remainder, |f'''| |u|^3 / 6 with
|f'''| <= s(1 - s) for the logistic family (s = sigmoid(eta*)) and u = eta - eta* of typical
size r_i = sqrt(x_i' Sigma x_i) under the Laplace covariance Sigma: p_i ~ s_i (1 - s_i) r_i^3.

Run:  .venv/bin/python benchmarks/bench_size_proportional.py [--quick]
"""

import argparse

import numpy as np
from scipy import special

from bench_rare_events import grouped_posterior, simulate


def term_moments(t, q):
    """(mu2, |mu3|, |mu4 - 3 mu2^2|) of the per-draw term t drawn with probabilities q."""
    c = t - q @ t
    mu2 = q @ c**2
    return mu2, abs(q @ c**3), abs(q @ c**4 - 3 * mu2**2)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="10^5 rows")
    n_rows = 100_000 if ap.parse_args().quick else 1_000_000
    X, y = simulate(n_rows, 300, seed=14)
    _, mode, cov = grouped_posterior(X, y, 10.0)
    Z = np.column_stack([np.ones(n_rows), X])
    eta_star = Z @ mode
    s = special.expit(eta_star)
    f1, f2 = y - s, -s * (1 - s)
    r = np.sqrt(np.einsum("ij,jk,ik->i", Z, cov, Z))
    p = s * (1 - s) * r**3
    p /= p.sum()
    print(f"N = {n_rows}; PPS puts {p[X[:, 0] == 1].sum():.0%} of the probability on the "
          f"{np.mean(X[:, 0] == 1):.0%} of rows with the rare feature")
    rng = np.random.default_rng(1)
    chol = np.linalg.cholesky(cov)
    moments = {"simple random": [], "size-proportional": []}
    uniform = np.full(n_rows, 1.0 / n_rows)
    for _ in range(20):
        theta = mode + chol @ rng.standard_normal(len(mode))
        u = Z @ theta - eta_star
        u1 = u + 0.7 * Z @ (chol @ rng.standard_normal(len(mode)))
        loglik = y * (eta_star + u1) - np.logaddexp(0, eta_star + u1) - (
            y * (eta_star + u) - np.logaddexp(0, eta_star + u))
        d = loglik - (f1 * (u1 - u) + 0.5 * f2 * (u1**2 - u**2))
        moments["simple random"].append(term_moments(n_rows * d, uniform))
        moments["size-proportional"].append(term_moments(d / p, p))
    print(f"{'n':>5} {'sampling':<18} {'median sd':>10} {'mean err(n)':>12}")
    ratios = []
    for n in (32, 64, 128, 256):
        errs = []
        for name, rows in moments.items():
            a = np.array(rows)
            err = a[:, 1] / (6 * n**2) + a[:, 2] / (24 * n**3)
            errs.append(err.mean())
            print(f"{n:>5} {name:<18} {np.median(np.sqrt(a[:, 0] / n)):>10.3g} "
                  f"{err.mean():>12.3g}")
        ratios.append(errs[0] / errs[1])
    print(f"check: err(n) simple random / size-proportional {min(ratios):.0f}x-"
          f"{max(ratios):.0f}x (> 1 expected): {'ok' if min(ratios) > 1 else 'FAILED'}")


if __name__ == "__main__":
    main()
