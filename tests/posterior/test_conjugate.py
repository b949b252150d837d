"""`tallchain.conjugate_posterior`, the exact posterior of the linear-Gaussian model.

Against what:

* statsmodels OLS on scikit-learn's bundled diabetes data (`sklearn.datasets.load_diabetes`,
  shipped inside the package, no download) in the flat-prior limit: with prior sd 1e6 the
  posterior mean is the OLS estimate, and the posterior covariance is statsmodels'
  ``cov_params()`` (= scale (Phi'Phi)^{-1}) rescaled from the estimated scale to noise_sd**2.
  The prior pulls by about prior_prec * posterior variance ~ 1e-12 * 1.7e5 ~ 2e-7 posterior sds,
  so the comparisons are in posterior-sd units with tolerance 1e-5.
* Bishop, Pattern Recognition and Machine Learning (2006), eqs. 3.53-3.54 with prior mean m_0
  and covariance S_0 (general form, eqs. 3.50-3.51), evaluated directly with numpy on a small
  random problem with an informative prior given as a full covariance matrix.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats
from sklearn.datasets import load_diabetes
from ulps import assert_ulps_close

import tallchain as tc


@pytest.fixture(scope="module")
def diabetes_ols():
    # reference: scikit-learn's bundled diabetes data (442 rows, 10 standardised features)
    data = load_diabetes()
    X, y = data.data, data.target
    # reference: statsmodels OLS with a constant column
    fit = sm.OLS(y, sm.add_constant(X)).fit()
    return X, y, list(data.feature_names), fit


@pytest.mark.parametrize("sd_factor", [1.0, 2.0])
def test_flat_prior_limit_matches_statsmodels_ols_on_diabetes(diabetes_ols, sd_factor):
    # reference: statsmodels OLS on scikit-learn's bundled diabetes data
    X, y, names, fit = diabetes_ols
    noise_sd = sd_factor * np.sqrt(fit.scale)  # the OLS residual sd (times a factor)
    model = tc.LinearRegression(X, y, noise_sd=noise_sd, prior=tc.GaussianPrior(sd=1e6),
                                coef_names=names)
    post = tc.conjugate_posterior(model)
    cov_ref = fit.cov_params() / fit.scale * noise_sd**2
    sd_ref = np.sqrt(np.diag(cov_ref))
    assert_allclose((post.mean - fit.params) / sd_ref, 0.0, rtol=0, atol=1e-5)
    assert_allclose(post.cov / np.outer(sd_ref, sd_ref), cov_ref / np.outer(sd_ref, sd_ref),
                    rtol=0, atol=1e-5)
    assert_allclose(post.sd, sd_ref, rtol=1e-5)
    # statsmodels' standard errors are the posterior sds at noise_sd = residual sd
    assert_allclose(post.sd, sd_factor * fit.bse, rtol=1e-5)
    assert post.coef_names == ["intercept", *names]


def test_flat_prior_limit_without_intercept(diabetes_ols):
    # reference: statsmodels OLS on scikit-learn's bundled diabetes data, no constant
    X, y, _, _ = diabetes_ols
    fit = sm.OLS(y - y.mean(), X).fit()
    noise_sd = np.sqrt(fit.scale)
    model = tc.LinearRegression(X, y - y.mean(), noise_sd=noise_sd, add_intercept=False,
                                prior=tc.GaussianPrior(sd=1e6))
    post = tc.conjugate_posterior(model)
    sd_ref = np.sqrt(np.diag(fit.cov_params()))
    assert_allclose((post.mean - fit.params) / sd_ref, 0.0, rtol=0, atol=1e-5)
    assert_allclose(post.cov / np.outer(sd_ref, sd_ref),
                    fit.cov_params() / np.outer(sd_ref, sd_ref), rtol=0, atol=1e-5)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_informative_prior_matches_bishop_3_53_3_54(rng, dtype):
    n, p, s = 40, 3, 0.8
    X = rng.normal(size=(n, p)).astype(dtype)
    y = 1.0 + X.astype(float) @ np.array([0.5, -1.0, 2.0]) + s * rng.normal(size=n)
    a = rng.normal(size=(p + 1, p + 1))
    S0 = 0.3 * (a @ a.T) + 0.2 * np.eye(p + 1)  # informative, correlated, full matrix
    m0 = np.array([0.5, 0.0, -0.5, 1.0])
    model = tc.LinearRegression(X, y, noise_sd=s, prior=tc.GaussianPrior(mean=m0, cov=S0))
    post = tc.conjugate_posterior(model)
    # reference: Bishop, PRML (2006), eqs. 3.53-3.54 (with prior mean m0, eqs. 3.50-3.51)
    phi = np.column_stack([np.ones(n), X.astype(float)])
    SN = np.linalg.inv(np.linalg.inv(S0) + phi.T @ phi / s**2)
    mN = SN @ (np.linalg.solve(S0, m0) + phi.T @ y / s**2)
    # Two solutions of the same SPD system (Cholesky inverse in the package, LU inverses and a
    # solve here): each is accurate to about d * cond * eps relative to the size of the
    # solution (Higham, Accuracy and Stability of Numerical Algorithms, ch. 14; from memory),
    # and the right-hand side and S_N pass through the conditioning of S_0 and of the
    # posterior precision. 4 d (cond(S_0) + cond(S_N^-1)) ulps of the largest entry.
    d = p + 1
    ulps = 4 * d * (np.linalg.cond(S0) + np.linalg.cond(np.linalg.inv(SN)))
    assert_ulps_close(post.mean, mN, ulps=ulps, scale=np.abs(mN).max())
    assert_ulps_close(post.cov, SN, ulps=ulps, scale=np.abs(SN).max())
    assert_array_equal(post.cov, post.cov.T)  # symmetrised by construction: exact
    # the informative prior matters here: the posterior is not the least-squares fit
    ols = np.linalg.lstsq(phi, y, rcond=None)[0]
    assert np.max(np.abs(post.mean - ols) / post.sd) > 0.05


def test_marginal_and_sample(rng):
    # correlated columns, so that the posterior's correlations matter (-0.9 between slopes)
    X = rng.normal(size=(30, 2)) @ np.array([[1.0, 0.9], [0.0, 0.3]])
    y = X @ np.array([1.0, -2.0]) + rng.normal(size=30)
    post = tc.conjugate_posterior(tc.LinearRegression(X, y, noise_sd=1.0,
                                                      prior=tc.GaussianPrior(sd=3.0)))
    # scipy.stats.norm(loc, scale) returns loc + scale * 0 and scale * 1: one rounding at most
    assert_ulps_close(post.marginal(1).mean(), post.mean[1], ulps=1)
    assert_ulps_close(post.marginal(1).std(), post.sd[1], ulps=1)
    draws = post.sample(4000, rng=np.random.default_rng(5))
    assert draws.shape == (4000, 3)
    # the same code with the same seed twice: bitwise
    assert_array_equal(draws, post.sample(4000, rng=np.random.default_rng(5)))

    def mean_within_5_se(d):
        # |error| < 5 standard errors (a > 5 sigma miss has probability ~6e-7 per coefficient)
        return np.all(np.abs(d.mean(axis=0) - post.mean) < 5 * post.sd / np.sqrt(len(d)))

    def mahalanobis_pvalue(d):
        # squared Mahalanobis distances of exact draws are chi-square with n_coef degrees of
        # freedom (scipy.stats.chi2); KS test, judged at level 1e-3
        z = np.linalg.solve(np.linalg.cholesky(post.cov), (d - post.mean).T)
        return stats.kstest(np.sum(z**2, axis=0), stats.chi2(df=3).cdf).pvalue

    assert mean_within_5_se(draws)
    assert mahalanobis_pvalue(draws) > 1e-3
    # Power checks: draws shifted by 0.2 sd fail the first test; draws 10% too wide, or with
    # the correlations dropped (independent marginals), fail the second.
    assert not mean_within_5_se(draws + 0.2 * post.sd)
    assert mahalanobis_pvalue(post.mean + 1.1 * (draws - post.mean)) < 1e-3
    independent = post.mean + post.sd * np.random.default_rng(6).standard_normal((4000, 3))
    assert mahalanobis_pvalue(independent) < 1e-3


def test_rejects_non_linear_models(rng):
    X = rng.normal(size=(10, 2))
    y = (X[:, 0] > 0).astype(float)
    with pytest.raises(tc.InputError, match="conjugate_posterior needs a LinearRegression"):
        tc.conjugate_posterior(tc.LogisticRegression(X, y))
    with pytest.raises(tc.InputError, match="model: is PoissonRegression"):
        tc.conjugate_posterior(tc.PoissonRegression(X, y))
