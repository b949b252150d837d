"""`NegativeBinomialRegression` (NB2, dispersion sampled): kernels, mode, and the sampler.

Against what:
* digamma and trigamma (numba, series of Abramowitz & Stegun 6.3.18 and 6.4.12) against
  scipy.special.digamma and polygamma;
* the log-likelihood against scipy.stats.nbinom.logpmf (n = r = 1/alpha, p = r / (r + mu));
  its gradient and Hessian in (beta, log alpha) against NumPy formulas with scipy.special
  (written out below from the log-pmf, independent of the kernels' p-based forms);
* the mode against statsmodels' NB2 maximum-likelihood fit (discrete NegativeBinomial,
  loglike_method="nb2", Newton), in the flat-prior limit;
* the draws of penalty-mala and mala against an importance-sampling reference (Student-t
  proposal around the Laplace approximation, NumPy/scipy densities only), by the weighted
  two-sample KS distance beside its floor 1.358 sqrt(1/ESS + 1/ESS_ref), tolerance 1.5.
  Power: Poisson regression on the same overdispersed counts fails the same test.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from ks_runs import importance_reference, run_and_check
from scipy import special, stats

import tallchain as tc
from tallchain.checks import ks_check
from tallchain.models import _family_params as fp

FLAT = tc.GaussianPrior(sd=1e6)
EPS = np.finfo(float).eps


def test_digamma_and_trigamma_match_scipy():
    x = np.geomspace(1e-3, 1e5, 400)
    psi = np.array([fp.digamma(v) for v in x])
    psi1 = np.array([fp.trigamma(v) for v in x])
    # series truncated at x >= 8 (digamma; next term ~3e-13) and x >= 12 (trigamma; ~3e-15);
    # the recurrence adds a rounding per step (at most 12): 1e-12 covers both
    assert_allclose(psi, special.digamma(x), rtol=0, atol=1e-12)
    assert np.all(np.abs(psi - special.digamma(x)) <= 1e-12 * (1 + np.abs(special.digamma(x))))
    assert_allclose(psi1, special.polygamma(1, x), rtol=1e-12)


def nb_data(rng, n=400, alpha=0.6):
    X = rng.standard_normal((n, 2))
    mu = np.exp(0.5 + X @ [0.4, -0.3])
    y = rng.poisson(mu * rng.gamma(1 / alpha, alpha, n)).astype(float)
    return X, y


def numpy_loglik_grad_hess(X, y, theta):
    """NB2 log-likelihood, gradient and Hessian in (beta, phi = log alpha), from the log-pmf
    l = lgamma(y + r) - lgamma(r) - lgamma(y + 1) + r log r + y eta - (y + r) log(r + mu)."""
    Phi = np.column_stack([np.ones(len(y)), X])
    eta = Phi @ theta[:-1]
    mu, r = np.exp(eta), np.exp(-theta[-1])
    ll = stats.nbinom.logpmf(y, r, r / (r + mu)).sum()   # scipy.stats
    l_eta = r * (y - mu) / (r + mu)
    l_ee = -r * mu * (y + r) / (r + mu) ** 2
    dl_dr = (special.digamma(y + r) - special.digamma(r) + np.log(r) + 1
             - np.log(r + mu) - (y + r) / (r + mu))
    d2l_dr2 = (special.polygamma(1, y + r) - special.polygamma(1, r) + 1 / r - 2 / (r + mu)
               + (y + r) / (r + mu) ** 2)
    l_p = -r * dl_dr
    l_pp = r * dl_dr + r**2 * d2l_dr2
    l_ep = -r * (mu * (y - mu) / (r + mu) ** 2)     # d/dr of l_eta, times dr/dphi = -r
    grad = np.r_[Phi.T @ l_eta, l_p.sum()]
    d = Phi.shape[1]
    hess = np.zeros((d + 1, d + 1))
    hess[:d, :d] = Phi.T @ (l_ee[:, None] * Phi)
    hess[d, :d] = hess[:d, d] = Phi.T @ l_ep
    hess[d, d] = l_pp.sum()
    return ll, grad, hess


@pytest.mark.parametrize("theta", [[0.5, 0.4, -0.3, np.log(0.6)], [2.0, -1.0, 0.5, -4.0],
                                   [-1.0, 0.2, 0.1, 2.0]], ids=["typical", "near-poisson", "wide"])
def test_kernels_match_scipy(rng, theta):
    X, y = nb_data(rng)
    theta = np.array(theta)
    model = tc.NegativeBinomialRegression(X, y)
    ll, grad, hess = numpy_loglik_grad_hess(X, y, theta)
    # different formulas (p-based in the kernels, mu-based here), each a few roundings per
    # row and a sum of 400 rows: 1e-10 relative to the largest term's size covers it
    assert_allclose(model.log_likelihood(theta), ll, rtol=1e-11)
    k_ll, k_grad = model.log_likelihood_grad(theta)
    assert_allclose(k_ll, ll, rtol=1e-11)
    assert_allclose(k_grad, grad, rtol=0, atol=1e-9 * np.abs(grad).max() + 1e-9)
    assert_allclose(model.log_likelihood_hessian(theta), hess, rtol=0,
                    atol=1e-9 * np.abs(hess).max())


def test_mode_matches_statsmodels_nb2(rng):
    X, y = nb_data(rng, n=2000)
    # reference: statsmodels NegativeBinomial (NB2) MLE by Newton; params = (beta, alpha)
    fit = sm.NegativeBinomial(y, sm.add_constant(X), loglike_method="nb2").fit(
        method="newton", disp=0, tol=1e-12, maxiter=100)
    model = tc.NegativeBinomialRegression(X, y, prior=FLAT, dispersion_prior=(1.0, 1e4))
    lap = tc.find_mode(model)
    ref = np.r_[fit.params[:3], np.log(fit.params[3])]
    sd = np.sqrt(np.diag(lap.cov))
    # Newton on both sides, each to ~1e-8 sd; the flat priors pull by < 1e-8 sd
    assert_allclose((lap.mode - ref) / sd, 0.0, rtol=0, atol=1e-5)
    assert lap.n_evaluations <= 25
    # statsmodels' standard errors of beta (inverse observed information) against the Laplace
    # covariance (same information matrix, beta block after the log-alpha reparameterisation
    # leaves it unchanged)
    assert_allclose(sd[:3], fit.bse[:3], rtol=1e-4)


# --- sampling against importance sampling --------------------------------------------------


@pytest.fixture(scope="module")
def small_case():
    rng = np.random.default_rng(20261203)
    X, y = nb_data(rng, n=300, alpha=0.8)
    X = X[:, :1]
    prior_sd, disp_prior = 3.0, (1.0, 1.0)
    model = tc.NegativeBinomialRegression(X, y, prior=tc.GaussianPrior(sd=prior_sd),
                                          dispersion_prior=disp_prior)
    return X, y, model, prior_sd, disp_prior


def _log_posterior(X, y, thetas, prior_sd, disp_prior):
    """NumPy/scipy log posterior of (intercept, slope, log alpha) for many thetas."""
    eta = thetas[:, :1] + thetas[:, 1:2] * X[:, 0][None, :]
    r = np.exp(-thetas[:, 2:3])
    mu = np.exp(eta)
    ll = stats.nbinom.logpmf(y[None, :], r, r / (r + mu)).sum(axis=1)
    lp = stats.norm.logpdf(thetas[:, :2], 0.0, prior_sd).sum(axis=1)
    return ll + lp + stats.norm.logpdf(thetas[:, 2], np.log(disp_prior[0]), disp_prior[1])


@pytest.fixture(scope="module")
def is_reference(small_case):
    X, y, model, prior_sd, disp_prior = small_case
    return importance_reference(
        model, lambda thetas: _log_posterior(X, y, thetas, prior_sd, disp_prior))


@pytest.mark.slow
@pytest.mark.parametrize("method", ["penalty-mala", "mala"])
def test_draws_match_importance_sampling(small_case, is_reference, method):
    _, _, model, _, _ = small_case
    ref, w = is_reference
    check = run_and_check(model, ref, method, seed=11,
                          names=["intercept", "x0", "dispersion"], reference_weights=w)
    assert check.passed, check.as_dict()


@pytest.mark.slow
def test_power_poisson_on_overdispersed_counts_fails(small_case, is_reference):
    X, y, _, prior_sd, _ = small_case
    ref, w = is_reference
    wrong = tc.PoissonRegression(X, y, prior=tc.GaussianPrior(sd=prior_sd))
    result = tc.sample(wrong, method="penalty-mala", chains=4, draws=3000, warmup=500, seed=11)
    check = ks_check(result.draws, ref[:, :2], coef_names=result.coef_names,
                     reference_weights=w)
    assert not check.passed and check.ratio.max() > 1.5


def test_simulated_counts_have_the_nb2_variance(rng):
    # mean mu and variance mu + alpha mu^2 (Cameron & Trivedi 2013, section 3.3), checked on
    # 200,000 draws at one mu: the sample variance's standard error is ~ var sqrt(2/n) times
    # the kurtosis factor; 5% covers it many times over, while Poisson's variance (mu) is off
    # by alpha mu = 240%.
    n = 200_000
    X = np.zeros((n, 1))
    model = tc.NegativeBinomialRegression(X, np.zeros(n))
    y = model.simulate([np.log(4.0), 0.0, np.log(0.6)], rng)
    assert abs(y.mean() - 4.0) < 5 * np.sqrt((4.0 + 0.6 * 16) / n)
    assert abs(y.var() / (4.0 + 0.6 * 16) - 1.0) < 0.05
