"""The penalty's residual error from non-Gaussian minibatch noise (mcmc/_noise_shape.py) and the
rule of batch_size="auto" built on it (mcmc/_schedule.py).

References, named beside each check:

* The error formula err(n) = |mu3|/(6 n^2) + |mu4 - 3 mu2^2|/(24 n^3) is the first two terms of
  the cumulant expansion of log E[exp(mean - mu)] - sigma^2/2 (METHODS.md section 2). For
  per-row terms Gamma(k, theta) the mean of n of them is Gamma(nk, theta/n) (additivity of the
  gamma distribution, from memory), so the quantity is known in closed form from the gamma
  cumulant generating function -k log(1 - theta t) (from memory) and by direct Monte Carlo with
  scipy.stats.gamma draws.
* The pooled per-row moments against the population's central moments (scipy.stats.moment) of a
  population where 2% of the rows dominate, each step's statistics computed by the chain's own
  kernel (`scaled_sum_and_variance`) on a simple random sample of 64 rows.
"""

import math

import numpy as np
import pytest
from scipy import stats

import tallchain as tc
from tallchain.mcmc import _estimators as E
from tallchain.mcmc import _schedule as S
from tallchain.mcmc import _transition as T
from tallchain.mcmc._noise_shape import (ERROR_LIMIT, batch_for_error, gaussian_error,
                                         pooled_moments, run_error_bound)

N_ROWS = 100_000


def _gamma_case(k, theta, n):
    """(err formula, exact value, the wrong formula with the mean's skewness and kurtosis)."""
    mu2, mu3, mu4 = k * theta**2, 2 * k * theta**3, 3 * k**2 * theta**4 + 6 * k * theta**4
    exact = -n * k * math.log1p(-theta / n) - k * theta - k * theta**2 / (2 * n)
    sigma = math.sqrt(mu2 / n)
    g1_mean, g2_mean = (mu3 / mu2**1.5) / math.sqrt(n), (mu4 / mu2**2 - 3) / n
    wrong = sigma**3 * g1_mean / (6 * math.sqrt(n)) + sigma**4 * g2_mean / (24 * n)
    return float(gaussian_error(n, mu2, mu3, mu4)), exact, wrong


def test_error_formula_against_a_direct_monte_carlo_of_a_skewed_mean():
    # Per-row terms Gamma(0.05, 20): skewness 8.9. n = 50: theta/n = 0.4.
    k, theta, n = 0.05, 20.0, 50
    err, exact, wrong = _gamma_case(k, theta, n)
    draws = stats.gamma(n * k, scale=theta / n).rvs(2_000_000,
                                                    random_state=np.random.default_rng(3))
    e = np.exp(draws - k * theta)
    mc = math.log(e.mean()) - k * theta**2 / (2 * n)
    se = e.std() / e.mean() / math.sqrt(e.size)     # delta method for log of a mean
    assert abs(mc - exact) < 4 * se                 # the closed form, checked by Monte Carlo
    # The formula keeps the terms j = 3, 4 of sum_j k theta^j / (j n^(j-1)); all terms are
    # positive here, so it lies below the exact value by the rest, at most the j = 5 term
    # over (1 - theta/n) (a geometric tail).
    rest = k * theta**5 / (5 * n**4) / (1 - theta / n)
    assert 0 < exact - err <= rest
    assert exact - err < 0.2 * exact
    # Power: the skewness and kurtosis of the mean (not of the rows) plugged into the same
    # formula miss most of the error.
    assert not exact - wrong <= rest


def _rare_population(rng):
    """Per-row terms D where 2% of rows dominate (the shape of a rare binary feature)."""
    rare = rng.random(N_ROWS) < 0.02
    return np.where(rare, 3.3e-4 * (1.0 + 0.3 * rng.standard_normal(N_ROWS)),
                    1e-8 * rng.standard_normal(N_ROWS))


def _step_stats(d, n, steps, rng):
    """Statistics (steps, ST_*) as the chain records them, one batch of n rows per step."""
    out = np.zeros((1, steps, T.N_STATS))
    for s in range(steps):
        idx = np.sort(rng.choice(d.size, n, replace=False))
        _, var, skew, kurt = E.scaled_sum_and_variance(d[idx], d.size)
        out[0, s, [T.ST_LOG_RATIO_SD, T.ST_SKEW, T.ST_KURT, T.ST_BATCH_SIZE,
                   T.ST_ACCEPTANCE_PROBABILITY]] = math.sqrt(var), skew, kurt, n, 1.0
    return out


def test_pooled_moments_see_rows_that_most_small_batches_miss(rng):
    d = _rare_population(rng)
    v = N_ROWS * d
    mu2, mu3, mu4 = (stats.moment(v, order=k) for k in (2, 3, 4))
    st = _step_stats(d, 64, 4000, rng)
    m = pooled_moments(st[..., T.ST_LOG_RATIO_SD], st[..., T.ST_SKEW], st[..., T.ST_KURT],
                       st[..., T.ST_BATCH_SIZE], N_ROWS)
    # A batch of 64 holds on average 1.3 dominating rows (none in 28% of batches), so each
    # step's moments are noisy; over 4000 steps the pooled mean is within a few standard
    # errors. The relative standard error of a mean of 4000 per-step m4 values, whose
    # coefficient of variation is about 1/sqrt(expected dominating rows) ~ 0.9, is ~0.014:
    # 0.1 is 7 of them.
    assert m.mu2 == pytest.approx(mu2, rel=0.1)
    assert m.mu3 == pytest.approx(abs(mu3), rel=0.15)
    assert m.excess4 == pytest.approx(mu4 - 3 * mu2**2, rel=0.15)
    true_err = gaussian_error(64, mu2, mu3, mu4, N_ROWS)
    assert m.error(64, N_ROWS) == pytest.approx(true_err, rel=0.15)
    # Power: the median step (what a look at typical batches sees) misses the tail.
    sd, skew, kurt = (np.median(np.abs(st[0, :, c])) for c in (T.ST_LOG_RATIO_SD, T.ST_SKEW,
                                                                T.ST_KURT))
    typical = sd**3 * skew / (6 * 8.0) + sd**4 * kurt / (24 * 64)
    assert not typical == pytest.approx(true_err, rel=0.15)


def _schedule(n_batch):
    settings = tc.SamplerSettings(method="penalty-mala", batch_size="auto", warmup=500)
    sched = S.Schedule(settings, N_ROWS)
    sched.n_batch = n_batch
    return sched


def test_auto_batch_grows_until_the_error_is_below_its_limit(rng, monkeypatch):
    d = _rare_population(rng)
    v = N_ROWS * d
    mu2, mu3, mu4 = (stats.moment(v, order=k) for k in (2, 3, 4))
    st = _step_stats(d, 64, 1000, rng)
    n_new = _schedule(64).next_batch(st)
    # the true error at the chosen batch is at the limit (within the pooled estimate's error,
    # about 0.05 relative over 1000 steps: 0.3), and one fifth smaller a batch is not enough
    assert gaussian_error(n_new, mu2, mu3, mu4, N_ROWS) <= 1.3 * ERROR_LIMIT
    assert gaussian_error(0.8 * n_new, mu2, mu3, mu4, N_ROWS) > ERROR_LIMIT
    # Power: the old rule (the log-ratio sd target alone) keeps a batch whose error is larger
    monkeypatch.setattr(S, "NOISE_LIMITS", S.NoiseLimits(math.inf, math.inf))
    n_old = _schedule(64).next_batch(st)
    assert n_old < n_new
    assert gaussian_error(n_old, mu2, mu3, mu4, N_ROWS) > 2 * ERROR_LIMIT


def test_gaussian_noise_leaves_the_sd_rule_alone(rng, monkeypatch):
    d = 1e-5 * rng.standard_normal(N_ROWS)
    st = _step_stats(d, 64, 400, rng)
    n_new = _schedule(64).next_batch(st)
    monkeypatch.setattr(S, "NOISE_LIMITS", S.NoiseLimits(math.inf, math.inf))
    assert n_new == _schedule(64).next_batch(st)


def test_steps_beyond_the_fallback_point_grow_the_batch():
    st = np.zeros((1, 1000, T.N_STATS))
    st[..., T.ST_BATCH_SIZE] = 64
    st[..., T.ST_ACCEPTANCE_PROBABILITY] = 1.0
    st[..., T.ST_LOG_RATIO_SD] = 0.5
    st[0, :20, T.ST_LOG_RATIO_SD] = 5.0          # 2% of steps at chi^2 = 25 > 16
    st[0, :20, T.ST_PENALTY_BEYOND_BOUND] = 1.0
    n_new = _schedule(64).next_batch(st)
    # chi^2 falls as 1/n: at n_new the 99.5% quantile (25 at n = 64) is below 0.9 x 16
    assert 25 * 64 / n_new <= 0.9 * 16 * (1 + 1e-9)
    assert 25 * 64 / (n_new - 1) > 0.9 * 16 * (1 - 64 / N_ROWS)
    st[0, 5:20, T.ST_PENALTY_BEYOND_BOUND] = 0.0    # 0.5%: within the stated share
    st[0, 5:20, T.ST_LOG_RATIO_SD] = 0.5
    assert _schedule(64).next_batch(st) < 64


def test_batch_for_error_is_the_smallest_batch_within_the_limit():
    m = pooled_moments([1.0], [3.0], [20.0], [100], N_ROWS)
    n = batch_for_error(m, 1e-4, N_ROWS, 32, 50_000)
    assert m.error(n, N_ROWS) <= 1e-4 < m.error(n - 1, N_ROWS)
    assert batch_for_error(m, 1e-30, N_ROWS, 32, 500) == 500
    assert batch_for_error(m, 1e3, N_ROWS, 32, 500) == 32


def test_run_error_bound_is_nan_without_minibatch_statistics():
    assert math.isnan(run_error_bound({}, N_ROWS, 64))
    assert math.isnan(run_error_bound({"log_ratio_skew": np.zeros((2, 0))}, N_ROWS, None))


def test_the_error_bound_is_reported_in_result_summary_run_json_and_header(rng, tmp_path):
    import json

    from tallchain.mcmc._tables import run_header

    X = rng.standard_normal((2000, 2))
    y = (rng.random(2000) < 0.3).astype(float)
    model = tc.LogisticRegression(X, y)
    r = tc.sample(model, method="penalty-mala", batch_size="auto", chains=2, warmup=100,
                  draws=100, seed=1)
    bound = r.penalty_error_bound
    # the same pooling of the draws' statistics (same code, so exact)
    assert bound == run_error_bound(r.stats, r.n_rows, r.tuned["batch_size"]) and bound >= 0
    assert r.tuned["batch_limited_by"] in ("log-ratio sd", "non-Gaussian error",
                                           "validity bound")
    assert r.summary(warn=False).run["penalty_error_bound"] == bound
    r.save(tmp_path / "run")
    record = json.loads((tmp_path / "run" / "run.json").read_text())
    assert record["penalty_error_bound"] == pytest.approx(bound, rel=1e-15)
    assert f"penalty error bound {bound:.2g}" in run_header(r)
    exact = tc.sample(model, method="mala", chains=2, warmup=50, draws=50, seed=1)
    assert math.isnan(exact.penalty_error_bound)
    assert "penalty error bound" not in run_header(exact)
