"""The batch estimators on the new model variants: sampled family parameters (linear sd, NB2
dispersion), binomial trials and frequency weights.

Against what: an identity, not a tolerance from Monte Carlo error. With the batch equal to
every row (n = N, so the scale N/n is 1), a control-variate estimator is exact: the batch sum
of [grad l_i - grad q_i] plus the proxy sum sum_i grad q_i is the full-data gradient, and the
batch sum of [D_i - (q_i(b') - q_i(b))] plus the proxy difference is the full-data
log-likelihood difference l(b') - l(b), whatever the proxy (METHODS.md section 4). The
full-data values come from the model's full passes, themselves checked against scipy and
statsmodels in tests/models. The two sides sum the same terms in other orders, with the
proxies' rounding on top: 1e-10 of the size of the largest term is far above that rounding
(N = 300 rows) and far below any missing term. Power: batch kernels that ignore the weights
(given the unweighted model's data beside the weighted row cache) break both identities.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose

import tallchain as tc
from tallchain.mcmc._estimators import (batch_residual_diffs, cv_gradient_rows,
                                        proxy_gradient_sum, proxy_loglik_diff_sum)
from tallchain.posterior import control_variate_cache

N = 300


def _models(rng):
    X = rng.standard_normal((N, 2))
    w = rng.integers(0, 4, N).astype(float)
    counts = rng.poisson(np.exp(0.5 + X @ [0.3, -0.2]) * rng.gamma(2.0, 0.5, N)).astype(float)
    m = rng.integers(1, 8, N).astype(float)
    return {
        "linear, sd sampled": tc.LinearRegression(X, 1.0 + X @ [0.5, -0.3]
                                                  + 0.7 * rng.standard_normal(N)),
        "negative binomial": tc.NegativeBinomialRegression(X, counts),
        "binomial": tc.BinomialRegression(X, np.minimum(counts, m), trials=m),
        "logistic, weighted": tc.LogisticRegression(X, (counts > 1).astype(float), weights=w),
        "negative binomial, weighted": tc.NegativeBinomialRegression(X, counts, weights=w),
    }


def _estimates(model, cache, beta, beta_new, data=None):
    data, rows = model.glm_data if data is None else data, cache.rows
    idx = np.arange(N, dtype=np.int64)
    work = np.empty((5, N))
    grad = np.empty(model.n_coef)
    cv_gradient_rows(data, rows, beta - cache.beta_star, idx, grad, work)
    proxy = np.empty(model.n_coef)
    proxy_gradient_sum(rows, beta, proxy)
    diffs = np.empty(N)
    batch_residual_diffs(data, rows, beta_new - cache.beta_star, beta - cache.beta_star, idx,
                         diffs, work)
    return grad + proxy, diffs.sum() + proxy_loglik_diff_sum(rows, beta_new, beta)


@pytest.mark.parametrize("name", ["linear, sd sampled", "negative binomial", "binomial",
                                  "logistic, weighted", "negative binomial, weighted"])
@pytest.mark.parametrize("order", [1, 2])
def test_full_batch_estimates_are_the_full_data_values(rng, name, order):
    model = _models(rng)[name]
    mode = tc.find_mode(model).mode
    cache = control_variate_cache(model, mode, order)
    beta = mode + 0.05 * rng.standard_normal(model.n_coef)
    beta_new = beta + 0.05 * rng.standard_normal(model.n_coef)
    grad, diff = _estimates(model, cache, beta, beta_new)
    _, full_grad = model.log_likelihood_grad(beta)
    full_diff = model.log_likelihood(beta_new) - model.log_likelihood(beta)
    size = abs(model.log_likelihood(beta))
    assert_allclose(grad, full_grad, rtol=0, atol=1e-10 * np.abs(full_grad).max() + 1e-10)
    assert_allclose(diff, full_diff, rtol=0, atol=1e-10 * size)


def test_power_batch_kernels_ignoring_the_weights_break_the_identities(rng):
    model = _models(rng)["logistic, weighted"]
    mode = tc.find_mode(model).mode
    cache = control_variate_cache(model, mode, 2)
    unweighted = tc.LogisticRegression(model.X, model.y).glm_data
    beta = mode + 0.05 * rng.standard_normal(model.n_coef)
    beta_new = beta + 0.05 * rng.standard_normal(model.n_coef)
    grad, diff = _estimates(model, cache, beta, beta_new, data=unweighted)
    _, full_grad = model.log_likelihood_grad(beta)
    full_diff = model.log_likelihood(beta_new) - model.log_likelihood(beta)
    with pytest.raises(AssertionError, match="Not equal to tolerance"):
        assert_allclose(grad, full_grad, rtol=0, atol=1e-10 * np.abs(full_grad).max() + 1e-10)
    with pytest.raises(AssertionError, match="Not equal to tolerance"):
        assert_allclose(diff, full_diff, rtol=0, atol=1e-10 * abs(model.log_likelihood(beta)))
