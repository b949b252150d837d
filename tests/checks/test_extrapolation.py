"""Richardson-Romberg extrapolation of sgld over the step size (checks/_extrapolation.py).

Outside reference: the exact posterior of the linear-Gaussian model (Bishop, PRML 2006, eqs.
3.53-3.54; posterior/_conjugate.py). For that model SGLD's stationary mean is exact and its
spread is inflated (for the Euler scheme on a Gaussian target the stationary variance is
Sigma / (1 - h/4) in units of a Laplace mass matrix: first order in h, as Durmus et al.,
NeurIPS 2016, assume), so the check covers means and sds: both extrapolated values must lie
within 3 of their Monte Carlo errors of the exact ones. The second-order remainder of the sd,
1 - 2 r(h/2) + r(h) with r(h) = (1 - h/4)^(-1/2), is -0.29% at h = 0.5, about 1.3 Monte Carlo
errors at this run length: the test is sized so that it passes by the method, not by luck
(measured: 1.75 Monte Carlo errors; the plain run at h/2, 16; sgld at h, KS 3.5-3.8 floors).
"""

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import ks_check
from tallchain.checks._extrapolation import error_in_mcse, richardson_romberg
from tallchain.mcmc import SamplerSettings, prepare, sample_pair
from tallchain.posterior import conjugate_posterior

pytestmark = pytest.mark.slow

STEP = 0.5


def make_problem():
    """The linear-Gaussian model, its exact posterior (and means and sds), its preparation."""
    gen = np.random.default_rng(7)
    X = gen.standard_normal((2000, 2)) @ np.array([[1.0, 0.5], [0.0, 1.0]])
    y = 0.3 + X @ [1.0, -0.5] + gen.standard_normal(2000)
    model = tc.LinearRegression(X, y, noise_sd=1.0)
    post = conjugate_posterior(model)
    exact = {"mean": post.mean, "sd": np.sqrt(np.diag(post.cov))}
    return model, post, exact, prepare(model)


@pytest.fixture(scope="module")
def problem():
    return make_problem()


def _pair(problem, shared):
    model, _, _, prep = problem
    s = SamplerSettings(method="sgld", step_size=STEP, batch_size=50, chains=4, draws=100_000,
                        warmup=500, seed=3)
    return sample_pair(model, s, preparation=prep, shared=shared)


def test_extrapolated_means_and_sds_match_the_exact_posterior(problem):
    _, post, exact, _ = problem
    coarse, fine = _pair(problem, shared=True)
    # sgld at h is visibly biased: KS distance >= 3 noise floors 1.358/sqrt(ECDF ESS)
    assert np.max(ks_check(coarse, post).ratio) >= 3.0
    rr = richardson_romberg(coarse, fine)
    assert error_in_mcse(rr, exact) <= 3.0
    # power: the plain estimate at h/2 (no extrapolation) fails the same test
    assert error_in_mcse(rr["fine"], exact) > 3.0
    # and at h, of course
    assert error_in_mcse(rr["coarse"], exact) > 3.0


def test_shared_noise_is_what_makes_the_extrapolation_precise(problem):
    """Without shared noise the same budget gives an extrapolation whose Monte Carlo error is
    at least 1.5 times larger (measured 2.2) (for independent chains the variance of 2 pi_{h/2} - pi_h is
    4 var(fine) + var(coarse), about 5 times that of one average; the shared noise removes
    most of it)."""
    coupled = richardson_romberg(*_pair(problem, shared=True))
    apart = richardson_romberg(*_pair(problem, shared=False))
    for key in ("mean_mcse", "sd_mcse"):
        assert np.all(np.array(apart[key]) >= 1.5 * np.array(coupled[key])), key
