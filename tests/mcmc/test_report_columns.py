"""The report's columns: ratios exp(coefficient), the Laplace approximation's distance from the
draws, and the summary and result printed as tables.

References: ArviZ's equal-tailed interval (``arviz.eti``) and median on exp of the draws;
scipy.stats (norm, kstwobign) and a NumPy empirical CDF for the KS distance; ArviZ's quantile
ESS for the noise floor.
"""

import re

import arviz as az
import numpy as np
import pytest
from scipy import special, stats
from ulps import assert_ulps_close

import tallchain as tc

KS_CRITICAL = 1.358   # 95% point of the Kolmogorov distribution (standard tables, from memory)


def _logistic(n, seed, slope=(0.8, -0.5), intercept=0.3):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, len(slope)))
    y = (rng.random(n) < special.expit(intercept + X @ slope)).astype(float)
    return X, y


@pytest.fixture(scope="module")
def logistic_run():
    X, y = _logistic(2000, 4)
    model = tc.LogisticRegression(X, y, coef_names=["dose", "age"])
    return tc.sample(model, method="penalty-mala", chains=4, draws=1000, warmup=400, seed=2,
                     progress=False)


@pytest.fixture(scope="module")
def linear_run():
    rng = np.random.default_rng(9)
    X = rng.standard_normal((1000, 2))
    y = 0.5 + X @ [1.0, -1.0] + rng.standard_normal(1000)
    return tc.sample(tc.LinearRegression(X, y, noise_sd=1.0), method="mala", chains=4, draws=2000,
                     warmup=500, seed=5, progress=False)


def test_odds_ratios_are_arviz_intervals_of_exp_draws(logistic_run):
    s = logistic_run.summary(warn=False, interval=0.8)
    assert s.ratio == "odds ratio"
    ratio = np.exp(logistic_run.draws)
    tree = az.from_dict({"posterior": {"b": ratio}}, dims={"b": ["coef"]})
    eti = az.eti(tree, prob=0.8)["b"]
    median = np.median(ratio.reshape(-1, 3), axis=0)
    # Quantiles of the same draws by linear interpolation in two libraries: a few ulps.
    assert_ulps_close(s.table["odds_ratio_lower_80"][1:], eti.sel(ci_bound="lower").values[1:], ulps=4)
    assert_ulps_close(s.table["odds_ratio_upper_80"][1:], eti.sel(ci_bound="upper").values[1:], ulps=4)
    assert_ulps_close(s.table["odds_ratio"][1:], median[1:], ulps=4)
    # exp(intercept) is the odds at x = 0, not a ratio: left out.
    assert np.isnan([s.table[k][0] for k in ("odds_ratio", "odds_ratio_lower_80",
                                             "odds_ratio_upper_80")]).all()


def test_poisson_has_rate_ratios_and_linear_none(linear_run):
    rng = np.random.default_rng(3)
    X = rng.standard_normal((500, 1))
    y = rng.poisson(np.exp(0.2 + 0.4 * X[:, 0])).astype(float)
    run = tc.sample(tc.PoissonRegression(X, y), chains=2, draws=300, warmup=300, seed=1,
                    progress=False)
    s = run.summary(warn=False)
    assert s.ratio == "rate ratio" and "rate_ratio_lower_90" in s.table
    assert_ulps_close(s.table["rate_ratio"][1], np.median(np.exp(run.draws[:, :, 1])), ulps=4)
    lin = linear_run.summary(warn=False)
    assert lin.ratio is None and not any("ratio" in k and "sd_ratio" not in k for k in lin.table)


def _ks_numpy(x, cdf):
    """sup |F_n - F| of a sample against a continuous CDF, from the sorted sample: the larger
    of max(i/n - F(x_(i))) and max(F(x_(i)) - (i-1)/n) (Kolmogorov 1933; from memory)."""
    x = np.sort(x)
    n = x.size
    F = cdf(x)
    i = np.arange(1, n + 1)
    return max(np.max(i / n - F), np.max(F - (i - 1) / n))


def test_laplace_columns_against_scipy_numpy_and_arviz(logistic_run):
    r = logistic_run
    s = r.summary(warn=False)
    flat = r.draws.reshape(-1, 3)
    sd_laplace = np.sqrt(np.diag(r.laplace_cov))
    for j in range(3):
        cdf = stats.norm(r.laplace_mode[j], sd_laplace[j]).cdf
        # The same sup over the same sorted points, found by scipy and by hand: the values
        # are one CDF evaluation minus i/n, so a few ulps of 1.
        assert_ulps_close(s.table["laplace_ks"][j], _ks_numpy(flat[:, j], cdf), ulps=4, scale=1.0)
        ess = min(float(az.ess(r.draws[:, :, j], method="quantile", prob=q))
                  for q in (0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 0.8, 0.9, 0.95))
        assert_ulps_close(s.table["ks_floor"][j], KS_CRITICAL / np.sqrt(ess), ulps=4)
    # The mean and sd in another summation order: a few ulps of the mean's size.
    sd = flat.std(axis=0, ddof=1)
    assert_ulps_close(s.table["laplace_shift"], (flat.mean(axis=0) - r.laplace_mode) / sd,
                      ulps=64, scale=np.abs(flat.mean(axis=0)) / sd)
    assert_ulps_close(s.table["laplace_sd_ratio"], sd_laplace / sd, ulps=8)


def _within_noise(table, threshold):
    return np.all(np.array(table["laplace_ks"]) / np.array(table["ks_floor"]) <= threshold)


def test_the_laplace_gap_is_within_noise_where_the_posterior_is_normal(linear_run):
    """A linear model with known noise sd has a normal posterior: the Laplace approximation
    is exact, and each KS distance lies below the Kolmogorov point of its level. Three
    coefficients at a family-wise 5%: scipy.stats.kstwobign.isf(0.05 / 3) = 1.09 floors
    (Bonferroni). Power: a logistic posterior on 30 rows is skewed (the same test fails),
    and so is a deliberately wrong normal approximation (sd 1.3x) on the linear run."""
    threshold = stats.kstwobign.isf(0.05 / 3) / KS_CRITICAL
    assert _within_noise(linear_run.summary(warn=False).table, threshold)
    wrong = dict(linear_run.__dict__, laplace_cov=1.69 * linear_run.laplace_cov)
    assert not _within_noise(tc.SampleResult(**wrong).summary(warn=False).table, threshold)
    X, y = _logistic(30, 1, slope=(2.5,), intercept=-1.5)
    small = tc.sample(tc.LogisticRegression(X, y), method="mala", chains=4, draws=2000,
                      warmup=500, seed=3, progress=False)
    assert not _within_noise(small.summary(warn=False).table,
                             stats.kstwobign.isf(0.05 / 2) / KS_CRITICAL)


def test_summary_and_result_print_as_tables(logistic_run):
    text = str(logistic_run.summary(warn=False))
    lines = text.splitlines()
    assert re.fullmatch(r"coefficient +mean +sd +90% interval +odds ratio +90% interval "
                        r"+ESS \(bulk\) +R-hat +Laplace KS/floor", lines[0])
    assert re.fullmatch(r"dose( +\S+){2} +\[ *\S+, +\S+\] +\S+ +\[ *\S+, +\S+\] +\d+ +\d\.\d{3} "
                        r"+\d+\.\d\d", lines[2])
    assert lines[4].startswith("odds ratio: exp(coefficient)")
    shown = repr(logistic_run)
    assert shown.splitlines()[0].startswith("penalty-mala: 4 chains x 1000 draws after 400 warmup")
    assert shown.splitlines()[1:] == lines and "array(" not in shown


def test_a_family_parameter_is_compared_with_its_laplace_marginal_on_the_log_scale(rng):
    """The noise sd is sampled, and approximated by Laplace, as log sigma; it is reported on
    its own scale. Its laplace_ks is scipy's KS of log(draws) against N(log mode, cov_jj) -
    equal to that of the draws against the log-normal, a monotone map - and its shift is in
    sds of log sigma. Power: comparing the sd's draws on their own scale with N(log mode,
    cov_jj) is beyond 3 noise floors."""
    from tallchain.mcmc._laplace_gap import laplace_gap

    X = rng.standard_normal((500, 2))
    y = 0.5 + X @ [1.0, -1.0] + 2.0 * rng.standard_normal(500)
    result = tc.sample(tc.LinearRegression(X, y), method="mala", chains=2, draws=1000,
                       warmup=300, seed=2)
    assert result.n_family_params == 1 and result.coef_names[-1] == "noise_sd"
    table = result.summary(warn=False).table
    flat = result.draws.reshape(-1, 4)
    log_mode, sd = np.log(result.laplace_mode[3]), np.sqrt(result.laplace_cov[3, 3])
    want = stats.kstest(np.log(flat[:, 3]), stats.norm(log_mode, sd).cdf).statistic
    assert table["laplace_ks"][3] == want      # the same scipy call on the same numbers
    assert table["laplace_ks"][3] < 1.5 * table["ks_floor"][3], table["laplace_ks"][3]
    wrong = laplace_gap(result.draws, result.laplace_mode, result.laplace_cov, n_log=0)
    assert wrong["laplace_ks"][3] > 3 * table["ks_floor"][3]
