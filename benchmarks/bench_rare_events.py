"""Rare events: does batch_size="auto" keep the tails of the posterior right?

A scenario of our own: logistic regression, N = 10^6 rows, about 300 events, four binary or
five-level features, one of them ("rare") present in 2% of the rows with only a handful of
events among them, so that its coefficient's posterior is wide and skewed. With second-order
control variates the minibatch log-ratio terms are then dominated by the few rows that carry
the rare feature: the noise is small but far from Gaussian, which is what the penalty method
assumes (METHODS.md section 2).

Reference: importance sampling from a multivariate Student-t (5 degrees of freedom) at the
posterior mode with 1.5 x the inverse Hessian there; the log posterior is summed over the
distinct rows of X (the features take few values, so it is exact and cheap), and the mode is
found by scipy (Newton-CG), so nothing of the reference comes from tallchain. Reported: its
effective sample size ESS = (sum w)^2 / sum w^2 and the Pareto k-hat of the weights (PSIS,
Vehtari, Simpson, Gelman, Yao & Gabry, JMLR 2024; `arviz_stats` `psislw`, or, where that
returns NaN, scipy.stats.genpareto fitted to the 3 sqrt(S) largest weights, and the script
says which); k-hat < 0.7 means the importance-sampling estimate is reliable.

Per coefficient and per tail p in {0.01, 0.99}: the sampled quantile q_p of the pooled draws,
the reference CDF at q_p (weighted), and its distance from p in Monte Carlo sds,
(F_ref(q_p) - p) / sqrt(p (1 - p) (1/ESS_chain + 1/ESS_ref)), with ESS_chain the ESS of the
quantile (ArviZ, method="quantile"). Runs, side by side in one process, for 3 chain seeds:
`batch_size="auto"` with the old rule (the log-ratio sd target only: `_schedule.NOISE_LIMITS`
switched off) and with the new one (the default); a fixed small batch as a check that the test
has power; full-data MALA. Done when every
|z| <= 4 at the new rule's auto settings, in at most 2x the old rule's run time.

Run:  .venv/bin/python benchmarks/bench_rare_events.py [--quick]
"""

import argparse
import time
import warnings

import numpy as np
from scipy import optimize, special, stats

import tallchain as tc
from tallchain.mcmc import _schedule

PREVALENCE = 0.02
SEEDS = (1, 2, 3)


def simulate(n_rows, events, seed):
    """X (rare, a, b, c), y with about ``events`` events; the rare feature has no effect."""
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.random(n_rows) < PREVALENCE, rng.random(n_rows) < 0.3,
                         rng.random(n_rows) < 0.5,
                         rng.integers(-2, 3, n_rows)]).astype(float)
    eta = X @ np.array([0.0, 0.5, -0.3, 0.2])
    b0 = np.log(events / n_rows) - np.log(np.mean(np.exp(eta)))
    y = (rng.random(n_rows) < special.expit(b0 + eta)).astype(float)
    return X, y


def grouped_posterior(X, y, prior_sd):
    """(log posterior of theta (k, 1 + p), its mode, the inverse Hessian there), summed over
    the distinct rows of X (exact), the mode by scipy's Newton-CG: independent of tallchain."""
    patterns, inverse, counts = np.unique(X, axis=0, return_inverse=True, return_counts=True)
    events = np.bincount(inverse.ravel(), weights=y, minlength=len(patterns))
    design = np.column_stack([np.ones(len(patterns)), patterns])
    prec = np.eye(design.shape[1]) / prior_sd**2

    def log_post(thetas):
        eta = np.atleast_2d(thetas) @ design.T
        loglik = (eta * events - counts * np.logaddexp(0.0, eta)).sum(axis=1)
        return loglik - 0.5 * np.sum(np.atleast_2d(thetas) ** 2, axis=1) / prior_sd**2

    def hessian(theta):
        s = special.expit(design @ theta)
        return design.T @ (design * (counts * s * (1 - s))[:, None]) + prec

    fit = optimize.minimize(lambda t: -log_post(t)[0], np.zeros(design.shape[1]),
                            jac=lambda t: -(design.T @ (events - counts
                                                        * special.expit(design @ t)) - prec @ t),
                            hess=hessian, method="Newton-CG", options={"xtol": 1e-10})
    return log_post, fit.x, np.linalg.inv(hessian(fit.x))


def importance_reference(log_post, mode, cov, n_draws, seed):
    """Draws, normalised weights, ESS and Pareto k-hat of the importance-sampling reference:
    multivariate t (5 df) at the mode with 1.5 x the inverse Hessian."""
    from arviz_stats.base import array_stats

    t5 = stats.multivariate_t(mode, 1.5 * cov, df=5, seed=np.random.default_rng(seed))
    thetas = t5.rvs(n_draws)
    log_ratio = log_post(thetas) - t5.logpdf(thetas)
    log_ratio -= log_ratio.max()
    w = np.exp(log_ratio) / np.exp(log_ratio).sum()
    _, khat = array_stats.psislw(log_ratio, r_eff=1.0)
    how = "PSIS (arviz_stats)"
    if not np.isfinite(khat):
        # the generalized Pareto fit to the M = 3 sqrt(S) largest weights' excesses (PSIS's
        # tail length) by scipy's maximum likelihood
        tail = np.sort(w)[-int(3 * np.sqrt(n_draws)) - 1:]
        khat = stats.genpareto.fit(tail[1:] - tail[0], floc=0.0)[0]
        how = "scipy.stats.genpareto fit to the largest weights"
    return thetas, w, 1.0 / np.sum(w**2), (float(khat), how)


def weighted_cdf(values, weights, at):
    """The reference CDF sum_i w_i 1{values_i <= at}."""
    return float(np.sum(weights[values <= at]))


def tail_z(result, ref, w, ref_ess, probs=(0.01, 0.99)):
    """(F_ref(q_p) - p) / MC sd for every coefficient and p: shape (n_coef, len(probs))."""
    import arviz as az

    draws = result.draws.reshape(-1, result.draws.shape[-1])
    z = np.empty((draws.shape[1], len(probs)))
    for j in range(draws.shape[1]):
        for k, p in enumerate(probs):
            ess = float(az.ess(result.draws[:, :, j], method="quantile", prob=p))
            q = np.quantile(draws[:, j], p)
            sd = np.sqrt(p * (1 - p) * (1.0 / ess + 1.0 / ref_ess))
            z[j, k] = (weighted_cdf(ref[:, j], w, q) - p) / sd
    return z


def run(model, label, seed, **options):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t0 = time.perf_counter()
        res = tc.sample(model, seed=seed, **options)
        seconds = time.perf_counter() - t0
    noisy = [str(c.message) for c in caught if issubclass(c.category, tc.NoisyLogRatioWarning)]
    return label, res, seconds, noisy


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="10^5 rows, fewer draws")
    args = ap.parse_args()
    n_rows, events = (100_000, 300) if args.quick else (1_000_000, 300)
    X, y = simulate(n_rows, events, seed=14)
    rare = X[:, 0] == 1
    print(f"N = {n_rows}, events {int(y.sum())}, rare feature in {rare.mean():.3%} of rows "
          f"with {int(y[rare].sum())} events")
    model = tc.LogisticRegression(X, y, coef_names=["rare", "a", "b", "c"])
    names = ["intercept", "rare", "a", "b", "c"]
    t0 = time.perf_counter()
    ref, w, ref_ess, khat = importance_reference(
        *grouped_posterior(X, y, 10.0), 100_000 if args.quick else 400_000, seed=3)
    print(f"reference: importance sampling, ESS {ref_ess:.0f}, Pareto k-hat {khat[0]:.2f} "
          f"by {khat[1]} "
          f"({time.perf_counter() - t0:.1f} s)")
    m = np.sum(w[:, None] * ref, axis=0)
    skew = np.sum(w[:, None] * (ref - m) ** 3, axis=0) / np.sum(w[:, None] * (ref - m) ** 2,
                                                              axis=0) ** 1.5
    print("reference posterior skewness: " + ", ".join(f"{n} {s:+.2f}"
                                                      for n, s in zip(names, skew)))
    print(f"\n{'run':<20} {'batch':>6} {'seconds':>8} {'x old':>6} {'err bound':>10} "
          f"{'max |z|':>8}  z at (1%, 99%) per coefficient")
    # compile (or load) the numba kernels outside the timed runs
    small = tc.LogisticRegression(X[:5000], (np.arange(5000) % 3 == 0).astype(float))
    run(small, "warm-up", 0, chains=1, warmup=40, draws=10)
    run(small, "warm-up", 0, chains=1, warmup=40, draws=10, method="mala")
    worst = []
    for seed in SEEDS[:1] if args.quick else SEEDS:
        old_limits = _schedule.NOISE_LIMITS
        _schedule.NOISE_LIMITS = _schedule.NoiseLimits(np.inf, np.inf)   # main's rule
        try:
            base = report(run(model, f"auto, old rule, {seed}", seed), None, ref, w,
                          ref_ess, names)[2]
        finally:
            _schedule.NOISE_LIMITS = old_limits
        worst.append(report(run(model, f"auto, new rule, {seed}", seed), base, ref, w,
                            ref_ess, names))
    report(run(model, "fixed batch 32", 1, batch_size=32), base, ref, w, ref_ess, names)
    report(run(model, "full-data mala", 1, method="mala"), base, ref, w, ref_ess, names)
    z_max = max(z for z, _, _ in worst)
    ratio_max = max(x for _, x, _ in worst)
    print(f"check: new rule, worst |z| {z_max:.2f} (<= 4) at up to {ratio_max:.2f}x the old "
          f"rule's time (<= 2): {'ok' if z_max <= 4 and ratio_max <= 2 else 'FAILED'}")
    if z_max > 4:
        raise SystemExit(1)


def report(outcome, base, ref, w, ref_ess, names):
    """Print one run's line; returns (its worst |z|, its time over ``base``, its seconds);
    ``base`` None: the run is the base of the "x old" column."""
    label, res, seconds, noisy = outcome
    base = seconds if base is None else base
    z = tail_z(res, ref, w, ref_ess)
    bound = getattr(res, "penalty_error_bound", float("nan"))
    cells = " ".join(f"{n}({a:+.1f},{b:+.1f})" for n, (a, b) in zip(names, z))
    print(f"{label:<20} {res.tuned['batch_size'] or 0:>6} {seconds:>8.1f} "
          f"{seconds / base:>6.2f} {bound:>10.4f} {np.abs(z).max():>8.2f}  {cells}", flush=True)
    print(f"{'':<20} batch set by: {res.tuned.get('batch_limited_by')}")
    for msg in noisy:
        print(f"{'':<20} warning: {msg[:200]}")
    return float(np.abs(z).max()), seconds / base, seconds


if __name__ == "__main__":
    main()
