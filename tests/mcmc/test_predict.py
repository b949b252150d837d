"""Predictions for new rows (`SampleResult.predict`) against closed forms outside the project.

Linear regression with known noise sd: the posterior of beta is N(m_N, S_N) (Bishop, Pattern
Recognition and Machine Learning 2006, eqs. 3.53-3.54), so the mean response x . beta is
N(m_N . x, x' S_N x) and a new observation is N(m_N . x, sigma^2 + x' S_N x) (eqs. 3.58-3.59).
Intervals from draws are compared with those normal quantiles (scipy.stats.norm) within their
Monte Carlo error (the quantile's MCSE, ArviZ), and the coverage of new observations is
checked by simulation with a binomial tolerance. Every check has a power check: a wrong
variant (no parameter uncertainty; no noise term) fails the same test.
"""

import numpy as np
import pytest
from scipy import special, stats

import tallchain as tc
from ulps import assert_ulps_close

NOISE_SD = 2.0
PRIOR_SD = 10.0
Z_MAX = 4.0   # 25 checks (5 rows x 5 columns) at 4 MCSE: family-wise false alarm < 0.2%


@pytest.fixture(scope="module")
def linear_run():
    rng = np.random.default_rng(20_261_203)
    n, beta = 400, np.array([0.5, 1.0, -0.7])
    X = rng.standard_normal((n, 2))
    y = beta[0] + X @ beta[1:] + NOISE_SD * rng.standard_normal(n)
    model = tc.LinearRegression(X, y, noise_sd=NOISE_SD, prior=tc.GaussianPrior(sd=PRIOR_SD))
    result = tc.sample(model, method="penalty-mala", chains=4, draws=2000, warmup=500, seed=7,
                       progress=False)
    # Bishop (2006) eqs. 3.53-3.54 with S_0 = PRIOR_SD^2 I, m_0 = 0, noise precision 1/sigma^2.
    Phi = np.column_stack([np.ones(n), X])
    S_N = np.linalg.inv(np.eye(3) / PRIOR_SD**2 + Phi.T @ Phi / NOISE_SD**2)
    m_N = S_N @ (Phi.T @ y) / NOISE_SD**2
    return result, m_N, S_N


def _exact(m_N, S_N, X_new, interval, noise):
    """Bishop (2006) eqs. 3.58-3.59: mean m_N . x, variance noise^2 + x' S_N x."""
    Phi = np.column_stack([np.ones(len(X_new)), X_new])
    mean = Phi @ m_N
    sd = np.sqrt(noise**2 + np.einsum("ij,jk,ik->i", Phi, S_N, Phi))
    z = stats.norm.ppf(0.5 + interval / 2)
    return mean, mean - z * sd, mean + z * sd, sd


def _quantile_mcse(draws, prob, sd):
    """MCSE of an estimated quantile of a normal with sd ``sd``: sqrt(p (1-p) / ESS) / phi(z_p)
    (the asymptotic variance of a sample quantile), with the quantile ESS from ArviZ."""
    import arviz as az

    ess = float(az.ess(draws, method="quantile", prob=prob))
    return np.sqrt(prob * (1 - prob) / ess) / stats.norm.pdf(stats.norm.ppf(prob)) * sd


def _worst_error(pred, result, m_N, S_N, X_new, interval):
    """Largest |predicted - exact| over rows and columns, in Monte Carlo standard errors."""
    import arviz as az

    tail = (1 - interval) / 2
    mean, lo, hi, sd_mu = _exact(m_N, S_N, X_new, interval, 0.0)
    _, plo, phi, sd_y = _exact(m_N, S_N, X_new, interval, NOISE_SD)
    worst = 0.0
    for i, x in enumerate(X_new):
        eta = result.draws[:, :, 0] + result.draws[:, :, 1:] @ x   # (chain, draw)
        se_mean = float(az.mcse(eta, method="mean"))
        se_lo = _quantile_mcse(eta, tail, sd_mu[i])
        # The new observation adds independent noise, which only lowers the autocorrelation of
        # the indicators: the eta's quantile ESS is a lower bound, used as the ESS.
        se_plo = _quantile_mcse(eta, tail, sd_y[i])
        errors = [(pred["mean"][i] - mean[i]) / se_mean,
                  (pred["lower_90"][i] - lo[i]) / se_lo, (pred["upper_90"][i] - hi[i]) / se_lo,
                  (pred["predictive_lower_90"][i] - plo[i]) / se_plo,
                  (pred["predictive_upper_90"][i] - phi[i]) / se_plo]
        worst = max(worst, *np.abs(errors))
    return worst


def test_linear_intervals_match_the_exact_normal_intervals(linear_run):
    result, m_N, S_N = linear_run
    X_new = np.array([[0.0, 0.0], [1.0, -1.0], [2.5, 0.3], [-1.5, 2.0], [0.2, 3.0]])
    pred = result.predict(X_new, interval=0.9)
    assert _worst_error(pred, result, m_N, S_N, X_new, 0.9) < Z_MAX
    # Power: a plug-in prediction (every draw replaced by the posterior mean: no parameter
    # uncertainty) makes the mean-response interval a point and fails the same test.
    plug_in = dict(pred)
    plug_in["lower_90"] = plug_in["upper_90"] = pred["mean"]
    assert _worst_error(plug_in, result, m_N, S_N, X_new, 0.9) > Z_MAX
    # Power: the new-observation interval without the noise term fails it too.
    no_noise = dict(pred, predictive_lower_90=pred["lower_90"],
                    predictive_upper_90=pred["upper_90"])
    assert _worst_error(no_noise, result, m_N, S_N, X_new, 0.9) > Z_MAX


def test_new_observations_are_covered_at_the_stated_rate(linear_run):
    """y_new drawn from the exact posterior predictive (beta_j ~ N(m_N, S_N) for each new row,
    then noise) falls in its interval with probability `interval` exactly, independently
    across rows: the count is binomial. The intervals' own Monte Carlo error shifts the rate
    by about sqrt(2 p (1-p) / ESS) (both ends, p the tail), added to the binomial variance."""
    import arviz as az

    result, m_N, S_N = linear_run
    rng = np.random.default_rng(11)
    n_new, interval = 2000, 0.9
    X_new = rng.uniform(-3, 3, size=(n_new, 2))
    beta = stats.multivariate_normal(m_N, S_N).rvs(n_new, random_state=rng)
    y_new = beta[:, 0] + np.einsum("ij,ij->i", X_new, beta[:, 1:]) + NOISE_SD * rng.standard_normal(n_new)
    pred = result.predict(X_new, interval=interval)
    ess = float(np.min(az.ess(result.draws.transpose(2, 0, 1)[1], method="quantile", prob=0.05)))
    se = np.sqrt(interval * (1 - interval) / n_new + 2 * 0.05 * 0.95 / ess)
    inside = (pred["predictive_lower_90"] <= y_new) & (y_new <= pred["predictive_upper_90"])
    assert abs(inside.mean() - interval) < 4 * se, (inside.mean(), se)
    # Power: the interval of the mean response (no noise term) under-covers new observations.
    narrow = (pred["lower_90"] <= y_new) & (y_new <= pred["upper_90"])
    assert abs(narrow.mean() - interval) > 4 * se, (narrow.mean(), se)


def test_blocks_of_any_size_give_the_same_predictions(linear_run):
    """Blocks consume the generator row by row, and each row's arithmetic is the same: the
    values agree to the last bits (a matrix product over another block shape may round
    differently: 4 ulps of the largest |value| in a column)."""
    result = linear_run[0]
    X_new = np.random.default_rng(3).standard_normal((7, 2))
    whole = result.predict(X_new)
    split = result.predict(X_new, chunk_rows=2)
    for key in whole:
        assert_ulps_close(split[key], whole[key], ulps=4, scale=np.max(np.abs(whole[key])))


def _small_run(family, rng, **extra):
    X = rng.standard_normal((300, 2))
    eta = 0.2 + X @ [0.6, -0.4]
    y = (rng.random(300) < special.expit(eta)).astype(float) if family is tc.LogisticRegression \
        else rng.poisson(np.exp(eta)).astype(float)
    model = family(X, y, **extra)
    return tc.sample(model, chains=2, draws=400, warmup=300, seed=5, progress=False)


def test_logistic_mean_response_is_the_mean_of_expit_over_the_draws(rng):
    """The mean response of logistic regression is 1 / (1 + exp(-eta)) (from memory; the
    logit link's inverse); computed here with numpy on the draws. The mean over S draws in
    another summation order: within 8 ulps. New observations are 0 or 1."""
    result = _small_run(tc.LogisticRegression, rng)
    X_new = rng.standard_normal((6, 2))
    coef = result.draws.reshape(-1, 3)
    mu = 1.0 / (1.0 + np.exp(-(coef[:, 0][None, :] + X_new @ coef[:, 1:].T)))
    pred = result.predict(X_new)
    assert_ulps_close(pred["mean"], mu.mean(axis=1), ulps=8)
    assert set(np.unique(np.r_[pred["predictive_lower_90"], pred["predictive_upper_90"]])) <= {0.0, 1.0}


def test_poisson_predictive_interval_against_the_mixture_cdf(rng):
    """The posterior predictive of a Poisson count is the mixture of Poisson(exp(eta_s)) over
    the draws; its CDF F(k) = mean_s scipy.stats.poisson.cdf(k, mu_s). The sample quantile at
    p of S simulated counts is the smallest k with empirical CDF >= p, so F(lower - 1) <= p
    and F(lower) >= p, each within 4 binomial standard errors sqrt(p (1-p) / S) (the counts
    are drawn independently given the draws). Power: the mean-response interval fails."""
    result = _small_run(tc.PoissonRegression, rng)
    X_new = rng.standard_normal((5, 2))
    coef = result.draws.reshape(-1, 3)
    mu = np.exp(coef[:, 0][None, :] + X_new @ coef[:, 1:].T)
    pred = result.predict(X_new, interval=0.8)
    se = np.sqrt(0.1 * 0.9 / coef.shape[0])

    def consistent(lower, upper):
        ok = True
        for i in range(len(X_new)):
            F = lambda k: stats.poisson.cdf(k, mu[i]).mean()   # noqa: E731
            ok &= F(lower[i] - 1) <= 0.1 + 4 * se and F(lower[i]) >= 0.1 - 4 * se
            ok &= F(upper[i] - 1) <= 0.9 + 4 * se and F(upper[i]) >= 0.9 - 4 * se
        return ok

    assert consistent(pred["predictive_lower_80"], pred["predictive_upper_80"])
    assert not consistent(pred["lower_80"], pred["upper_80"])


@pytest.mark.parametrize("new_X, message", [
    (np.zeros((3, 3)), "new_X: has shape (3, 3), but the run has 2 columns"),
    ({"x0": [1.0], "z": [2.0]}, "new_X: has no column 'x1'"),
    ({"x0": [1.0], "x1": [np.nan]}, "new_X: contains nan in row 0, column 1"),
    ({"x0": [1.0], "x1": ["north"]}, "new_X: column 'x1' is not numeric"),
])
def test_bad_new_rows_are_refused_in_one_line(new_X, message, rng):
    result = _small_run(tc.LogisticRegression, rng)
    with pytest.raises(tc.InputError, match=None) as err:
        result.predict(new_X)
    assert str(err.value).startswith(message) and "\n" not in str(err.value)


def test_named_columns_are_taken_by_name(rng):
    """A table's columns are matched by name, whatever their order (pandas DataFrame)."""
    import pandas as pd

    result = _small_run(tc.LogisticRegression, rng)
    X_new = rng.standard_normal((4, 2))
    by_position = result.predict(X_new)
    by_name = result.predict(pd.DataFrame({"x1": X_new[:, 1], "x0": X_new[:, 0]}))
    for key in by_position:   # the same code on the same numbers: bitwise
        np.testing.assert_array_equal(by_name[key], by_position[key])


def test_parameters_beyond_the_coefficients_reach_the_response():
    """Draws may carry a family's further parameters after the coefficients (a noise sd, a
    dispersion): they stay out of the linear predictor and reach ``Response.draw``. A normal
    response whose sd is that column (3 in every draw), at eta = 0.5 + 1.0 x 2: the 90%
    bounds 2.5 +- 1.645 x 3 (scipy.stats.norm) within 4 standard errors of a sample quantile,
    sqrt(p (1-p) / S) / phi(z) x 3. Power: the response of the known-sd family (sd 1)
    fails."""
    from tallchain.mcmc._predict import predict_block
    from tallchain.models import NormalResponse

    S = 20_000
    coef = np.column_stack([np.full(S, 0.5), np.full(S, 1.0), np.full(S, 3.0)])
    z = stats.norm.ppf(0.95)
    se = np.sqrt(0.05 * 0.95 / S) / stats.norm.pdf(z) * 3.0

    def bounds(response):
        out = predict_block(coef, np.array([[2.0]]), None, intercept=True, response=response,
                            interval=0.9, rng=np.random.default_rng(4))
        assert out["mean"][0] == 2.5   # the extra column is not a coefficient
        return out["predictive_lower_90"][0], out["predictive_upper_90"][0]

    lo, hi = bounds(NormalResponse(None))    # the linear family with a sampled noise sd
    assert abs(lo - (2.5 - 3 * z)) < 4 * se and abs(hi - (2.5 + 3 * z)) < 4 * se
    lo, hi = bounds(NormalResponse(1.0))
    assert not (abs(lo - (2.5 - 3 * z)) < 4 * se and abs(hi - (2.5 + 3 * z)) < 4 * se)


def test_negative_binomial_new_observations_follow_nb2():
    """NegativeBinomialResponse draws y given eta and each draw's dispersion alpha: NB2 with
    mean mu and variance mu + alpha mu^2, scipy.stats.nbinom(n = 1/alpha, p = 1/(1 + alpha
    mu)) (Cameron & Trivedi 2013). Chi-square of 20,000 draws against its pmf (counts above
    the 99.9% point pooled), at level 0.001. Power: Poisson draws of the same mean fail."""
    from tallchain.models import NegativeBinomialResponse, PoissonResponse

    mu, alpha, S = 4.0, 0.5, 20_000
    eta = np.full((1, S), np.log(mu))
    extra = np.full((S, 1), alpha)
    ref = stats.nbinom(1 / alpha, 1 / (1 + alpha * mu))
    top = int(ref.ppf(0.999))
    expected = np.append(ref.pmf(np.arange(top)), ref.sf(top - 1)) * S

    def pvalue(y):
        counts = np.bincount(np.minimum(y.astype(int).ravel(), top), minlength=top + 1)
        return stats.chisquare(counts, expected).pvalue

    y = NegativeBinomialResponse().draw(eta, np.random.default_rng(3), extra)
    assert pvalue(y) > 1e-3
    assert pvalue(PoissonResponse().draw(eta, np.random.default_rng(3), extra)) < 1e-3


def test_binomial_new_observations_are_refused_in_one_line():
    from tallchain.models import BinomialResponse

    with pytest.raises(tc.InputError, match=r"^predict: new binomial observations need each "
                       r"new row's trials"):
        BinomialResponse().draw(np.zeros((2, 3)), np.random.default_rng(0))


def test_a_sampled_noise_sd_widens_new_observation_intervals_to_the_stated_rate():
    """Linear regression without a known noise sd: each draw's own sd (sampled, reported as
    noise_sd) enters the new observations. 2,000 data rows fix beta and sigma to within about
    2% of sigma, so new observations drawn from the true model (sigma = 2) are covered at
    the stated 0.9 up to that (a shift below 0.005) and binomial error over 2,000 new rows
    (sd 0.0067): 4 binomial sds. Power: the same draws predicted with the noise sd fixed at
    1 (half the true one) under-cover."""
    import dataclasses

    rng = np.random.default_rng(20_261_203)
    X = rng.standard_normal((2000, 2))
    beta, sigma = np.array([0.5, 1.0, -1.0]), 2.0
    y = beta[0] + X @ beta[1:] + sigma * rng.standard_normal(2000)
    result = tc.sample(tc.LinearRegression(X, y), method="mala", chains=2, draws=1000,
                       warmup=300, seed=4)
    assert result.coef_names[-1] == "noise_sd"
    X_new = rng.standard_normal((2000, 2))
    y_new = beta[0] + X_new @ beta[1:] + sigma * rng.standard_normal(2000)
    se = np.sqrt(0.9 * 0.1 / 2000)

    def coverage(res):
        pred = res.predict(X_new, interval=0.9, seed=1)
        return np.mean((pred["predictive_lower_90"] <= y_new) & (y_new <= pred["predictive_upper_90"]))

    assert abs(coverage(result) - 0.9) < 4 * se
    draws = result.draws.copy()
    draws[..., -1] = 1.0
    assert coverage(dataclasses.replace(result, draws=draws)) < 0.9 - 4 * se
