"""`tallchain.find_mode`: the posterior mode and the Laplace precision there.

Against what: statsmodels maximum-likelihood fits (Logit; GLM Poisson with log link and an
offset; OLS) in the flat-prior limit (prior sd 1e6, so the mode is the MLE to about
prior_prec * posterior variance ~ 1e-12 relative). The Laplace precision is the negative
log-likelihood Hessian at the mode (plus the negligible prior precision), which is the inverse of
statsmodels' ``cov_params()`` (for OLS after rescaling from the estimated scale to noise_sd**2).
Stationarity and the precision are also checked against the gradient and Hessian of the log
posterior in plain NumPy (tests/numpy_glm.py), independent of the package's numba kernels.
Modes are compared in posterior-sd units, to within `numpy_glm.mode_sd_tolerance`: how closely
any minimiser of a log posterior known to its rounding can place the mode (about 1e-5 sd here;
the statsmodels fits, by Newton on the gradient to tol=1e-12, are far more precise).
"""

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from numpy_glm import log_posterior_grad_precision, mode_sd_tolerance
from scipy import special
from ulps import assert_ulps_close

import tallchain as tc

FLAT = tc.GaussianPrior(sd=1e6)
N = 500


def design(rng, p=3):
    return rng.normal(0.0, 0.8, size=(N, p))


def find_mode_counting_passes(model, **kwargs):
    """find_mode, and the number of full-data passes it made (log-likelihood-and-gradient and
    Hessian passes)."""
    calls = []
    real_grad, real_hess = model.log_likelihood_grad, model.log_likelihood_hessian
    model.log_likelihood_grad = lambda beta: calls.append(1) or real_grad(beta)
    model.log_likelihood_hessian = lambda beta: calls.append(1) or real_hess(beta)
    try:
        return tc.find_mode(model, **kwargs), len(calls)
    finally:
        del model.log_likelihood_grad, model.log_likelihood_hessian


def assert_stationary(lap, model):
    """The Newton step from the mode, cov @ grad, is within the mode's tolerance in sds."""
    grad, _, _ = log_posterior_grad_precision(model, lap.mode)
    sd = np.sqrt(np.diag(lap.cov))
    assert_allclose(lap.cov @ grad / sd, 0.0, rtol=0, atol=mode_sd_tolerance(model, lap.mode))


def check_against(model, params, cov):
    lap, passes = find_mode_counting_passes(model)
    sd = np.sqrt(np.diag(cov))
    assert_allclose((lap.mode - params) / sd, 0.0, rtol=0,
                    atol=mode_sd_tolerance(model, lap.mode))
    assert_stationary(lap, model)
    # statsmodels' cov_params() is the inverse Hessian at its own estimate, itself found to
    # ~1e-12 (Newton, tol=1e-12): the two precisions differ by the curvature's change over
    # the modes' distance (about 1e-5 sd), below 1e-6 relative.
    assert_allclose(lap.precision, np.linalg.inv(cov), rtol=1e-6,
                    atol=1e-8 * np.abs(lap.precision).max())
    assert_allclose(lap.cov, cov, rtol=1e-6, atol=1e-8 * np.abs(cov).max())
    # the cost counter: every gradient and Hessian pass, the logistic separation check's
    # Hessian at the prior mean included (LaplaceApproximation.n_evaluations)
    assert lap.n_evaluations == passes and passes > 2
    return lap


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_logistic_mode_matches_statsmodels_logit(rng, dtype):
    X = design(rng).astype(dtype)
    eta = 0.4 + X.astype(float) @ np.array([1.0, -0.5, 0.3])
    y = (rng.random(N) < special.expit(eta)).astype(float)
    # reference: statsmodels Logit (Newton MLE), same float64-widened design
    fit = sm.Logit(y, sm.add_constant(X.astype(float))).fit(disp=0, tol=1e-12, maxiter=100)
    check_against(tc.LogisticRegression(X, y, prior=FLAT), fit.params, fit.cov_params())


def test_poisson_mode_with_offset_matches_statsmodels_glm(rng):
    X = design(rng)
    offset = np.log(rng.uniform(0.5, 3.0, N))  # log exposure
    mu = np.exp(-0.2 + X @ np.array([0.5, -0.3, 0.2]) + offset)
    y = rng.poisson(mu).astype(float)
    # reference: statsmodels GLM, Poisson family (log link), with offset
    fit = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(), offset=offset).fit(
        tol=1e-12)
    check_against(tc.PoissonRegression(X, y, offset=offset, prior=FLAT), fit.params,
                  fit.cov_params())


def test_poisson_mode_without_intercept(rng):
    X = design(rng, p=2)
    y = rng.poisson(np.exp(X @ np.array([0.6, -0.4]))).astype(float)
    # reference: statsmodels GLM, Poisson family (log link), no constant
    fit = sm.GLM(y, X, family=sm.families.Poisson()).fit(tol=1e-12)
    check_against(tc.PoissonRegression(X, y, add_intercept=False, prior=FLAT), fit.params,
                  fit.cov_params())


def test_linear_mode_matches_statsmodels_ols(rng):
    X = design(rng)
    y = 1.5 + X @ np.array([2.0, 0.0, -1.0]) + 0.9 * rng.normal(size=N)
    # reference: statsmodels OLS; cov_params() = scale (Phi'Phi)^{-1}, rescaled to noise_sd**2
    fit = sm.OLS(y, sm.add_constant(X)).fit()
    noise_sd = 0.9
    model = tc.LinearRegression(X, y, noise_sd=noise_sd, prior=FLAT)
    lap = check_against(model, fit.params, fit.cov_params() / fit.scale * noise_sd**2)
    # and the exact posterior agrees (same flat prior)
    post = tc.conjugate_posterior(model)
    assert_allclose((lap.mode - post.mean) / post.sd, 0.0, rtol=0,
                    atol=mode_sd_tolerance(model, lap.mode))


def test_informative_prior_moves_the_mode_to_a_stationary_point(rng):
    X = design(rng)
    y = (rng.random(N) < special.expit(X @ np.array([1.0, -1.0, 0.5]))).astype(float)
    prior = tc.GaussianPrior(mean=[0.0, 3.0, 0.0, 0.0], sd=[1.0, 0.1, 1.0, 1.0])
    model = tc.LogisticRegression(X, y, prior=prior)
    lap = tc.find_mode(model)
    assert_stationary(lap, model)
    assert lap.mode[1] > 2.0  # pulled most of the way to the tight prior mean 3
    # Power check of the stationarity test: the mode of the same data under the flat prior is
    # many Newton-step tolerances away from a stationary point of this posterior.
    with pytest.raises(AssertionError, match="Not equal to tolerance"):
        assert_stationary(tc.find_mode(tc.LogisticRegression(X, y, prior=FLAT)), model)
    # The precision against the NumPy Hessian: sums of N terms in two orders (numba blocks,
    # BLAS), each within (N - 1)/2 ulps of the sum of |terms| whatever the order (Higham,
    # Accuracy and Stability of Numerical Algorithms, ch. 4; from memory), plus a few ulps per
    # term for exp in numba against scipy's expit: N + 8 ulps of the sum of |terms|.
    _, precision, size = log_posterior_grad_precision(model, lap.mode)
    assert_ulps_close(lap.precision, precision, ulps=N + 8, scale=size)


def test_too_few_iterations_raise_with_advice(rng):
    X = design(rng)
    y = (rng.random(N) < special.expit(X @ np.array([1.0, -1.0, 0.5]))).astype(float)
    with pytest.raises(tc.ModeNotFoundError,
                       match=r"still converging when it stopped after 2 iterations.*raise max_iter"):
        tc.find_mode(tc.LogisticRegression(X, y, prior=FLAT), max_iter=2)


def test_separated_logistic_data_with_flat_prior_raise():
    x = np.linspace(-1.0, 1.0, 50)[:, None]
    y = (x[:, 0] > 0).astype(float)  # perfectly separated: the MLE does not exist
    with pytest.raises(tc.ModeNotFoundError, match="separation"):
        tc.find_mode(tc.LogisticRegression(x, y, prior=tc.GaussianPrior(sd=1e8)))
    # Power check of the guard's other side: an informative prior makes the posterior proper,
    # and the same data then have a mode (no error).
    model = tc.LogisticRegression(x, y, prior=tc.GaussianPrior(sd=2.5))
    lap = tc.find_mode(model)
    assert_stationary(lap, model)
    assert abs(lap.mode[1]) < 25


def test_collinear_constant_column_is_not_mistaken_for_separation(rng):
    # A constant column beside the intercept carries no information along (1, -1); the prior
    # decides that direction and the mode exists.
    X = np.column_stack([rng.standard_normal(400), np.ones(400)])
    y = (rng.random(400) < 0.4).astype(float)
    model = tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=10.0))
    lap = tc.find_mode(model)
    assert_stationary(lap, model)


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_parallel_passes_give_the_serial_mode(rng, monkeypatch, family):
    # Three row blocks: the parallel passes differ from the serial ones in rounding only, which
    # Newton may turn into a different stop: each within the mode's tolerance, so the two within
    # twice that (2 x 3e-4 sd at 12,288 rows).
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
    assert_allclose((parallel.mode - serial.mode) / sd, 0.0, rtol=0,
                    atol=2 * mode_sd_tolerance(model, serial.mode))
    assert_allclose(parallel.precision, serial.precision, rtol=1e-6)


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_row_cache_reuses_newtons_last_passes_bitwise(family, rng):
    # The gradient and Hessian at the mode come from the same passes at the same point, so
    # the row cache built with them equals the one that repeats them, bit for bit; two passes
    # fewer.
    from tallchain.posterior import cache_passes, control_variate_cache

    X = design(rng)
    eta = 0.3 + X @ np.array([0.5, -0.4, 0.2])
    if family == "logistic":
        model = tc.LogisticRegression(X, (rng.random(len(eta)) < special.expit(eta)) * 1.0)
    else:
        model = tc.PoissonRegression(X, rng.poisson(np.exp(eta)).astype(float))
    lap = tc.find_mode(model)
    assert lap.loglik_derivatives is not None
    reused = control_variate_cache(model, lap.mode, 2, lap.loglik_derivatives)
    fresh = control_variate_cache(model, lap.mode, 2)
    np.testing.assert_array_equal(reused.g_star, fresh.g_star)
    np.testing.assert_array_equal(reused.H_star, fresh.H_star)
    assert cache_passes(2, lap.loglik_derivatives) == 1 and cache_passes(2, None) == 3


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_subsample_start_reaches_the_statsmodels_mode(family, rng, monkeypatch):
    # Tall data in miniature: a 2,000-row subsample of 20,000 rows starts Newton. The mode is
    # statsmodels' maximum-likelihood fit (flat prior), to the rounding floor of the sums.
    from tallchain.posterior import _start

    monkeypatch.setattr(_start, "SUBSAMPLE_ROWS", 2000)
    n = 20_000
    X = rng.normal(0.0, 0.8, size=(n, 3))
    eta = 0.3 + X @ np.array([1.5, -1.0, 0.7])
    if family == "logistic":
        y = (rng.random(n) < special.expit(eta)).astype(float)
        model = tc.LogisticRegression(X, y, prior=FLAT)
        fit = sm.Logit(y, sm.add_constant(X)).fit(disp=0, tol=1e-12, maxiter=100)
    else:
        y = rng.poisson(np.exp(eta)).astype(float)
        model = tc.PoissonRegression(X, y, prior=FLAT)
        fit = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson()).fit(tol=1e-12)
    calls = []
    real = _start.subsample_start
    monkeypatch.setattr("tallchain.posterior._mode.subsample_start",
                        lambda *a: calls.append(1) or real(*a))
    lap = tc.find_mode(model)
    assert calls and "Newton converged" in lap.message
    sd = np.sqrt(np.diag(lap.cov))
    assert_allclose((lap.mode - fit.params) / sd, 0.0, rtol=0,
                    atol=mode_sd_tolerance(model, lap.mode))
    # from the prior mean the same Newton needs more full-data passes than from the start
    # (whose own passes count as ceil(passes * 2,000 / 20,000) = 1 or 2)
    monkeypatch.setattr(_start, "SUBSAMPLE_ROWS", n)      # too few rows: no subsample
    plain = tc.find_mode(model)
    assert lap.n_evaluations < plain.n_evaluations, (lap.message, plain.message)
