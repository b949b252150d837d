"""How often does a sweep call an exact setting "biased"? The false-alarm rate of its verdicts.

A sweep judges every grid point by the KS distance of each coefficient's draws to the exact
posterior, in units of the noise floor 1.358/sqrt(n_eff). Two questions, measured here:

1. **Which effective sample size makes sqrt(n_eff) KS follow the Kolmogorov distribution?**
   MALA on N(0, 1), written in NumPy (independent of tallchain's kernels), at steps below and
   above the usual tuning: the share of runs whose sqrt(n_eff) KS exceeds the Kolmogorov 95%
   and 99% points (1.358, 1.628; scipy.stats.kstwobign), for n_eff = bulk ESS, tail ESS,
   min(bulk, tail) and the ESS of the empirical CDF (`tallchain.checks.ecdf_ess`).

2. **The false-alarm rate of whole tables.** Tables of exact settings as `sweep` builds them
   (a tuning run, then the tuned step x 1/8 ... 8 for full-data MALA and for penalty-mala with
   second-order control variates on a linear model, exact there), each point judged by four
   rules: the old one (1.5 floors, bulk ESS) and the family-wise threshold at level 0.05
   (Bonferroni over points x coefficients, `tallchain.checks.family_threshold`) with bulk,
   min(bulk, tail) and ECDF ESS. Reported: the share of tables with any "biased" point, with
   a binomial 95% interval. sgld rows in the same tables check power: how often sgld is
   flagged at the tuned step h* and below it, where its bias shrinks.

Run:  .venv/bin/python benchmarks/bench_sweep_false_alarms.py [--quick] [--tables T] [--coefs K]
"""

import argparse
import time
import warnings
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy import stats

KOLMOGOROV_95, KOLMOGOROV_99 = stats.kstwobign.isf(0.05), stats.kstwobign.isf(0.01)
MIN_ESS = 100          # the sweep's MIN_ESS_FOR_VERDICT
OLD_THRESHOLD = 1.5    # floors, before the family-wise rule


def _ess(draws):
    """bulk, tail (5% and 95% quantiles, Vehtari et al. 2021) and ECDF ESS of (chain, draw)."""
    import arviz as az

    from tallchain.checks import ecdf_ess

    return (float(az.ess(draws, method="bulk")),
            float(az.ess(draws, method="tail", prob=(0.05, 0.95))),
            float(ecdf_ess(draws[:, :, None])[0]))


def gaussian_mala(h, replications, seed, chains=4, draws=2000, warmup=500):
    """KS to N(0, 1) and the three ESS of `replications` runs of NumPy MALA at step h."""
    rng = np.random.default_rng(seed)
    x = 2.0 * rng.standard_normal((replications, chains))   # overdispersed starts
    out = np.empty((replications, chains, draws))
    accepted = 0.0

    def log_q(to, frm):           # Langevin proposal density for N(0, 1), up to a constant
        return -0.5 * (to - (1.0 - 0.5 * h) * frm) ** 2 / h

    for it in range(warmup + draws):
        y = (1.0 - 0.5 * h) * x + np.sqrt(h) * rng.standard_normal(x.shape)
        log_a = -0.5 * y**2 + 0.5 * x**2 + log_q(x, y) - log_q(y, x)
        move = np.log(rng.random(x.shape)) < log_a
        x = np.where(move, y, x)
        if it >= warmup:
            out[:, :, it - warmup] = x
            accepted += move.mean() / draws
    ks = np.array([stats.kstest(out[r].ravel(), stats.norm.cdf).statistic
                   for r in range(replications)])
    ess = np.array([_ess(out[r]) for r in range(replications)])
    return accepted, ks, ess


def _table(args):
    """One sweep-like table: per point and coefficient, KS to the exact marginal and the three
    ESS; the verdict logic is applied afterwards."""
    warnings.simplefilter("ignore")
    import tallchain as tc
    from tallchain.mcmc import prepare

    seed, n_coef, n_rows, draws, warmup = args
    rng = np.random.default_rng(1000 + n_coef)
    mix = np.triu(np.full((n_coef - 1, n_coef - 1), 0.4)) + 0.6 * np.eye(n_coef - 1)
    X = rng.standard_normal((n_rows, n_coef - 1)) @ mix
    model = tc.LinearRegression(X, 0.3 + X @ np.linspace(-1, 1, n_coef - 1)
                                + rng.standard_normal(n_rows), noise_sd=1.0)
    post = tc.conjugate_posterior(model)
    preparation = prepare(model)
    seeds = np.random.SeedSequence(seed).spawn(22)
    tuned = tc.sample(model, method="mala", chains=2, draws=200, warmup=max(warmup, 200),
                      seed=seeds[0], preparation=preparation)
    h = float(np.mean(tuned.tuned["step_size"]))
    rows = []
    for m, method in enumerate(("mala", "penalty-mala", "sgld")):
        for k in range(-3, 4):
            extra = {} if method == "mala" else {"batch_size": 32}
            r = tc.sample(model, method=method, step_size=h * 2.0**k, chains=4, draws=draws,
                          warmup=warmup, seed=seeds[1 + 7 * m + k + 3],
                          preparation=preparation, parallel=False, **extra)
            finite = bool(np.all(np.isfinite(r.draws)))
            for j in range(n_coef):
                d = r.draws[:, :, j]
                ks = stats.kstest(d.ravel(), post.marginal(j).cdf).statistic if finite else np.nan
                ess = _ess(d) if finite else (np.nan,) * 3
                rows.append((seed, m, k, j, ks, *ess))
    return rows


def table_shares(rows, n_coef, level, n_points):
    """Share of tables with any 'biased' point of the exact methods (0, 1) and of sgld (2),
    under each rule; each rule's threshold in floors."""
    from tallchain.checks import KS_CRITICAL, family_threshold

    seed, method, k, j, ks, bulk, tail, ecdf = rows.T
    bonferroni, _ = family_threshold(level, n_points * n_coef)
    rules = {"old: 1.5 floors, bulk ESS": (OLD_THRESHOLD, bulk),
             "family-wise, bulk ESS": (bonferroni, bulk),
             "family-wise, min(bulk, tail) ESS": (bonferroni, np.minimum(bulk, tail)),
             "family-wise, ECDF ESS (the sweep's)": (bonferroni, ecdf)}
    out = {}
    for name, (threshold, ess) in rules.items():
        ratio = ks * np.sqrt(ess) / KS_CRITICAL
        flagged = {}
        for key in zip(seed, method, k):
            at = (seed == key[0]) & (method == key[1]) & (k == key[2])
            if np.all(np.isfinite(ratio[at])) and np.min(ess[at]) >= MIN_ESS:
                flagged[key] = bool(np.max(ratio[at]) > threshold)
        tables = np.unique(seed)
        exact = [any(flagged.get((s, m, kk), False) for m in (0, 1) for kk in range(-3, 4))
                 for s in tables]
        sgld = [np.mean([flagged.get((s, 2, kk), False) for s in tables]) for kk in range(-3, 1)]
        out[name] = (threshold, np.mean(exact), int(np.sum(exact)), len(tables), sgld)
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer replications and tables")
    ap.add_argument("--tables", type=int, default=None, help="tables to simulate (default 300)")
    ap.add_argument("--coefs", type=int, default=6, help="coefficients of the linear model")
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    reps = 100 if args.quick else 600
    n_tables = args.tables or (12 if args.quick else 300)

    t0 = time.perf_counter()
    print("1. sqrt(n_eff) KS of exact MALA on N(0, 1) (NumPy), share above the Kolmogorov "
          f"95% / 99% points ({reps} runs of 4 x 2000 draws per step)")
    print(f"{'step':>5} {'accept':>7}   {'n_eff':<16}{'> 1.358 (5%)':>14}{'> 1.628 (1%)':>14}")
    for i, h in enumerate((0.7, 1.4, 2.0, 2.8)):
        acc, ks, ess = gaussian_mala(h, reps, seed=10 + i)
        bulk, tail, ecdf = ess.T
        for name, e in (("bulk", bulk), ("tail", tail), ("min(bulk, tail)", np.minimum(bulk, tail)),
                        ("ECDF", ecdf)):
            z = ks * np.sqrt(e)
            p5, p1 = np.mean(z > KOLMOGOROV_95), np.mean(z > KOLMOGOROV_99)
            se = np.sqrt(0.05 * 0.95 / reps)
            print(f"{h:>5.1f} {acc:>7.3f}   {name:<16}{p5:>9.3f} ± {se:.3f}{p1:>13.4f}")
    print(f"({time.perf_counter() - t0:.0f} s)\n")

    t0 = time.perf_counter()
    n_coef, level = args.coefs, 0.05
    jobs = [(s, n_coef, 300, 2000, 500) for s in range(n_tables)]
    with ProcessPoolExecutor(args.workers) as ex:
        rows = np.array([row for table in ex.map(_table, jobs) for row in table], dtype=float)
    print(f"2. {n_tables} sweep tables of exact settings: mala and penalty-mala (second-order "
          f"control variates, exact on a linear model) x 7 steps, {n_coef} coefficients, "
          f"4 x 2000 draws; family-wise level {level} over 14 x {n_coef} tests; sgld x 7 steps "
          "beside them for power")
    print(f"{'rule':<38}{'threshold':>10}{'tables with a false alarm':>38}"
          f"   sgld flagged at h*/8, h*/4, h*/2, h*")
    for name, (thr, share, x, n, power) in table_shares(rows, n_coef, level, 14).items():
        lo, hi = stats.binomtest(x, n).proportion_ci(0.95)
        print(f"{name:<38}{thr:>10.3f}{share:>11.3f} ({x}/{n}; 95% CI {lo:.3f}-{hi:.3f})"
              f"   {' '.join(f'{p:.2f}' for p in power)}")
    print(f"({time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
