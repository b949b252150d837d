"""`tallchain.find_mode`: the posterior mode and the Laplace precision there.

Against what: statsmodels maximum-likelihood fits (Logit; GLM Poisson with log link and an
offset; OLS) in the flat-prior limit (prior sd 1e6, so the mode is the MLE to about
prior_prec * posterior variance ~ 1e-12 relative). The Laplace precision is the negative
log-likelihood Hessian at the mode (plus the negligible prior precision), which is the inverse of
statsmodels' ``cov_params()`` (for OLS after rescaling from the estimated scale to noise_sd**2).
"""

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import special

import tallchain as tc

FLAT = tc.GaussianPrior(sd=1e6)
N = 500


@pytest.fixture
def rng():
    return np.random.default_rng(2718)


def design(rng, p=3):
    return rng.normal(0.0, 0.8, size=(N, p))


def check_against(lap, params, cov):
    sd = np.sqrt(np.diag(cov))
    assert_allclose((lap.mode - params) / sd, 0.0, rtol=0, atol=1e-6)
    assert_allclose(lap.precision, np.linalg.inv(cov), rtol=1e-6,
                    atol=1e-8 * np.abs(lap.precision).max())
    assert_allclose(lap.cov, cov, rtol=1e-6, atol=1e-8 * np.abs(cov).max())
    assert lap.converged and lap.n_evaluations > 1


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_logistic_mode_matches_statsmodels_logit(rng, dtype):
    X = design(rng).astype(dtype)
    eta = 0.4 + X.astype(float) @ np.array([1.0, -0.5, 0.3])
    y = (rng.random(N) < special.expit(eta)).astype(float)
    lap = tc.find_mode(tc.LogisticRegression(X, y, prior=FLAT))
    # reference: statsmodels Logit (Newton MLE), same float64-widened design
    fit = sm.Logit(y, sm.add_constant(X.astype(float))).fit(disp=0, tol=1e-12, maxiter=100)
    check_against(lap, fit.params, fit.cov_params())


def test_poisson_mode_with_offset_matches_statsmodels_glm(rng):
    X = design(rng)
    offset = np.log(rng.uniform(0.5, 3.0, N))  # log exposure
    mu = np.exp(-0.2 + X @ np.array([0.5, -0.3, 0.2]) + offset)
    y = rng.poisson(mu).astype(float)
    lap = tc.find_mode(tc.PoissonRegression(X, y, offset=offset, prior=FLAT))
    # reference: statsmodels GLM, Poisson family (log link), with offset
    fit = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(), offset=offset).fit(
        tol=1e-12)
    check_against(lap, fit.params, fit.cov_params())


def test_poisson_mode_without_intercept(rng):
    X = design(rng, p=2)
    y = rng.poisson(np.exp(X @ np.array([0.6, -0.4]))).astype(float)
    lap = tc.find_mode(tc.PoissonRegression(X, y, add_intercept=False, prior=FLAT))
    # reference: statsmodels GLM, Poisson family (log link), no constant
    fit = sm.GLM(y, X, family=sm.families.Poisson()).fit(tol=1e-12)
    check_against(lap, fit.params, fit.cov_params())


def test_linear_mode_matches_statsmodels_ols(rng):
    X = design(rng)
    y = 1.5 + X @ np.array([2.0, 0.0, -1.0]) + 0.9 * rng.normal(size=N)
    # reference: statsmodels OLS; cov_params() = scale (Phi'Phi)^{-1}, rescaled to noise_sd**2
    fit = sm.OLS(y, sm.add_constant(X)).fit()
    noise_sd = 0.9
    lap = tc.find_mode(tc.LinearRegression(X, y, noise_sd=noise_sd, prior=FLAT))
    check_against(lap, fit.params, fit.cov_params() / fit.scale * noise_sd**2)
    # and the exact posterior agrees (same flat prior)
    post = tc.conjugate_posterior(tc.LinearRegression(X, y, noise_sd=noise_sd, prior=FLAT))
    assert_allclose((lap.mode - post.mean) / post.sd, 0.0, rtol=0, atol=1e-6)


def test_informative_prior_moves_the_mode_to_a_stationary_point(rng):
    X = design(rng)
    y = (rng.random(N) < special.expit(X @ np.array([1.0, -1.0, 0.5]))).astype(float)
    prior = tc.GaussianPrior(mean=[0.0, 3.0, 0.0, 0.0], sd=[1.0, 0.1, 1.0, 1.0])
    model = tc.LogisticRegression(X, y, prior=prior)
    lap = tc.find_mode(model)
    _, g = model.log_likelihood_grad(lap.mode)
    grad_post = g - model.prior_prec @ (lap.mode - model.prior_mean)
    assert_allclose(grad_post, 0.0, rtol=0, atol=1e-6)
    assert lap.mode[1] > 2.0  # pulled most of the way to the tight prior mean 3
    assert_allclose(lap.precision, -model.log_likelihood_hessian(lap.mode) + model.prior_prec,
                    rtol=1e-12)


def test_too_few_iterations_raise_with_advice(rng):
    X = design(rng)
    y = (rng.random(N) < special.expit(X @ np.array([1.0, -1.0, 0.5]))).astype(float)
    with pytest.raises(tc.ModeNotFoundError,
                       match=r"L-BFGS stopped after \d+ iterations .*check the data for separation"):
        tc.find_mode(tc.LogisticRegression(X, y, prior=FLAT), max_iter=2)


def test_separated_logistic_data_with_flat_prior_raise():
    x = np.linspace(-1.0, 1.0, 50)[:, None]
    y = (x[:, 0] > 0).astype(float)  # perfectly separated: the MLE does not exist
    with pytest.raises(tc.ModeNotFoundError, match="separation"):
        tc.find_mode(tc.LogisticRegression(x, y, prior=tc.GaussianPrior(sd=1e8)))
    # Power check of the guard's other side: an informative prior makes the posterior proper,
    # and the same data then have a mode (no error).
    lap = tc.find_mode(tc.LogisticRegression(x, y, prior=tc.GaussianPrior(sd=2.5)))
    assert np.all(np.isfinite(lap.mode)) and abs(lap.mode[1]) < 25


def test_collinear_constant_column_is_not_mistaken_for_separation():
    # A constant column beside the intercept carries no information along (1, -1); the prior
    # decides that direction and the mode exists.
    rng = np.random.default_rng(4)
    X = np.column_stack([rng.standard_normal(400), np.ones(400)])
    y = (rng.random(400) < 0.4).astype(float)
    lap = tc.find_mode(tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=10.0)))
    assert np.all(np.isfinite(lap.mode))


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_parallel_passes_give_the_serial_mode(rng, monkeypatch, family):
    # Three row blocks: the parallel passes differ from the serial ones in rounding only, which
    # L-BFGS may turn into a different stop within its tolerance.
    from tallchain.models import _passes as _full_passes
    from tallchain.models._kernels import BLOCK_ROWS

    n = 3 * BLOCK_ROWS
    X = rng.normal(0.0, 0.8, size=(n, 3))
    eta = 0.4 + X @ np.array([1.0, -0.5, 0.3])
    if family == "logistic":
        model = tc.LogisticRegression(X, (rng.random(n) < special.expit(eta)).astype(float))
    else:
        model = tc.PoissonRegression(X, rng.poisson(np.exp(eta)).astype(float))
    laps = []
    for threshold in (n + 1, n):
        monkeypatch.setattr(_full_passes, "PARALLEL_MIN_ROWS", threshold)
        laps.append(tc.find_mode(model))
    serial, parallel = laps
    sd = np.sqrt(np.diag(serial.cov))
    assert_allclose((parallel.mode - serial.mode) / sd, 0.0, rtol=0, atol=1e-6)
    assert_allclose(parallel.precision, serial.precision, rtol=1e-6)
