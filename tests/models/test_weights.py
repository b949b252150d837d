"""Frequency weights (``weights=``, every family): the reference is the data with each row
repeated weights[i] times.

Against what:
* the log-likelihood, its gradient and Hessian against the same family on the repeated rows
  (the same terms summed in another order and grouping: within 1e-12 of the largest entry,
  far above the ~N eps of either sum and far below any modelling difference);
* the mode and standard errors against statsmodels' GLM fit with ``freq_weights`` (logistic
  and Poisson, flat-prior limit);
* the exact conjugate posterior (Bishop, PRML 2006, eqs. 3.53-3.54) of a weighted linear model
  against that of the repeated rows, and penalty-mala's draws of the weighted model against
  it by KS beside the floor 1.358/sqrt(ECDF ESS), tolerance 1.5. Power: the same data without
  their weights fail the same test.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from ks_runs import run_and_check
from numpy.testing import assert_allclose

import tallchain as tc

N = 200
THETA = np.array([0.2, 0.5, -0.4])


def _data(rng):
    X = rng.standard_normal((N, 2))
    w = rng.integers(0, 4, N).astype(float)
    m = rng.integers(1, 6, N).astype(float)
    counts = rng.poisson(2.0, N).astype(float)
    ys = {"linear": 0.5 + X @ [1.0, -1.0] + rng.standard_normal(N),
          "logistic": (rng.random(N) < 0.4).astype(float), "counts": counts,
          "successes": np.minimum(counts, m)}
    return X, w, m, ys


FAMILIES = {
    "linear, sd sampled": (lambda X, ys, m, sel, **k: tc.LinearRegression(
        X[sel], ys["linear"][sel], noise_sd_prior=(1.0, 1.0), **k), [0.1]),
    "linear, sd known": (lambda X, ys, m, sel, **k: tc.LinearRegression(
        X[sel], ys["linear"][sel], noise_sd=1.0, **k), []),
    "logistic": (lambda X, ys, m, sel, **k: tc.LogisticRegression(
        X[sel], ys["logistic"][sel], **k), []),
    "poisson": (lambda X, ys, m, sel, **k: tc.PoissonRegression(
        X[sel], ys["counts"][sel], **k), []),
    "negative binomial": (lambda X, ys, m, sel, **k: tc.NegativeBinomialRegression(
        X[sel], ys["counts"][sel], **k), [-0.5]),
    "binomial": (lambda X, ys, m, sel, **k: tc.BinomialRegression(
        X[sel], ys["successes"][sel], trials=m[sel], **k), []),
}


@pytest.mark.parametrize("family", FAMILIES)
def test_weights_equal_repeated_rows(rng, family):
    X, w, m, ys = _data(rng)
    build, extra = FAMILIES[family]
    theta = np.r_[THETA, extra]
    weighted = build(X, ys, m, np.arange(N), weights=w)
    repeated = build(X, ys, m, np.repeat(np.arange(N), w.astype(int)))
    ll_w, g_w = weighted.log_likelihood_grad(theta)
    ll_r, g_r = repeated.log_likelihood_grad(theta)
    assert_allclose(ll_w, ll_r, rtol=1e-12)
    assert_allclose(weighted.log_likelihood(theta), repeated.log_likelihood(theta), rtol=1e-12)
    assert_allclose(g_w, g_r, rtol=0, atol=1e-12 * np.abs(g_r).max())
    h_r = repeated.log_likelihood_hessian(theta)
    assert_allclose(weighted.log_likelihood_hessian(theta), h_r, rtol=0,
                    atol=1e-12 * np.abs(h_r).max())
    # the weights travel with the design to a new response
    np.testing.assert_array_equal(weighted.with_response(weighted.y).weights, weighted.weights)


@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_mode_matches_statsmodels_freq_weights(rng, family):
    X, w, _, ys = _data(rng)
    y = ys["logistic"] if family == "logistic" else ys["counts"]
    sm_family = sm.families.Binomial() if family == "logistic" else sm.families.Poisson()
    # reference: statsmodels GLM with freq_weights (IRLS)
    fit = sm.GLM(y, sm.add_constant(X), family=sm_family, freq_weights=w).fit(tol=1e-12)
    cls = tc.LogisticRegression if family == "logistic" else tc.PoissonRegression
    lap = tc.find_mode(cls(X, y, weights=w, prior=tc.GaussianPrior(sd=1e6)))
    sd = np.sqrt(np.diag(lap.cov))
    assert_allclose((lap.mode - fit.params) / sd, 0.0, rtol=0, atol=1e-6)
    assert_allclose(sd, fit.bse, rtol=1e-6)


@pytest.mark.parametrize("weights, match", [
    (np.ones(5), r"^weights: has 5 rows but X has 6; give one frequency weight per row"),
    ([1, 1, -1, 1, 1, 1], r"^weights: has -1 in row 2; give frequency weights >= 0"),
    ([1, 1, np.nan, 1, 1, 1], r"^weights: contains nan in row 2"),
])
def test_bad_weights_are_one_line_errors(weights, match):
    X = np.arange(12.0).reshape(6, 2)
    with pytest.raises(tc.InputError, match=match):
        tc.PoissonRegression(X, np.ones(6), weights=weights)


@pytest.fixture(scope="module")
def weighted_linear():
    rng = np.random.default_rng(20261205)
    n = 3000
    X = rng.standard_normal((n, 2))
    w = rng.integers(1, 6, n).astype(float)
    y = 0.5 + X @ [1.0, -1.0] + 1.3 * rng.standard_normal(n)
    model = tc.LinearRegression(X, y, noise_sd=1.3, weights=w)
    rows = np.repeat(np.arange(n), w.astype(int))
    exact = tc.conjugate_posterior(tc.LinearRegression(X[rows], y[rows], noise_sd=1.3))
    return model, exact, (X, y)


def test_weighted_conjugate_posterior_is_that_of_the_repeated_rows(weighted_linear):
    model, exact, _ = weighted_linear
    post = tc.conjugate_posterior(model)
    assert_allclose(post.mean, exact.mean, rtol=0, atol=1e-10 * exact.sd.min())
    assert_allclose(post.cov, exact.cov, rtol=1e-10)


@pytest.mark.slow
def test_weighted_draws_match_the_repeated_rows(weighted_linear):
    model, exact, _ = weighted_linear
    check = run_and_check(model, exact, "penalty-mala", seed=17,
                          names=["intercept", "x0", "x1"])
    assert check.passed, check.as_dict()


@pytest.mark.slow
def test_power_dropping_the_weights_fails(weighted_linear):
    _, exact, (X, y) = weighted_linear
    check = run_and_check(tc.LinearRegression(X, y, noise_sd=1.3), exact, "penalty-mala",
                          seed=17, names=["intercept", "x0", "x1"])
    assert not check.passed and check.ratio.max() > 1.5


def test_sweep_reference_cache_key_covers_the_weights(rng):
    # A sweep reuses its reference run for a model with the same fingerprint: models that
    # differ only in their weights must not share it (power: the same weights do).
    from tallchain.checks._sweep import model_fingerprint
    X, w, _, ys = _data(rng)
    a = tc.LogisticRegression(X, ys["logistic"], weights=w)
    assert model_fingerprint(a) != model_fingerprint(tc.LogisticRegression(X, ys["logistic"]))
    assert model_fingerprint(a) != model_fingerprint(
        tc.LogisticRegression(X, ys["logistic"], weights=w + 1))
    assert model_fingerprint(a) == model_fingerprint(
        tc.LogisticRegression(X, ys["logistic"], weights=w.copy()))
