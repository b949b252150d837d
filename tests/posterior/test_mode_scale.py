"""`tallchain.find_mode` on raw-scale columns: an income in dollars (~6e4) beside a share in
[0, 1] and a standard-normal column, without standardisation.

Against what: statsmodels maximum-likelihood fits on the same raw design (Logit; GLM Poisson with
log link and an offset; OLS), in the flat-prior limit (prior sd 1e6: the prior's pull on the
income coefficient, ~1e-5, is a few 1e-12 of its posterior variance's inverse). Modes are
compared in posterior-sd units to within `numpy_glm.mode_sd_tolerance` (how closely any
minimiser can place the mode), precisions after scaling to unit diagonal (the raw precision
spans 1e-1..1e15, so an absolute tolerance would hide the small entries).
Power: scipy's L-BFGS-B on the same log posterior and gradient (what find_mode used before)
misses the same reference by orders of magnitude more than the tolerance (on these data; on
other draws of the same design L-BFGS can converge, so this is a check of the test, not a
claim that L-BFGS always fails).
"""

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from numpy_glm import log_posterior_grad_precision, mode_sd_tolerance
from scipy import optimize, special

import tallchain as tc

FLAT = tc.GaussianPrior(sd=1e6)
N = 2000
NAMES = ["income", "share", "z"]
# Most full-data passes a fit below may take (measured with the suite's seed: logistic 11,
# Poisson 18, its first steps halved by the line search where exp overflows).
MAX_PASSES = 25


def raw_design(rng, n=N):
    income = rng.lognormal(np.log(6e4), 0.5, n)   # dollars
    return np.column_stack([income, rng.random(n), rng.standard_normal(n)])


def logistic_data(rng):
    X = raw_design(rng)
    eta = -1.0 + 1.5e-5 * X[:, 0] - 0.8 * X[:, 1] + 0.3 * X[:, 2]
    return X, (rng.random(N) < special.expit(eta)).astype(float)


def assert_matches(mode, precision, params, cov, model):
    """Mode within the minimiser's tolerance in posterior sds; precision to 1e-6 after scaling
    both to the reference's posterior sds."""
    sd = np.sqrt(np.diag(cov))
    assert_allclose((mode - params) / sd, 0.0, rtol=0, atol=mode_sd_tolerance(model, mode))
    scaled = precision * sd[:, None] * sd[None, :]
    assert_allclose(scaled, np.linalg.inv(cov) * sd[:, None] * sd[None, :], rtol=0, atol=1e-6)


def lbfgs_mode(model):
    """The mode by scipy L-BFGS-B on the same objective (the method find_mode replaced)."""
    def neg(beta):
        ll, g = model.log_likelihood_grad(beta)
        r = beta - model.prior_mean
        val = -(ll - 0.5 * r @ model.prior_prec @ r)
        return (val, -(g - model.prior_prec @ r)) if np.isfinite(val) else (np.inf, 0 * beta)
    return optimize.minimize(neg, model.prior_mean.copy(), jac=True, method="L-BFGS-B",
                             options={"maxiter": 1000, "ftol": 0.0, "gtol": 1e-9}).x


def test_raw_scale_logistic_matches_statsmodels_logit(rng):
    X, y = logistic_data(rng)
    # reference: statsmodels Logit (Newton MLE) on the raw design
    fit = sm.Logit(y, sm.add_constant(X)).fit(disp=0, tol=1e-12, maxiter=100)
    model = tc.LogisticRegression(X, y, prior=FLAT, coef_names=NAMES)
    lap = tc.find_mode(model)
    assert_matches(lap.mode, lap.precision, fit.params, fit.cov_params(), model)
    assert 3 <= lap.n_evaluations <= MAX_PASSES
    grad, _, _ = log_posterior_grad_precision(model, lap.mode)   # stationary in NumPy too
    assert_allclose(lap.cov @ grad / np.sqrt(np.diag(lap.cov)), 0.0, rtol=0,
                    atol=mode_sd_tolerance(model, lap.mode))
    # Power: L-BFGS on the same objective stalls far from the same reference.
    with pytest.raises(AssertionError, match="Not equal to tolerance"):
        assert_matches(lbfgs_mode(model), lap.precision, fit.params, fit.cov_params(), model)


def test_raw_scale_poisson_with_offset_matches_statsmodels_glm(rng):
    X = raw_design(rng)
    offset = np.log(rng.uniform(0.5, 3.0, N))
    mu = np.exp(-0.5 + 2e-5 * X[:, 0] + 0.4 * X[:, 1] - 0.2 * X[:, 2] + offset)
    y = rng.poisson(mu).astype(float)
    # reference: statsmodels GLM, Poisson family (log link, IRLS), with offset, raw design
    fit = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(), offset=offset).fit(
        tol=1e-12)
    model = tc.PoissonRegression(X, y, offset=offset, prior=FLAT, coef_names=NAMES)
    lap = tc.find_mode(model)
    assert_matches(lap.mode, lap.precision, fit.params, fit.cov_params(), model)
    assert 3 <= lap.n_evaluations <= MAX_PASSES


def test_raw_scale_linear_matches_statsmodels_ols(rng):
    X = raw_design(rng)
    y = 2.0 + 3e-5 * X[:, 0] - 1.0 * X[:, 1] + 0.5 * X[:, 2] + 0.7 * rng.standard_normal(N)
    # reference: statsmodels OLS; cov_params() rescaled from its estimated scale to noise_sd**2
    fit = sm.OLS(y, sm.add_constant(X)).fit()
    model = tc.LinearRegression(X, y, noise_sd=0.7, prior=FLAT, coef_names=NAMES)
    lap = tc.find_mode(model)
    assert_matches(lap.mode, lap.precision, fit.params, fit.cov_params() / fit.scale * 0.49,
                   model)
    # The log posterior is quadratic: one Newton step lands on the mode (4 passes: gradient and
    # Hessian at the start and at the step).
    assert lap.n_evaluations == 4


def test_iterations_do_not_depend_on_column_scale(rng):
    # Newton's iterates are invariant under rescaling a column (in exact arithmetic): income in
    # dollars and in tens of thousands of dollars take the same iterations, and the modes
    # agree after the change of units.
    X, y = logistic_data(rng)
    Xk = X.copy()
    Xk[:, 0] /= 1e4
    raw = tc.find_mode(tc.LogisticRegression(X, y, prior=FLAT))
    scaled = tc.find_mode(tc.LogisticRegression(Xk, y, prior=FLAT))
    assert raw.message.split(" (")[0] == scaled.message.split(" (")[0]
    assert raw.n_evaluations == scaled.n_evaluations
    sd = np.sqrt(np.diag(scaled.cov))
    units = np.array([1.0, 1e4, 1.0, 1.0])
    assert_allclose((raw.mode * units - scaled.mode) / sd, 0.0, rtol=0, atol=1e-6)


def test_overflow_on_a_raw_scale_column_names_the_column(rng):
    X = raw_design(rng, 200)
    y = rng.poisson(2.0, 200).astype(float)
    model = tc.PoissonRegression(X, y, coef_names=NAMES)
    # exp(0.02 * 6e4) overflows at the start: the column's scale is the cause, and it is named
    with pytest.raises(tc.ModeNotFoundError,
                       match=r"not finite at the starting point.*column 'income' reaches .*"
                             r"rescale it.*standardize = true"):
        tc.find_mode(model, start=[0.0, 0.02, 0.0, 0.0])
    # Power of the attribution: on standardised columns the same overflow (from an intercept
    # of 800) blames the coefficients, not a column.
    Z = (X - X.mean(axis=0)) / X.std(axis=0)
    with pytest.raises(tc.ModeNotFoundError, match=r"not finite at the starting point "
                                                   r"\(coefficients \[800"):
        tc.find_mode(tc.PoissonRegression(Z, y), start=[800.0, 0.0, 0.0, 0.0])
    # From the prior mean the damped steps never overflow: the same raw data fit.
    assert np.isfinite(tc.find_mode(model).mode).all()
