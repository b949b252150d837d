"""The GLM kernels (models/_kernels.py): every kernel the package runs, against its reference.

What is checked, and against what:

* Every kernel against the pure-NumPy reference of the same name in
  ``tallchain.models._reference``, for the three families, float64 and float32 X, intercept on
  and off, with and without an offset, on an unsorted index batch with repeats; the serial
  full-data kernels also on a range of rows [lo, hi). Kernel and reference are different code
  paths, so they are compared in units of machine epsilon (``ulps.assert_ulps_close``), with
  the budgets of ``glm_problems`` (stated there: a linear predictor of p + 2 terms, a few
  ulps per exp/log, n - 1 ulps for a sum of n terms in another order) relative to the size of
  the terms that are added.
* Gradients against central finite differences of the full log-likelihood kernel, Hessians
  against second central differences of it (truncation error, not rounding: relative
  tolerances from the step sizes).
* Stability for |eta| up to 1000 (and a wide float range in the hypothesis tests): never NaN;
  logistic and linear values finite. Poisson: l = y eta - e^eta - log y! is -inf once e^eta
  overflows (eta > log(DBL_MAX) ~ 709.78), never NaN; f' and f'' saturate at -e^700 (finite);
  D is exact while finite, 0 when eta' = eta, and +-inf with the right sign beyond float range.
* The parallel set-up kernels (``par_*``) against the references and the serial kernels on three
  blocks of rows (every case above, with and without constants), and bitwise equal for 1 and 2
  threads (the same blocked code); ``_passes`` picks serial or parallel by the number of rows,
  and concurrent callers serialise on its lock.

The minibatch estimator kernels (mcmc/_estimators.py) are checked in tests/mcmc.
"""

import math
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from scipy import special, stats

from glm_problems import (CASES, FAMILIES, NOISE_SD, N_ROWS, ROW_ULPS, TINY, eta_parts,
                          f1_parts, f2_parts, f_parts, grad_scale, hessian_scale, loglik_scale,
                          make_problem, sum_ulps)
import tallchain as tc
from tallchain.mcmc import _estimators as E
from tallchain.models import _kernels as K
from tallchain.models import _passes as FP
from tallchain.models import _reference as R
from tallchain.posterior._control_variates import RowCache, row_cache
from ulps import assert_ulps_close

HYP = settings(max_examples=300, deadline=None, derandomize=True, database=None)


@pytest.fixture(params=CASES)
def problem(request):
    return make_problem(*request.param)


def full_loglik_grad(data, beta, with_const=True, lo=0, hi=None):
    """The kernel's (value, gradient) over rows [lo, hi)."""
    grad = np.full(beta.shape[0], np.nan)
    hi = data.X.shape[0] if hi is None else hi
    return K.full_loglik_grad(data, beta, grad, with_const, lo, hi), grad


def full_hessian(data, beta, lo=0, hi=None):
    hess = np.full((beta.shape[0], beta.shape[0]), np.nan)
    K.full_hessian(data, beta, hess, lo, data.X.shape[0] if hi is None else hi)
    return hess


# --- kernels against the references ------------------------------------------------------------


def test_batch_loglik(problem):
    data, beta, _, _, idx = problem
    out = np.full(idx.shape[0], np.nan)
    K.batch_loglik(data, beta, idx, out)
    assert_ulps_close(out, R.batch_loglik(data, beta, idx), ulps=ROW_ULPS,
                      scale=loglik_scale(data, beta, idx))


@pytest.mark.parametrize("with_const", [True, False])
@pytest.mark.parametrize(("lo", "hi"), [(0, N_ROWS), (7, 31)])
def test_full_loglik_and_gradient(problem, with_const, lo, hi):
    data, beta, _, _, _ = problem
    rows = np.arange(lo, hi)
    want_val, want_grad = R.full_loglik_grad(data, beta, with_const, lo, hi)
    val_scale = loglik_scale(data, beta, rows, with_const).sum()
    g_scale = grad_scale(data, beta, rows).sum(axis=0)
    assert_ulps_close(K.full_loglik(data, beta, with_const, lo, hi), want_val,
                      ulps=sum_ulps(hi - lo), scale=val_scale)
    val, grad = full_loglik_grad(data, beta, with_const, lo, hi)
    assert_ulps_close(val, want_val, ulps=sum_ulps(hi - lo), scale=val_scale)
    assert_ulps_close(grad, want_grad, ulps=sum_ulps(hi - lo), scale=g_scale)


@pytest.mark.parametrize(("lo", "hi"), [(0, N_ROWS), (7, 31)])
def test_full_hessian(problem, lo, hi):
    data, beta, _, _, _ = problem
    hess = full_hessian(data, beta, lo, hi)
    scale = hessian_scale(K.GLMData(data.family, data.X[lo:hi], data.y[lo:hi],
                                    data.offset[lo:hi], data.noise_sd, data.intercept), beta)
    assert_ulps_close(hess, R.full_hessian(data, beta, lo, hi), ulps=sum_ulps(hi - lo),
                      scale=scale)
    assert_array_equal(hess, hess.T)  # the kernel fills one triangle and copies it


def test_full_eta_derivatives(problem):
    data, beta, _, _, _ = problem
    lo, hi = 5, 40
    cols = [np.full(N_ROWS, np.nan) for _ in range(3)]
    K.full_eta_derivatives(data, beta, *cols, lo, hi)
    for c in cols:  # rows outside [lo, hi) untouched
        assert np.isnan(c[:lo]).all() and np.isnan(c[hi:]).all()
    rows = np.arange(lo, hi)
    eta = R.linear_predictor(data, beta, rows)
    y = data.y[lo:hi]
    parts = eta_parts(data, beta, rows)
    scales = (parts,
              f1_parts(data.family, eta, y, NOISE_SD) + f2_parts(data.family, eta, NOISE_SD) * parts,
              f2_parts(data.family, eta, NOISE_SD) * (1.0 + parts))
    for got, want, scale in zip(cols, R.full_eta_derivatives(data, beta, lo, hi), scales):
        assert_ulps_close(got[lo:hi], want, ulps=ROW_ULPS, scale=scale)


def test_pointwise_and_full_log_likelihood_of_a_model(problem):
    # The public model methods run batch_loglik and full_loglik on model.glm_data.
    data, beta, _, _, idx = problem
    ic = bool(data.intercept)
    model = {K.LINEAR: lambda: tc.LinearRegression(data.X, data.y, noise_sd=NOISE_SD,
                                                   add_intercept=ic),
             K.LOGISTIC: lambda: tc.LogisticRegression(data.X, data.y, add_intercept=ic),
             K.POISSON: lambda: tc.PoissonRegression(data.X, data.y, offset=data.offset,
                                                     add_intercept=ic)}[data.family]()
    mdata = model.glm_data
    # a read-only view of the model's X, no copy (models._kernels.kernel_view)
    assert np.shares_memory(mdata.X, model.X) and not mdata.X.flags.writeable
    assert mdata.family == data.family and mdata.intercept == data.intercept
    assert_ulps_close(model.pointwise_log_likelihood(beta, idx), R.batch_loglik(mdata, beta, idx),
                      ulps=ROW_ULPS, scale=loglik_scale(mdata, beta, idx))
    assert_ulps_close(model.log_likelihood(beta), R.full_loglik(mdata, beta),
                      ulps=sum_ulps(N_ROWS), scale=loglik_scale(mdata, beta).sum())


# --- scalar functions of eta -------------------------------------------------------------------

Y_VALUES = {K.LINEAR: (-3.0, 0.0, 2.5), K.LOGISTIC: (0.0, 1.0), K.POISSON: (0.0, 1.0, 7.0, 1000.0)}


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_eta_functions_match_reference_on_a_grid(family):
    # eta is exact here: the budget is the function evaluations alone, 4 ulps of the size of
    # their terms (glm_problems), one more for the added constant.
    eta = np.linspace(-30.0, 30.0, 241)
    for y in {K.LINEAR: (-2.0, 0.0, 3.5), K.LOGISTIC: (0.0, 1.0), K.POISSON: (0.0, 1.0, 12.0)}[family]:
        ln = float(R.log_norm_const(family, y, NOISE_SD))
        # log(s) + log(sqrt(2 pi)) and lgamma: within 2 ulps each in libm and SciPy
        assert_ulps_close(K.log_norm_const(family, y, NOISE_SD), ln, ulps=4)
        got = np.array([[K.loglik_eta(family, e, y, NOISE_SD, ln), K.dloglik_eta(family, e, y, NOISE_SD),
                         K.d2loglik_eta(family, e, y, NOISE_SD)] for e in eta])
        assert_ulps_close(got[:, 0], R.loglik_eta(family, eta, y, NOISE_SD, ln), ulps=5,
                          scale=f_parts(family, eta, y, NOISE_SD, ln))
        assert_ulps_close(got[:, 1], R.dloglik_eta(family, eta, y, NOISE_SD), ulps=4,
                          scale=f1_parts(family, eta, y, NOISE_SD))
        assert_ulps_close(got[:, 2], R.d2loglik_eta(family, eta, y, NOISE_SD), ulps=4,
                          scale=f2_parts(family, eta, NOISE_SD))


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_loglik_and_dloglik_together(family):
    # The fused (f, f') kernel against the separate kernels and the reference, tails included.
    # Budgets as on the grid (exact eta): 5 ulps of the terms of f (f_parts includes e^eta, which
    # dominates the Poisson value: a fused multiply-add there moves the last bits), 4 of f'.
    eta = np.r_[-1000.0, -709.9, np.linspace(-40.0, 40.0, 161), 709.9, 1000.0]
    for y in Y_VALUES[family]:
        ln = K.log_norm_const(family, y, NOISE_SD)
        got = np.array([K.loglik_and_dloglik_eta(family, e, y, NOISE_SD, ln) for e in eta])
        sep = np.array([(K.loglik_eta(family, e, y, NOISE_SD, ln), K.dloglik_eta(family, e, y, NOISE_SD))
                        for e in eta])
        assert not np.isnan(got).any()
        f_scale = f_parts(family, eta, y, NOISE_SD, ln)
        f1_scale = f1_parts(family, np.minimum(eta, 700.0), y, NOISE_SD)
        # Poisson f is -inf beyond float range, in both
        fin = np.isfinite(sep[:, 0])
        assert_array_equal(got[~fin, 0], sep[~fin, 0])
        assert_ulps_close(got[fin, 0], sep[fin, 0], ulps=5, scale=f_scale[fin])
        assert_ulps_close(got[:, 1], sep[:, 1], ulps=4, scale=f1_scale)
        mid = np.abs(eta) <= 40.0
        want_f, want_f1 = R.loglik_and_dloglik_eta(family, eta[mid], y, NOISE_SD, ln)
        assert_ulps_close(got[mid, 0], want_f, ulps=5, scale=f_scale[mid])
        assert_ulps_close(got[mid, 1], want_f1, ulps=4, scale=f1_scale[mid])


def test_log_norm_constants():
    # reference: the normal density at its mean is 1/(s sqrt(2 pi)); Poisson pmf has 1/y!
    # (scipy.stats computes them through other formulas: a few ulps of the terms apart)
    assert_ulps_close(K.log_norm_const(K.LINEAR, 0.3, 2.0), stats.norm(0.0, 2.0).logpdf(0.0),
                      ulps=4)  # reference: scipy.stats.norm.logpdf
    assert_ulps_close(K.log_norm_const(K.POISSON, 5.0, 1.0), -math.log(120.0), ulps=4)
    # the whole per-datum log-likelihood against scipy.stats, relative to the size of its terms
    y, eta = 4.0, 0.8
    ln = K.log_norm_const(K.POISSON, y, 1.0)
    assert_ulps_close(K.loglik_eta(K.POISSON, eta, y, 1.0, ln),
                      stats.poisson(math.exp(eta)).logpmf(4), ulps=8,
                      scale=f_parts(K.POISSON, eta, y, 1.0, ln))  # reference: scipy.stats.poisson
    ln = K.log_norm_const(K.LINEAR, y, 1.3)
    assert_ulps_close(K.loglik_eta(K.LINEAR, eta, y, 1.3, ln), stats.norm(eta, 1.3).logpdf(y),
                      ulps=8, scale=f_parts(K.LINEAR, eta, y, 1.3, ln))  # reference: scipy.stats.norm
    assert_ulps_close(K.loglik_eta(K.LOGISTIC, eta, 1.0, 1.0, 0.0),
                      stats.bernoulli(special.expit(eta)).logpmf(1), ulps=8,
                      scale=f_parts(K.LOGISTIC, eta, 1.0, 1.0))  # reference: scipy.stats.bernoulli


# --- finite differences ------------------------------------------------------------------------


@pytest.mark.parametrize("intercept", [0, 1])
@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_gradient_and_hessian_against_finite_differences(family, intercept):
    # Truncation error O(h^2) of central differences, and rounding of f over the step: relative
    # tolerances of a few h^2 and eps/h (not rounding comparisons, so not in ulps).
    data, beta, _, _, _ = make_problem(family, np.float64, intercept, True)
    d = beta.shape[0]
    f = lambda b: K.full_loglik(data, b, True, 0, N_ROWS)  # noqa: E731
    _, grad = full_loglik_grad(data, beta)
    hess = full_hessian(data, beta)
    h, eye = 1e-5, np.eye(d)
    fd_grad = np.array([(f(beta + h * e) - f(beta - h * e)) / (2 * h) for e in eye])
    assert_allclose(grad, fd_grad, rtol=1e-7, atol=1e-7)
    h = 1e-4
    fd_hess = np.array([[(f(beta + h * a + h * b) - f(beta + h * a - h * b)
                          - f(beta - h * a + h * b) + f(beta - h * a - h * b)) / (4 * h * h)
                         for b in eye] for a in eye])
    assert_allclose(hess, fd_hess, rtol=1e-5, atol=1e-5 * np.abs(hess).max())


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_eta_derivatives_against_finite_differences(family):
    eta = np.linspace(-20.0, 20.0, 81)
    y = {K.LINEAR: 1.5, K.LOGISTIC: 1.0, K.POISSON: 3.0}[family]
    f = lambda e: K.loglik_eta(family, e, y, NOISE_SD, 0.0)  # noqa: E731
    fp = lambda e: K.dloglik_eta(family, e, y, NOISE_SD)  # noqa: E731
    h = 1e-6
    for e in eta:
        scale = 1.0 + abs(f(e))
        assert_allclose(fp(e), (f(e + h) - f(e - h)) / (2 * h), rtol=1e-6, atol=1e-8 * scale / h)
        assert_allclose(K.d2loglik_eta(family, e, y, NOISE_SD), (fp(e + h) - fp(e - h)) / (2 * h),
                        rtol=1e-5, atol=1e-8 * (1.0 + abs(fp(e))) / h)


# --- stability ---------------------------------------------------------------------------------

ETA_EXTREME = np.array([-1000.0, -709.9, -700.0, -50.0, -1.0, 0.0, 1.0, 50.0, 700.0, 709.7,
                        709.9, 1000.0])
LOG_DBL_MAX = math.log(np.finfo(np.float64).max)  # ~709.78


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_eta_functions_never_nan_for_extreme_eta(family):
    for y in Y_VALUES[family]:
        ln = K.log_norm_const(family, y, NOISE_SD)
        for e in ETA_EXTREME:
            vals = [K.loglik_eta(family, e, y, NOISE_SD, ln), K.dloglik_eta(family, e, y, NOISE_SD),
                    K.d2loglik_eta(family, e, y, NOISE_SD)]
            assert not any(math.isnan(v) for v in vals), (y, e, vals)
            for e0 in ETA_EXTREME:
                dv = K.loglik_diff_eta(family, e, e0, y, NOISE_SD)
                assert not math.isnan(dv), (y, e, e0)
                if family != K.POISSON:
                    assert math.isfinite(dv), (y, e, e0, dv)
            if family != K.POISSON:
                assert all(math.isfinite(v) for v in vals), (y, e, vals)


def test_logistic_exact_values_in_the_tails():
    # log(1 + e^1000) = 1000 to double precision; sigma(+-1000) = 1, 0.
    for e, y, want in [(1000.0, 1.0, 0.0), (1000.0, 0.0, -1000.0), (-1000.0, 1.0, -1000.0),
                       (-1000.0, 0.0, 0.0)]:
        assert K.loglik_eta(K.LOGISTIC, e, y, 1.0, 0.0) == want
    assert K.dloglik_eta(K.LOGISTIC, 1000.0, 0.0, 1.0) == -1.0
    assert K.dloglik_eta(K.LOGISTIC, -1000.0, 1.0, 1.0) == 1.0
    assert K.d2loglik_eta(K.LOGISTIC, 1000.0, 0.0, 1.0) == 0.0
    # D across the tails: y (e' - e) - (softplus(e') - softplus(e))
    assert K.loglik_diff_eta(K.LOGISTIC, 1000.0, -1000.0, 0.0, 1.0) == -1000.0
    assert K.loglik_diff_eta(K.LOGISTIC, 1000.0, -1000.0, 1.0, 1.0) == 1000.0


def test_poisson_behaviour_beyond_float_range():
    y = 3.0
    ln = K.log_norm_const(K.POISSON, y, 1.0)
    # l is -inf once e^eta overflows, finite just below; never NaN.
    assert K.loglik_eta(K.POISSON, 709.9, y, 1.0, ln) == -math.inf
    assert K.loglik_eta(K.POISSON, 1000.0, y, 1.0, ln) == -math.inf
    assert math.isfinite(K.loglik_eta(K.POISSON, 709.7, y, 1.0, ln))
    # -3000 exactly, plus -log 6 (lgamma within 2 ulps): the sum rounds once more
    assert_ulps_close(K.loglik_eta(K.POISSON, -1000.0, y, 1.0, ln), -3000.0 - math.log(6.0),
                      ulps=2)
    # f' and f'' saturate at eta = 700 (finite) instead of overflowing.
    sat = math.exp(700.0)
    for e in (700.0, 709.9, 1000.0, 1e6):
        assert K.dloglik_eta(K.POISSON, e, y, 1.0) == y - sat
        assert K.d2loglik_eta(K.POISSON, e, y, 1.0) == -sat
    # D: 0 for equal predictors, exact while finite, signed inf beyond float range.
    for e in (-1000.0, 0.0, 705.0, 709.9, 1000.0):
        assert K.loglik_diff_eta(K.POISSON, e, e, y, 1.0) == 0.0
    # Reference y de - e^704.9 (e^de - 1) with de = 705 - 704.9 (exact in floating point),
    # within 3 ulps (exp, expm1, a product, a difference). Above e^700 the kernel forms
    # e^(705 + log(1 - e^-de)) in log space: the argument x ~ 702.6 rounds within
    # u (705 + |log(1 - e^-de)|), which e^x turns into a relative error of 708 u = 354 ulps.
    de = 705.0 - 704.9
    want = y * de - math.exp(704.9) * math.expm1(de)
    assert_ulps_close(K.loglik_diff_eta(K.POISSON, 705.0, 704.9, y, 1.0), want, ulps=360)
    assert_ulps_close(K.loglik_diff_eta(K.POISSON, 704.9, 705.0, y, 1.0), -want, ulps=360)
    assert K.loglik_diff_eta(K.POISSON, 1000.0, 999.0, y, 1.0) == -math.inf
    assert K.loglik_diff_eta(K.POISSON, 999.0, 1000.0, y, 1.0) == math.inf
    assert K.loglik_diff_eta(K.POISSON, 1000.0, 0.0, y, 1.0) == -math.inf
    # e^710 (e^1e-10 - 1) ~ 2.2e298: finite although e^710 alone overflows. Both sides take e^x
    # of an argument x ~ 687 formed by adding logs: x rounds within u (|710| + |log 1e-10|),
    # which e^x turns into a relative error of about 733 u per side, 733 ulps for two.
    e0, e1 = 710.0, 710.0 + 1e-10
    got = K.loglik_diff_eta(K.POISSON, e1, e0, y, 1.0)
    assert_ulps_close(got, y * (e1 - e0) - math.exp(e0 + math.log(math.expm1(e1 - e0))),
                      ulps=740)
    # a huge step up from a predictor whose e^eta underflows: y de - e^{e'} (no 0 * inf)
    assert K.loglik_diff_eta(K.POISSON, 0.0, -746.0, 0.0, 1.0) == -1.0  # e^-746 underflows: exact
    assert_ulps_close(K.loglik_diff_eta(K.POISSON, 2.0, -800.0, y, 1.0),
                      y * 802.0 - math.exp(2.0), ulps=2)  # e^2 and one subtraction


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_row_kernels_with_linear_predictor_up_to_1000(family):
    # One column x in [-1, 1] and beta = 1000: eta spans [-1000, 1000] (plus intercept 0).
    x = np.linspace(-1.0, 1.0, 41)
    X = x[:, None].copy()
    y = {K.LINEAR: np.sin(x), K.LOGISTIC: (x > 0.3).astype(float),
         K.POISSON: np.round(5 * (1 + x))}[family]
    data = K.GLMData(family, X, y, np.zeros(x.size), NOISE_SD, 1)
    beta, beta_new = np.array([0.0, 1000.0]), np.array([0.0, -1000.0])
    idx = np.arange(x.size, dtype=np.int64)
    ll, dd = np.empty(x.size), np.empty(x.size)
    K.batch_loglik(data, beta, idx, ll)
    # D_i = l_i(beta_new) - l_i(beta) as the sampler forms it: residual differences without
    # control variates (row cache of order 0: beta* = 0, eta* = offset)
    rows = RowCache(0, np.zeros(2), row_cache(data, np.zeros(2)), np.zeros(2), np.zeros((2, 2)))
    E.batch_residual_diffs(data, rows, beta_new, beta, idx, dd, np.empty((3, x.size)))
    eta, f1, f2 = (np.empty(x.size) for _ in range(3))
    K.full_eta_derivatives(data, beta, eta, f1, f2, 0, x.size)
    total, grad = full_loglik_grad(data, beta)
    hess = full_hessian(data, beta)
    for a in (ll, dd, f1, f2, grad, hess, np.array([total])):
        assert not np.isnan(a).any()
    assert np.isfinite(f1).all() and np.isfinite(grad).all() and np.isfinite(hess).all()
    if family == K.POISSON:
        over = 1000.0 * x > LOG_DBL_MAX
        assert_array_equal(ll[over], -np.inf)
        assert np.isfinite(ll[~over]).all()
        assert total == -np.inf
        # D from eta = 1000 x to -1000 x: +inf where the old point was beyond float range,
        # -inf where the new one is, 0 at x = 0.
        assert_array_equal(dd[over], np.inf)
        assert_array_equal(dd[-1000.0 * x > LOG_DBL_MAX], -np.inf)
        assert dd[x.size // 2] == 0.0
    else:
        assert np.isfinite(ll).all() and np.isfinite(dd).all() and math.isfinite(total)


# --- hypothesis: identities over a wide float range --------------------------------------------

wide = st.floats(min_value=-1e300, max_value=1e300, allow_nan=False)
moderate = st.floats(min_value=-30.0, max_value=30.0, allow_nan=False)
huge_eta = st.floats(min_value=-1e4, max_value=1e4, allow_nan=False)
family_y = st.sampled_from([(K.LINEAR, -2.0), (K.LINEAR, 4.0), (K.LOGISTIC, 0.0), (K.LOGISTIC, 1.0),
                            (K.POISSON, 0.0), (K.POISSON, 6.0)])


@HYP
@given(wide)
def test_softplus_and_sigmoid_identities(z):
    # Each of softplus, logaddexp, sigmoid and expit is within 1-2 ulps (2 ulps for two):
    # relative to the value, or to the smallest normal number where it underflows.
    sp, spm = K.softplus(z), K.softplus(-z)
    assert math.isfinite(sp) and sp >= max(z, 0.0) and sp >= 0.0
    assert_ulps_close(sp, np.logaddexp(0.0, z), ulps=4, scale=TINY)  # reference: numpy.logaddexp
    # log(1+e^z) - log(1+e^-z) = z: one rounding more, relative to the two terms
    assert_ulps_close(sp - spm, z, ulps=4, scale=sp + spm)
    s, sm = K.sigmoid(z), K.sigmoid(-z)
    assert 0.0 <= s <= 1.0
    assert_ulps_close(s, special.expit(z), ulps=4, scale=TINY)  # reference: scipy.special.expit
    assert_ulps_close(s + sm, 1.0, ulps=4)


@HYP
@given(st.floats(min_value=-700.0, max_value=700.0, allow_nan=False))
def test_sigmoid_is_derivative_of_softplus(z):
    # d/dz log(1 + e^z) = sigma(z) = exp(-softplus(-z)). e^-x turns the rounding of x
    # (u |x|) into a relative error u |x|, |x| / 2 ulps, on top of 4 ulps for the functions.
    x = K.softplus(-z)
    assert_ulps_close(K.sigmoid(z), math.exp(-x), ulps=4 + 0.5 * abs(x), scale=TINY)


@HYP
@given(family_y, huge_eta)
def test_loglik_diff_is_zero_for_equal_predictors(fy, e):
    family, y = fy
    assert K.loglik_diff_eta(family, e, e, y, NOISE_SD) == 0.0


@HYP
@given(family_y, moderate, moderate)
def test_loglik_diff_equals_difference_of_logliks(fy, e1, e0):
    # The kernel's D and the plain difference f(e1) - f(e0): each f within 4 ulps of its terms
    # (one more for the subtraction), the kernel's D within a few ulps of the same terms.
    family, y = fy
    f1 = K.loglik_eta(family, e1, y, NOISE_SD, 0.0)
    f0 = K.loglik_eta(family, e0, y, NOISE_SD, 0.0)
    got = K.loglik_diff_eta(family, e1, e0, y, NOISE_SD)
    scale = f_parts(family, e1, y, NOISE_SD) + f_parts(family, e0, y, NOISE_SD)
    assert_ulps_close(got, f1 - f0, ulps=10, scale=scale)
    assert_ulps_close(got, R.loglik_diff_eta(family, e1, e0, y, NOISE_SD), ulps=10, scale=scale)
    assert_ulps_close(K.loglik_diff_eta(family, e0, e1, y, NOISE_SD), -got, ulps=10, scale=scale)


@HYP
@given(family_y, huge_eta, huge_eta)
def test_loglik_diff_never_nan(fy, e1, e0):
    family, y = fy
    v = K.loglik_diff_eta(family, e1, e0, y, NOISE_SD)
    assert not math.isnan(v)
    if family != K.POISSON:
        assert math.isfinite(v)
    elif math.isinf(v):
        # only beyond float range, and with the sign of -(e^{e1} - e^{e0})
        assert max(e1, e0) > 700.0 and (v < 0) == (e1 > e0)


# --- parallel set-up kernels and their dispatch (models/_passes.py) ----------------------------

# Three blocks, the last one partial.
N_TALL = 2 * K.BLOCK_ROWS + 1234
MAX_THREADS = min(2, numba.config.NUMBA_NUM_THREADS)


@pytest.fixture(params=CASES)
def tall_problem(request):
    return make_problem(*request.param, n_rows=N_TALL)


def parallel_passes(data, beta, with_const=True):
    """(loglik, grad, hess, eta, f', f'') from the parallel kernels."""
    d = beta.shape[0]
    grad, hess = np.full(d, np.nan), np.full((d, d), np.nan)
    val = K.par_loglik_grad(data, beta, grad, with_const)
    K.par_hessian(data, beta, hess)
    cols = [np.full(N_TALL, np.nan) for _ in range(3)]
    K.par_eta_derivatives(data, beta, *cols)
    return [np.array(val), grad, hess, *cols]


@pytest.mark.parametrize("with_const", [True, False])
def test_parallel_kernels_match_references_and_serial_kernels(tall_problem, with_const):
    # Block sums added in block order, against the reference and the serial kernel: sums of
    # N_TALL terms in other orders (glm_problems.sum_ulps); per-row values within ROW_ULPS.
    data, beta, _, _, _ = tall_problem
    val, grad, hess, eta, f1, f2 = parallel_passes(data, beta, with_const)
    want_val, want_grad = R.full_loglik_grad(data, beta, with_const)
    val_scale = loglik_scale(data, beta, None, with_const).sum()
    g_scale = grad_scale(data, beta).sum(axis=0)
    h_scale = hessian_scale(data, beta)
    serial_val, serial_grad = full_loglik_grad(data, beta, with_const)
    for want in (want_val, serial_val):
        assert_ulps_close(val, want, ulps=sum_ulps(N_TALL), scale=val_scale)
    for want in (want_grad, serial_grad):
        assert_ulps_close(grad, want, ulps=sum_ulps(N_TALL), scale=g_scale)
    for want in (R.full_hessian(data, beta), full_hessian(data, beta)):
        assert_ulps_close(hess, want, ulps=sum_ulps(N_TALL), scale=h_scale)
    assert_array_equal(hess, hess.T)
    serial_cols = [np.full(N_TALL, np.nan) for _ in range(3)]
    K.full_eta_derivatives(data, beta, *serial_cols, 0, N_TALL)
    parts = eta_parts(data, beta)
    ref_eta = R.linear_predictor(data, beta)
    scales = (parts,
              f1_parts(data.family, ref_eta, data.y, NOISE_SD)
              + f2_parts(data.family, ref_eta, NOISE_SD) * parts,
              f2_parts(data.family, ref_eta, NOISE_SD) * (1.0 + parts))
    for got, want, serial, scale in zip((eta, f1, f2), R.full_eta_derivatives(data, beta),
                                        serial_cols, scales):
        assert_ulps_close(got, want, ulps=ROW_ULPS, scale=scale)
        assert_ulps_close(got, serial, ulps=ROW_ULPS, scale=scale)


def test_parallel_kernels_do_not_depend_on_the_thread_count(tall_problem):
    # the same blocked code with 1 and 2 threads: bitwise equal
    data, beta, _, _, _ = tall_problem
    before = numba.get_num_threads()
    try:
        runs = []
        for n_threads in (1, MAX_THREADS):
            numba.set_num_threads(n_threads)
            runs.append(parallel_passes(data, beta))
    finally:
        numba.set_num_threads(before)
    for a, b in zip(*runs):
        assert_array_equal(a, b)


def test_parallel_kernels_beyond_float_range():
    # Poisson with eta up to ~1000: -inf log-likelihood in some blocks, finite saturated
    # derivatives, never NaN; as the serial kernels (sums in another order: sum_ulps of the
    # sums of absolute values).
    data, beta, _, _, _ = make_problem(K.POISSON, np.float64, 1, False, n_rows=N_TALL)
    beta = 1000.0 * beta / np.abs(beta).max()
    val, grad, hess, *cols = parallel_passes(data, beta)
    val0, grad0 = full_loglik_grad(data, beta)
    hess0 = full_hessian(data, beta)
    assert val == val0 == -np.inf
    assert np.isfinite(grad).all() and np.isfinite(hess).all()
    phi = np.abs(R.design(data.X, 1))
    f1, f2 = np.abs(cols[1]), np.abs(cols[2])  # saturated at e^700 beyond float range
    assert_ulps_close(grad, grad0, ulps=sum_ulps(N_TALL), scale=phi.T @ f1)
    assert_ulps_close(hess, hess0, ulps=sum_ulps(N_TALL), scale=phi.T @ (f2[:, None] * phi))


@pytest.mark.parametrize("parallel", [False, True], ids=["serial", "parallel"])
def test_full_passes_dispatch_on_the_number_of_rows(tall_problem, monkeypatch, parallel):
    # The pass runs exactly the kernel chosen for this many rows: bitwise equal to calling it.
    data, beta, _, beta_star, _ = tall_problem
    monkeypatch.setattr(FP, "PARALLEL_MIN_ROWS", N_TALL if parallel else N_TALL + 1)
    val, grad = FP.loglik_grad(data, beta)
    hess = FP.hessian(data, beta)
    aux = row_cache(data, beta_star)
    cols = [np.empty(N_TALL) for _ in range(3)]
    if parallel:
        want = parallel_passes(data, beta)[:3]
        K.par_eta_derivatives(data, beta_star, *cols)
    else:
        want = [*full_loglik_grad(data, beta), full_hessian(data, beta)]
        K.full_eta_derivatives(data, beta_star, *cols, 0, N_TALL)
    for got, w in zip((val, grad, hess), want):
        assert_array_equal(got, w)
    assert_array_equal(aux, np.column_stack([data.y, *cols]))
    with pytest.raises(ValueError, match="beta"):
        FP.loglik_grad(data, beta[:-1])


def test_concurrent_callers_serialise_and_agree(monkeypatch):
    # Under the lock, threads launching the parallel kernels at once neither crash (a
    # "workqueue" threading layer would abort) nor change each other's values.
    monkeypatch.setattr(FP, "PARALLEL_MIN_ROWS", 0)
    data, beta, _, _, _ = make_problem(K.LOGISTIC, np.float32, 1, True, n_rows=N_TALL)

    def passes(_):
        val, grad = FP.loglik_grad(data, beta)
        aux = row_cache(data, beta)
        return [np.array(val), grad, FP.hessian(data, beta), aux]

    with ThreadPoolExecutor(4) as pool:
        results = list(pool.map(passes, range(8)))
    for other in results[1:]:
        for a, b in zip(results[0], other):
            assert_array_equal(a, b)
    assert numba.threading_layer() in ("omp", "tbb", "workqueue")
