"""Linear regression with the noise sd sampled, against its exact posterior by quadrature.

The model: y ~ N(X beta, s^2 I), beta ~ N(m0, S0) (tallchain.GaussianPrior), log s ~
N(log median, log_sd^2) (``noise_sd_prior``). Given s the coefficients' posterior is Gaussian,
precision A(s) = X'X / s^2 + S0^-1, mean A^-1 b, b = X'y / s^2 + S0^-1 m0 (Bishop, PRML 2006,
eqs. 3.53-3.54), and the marginal likelihood is y ~ N(X m0, s^2 I + X S0 X') (PRML eq. 3.86 in
another parameterisation), written here through A:
    log p(y | s) = -N log s - N/2 log 2 pi - y'y / (2 s^2) - m0' S0^-1 m0 / 2 + b' A^-1 b / 2
                   - log|A| / 2 - log|S0| / 2          (completing the square; from memory,
checked below against scipy.stats.multivariate_normal on the N x N covariance). The
posterior of phi = log s is then one-dimensional: p(y | e^phi) N(phi; log median, log_sd^2),
integrated on a grid (scipy.integrate). Marginal CDFs: phi's by cumulative trapezoid; each
coefficient's as the phi-mixture of the Gaussian CDFs given s.

Against it, the draws of each coefficient and of noise_sd (natural scale) by the KS distance
beside its noise floor 1.358 / sqrt(ECDF ESS) (tallchain.checks.ks_check), tolerance 1.5
floors. Power: the same test on the model with the noise sd fixed at half its posterior mean
(a wrong known sd) fails for the coefficients.
"""

import numpy as np
import pytest
from ks_runs import run_and_check
from scipy import integrate, linalg, stats

import tallchain as tc
from tallchain.checks import ks_check

KS_TOL = 1.5
N = 2000
PRIOR = tc.GaussianPrior(mean=0.0, sd=10.0)
NOISE_PRIOR = (1.0, 1.0)   # log s ~ N(0, 1)


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(20261203)
    X = rng.standard_normal((N, 2)) + [0.5, 0.0]
    y = 1.0 + X @ np.array([0.5, -0.3]) + 0.7 * rng.standard_normal(N)
    return X, y


def design(X):
    return np.column_stack([np.ones(X.shape[0]), X])


def conditional(Phi, y, s, m0, S0_inv):
    """Mean, covariance and log marginal likelihood of the coefficients given s."""
    A = Phi.T @ Phi / s**2 + S0_inv
    b = Phi.T @ y / s**2 + S0_inv @ m0
    c, low = linalg.cho_factor(A)
    mean = linalg.cho_solve((c, low), b)
    log_det_A = 2.0 * np.sum(np.log(np.diag(c)))
    log_det_S0 = -np.linalg.slogdet(S0_inv)[1]
    n = y.shape[0]
    loglik = (-n * np.log(s) - 0.5 * n * np.log(2 * np.pi) - 0.5 * y @ y / s**2
              - 0.5 * m0 @ S0_inv @ m0 + 0.5 * b @ mean - 0.5 * log_det_A - 0.5 * log_det_S0)
    return mean, linalg.cho_solve((c, low), np.eye(A.shape[0])), loglik


class _Mixture:
    """CDF of a weighted mixture of normals (one coefficient over the phi grid)."""

    def __init__(self, weights, means, sds):
        self.w, self.m, self.s = weights, means, sds

    def cdf(self, x):
        x = np.atleast_1d(x)
        return stats.norm.cdf((x[:, None] - self.m) / self.s) @ self.w


class _Tabulated:
    """CDF tabulated on a grid of sigma values."""

    def __init__(self, grid, cdf):
        self.grid, self.values = grid, cdf

    def cdf(self, x):
        return np.interp(x, self.grid, self.values, left=0.0, right=1.0)


@pytest.fixture(scope="module")
def exact_marginals(problem):
    X, y = problem
    Phi = design(X)
    m0, S0_inv = np.zeros(3), np.eye(3) / 100.0
    # grid over phi = log s: +-12 posterior sds around the maximum (sd of phi ~ 1/sqrt(2N))
    centre = np.log(np.sqrt(np.mean((y - Phi @ np.linalg.lstsq(Phi, y)[0]) ** 2)))
    phi = centre + np.linspace(-12, 12, 1201) / np.sqrt(2 * N)
    conds = [conditional(Phi, y, np.exp(p), m0, S0_inv) for p in phi]
    log_post = (np.array([c[2] for c in conds])
                + stats.norm.logpdf(phi, np.log(NOISE_PRIOR[0]), NOISE_PRIOR[1]))
    dens = np.exp(log_post - log_post.max())
    dens /= integrate.trapezoid(dens, phi)
    weights = dens * np.gradient(phi)            # quadrature weights (trapezoid-like)
    weights /= weights.sum()
    assert dens[0] < 1e-12 * dens.max() and dens[-1] < 1e-12 * dens.max()   # grid covers it
    means = np.array([c[0] for c in conds])
    sds = np.sqrt(np.array([np.diag(c[1]) for c in conds]))
    marginals = [_Mixture(weights, means[:, j], sds[:, j]) for j in range(3)]
    cdf_phi = integrate.cumulative_trapezoid(dens, phi, initial=0.0)
    marginals.append(_Tabulated(np.exp(phi), cdf_phi / cdf_phi[-1]))
    return marginals, (Phi, y, m0, S0_inv)


def test_reference_marginal_likelihood_matches_scipy(exact_marginals):
    # The closed form above against scipy.stats.multivariate_normal: y ~ N(X m0, s^2 I + X S0 X')
    _, (Phi, y, m0, S0_inv) = exact_marginals
    s = 0.8
    cov = s**2 * np.eye(N) + Phi @ np.linalg.inv(S0_inv) @ Phi.T
    expected = stats.multivariate_normal(Phi @ m0, cov).logpdf(y)
    assert abs(conditional(Phi, y, s, m0, S0_inv)[2] - expected) < 1e-8 * abs(expected)


@pytest.fixture(scope="module")
def model(problem):
    X, y = problem
    return tc.LinearRegression(X, y, prior=PRIOR, noise_sd_prior=NOISE_PRIOR)


def test_model_parameters_and_names(model):
    assert model.coef_names == ["intercept", "x0", "x1", "log_noise_sd"]
    assert model.output_names == ["intercept", "x0", "x1", "noise_sd"]
    assert model.n_coef == 4 and not model.closed_form_posterior
    # the prior of log s as stated: N(log 1, 1), independent of the coefficients
    assert model.prior_mean[-1] == 0.0 and model.prior_prec[-1, -1] == 1.0
    assert not np.any(model.prior_prec[-1, :-1])


@pytest.mark.slow
@pytest.mark.parametrize("method", ["penalty-mala", "mala"])
def test_draws_match_the_quadrature_posterior(model, exact_marginals, method):
    marginals, _ = exact_marginals
    check = run_and_check(model, marginals, method, seed=7,
                          names=["intercept", "x0", "x1", "noise_sd"], tolerance=KS_TOL)
    assert check.passed, check.as_dict()


@pytest.mark.slow
def test_power_a_wrong_fixed_noise_sd_fails(problem, exact_marginals):
    # The same test on the model with the noise sd fixed at 0.35 (half the posterior mean):
    # the coefficients' posteriors come out half as wide.
    marginals, _ = exact_marginals
    X, y = problem
    wrong = tc.LinearRegression(X, y, prior=PRIOR, noise_sd=0.35)
    result = tc.sample(wrong, method="penalty-mala", chains=4, draws=3000, warmup=500, seed=7)
    check = ks_check(result.draws, marginals[:3], coef_names=result.coef_names,
                     tolerance=KS_TOL)
    assert not check.passed
    assert check.ratio.max() > KS_TOL


def test_mode_matches_the_quadrature_maximum(model, exact_marginals):
    # The joint mode in (beta, log s) against a direct maximisation of the same log posterior
    # in plain NumPy/scipy (the profile over s of the closed form above is not the joint mode,
    # so compare with scipy.optimize on the joint density).
    from scipy import optimize
    _, (Phi, y, m0, S0_inv) = exact_marginals

    def neg(theta):
        b, phi = theta[:3], theta[3]
        r = y - Phi @ b
        return -(np.sum(stats.norm.logpdf(r, 0.0, np.exp(phi)))
                 - 0.5 * (b - m0) @ S0_inv @ (b - m0)
                 + stats.norm.logpdf(phi, np.log(NOISE_PRIOR[0]), NOISE_PRIOR[1]))

    ref = optimize.minimize(neg, np.r_[np.linalg.lstsq(Phi, y)[0], 0.0], method="BFGS",
                            options={"gtol": 1e-10}).x
    lap = tc.find_mode(model)
    sd = np.sqrt(np.diag(lap.cov))
    # BFGS on a value known to ~N eps: the modes agree to ~1e-5 sd (numpy_glm.mode_sd_tolerance)
    np.testing.assert_allclose((lap.mode - ref) / sd, 0.0, rtol=0, atol=1e-4)


def test_calibration_prior_keeps_each_block(model):
    # calibrate(prior="laplace") builds the model under N(mode, cov) as its prior blocks hold
    # it: the coefficients' block whole, log s by its own mean and variance. log(exp(m)) and
    # sqrt(v)^2 round once each: within 2 ulps.
    lap = tc.find_mode(model)
    cal = model.with_theta_prior(lap.mode, lap.cov)
    np.testing.assert_array_equal(cal.prior_cov[:3, :3], lap.cov[:3, :3])
    assert not np.any(cal.prior_cov[3, :3]) and not np.any(cal.prior_cov[:3, 3])
    np.testing.assert_allclose(cal.prior_mean, lap.mode, rtol=4 * np.finfo(float).eps)
    np.testing.assert_allclose(cal.prior_cov[3, 3], lap.cov[3, 3], rtol=4 * np.finfo(float).eps)
    assert cal.noise_sd is None and cal.n_coef == 4
