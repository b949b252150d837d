"""`BinomialRegression`: successes out of trials, against the same data expanded to 0/1 rows.

Against what:
* the log-likelihood against scipy.stats.binom.logpmf, and its gradient and Hessian against
  logistic regression on the expanded rows (m_i rows per group, y_i of them ones: the same
  likelihood up to the binomial coefficients);
* the mode and standard errors against statsmodels' GLM Binomial fit on (successes,
  failures), in the flat-prior limit;
* the draws of penalty-mala and mala against an importance-sampling reference whose density is
  the expanded-rows logistic log-likelihood in NumPy (scipy.special.expit), by the weighted
  two-sample KS distance beside its floor, tolerance 1.5. Power: the same successes with the
  trials doubled (a wrong trials column) fail the same test.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from ks_runs import importance_reference, run_and_check
from numpy.testing import assert_allclose
from scipy import special, stats

import tallchain as tc

FLAT = tc.GaussianPrior(sd=1e6)


def grouped(rng, n=300, p=2):
    X = rng.standard_normal((n, p))
    m = rng.integers(1, 15, n).astype(float)
    beta = np.array([0.3, 0.8, -0.5])[:p + 1]
    y = rng.binomial(m.astype(int), special.expit(beta[0] + X @ beta[1:])).astype(float)
    return X, y, m


def expanded(X, y, m):
    """The same data as 0/1 rows: row i repeated m_i times, y_i of them labelled 1."""
    rows = np.repeat(np.arange(len(y)), m.astype(int))
    first = np.concatenate([[0], np.cumsum(m.astype(int))[:-1]])
    rank = np.arange(len(rows)) - first[rows]
    return X[rows], (rank < y[rows]).astype(float)


def test_likelihood_matches_scipy_and_the_expanded_rows(rng):
    X, y, m = grouped(rng)
    model = tc.BinomialRegression(X, y, trials=m)
    Xe, ye = expanded(X, y, m)
    logistic = tc.LogisticRegression(Xe, ye)
    theta = np.array([0.2, 0.5, -0.4])
    eta = theta[0] + X @ theta[1:]
    # scipy.stats.binom: the constant log C(m, y) included
    assert_allclose(model.log_likelihood(theta),
                    stats.binom.logpmf(y, m, special.expit(eta)).sum(), rtol=1e-12)
    # the expanded rows: same gradient and Hessian (sums of the same terms in other orders
    # and groupings: 1e-12 relative to the largest entry)
    _, g = model.log_likelihood_grad(theta)
    _, ge = logistic.log_likelihood_grad(theta)
    assert_allclose(g, ge, rtol=0, atol=1e-12 * np.abs(ge).max())
    he = logistic.log_likelihood_hessian(theta)
    assert_allclose(model.log_likelihood_hessian(theta), he, rtol=0,
                    atol=1e-12 * np.abs(he).max())


def test_mode_matches_statsmodels_glm_binomial(rng):
    X, y, m = grouped(rng, n=1000)
    # reference: statsmodels GLM, Binomial family (logit), endog = (successes, failures)
    fit = sm.GLM(np.column_stack([y, m - y]), sm.add_constant(X),
                 family=sm.families.Binomial()).fit(tol=1e-12)
    lap = tc.find_mode(tc.BinomialRegression(X, y, trials=m, prior=FLAT))
    sd = np.sqrt(np.diag(lap.cov))
    assert_allclose((lap.mode - fit.params) / sd, 0.0, rtol=0, atol=1e-6)
    assert_allclose(sd, fit.bse, rtol=1e-6)


@pytest.mark.parametrize("kwargs, match", [
    ({}, r"^trials: is missing; give the number of trials of every row"),
    ({"trials": np.full(5, 2.0)}, r"^trials: has 5 rows but X has 6; give one number"),
    ({"trials": [2, 2, 0, 2, 2, 2]}, r"^trials: has 0 in row 2; give whole numbers of trials"),
    ({"trials": [2, 2, 1.5, 2, 2, 2]}, r"^trials: has 1\.5 in row 2"),
    ({"trials": [2, 2, 2, 1, 2, 2]}, r"^y: has 2 successes in row 3 of 1 trials"),
])
def test_bad_trials_are_one_line_errors(kwargs, match):
    X = np.arange(12.0).reshape(6, 2)
    with pytest.raises(tc.InputError, match=match):
        tc.BinomialRegression(X, [0, 1, 2, 2, 1, 0], **kwargs)


@pytest.fixture(scope="module")
def small_case():
    rng = np.random.default_rng(20261204)
    X, y, m = grouped(rng, n=150, p=1)
    return X, y, m, tc.GaussianPrior(sd=3.0)


def _expanded_log_posterior(X, y, m, thetas):
    """Logistic log-likelihood of the expanded 0/1 rows plus the N(0, 3^2) prior, in NumPy."""
    Xe, ye = expanded(X, y, m)
    eta = thetas[:, :1] + thetas[:, 1:2] * Xe[:, 0][None, :]
    ll = np.sum(ye * eta - np.logaddexp(0.0, eta), axis=1)
    return ll + stats.norm.logpdf(thetas, 0.0, 3.0).sum(axis=1)


@pytest.fixture(scope="module")
def is_reference(small_case):
    X, y, m, prior = small_case
    model = tc.BinomialRegression(X, y, trials=m, prior=prior)
    return importance_reference(model, lambda t: _expanded_log_posterior(X, y, m, t))


@pytest.mark.slow
@pytest.mark.parametrize("method", ["penalty-mala", "mala"])
def test_draws_match_the_expanded_rows(small_case, is_reference, method):
    X, y, m, prior = small_case
    ref, w = is_reference
    model = tc.BinomialRegression(X, y, trials=m, prior=prior)
    check = run_and_check(model, ref, method, seed=13, names=["intercept", "x0"],
                          reference_weights=w)
    assert check.passed, check.as_dict()


@pytest.mark.slow
def test_power_wrong_trials_fail(small_case, is_reference):
    X, y, m, prior = small_case
    ref, w = is_reference
    wrong = tc.BinomialRegression(X, y, trials=2 * m, prior=prior)
    check = run_and_check(wrong, ref, "penalty-mala", seed=13, names=["intercept", "x0"],
                          reference_weights=w)
    assert not check.passed and check.ratio.max() > 1.5
