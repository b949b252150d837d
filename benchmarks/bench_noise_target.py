"""Which default `target_log_ratio_sd` should batch_size="auto" aim at?

penalty-mala with batch_size="auto" picks the batch n in warmup so that the estimated sd of the
minibatch log-ratio sits near `target_log_ratio_sd`. A larger target means smaller batches
(cheaper steps) but a larger penalty (acceptance falls like 2 Phi(-sigma/2), METHODS.md 1).
This script sweeps the target and measures the trade-off where the target binds, i.e. where the
log-ratio noise is large (with second-order control variates the batch floor binds instead; a
check line shows it):

* logistic (d = 8), linear (d = 6, known noise sd) and Poisson (d = 5) regression, N = 20,000,
  first-order control variates (`proxy_order=1`: noise O(d/n), independent of N);
* logistic (d = 6), N = 10,000, no control variates (noise O(N/n)).

Per target, over replicate seeds (mean and standard error): the chosen batch, acceptance and
its ratio to 0.574 x mean 2 Phi(-sigma_t/2) (sigma_t the estimated sd at draw t), the mean and
root-mean-square log-ratio sd of the draws (the target is on the rms), min bulk ESS,
ESS per 10^6 data evaluations of the draws phase (the efficiency the choice is made on), ESS
per second of the run (warmup + draws; seconds are noisy), the largest KS distance to a
reference over its two-sample noise floor 1.358 sqrt(1/ESS + 1/ESS_ref), and the share of
draws in which the Ceperley-Dewing correction fell back to sigma^2/2. References: the exact
posterior (linear) and long full-data MALA runs (logistic, Poisson). One core
(`parallel=False`), batch_ceiling = N so that the ceiling never binds.

The choice is made on the first-order problems: each problem's efficiency relative to its own
best, averaged over problems. Without control variates the chosen batch is a large share of N
at every target, so the target hardly changes the cost there; that case is shown, not used.

Run:  .venv/bin/python benchmarks/bench_noise_target.py [--quick]
"""

import argparse
import time
import warnings

import numpy as np
from scipy import stats

import tallchain as tc
from tallchain.checks import KS_CRITICAL, ks_check
from tallchain.mcmc import ess_bulk
from tallchain.mcmc import prepare
from tallchain.mcmc._sampling import DEFAULT_BATCH_FLOOR

TARGETS = (0.25, 0.5, 0.75, 1.0, 1.25, 1.5, 2.0, 2.5)
QUICK_TARGETS = (0.5, 1.0, 2.0)
MALA_ACCEPT = 0.574  # Roberts & Rosenthal (1998)


class Problem:
    """A model, how it is sampled (control variates) and its reference for the KS check."""

    def __init__(self, name, model, cv, reference, ref_ess=None):
        self.name, self.model, self.cv = name, model, cv
        self.reference, self.ref_ess = reference, ref_ess
        self.prep = prepare(model, proxy_orders=(1, 2) if cv else (0,))


def _mala_reference(model, draws, seed):
    """Long full-data MALA run: flat draws and per-coefficient bulk ESS."""
    ref = tc.sample(model, method="mala", chains=4, draws=draws, warmup=500, seed=seed,
                    parallel=False)
    return ref.draws.reshape(-1, model.n_coef), ess_bulk(ref.draws)


def problems(rng, ref_draws):
    """Yield the benchmark problems (invented data, fixed seeds)."""
    n = 20_000
    # Invented scenario: 20,000 ad impressions, clicked or not, 7 standardised page features.
    X = rng.standard_normal((n, 7))
    eta = -1.0 + X @ np.linspace(-0.6, 0.6, 7)
    logit = tc.LogisticRegression(X, (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float))
    yield Problem("logistic cv1", logit, True, *_mala_reference(logit, ref_draws, 91))
    # Invented scenario: delivery times of 20,000 parcels against 5 route features, noise sd 1.
    X = rng.standard_normal((n, 5)) @ (np.eye(5) + 0.3)
    lin = tc.LinearRegression(X, 2.0 + X @ np.linspace(-1.0, 1.0, 5) + rng.standard_normal(n),
                              noise_sd=1.0)
    yield Problem("linear cv1", lin, True, tc.conjugate_posterior(lin))
    # Invented scenario: bicycle rentals on 20,000 station-days against 4 weather features.
    X = rng.standard_normal((n, 4))
    pois = tc.PoissonRegression(X, rng.poisson(np.exp(0.5 + X @ [0.3, -0.2, 0.1, 0.25])))
    yield Problem("poisson cv1", pois, True, *_mala_reference(pois, ref_draws, 92))
    n = 10_000
    # Invented scenario: 10,000 loan applications, repaid or not, 5 standardised features.
    X = rng.standard_normal((n, 5))
    eta = 0.3 + X @ np.linspace(-0.8, 0.8, 5)
    plain = tc.LogisticRegression(X, (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float))
    yield Problem("logistic no-cv", plain, False, *_mala_reference(plain, ref_draws, 93))


def run_one(problem, target, seed, chains, draws, warmup, proxy_order=1):
    """One penalty-mala run at ``target``; returns its figures as a dict."""
    model = problem.model
    r = tc.sample(model, method="penalty-mala", batch_size="auto", control_variates=problem.cv,
                  proxy_order=proxy_order, target_log_ratio_sd=target, batch_ceiling=model.n_rows,
                  chains=chains, draws=draws, warmup=warmup, seed=seed, parallel=False,
                  preparation=problem.prep)
    rows_warm = float(np.sum(r.warmup_stats["batch_size"]))
    rows_draws = float(np.sum(r.stats["batch_size"]))
    # Row visits per batch row drawn: 3 for penalty-mala (gradient batch at both ends of the
    # proposal, log-ratio batch); the draws phase is that times the rows of its batches.
    per_row = r.data_evaluations / (rows_warm + rows_draws)
    evals_draws = per_row * rows_draws
    ess = ess_bulk(r.draws)
    if isinstance(problem.reference, np.ndarray):
        check = ks_check(r.draws, problem.reference)
        # The reference draws are autocorrelated: their ESS, not their count, in the floor.
        floor = KS_CRITICAL * np.sqrt(1.0 / check.ess + 1.0 / problem.ref_ess)
        ks = float(np.max(check.ks / floor))
    else:
        ks = float(np.max(ks_check(r.draws, problem.reference).ratio))
    sd = r.stats["log_ratio_sd"]
    pred = MALA_ACCEPT * float(np.nanmean(2.0 * stats.norm.cdf(-sd / 2.0)))
    return dict(batch=r.tuned["batch_size"], acc=r.acceptance_rate,
                acc_ratio=r.acceptance_rate / pred, sd=float(np.nanmean(sd)),
                rms=float(np.sqrt(np.nanmean(sd**2))),
                ess=float(np.min(ess)), eff=float(np.min(ess)) / evals_draws * 1e6,
                ess_s=float(np.min(ess)) / r.sampling_seconds, ks=ks,
                fallback=100.0 * r.penalty_beyond_bound_count / (chains * draws), per_row=per_row)


def mean_se(values):
    v = np.asarray(values, dtype=float)
    return float(v.mean()), (float(v.std(ddof=1) / np.sqrt(v.size)) if v.size > 1 else np.nan)


def flat_region(targets, curve, share=0.9):
    """Argmax of ``curve`` and the contiguous run of targets around it with curve >= share*max."""
    best = int(np.argmax(curve))
    lo = hi = best
    while lo > 0 and curve[lo - 1] >= share * curve[best]:
        lo -= 1
    while hi < len(curve) - 1 and curve[hi + 1] >= share * curve[best]:
        hi += 1
    return targets[best], targets[lo], targets[hi]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="three targets, two seeds, short runs")
    args = ap.parse_args()
    targets = QUICK_TARGETS if args.quick else TARGETS
    reps = 2 if args.quick else 5
    chains, draws, warmup = (4, 600, 500) if args.quick else (4, 1500, 500)
    ref_draws = 1500 if args.quick else 5000
    warnings.simplefilter("ignore")
    t_start = time.perf_counter()
    rng = np.random.default_rng(2027)
    # Compile (or load from cache) every kernel before anything is timed.
    Xw = rng.standard_normal((2000, 3))
    warm = tc.LogisticRegression(Xw, (rng.random(2000) < 0.5).astype(float))
    for cv in (False, True):
        tc.sample(warm, method="penalty-mala", control_variates=cv, proxy_order=1, chains=1,
                  draws=50, warmup=50, seed=0, parallel=False)
    tc.sample(warm, method="mala", chains=1, draws=20, warmup=20, seed=0, parallel=False)

    header = ("| problem | target | batch n | acceptance | acc / pred | "
              "log-ratio sd mean, rms | min ESS | "
              "ESS per 1e6 evals | ESS/s (run) | max KS/floor | penalty beyond bound % |")
    lines = [header, "|---" * (header.count("|") - 1) + "|"]
    curves, checks, per_rows = {}, [], set()
    for prob in problems(rng, ref_draws):
        eff_mean, eff_se = [], []
        for target in targets:
            runs = [run_one(prob, target, 1000 + rep, chains, draws, warmup)
                    for rep in range(reps)]
            per_rows.update(round(x["per_row"], 9) for x in runs)
            m = {k: mean_se([x[k] for x in runs]) for k in runs[0] if k != "per_row"}
            eff_mean.append(m["eff"][0])
            eff_se.append(m["eff"][1])
            lines.append(
                f"| {prob.name} | {target:.2f} | {m['batch'][0]:.0f} ± {m['batch'][1]:.0f} | "
                f"{m['acc'][0]:.3f} | {m['acc_ratio'][0]:.2f} | "
                f"{m['sd'][0]:.2f}, {m['rms'][0]:.2f} | "
                f"{m['ess'][0]:.0f} | {m['eff'][0]:.2f} ± {m['eff'][1]:.2f} | "
                f"{m['ess_s'][0]:.0f} ± {m['ess_s'][1]:.0f} | {m['ks'][0]:.2f} | "
                f"{m['fallback'][0]:.2f} |")
            print(lines[-1], flush=True)
        curves[prob.name] = (np.array(eff_mean), np.array(eff_se))
        if prob.cv:
            r2 = run_one(prob, 1.0, 1000, chains, min(draws, 500), warmup, proxy_order=2)
            checks.append(f"check: {prob.name[:-4]} proxy_order=2, target 1.0: batch {r2['batch']} "
                          f"(floor {DEFAULT_BATCH_FLOOR}), log-ratio sd {r2['sd']:.3g}")

    print()
    print("\n".join(lines))
    print()
    for line in checks:
        print(line)
    print(f"check: row visits per batch row drawn, every run: {sorted(per_rows)} (3 expected)")
    print()
    names = list(curves)
    for name in names:
        best, lo, hi = flat_region(targets, curves[name][0])
        print(f"{name}: optimum {best}; within 10%: [{lo}, {hi}]")
    # The choice: each problem's efficiency relative to its own best, averaged over the
    # problems with control variates (without them the batch is a large share of N at every
    # target, so the target hardly changes the cost; that row is shown, not used).
    for label, keys in (("cv1 problems", [k for k in names if k.endswith("cv1")]),
                        ("all problems", names)):
        rel = np.array([curves[k][0] / curves[k][0].max() for k in keys])
        rel_se = np.array([curves[k][1] / curves[k][0].max() for k in keys])
        combined = rel.mean(axis=0)
        combined_se = np.sqrt(np.nansum(rel_se**2, axis=0)) / len(keys)
        print(f"combined over {label} (mean relative efficiency ± se): " + ", ".join(
            f"{t}: {c:.2f}±{s:.2f}" for t, c, s in zip(targets, combined, combined_se)))
        best, lo, hi = flat_region(targets, combined)
        i = targets.index(best)
        tied = [t for t, c, s in zip(targets, combined, combined_se)
                if combined[i] - c <= 2.0 * np.hypot(s, combined_se[i])]
        print(f"  indistinguishable from the optimum (difference < 2 se): {tied}")
        if label == "cv1 problems":
            print(f"efficiency-optimal target (ESS per 1e6 evaluations): {best}; "
                  f"within 10% of the optimum: [{lo}, {hi}]")
            # Among settings the measurement cannot tell apart, the least noisy one: a smaller
            # sd strains the Gaussian assumption less and falls back to the plug-in less often.
            print(f"suggested default (the smallest target indistinguishable from the "
                  f"optimum): {min(tied)}")
    print(f"run time: {time.perf_counter() - t_start:.0f} s")


if __name__ == "__main__":
    main()
