"""The acceptance rules alone, on targets whose exact answer is known.

Sources: the penalty identity and the acceptance formula A(Lambda, sigma) are from Ceperley &
Dewing (J. Chem. Phys. 110, 9812, 1999) and METHODS.md section 1 (derived); the Bessel closed
form of u_B is checked against scipy.special.jv; the target N(0, 1) is scipy.stats.norm.
"""

import math

import arviz as az
import numba
import numpy as np
import pytest
from scipy import special, stats

from ulps import assert_ulps_close

from tallchain.checks import KS_CRITICAL
from tallchain.mcmc import _acceptance_kernels as K
from tallchain.mcmc import _acceptance_rules as acceptance

EPS = np.finfo(np.float64).eps

# --- Ceperley-Dewing correction ----------------------------------------------------------------


def rounding_size(chi2, n):
    """The size, in absolute units of u_B, that rounding in the two evaluations of u_B scales
    with. The kernel sums the alternating series of 0F1(; b; -x), whose partial sums grow to
    about e^{2x/b} = e^{chi^2} times the total, so e^{-u_B} is within about e^{chi^2} u
    relative, u_B within e^{chi^2} u absolute (the kernel's docstring). The closed form adds
    log Gamma(b), (1 - b)/2 log x and log J_{b-1}(2 sqrt x), each within u of its size, so u_B
    is within u times the sum of their sizes."""
    chi2 = np.asarray(chi2, dtype=float)
    b = 0.5 * (n - 1.0)
    x = 0.25 * (n - 1.0) * chi2
    j = special.jv(b - 1.0, 2.0 * np.sqrt(x))
    return (np.exp(chi2) + abs(special.gammaln(b)) + np.abs(0.5 * (1.0 - b) * np.log(x))
            + np.abs(np.log(np.abs(j))))


@pytest.mark.parametrize("n", [5, 10, 30, 100, 200])
def test_series_kernel_matches_bessel_closed_form(n):
    # reference: scipy.special.jv through the closed form e^{-u_B} = Gamma(b) x^{(1-b)/2} J_{b-1}(2 sqrt x).
    # Two methods, each within a few u of rounding_size: the series adds up to a few dozen
    # terms (each rounding within u of a partial sum), scipy's jv is within a few ulps of J away
    # from its zeros (0.95 of the bound keeps it away): 16 ulps of rounding_size for both.
    chi2 = np.linspace(0.01, 0.95 * min(acceptance.validity_bound(n), 8.0), 25)
    assert_ulps_close(acceptance.ceperley_dewing_penalty(chi2, n),
                      acceptance.ceperley_dewing_closed_form(chi2, n), ulps=16,
                      scale=rounding_size(chi2, n))


@pytest.mark.parametrize("n", [10, 100, 1000])
def test_printed_three_term_series_agrees_for_small_variance(n):
    # Ceperley & Dewing (1999) print u_B = chi^2/2 + chi^4/(4(n+1)) + chi^6/(3(n+1)(n+3)) + ...
    # The next term is O(chi^8/n^3): check agreement to that order. Its coefficient, measured
    # on these values, is 0.30-0.62 x chi^8/n^3 (derived numerically): 2 leaves a margin. The
    # slack for rounding: 16 ulps of e^{chi^2} u_B (the alternating series' cancellation).
    chi2 = np.array([0.05, 0.2, 0.5, 1.0])
    exact = acceptance.ceperley_dewing_penalty(chi2, n)
    gap = np.abs(exact - acceptance.ceperley_dewing_series(chi2, n))
    assert np.all(gap <= 2 * chi2**4 / n**3 + 16 * EPS * np.exp(chi2) * exact), gap
    # ...and the third term matters: two terms alone miss by about chi^6/(3 n^2).
    gap2 = np.abs(exact - acceptance.ceperley_dewing_series(chi2, n, terms=2))
    assert gap2[-1] > 0.5 * chi2[-1] ** 3 / (3 * (n + 1) * (n + 3))


@pytest.mark.parametrize("n", [5, 10, 40])
def test_correction_is_undefined_beyond_validity_bound(n):
    bound = acceptance.validity_bound(n)
    assert np.isfinite(acceptance.ceperley_dewing_penalty(0.98 * bound, n))
    assert np.isnan(acceptance.ceperley_dewing_penalty(1.02 * bound, n))
    # Large n: the first Bessel zero puts the bound near n/4 (METHODS.md section 1).
    assert acceptance.validity_bound(400) == pytest.approx(400 / 4, rel=0.15)


@pytest.mark.parametrize("n", [10, 24])
def test_correction_stays_undefined_where_the_series_turns_positive_again(n):
    # Beyond the second Bessel zero 0F1(; (n-1)/2; -(n-1) chi^2/4) is positive again
    # (scipy.special.hyp0f1): 12.1 < chi^2 < 16 at n = 10, 15.7 < chi^2 < 16 at n = 24. The
    # estimator is valid only up to the first zero (METHODS.md section 1), so the kernel falls
    # back there too.
    chi2 = 15.9
    assert special.hyp0f1(0.5 * (n - 1), -0.25 * (n - 1) * chi2) > 0
    assert chi2 > acceptance.validity_bound(n)
    assert np.isnan(acceptance.ceperley_dewing_penalty(chi2, n))
    assert K.noise_penalty(K.PENALTY_CD, chi2, float(n), False) == (0.5 * chi2, True)


@pytest.mark.parametrize("n", [5, 41, 401])
def test_validity_bound_is_the_first_bessel_zero(n):
    # For odd n the order (n - 3)/2 is an integer and scipy.special.jn_zeros tabulates j_{nu,1}.
    # validity_bound finds it by brentq (default xtol 2e-12, rtol 4 eps; scipy.optimize
    # docs): the bound j^2/(n - 1) is good to twice j's relative error.
    j = special.jn_zeros((n - 3) // 2, 1)[0]
    rel = 2 * (2e-12 / j + 4 * EPS)
    np.testing.assert_allclose(acceptance.validity_bound(n), j**2 / (n - 1), rtol=rel, atol=0)


def test_noise_penalty_and_log_accept_probability_by_rule():
    # The penalty each rule subtracts and whether Ceperley-Dewing fell back (its definition in
    # _acceptance_kernels; the same operations, so exact), and log min(1, e^z) with -inf for a
    # non-finite z.
    n = 10
    bound = acceptance.validity_bound(n)
    for var in (0.0, 0.3, 0.9 * bound, 1.1 * bound):
        assert K.noise_penalty(K.EXACT, var, n, False) == (0.0, False)
        assert K.noise_penalty(K.PLUGIN, var, n, False) == (0.0, False)
        assert K.noise_penalty(K.PENALTY, var, n, False) == (0.5 * var, False)
        assert K.noise_penalty(K.PENALTY_CD, var, n, True) == (0.5 * var, False)  # known variance
        pen, beyond = K.noise_penalty(K.PENALTY_CD, var, n, False)
        assert beyond == (var > bound)
        assert pen == (0.5 * var if beyond else K.ceperley_dewing_penalty(var, n))
    assert K.log_accept_probability(-1.0, 0.25, 0.5) == -1.25
    assert K.log_accept_probability(1.0, 0.25, 0.5) == 0.0
    for bad in (math.nan, math.inf, -math.inf):
        assert K.log_accept_probability(bad, 0.0, 0.0) == -math.inf


def test_exp_minus_u_b_is_unbiased_for_exp_minus_half_sigma2():
    # chi^2 = sigma^2 * Chi2_{n-1}/(n-1): E[e^{-u_B(chi^2)}] = e^{-sigma^2/2} (Ceperley & Dewing
    # 1999). The plug-in e^{-chi^2/2} has mean (1 + sigma^2/(n-1))^{-(n-1)/2} (chi-square mgf),
    # which differs: the power check.
    rng = np.random.default_rng(20261201)
    n, sigma2, reps = 6, 1.5, 200_000
    chi2 = sigma2 * rng.chisquare(n - 1, size=reps) / (n - 1)
    # The unbiased estimator is 0F1(; (n-1)/2; -(n-1) chi^2/4) (scipy.special.hyp0f1), negative
    # beyond the validity bound; where it is positive it must equal the kernel's e^{-u_B}.
    unbiased = special.hyp0f1(0.5 * (n - 1), -0.25 * (n - 1) * chi2)
    ok = unbiased > 0
    assert ok.mean() > 0.95
    # (relative to e^{-u_B}: rounding_size of both evaluations, as in the closed-form test)
    c, f = chi2[ok][:2000], unbiased[ok][:2000]
    assert_ulps_close(np.exp(-acceptance.ceperley_dewing_penalty(c, n)), f, ulps=16,
                      scale=f * rounding_size(c, n))
    plug_in = np.exp(-0.5 * chi2)
    target = math.exp(-0.5 * sigma2)
    for est, should_pass in ((unbiased, True), (plug_in, False)):
        z = (est.mean() - target) / (est.std(ddof=1) / math.sqrt(reps))
        assert (abs(z) < 4.0) == should_pass, z


# --- acceptance probability with injected noise -----------------------------------------------


@numba.njit(cache=True)
def _flip_chain_accepts(rule, sigma, n_iter, rng):
    """Proposals with Lambda = 0 exactly: the accept decisions are i.i.d. with mean A(0, sigma)."""
    acc = 0
    for _ in range(n_iter):
        noisy = sigma * rng.standard_normal()
        pen, _ = K.noise_penalty(rule, sigma * sigma, 2.0, False)
        if math.log(rng.random()) < K.log_accept_probability(noisy, 0.0, pen):
            acc += 1
    return acc


@pytest.mark.parametrize("sigma", [0.5, 1.0, 2.0])
def test_mean_acceptance_matches_formula(sigma):
    # A(0, sigma) = 2 Phi(-sigma/2) (METHODS.md section 1, derived), checked within 4 binomial SE.
    n_iter = 400_000
    expected = 2 * stats.norm.cdf(-sigma / 2)  # scipy.stats.norm
    # mean_acceptance evaluates Phi at (0 - sigma^2/2)/sigma, one rounding from -sigma/2, and
    # Phi's relative condition |x phi(x) / Phi(x)| is below 1.6 for |x| <= 1; scipy's ndtr
    # itself is good to a few ulps (from memory): 8 ulps.
    assert_ulps_close(acceptance.mean_acceptance(0.0, sigma), expected, ulps=8)
    # 4 binomial standard errors: a two-sided false alarm of 6e-5 (normal approximation).
    se = math.sqrt(expected * (1 - expected) / n_iter)
    rate = _flip_chain_accepts(K.PENALTY, sigma, n_iter, np.random.default_rng(7)) / n_iter
    assert abs(rate - expected) < 4 * se
    # Power check: the plug-in rule's acceptance is not A(0, sigma).
    rate_plugin = _flip_chain_accepts(K.PLUGIN, sigma, n_iter, np.random.default_rng(7)) / n_iter
    assert abs(rate_plugin - expected) > 4 * se


@numba.njit(cache=True)
def _noisy_gaussian_chain(rule, sigma, scale, n_iter, rng):
    """Random-walk chain on N(0, 1) whose exact log ratio is corrupted by N(0, sigma^2) noise."""
    out = np.empty(n_iter)
    x = 0.0
    for t in range(n_iter):
        prop = x + scale * rng.standard_normal()
        exact = -0.5 * (prop * prop - x * x)
        noisy = exact + sigma * rng.standard_normal()
        pen, _ = K.noise_penalty(rule, sigma * sigma, 2.0, False)
        if math.log(rng.random()) < K.log_accept_probability(noisy, 0.0, pen):
            x = prop
        out[t] = x
    return out


def _ks_over_floor(rule, sigma, chains=4, n_iter=100_000):
    draws = np.stack([_noisy_gaussian_chain(rule, sigma, 2.4, n_iter,
                                            np.random.default_rng(100 + c))
                      for c in range(chains)])
    ess = float(az.ess(draws, method="bulk"))
    ks = stats.kstest(draws.ravel(), stats.norm.cdf).statistic
    return ks / (KS_CRITICAL / math.sqrt(ess))


@pytest.mark.slow
@pytest.mark.parametrize("sigma", [0.5, 1.0, 2.0])
def test_penalty_chain_targets_the_posterior_and_plug_in_does_not(sigma):
    # Target N(0, 1) (scipy.stats.norm). Penalty rule: KS within 1.5 x the ESS floor.
    assert _ks_over_floor(K.PENALTY, sigma) <= 1.5
    # Power check: the plug-in rule is biased visibly from sigma = 1 on.
    if sigma >= 1.0:
        assert _ks_over_floor(K.PLUGIN, sigma) > 1.5
