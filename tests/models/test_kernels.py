"""The GLM kernels (models/_kernels.py) and the estimator kernels (_estimator_kernels.py).

What is checked, and against what:

* Every kernel against its pure-NumPy reference in ``tallchain.models._reference`` for the three
  families, float64 and float32 X, intercept on and off, with and without an offset, on an
  unsorted index batch with repeats.
* Gradients against central finite differences of the full log-likelihood kernel, Hessians
  against second central differences of it; the D kernels against l(b') - l(b).
* Stability for |eta| up to 1000 (and a wide float range in the hypothesis tests): never NaN;
  logistic and linear values finite. Poisson: l = y eta - e^eta - log y! is -inf once e^eta
  overflows (eta > log(DBL_MAX) ~ 709.78), never NaN; f' and f'' saturate at -e^700 (finite);
  D is exact while finite, 0 when eta' = eta, and +-inf with the right sign beyond float range.
* Control-variate identities (METHODS.md section 4): the closed-form proxy sums equal the row
  sums of the reference proxies; with cv order 2 on the linear family the residual differences
  vanish to rounding and the control-variate gradient equals the full gradient.
* The parallel set-up kernels (``par_*``) against the serial kernels on three blocks of rows
  (every case above, with and without constants): equal to rounding, bitwise equal for 1 and 2
  threads; ``_full_passes`` picks serial or parallel by the number of rows, and concurrent
  callers serialise on its lock.
* ``scaled_sum_and_variance`` against the reference, against numpy/scipy.stats moments, and the
  unbiasedness of its variance estimate by enumerating every subset of a tiny population.
"""

import itertools
import math
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from scipy import special, stats

from tallchain.mcmc import _estimators as EK
from tallchain.models import _passes as FP
from tallchain.posterior._control_variates import row_cache
from tallchain.models import _kernels as K
from tallchain.models import _reference as R

FAMILIES = {"linear": K.LINEAR, "logistic": K.LOGISTIC, "poisson": K.POISSON}
N_ROWS, N_COLS = 50, 3
NOISE_SD = 0.7
# Reference and kernel differ only in summation order (float32 X is widened exactly).
RTOL = 1e-12
HYP = settings(max_examples=300, deadline=None, derandomize=True, database=None)


@pytest.fixture
def rng():
    return np.random.default_rng(20240611)


def make_problem(family, dtype, intercept, with_offset, seed=7, n_rows=N_ROWS):
    """A small GLM problem with moderate linear predictors, and three coefficient vectors."""
    g = np.random.default_rng(seed)
    d = N_COLS + intercept
    X = np.ascontiguousarray(g.normal(0.0, 0.6, size=(n_rows, N_COLS)).astype(dtype))
    offset = g.uniform(-0.5, 0.5, n_rows) if with_offset else np.zeros(n_rows)
    beta = g.normal(0.0, 0.4, d)
    eta = R.linear_predictor(X, beta, intercept, offset)
    if family == K.LINEAR:
        y = eta + NOISE_SD * g.normal(size=n_rows)
    elif family == K.LOGISTIC:
        y = (g.random(n_rows) < special.expit(eta)).astype(np.float64)
    else:
        y = g.poisson(np.exp(eta)).astype(np.float64)
    args = (family, X, y, offset, NOISE_SD, intercept)
    beta_new = beta + g.normal(0.0, 0.3, d)
    beta_star = beta + g.normal(0.0, 0.1, d)
    idx = g.integers(0, n_rows, 20).astype(np.int64)  # unsorted, with repeats
    return args, beta, beta_new, beta_star, idx


CASES = [pytest.param((fam, dt, ic, off), id=f"{name}-{np.dtype(dt).name}-ic{ic}-{'off' if off else 'nooff'}")
         for name, fam in FAMILIES.items() for dt in (np.float64, np.float32)
         for ic in (0, 1) for off in (False, True)]


@pytest.fixture(params=CASES)
def problem(request):
    return make_problem(*request.param)


# --- kernels against the references ------------------------------------------------------------


def test_batch_loglik(problem):
    args, beta, _, _, idx = problem
    out = np.empty(idx.shape[0])
    K.batch_loglik(*args, beta, idx, out)
    assert_allclose(out, R.pointwise_loglik(*args, beta, idx), rtol=RTOL, atol=1e-13)


def test_batch_loglik_diff(problem):
    args, beta, beta_new, _, idx = problem
    out = np.empty(idx.shape[0])
    K.batch_loglik_diff(*args, beta_new, beta, idx, out)
    assert_allclose(out, R.pointwise_loglik_diff(*args, beta_new, beta, idx), rtol=1e-10,
                    atol=1e-12)
    # ...and against the kernel's own l(b') - l(b)
    l1, l0 = np.empty_like(out), np.empty_like(out)
    K.batch_loglik(*args, beta_new, idx, l1)
    K.batch_loglik(*args, beta, idx, l0)
    assert_allclose(out, l1 - l0, rtol=1e-10, atol=1e-12)


def test_batch_grad_rows_and_sum(problem):
    args, beta, _, _, idx = problem
    d = beta.shape[0]
    rows = np.full((idx.shape[0], d), np.nan)
    K.batch_grad_rows(*args, beta, idx, rows)
    assert_allclose(rows, R.grad_rows(*args, beta, idx), rtol=RTOL, atol=1e-14)
    total = np.full(d, np.nan)
    K.batch_grad_sum(*args, beta, idx, total)
    assert_allclose(total, R.grad_sum(*args, beta, idx), rtol=RTOL, atol=1e-13)


def test_full_sums(problem):
    args, beta, beta_new, _, _ = problem
    d = beta.shape[0]
    assert_allclose(K.full_loglik(*args, beta), R.loglik(*args, beta), rtol=RTOL)
    grad = np.full(d, np.nan)
    val = K.full_loglik_grad(*args, beta, grad)
    assert_allclose(val, R.loglik(*args, beta), rtol=RTOL)
    assert_allclose(grad, R.grad_sum(*args, beta), rtol=RTOL, atol=1e-13)
    assert_allclose(K.full_loglik_diff(*args, beta_new, beta), R.loglik_diff(*args, beta_new, beta),
                    rtol=1e-10, atol=1e-11)
    hess = np.full((d, d), np.nan)
    K.full_hessian(*args, beta, hess)
    assert_allclose(hess, R.hessian(*args, beta), rtol=RTOL, atol=1e-13)
    assert_array_equal(hess, hess.T)


@pytest.mark.parametrize("with_const", [True, False])
def test_full_sums_with_and_without_constants(problem, with_const):
    args, beta, _, _, _ = problem
    want = R.loglik(*args, beta, with_const=with_const)
    assert_allclose(K.full_loglik_shifted(*args, beta, with_const), want, rtol=RTOL)
    grad = np.full(beta.shape[0], np.nan)
    assert_allclose(K.full_loglik_grad_shifted(*args, beta, grad, with_const), want, rtol=RTOL)
    assert_allclose(grad, R.grad_sum(*args, beta), rtol=RTOL, atol=1e-13)


def test_full_eta_derivatives(problem):
    args, beta, _, _, _ = problem
    eta, f1, f2 = (np.full(N_ROWS, np.nan) for _ in range(3))
    K.full_eta_derivatives(*args, beta, eta, f1, f2)
    for got, want in zip((eta, f1, f2), R.eta_derivatives(*args, beta)):
        assert_allclose(got, want, rtol=RTOL, atol=1e-14)


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_eta_functions_match_reference_on_a_grid(family):
    eta = np.linspace(-30.0, 30.0, 241)
    for y in {K.LINEAR: (-2.0, 0.0, 3.5), K.LOGISTIC: (0.0, 1.0), K.POISSON: (0.0, 1.0, 12.0)}[family]:
        ln = float(R.log_norm_const(family, y, NOISE_SD))
        assert_allclose(K.log_norm_const(family, y, NOISE_SD), ln, rtol=1e-15, atol=0)
        got = np.array([[K.loglik_eta(family, e, y, NOISE_SD, ln), K.dloglik_eta(family, e, y, NOISE_SD),
                         K.d2loglik_eta(family, e, y, NOISE_SD)] for e in eta])
        assert_allclose(got[:, 0], R.loglik_eta(family, eta, y, NOISE_SD), rtol=1e-14, atol=1e-14)
        assert_allclose(got[:, 1], R.dloglik_eta(family, eta, y, NOISE_SD), rtol=1e-14, atol=1e-15)
        assert_allclose(got[:, 2], R.d2loglik_eta(family, eta, y, NOISE_SD), rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_loglik_and_dloglik_together(family):
    # the fused (f, f') kernel against the separate kernels and the reference, tails included
    eta = np.r_[-1000.0, -709.9, np.linspace(-40.0, 40.0, 161), 709.9, 1000.0]
    for y in Y_VALUES[family]:
        ln = K.log_norm_const(family, y, NOISE_SD)
        got = np.array([K.loglik_and_dloglik_eta(family, e, y, NOISE_SD, ln) for e in eta])
        sep = np.array([(K.loglik_eta(family, e, y, NOISE_SD, ln), K.dloglik_eta(family, e, y, NOISE_SD))
                        for e in eta])
        assert not np.isnan(got).any()
        # f = y eta - ... + log_norm cancels: compare in units of its largest terms
        scale = 1.0 + np.abs(y * eta) + abs(ln) + np.abs(eta)
        assert_allclose(got[:, 0] / scale, sep[:, 0] / scale, rtol=0, atol=1e-15)
        assert_allclose(got[:, 1], sep[:, 1], rtol=1e-15, atol=1e-15)
        mid = np.abs(eta) <= 40.0
        assert_allclose(got[mid, 0] / scale[mid],
                        R.loglik_eta(family, eta[mid], y, NOISE_SD) / scale[mid], rtol=0,
                        atol=1e-15)
        assert_allclose(got[mid, 1], R.dloglik_eta(family, eta[mid], y, NOISE_SD), rtol=1e-14,
                        atol=1e-15)


def test_log_norm_constants():
    # reference: the normal density at its mean is 1/(s sqrt(2 pi)); Poisson pmf has 1/y!
    assert_allclose(K.log_norm_const(K.LINEAR, 0.3, 2.0), stats.norm(0.0, 2.0).logpdf(0.0),
                    rtol=1e-15)  # reference: scipy.stats.norm.logpdf
    assert_allclose(K.log_norm_const(K.POISSON, 5.0, 1.0), -math.log(120.0), rtol=1e-15)
    # the whole per-datum log-likelihood against scipy.stats
    y, eta = 4.0, 0.8
    assert_allclose(K.loglik_eta(K.POISSON, eta, y, 1.0, K.log_norm_const(K.POISSON, y, 1.0)),
                    stats.poisson(math.exp(eta)).logpmf(4), rtol=1e-14)  # reference: scipy.stats.poisson
    assert_allclose(K.loglik_eta(K.LINEAR, eta, y, 1.3, K.log_norm_const(K.LINEAR, y, 1.3)),
                    stats.norm(eta, 1.3).logpdf(y), rtol=1e-14)  # reference: scipy.stats.norm
    assert_allclose(K.loglik_eta(K.LOGISTIC, eta, 1.0, 1.0, 0.0),
                    stats.bernoulli(special.expit(eta)).logpmf(1), rtol=1e-14)  # reference: scipy.stats.bernoulli


# --- finite differences ------------------------------------------------------------------------


@pytest.mark.parametrize("intercept", [0, 1])
@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_gradient_and_hessian_against_finite_differences(family, intercept):
    args, beta, _, _, _ = make_problem(family, np.float64, intercept, True)
    d = beta.shape[0]
    f = lambda b: K.full_loglik(*args, b)  # noqa: E731
    grad = np.empty(d)
    K.full_loglik_grad(*args, beta, grad)
    hess = np.empty((d, d))
    K.full_hessian(*args, beta, hess)
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
Y_VALUES = {K.LINEAR: (-3.0, 0.0, 2.5), K.LOGISTIC: (0.0, 1.0), K.POISSON: (0.0, 1.0, 7.0, 1000.0)}
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
    assert_allclose(K.loglik_eta(K.POISSON, -1000.0, y, 1.0, ln), -3000.0 - math.log(6.0), rtol=1e-15)
    # f' and f'' saturate at eta = 700 (finite) instead of overflowing.
    sat = math.exp(700.0)
    for e in (700.0, 709.9, 1000.0, 1e6):
        assert K.dloglik_eta(K.POISSON, e, y, 1.0) == y - sat
        assert K.d2loglik_eta(K.POISSON, e, y, 1.0) == -sat
    # D: 0 for equal predictors, exact while finite, signed inf beyond float range.
    for e in (-1000.0, 0.0, 705.0, 709.9, 1000.0):
        assert K.loglik_diff_eta(K.POISSON, e, e, y, 1.0) == 0.0
    want = y * 0.1 - (math.exp(705.0) - math.exp(704.9))  # both terms representable
    assert_allclose(K.loglik_diff_eta(K.POISSON, 705.0, 704.9, y, 1.0), want, rtol=1e-12)
    assert_allclose(K.loglik_diff_eta(K.POISSON, 704.9, 705.0, y, 1.0), -want, rtol=1e-12)
    assert K.loglik_diff_eta(K.POISSON, 1000.0, 999.0, y, 1.0) == -math.inf
    assert K.loglik_diff_eta(K.POISSON, 999.0, 1000.0, y, 1.0) == math.inf
    assert K.loglik_diff_eta(K.POISSON, 1000.0, 0.0, y, 1.0) == -math.inf
    # e^710 (1 - e^-1e-10) ~ 2.2e298: finite although e^710 alone overflows.
    e0, e1 = 710.0, 710.0 + 1e-10
    got = K.loglik_diff_eta(K.POISSON, e1, e0, y, 1.0)
    assert_allclose(got, -math.exp(e0 + math.log(e1 - e0)), rtol=1e-9)
    # a huge step up from a predictor whose e^eta underflows: y de - e^{e'} (no 0 * inf)
    assert_allclose(K.loglik_diff_eta(K.POISSON, 0.0, -746.0, 0.0, 1.0), -1.0, rtol=1e-15)
    assert_allclose(K.loglik_diff_eta(K.POISSON, 2.0, -800.0, y, 1.0), y * 802.0 - math.exp(2.0),
                    rtol=1e-14)


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_row_kernels_with_linear_predictor_up_to_1000(family):
    # One column x in [-1, 1] and beta = 1000: eta spans [-1000, 1000] (plus intercept 0).
    x = np.linspace(-1.0, 1.0, 41)
    X = x[:, None].copy()
    y = {K.LINEAR: np.sin(x), K.LOGISTIC: (x > 0.3).astype(float),
         K.POISSON: np.round(5 * (1 + x))}[family]
    args = (family, X, y, np.zeros(x.size), NOISE_SD, 1)
    beta, beta_new = np.array([0.0, 1000.0]), np.array([0.0, -1000.0])
    idx = np.arange(x.size, dtype=np.int64)
    ll, dd, rows = np.empty(x.size), np.empty(x.size), np.empty((x.size, 2))
    K.batch_loglik(*args, beta, idx, ll)
    K.batch_loglik_diff(*args, beta_new, beta, idx, dd)
    K.batch_grad_rows(*args, beta, idx, rows)
    grad, hess = np.empty(2), np.empty((2, 2))
    total = K.full_loglik_grad(*args, beta, grad)
    K.full_hessian(*args, beta, hess)
    for a in (ll, dd, rows, grad, hess, np.array([total])):
        assert not np.isnan(a).any()
    assert np.isfinite(rows).all() and np.isfinite(grad).all() and np.isfinite(hess).all()
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
    sp, spm = K.softplus(z), K.softplus(-z)
    assert math.isfinite(sp) and sp >= max(z, 0.0) and sp >= 0.0
    assert_allclose(sp, np.logaddexp(0.0, z), rtol=1e-14, atol=1e-300)  # reference: numpy.logaddexp
    assert_allclose(sp - spm, z, rtol=1e-14, atol=1e-15)  # log(1+e^z) - log(1+e^-z) = z
    s, sm = K.sigmoid(z), K.sigmoid(-z)
    assert 0.0 <= s <= 1.0
    assert_allclose(s, special.expit(z), rtol=1e-14, atol=1e-300)  # reference: scipy.special.expit
    assert_allclose(s + sm, 1.0, rtol=0, atol=4.5e-16)


@HYP
@given(st.floats(min_value=-700.0, max_value=700.0, allow_nan=False))
def test_sigmoid_is_derivative_of_softplus(z):
    # d/dz log(1 + e^z) = sigma(z) = exp(-softplus(-z))
    assert_allclose(K.sigmoid(z), math.exp(-K.softplus(-z)), rtol=1e-12, atol=0)


@HYP
@given(family_y, huge_eta)
def test_loglik_diff_is_zero_for_equal_predictors(fy, e):
    family, y = fy
    assert K.loglik_diff_eta(family, e, e, y, NOISE_SD) == 0.0


@HYP
@given(family_y, moderate, moderate)
def test_loglik_diff_equals_difference_of_logliks(fy, e1, e0):
    family, y = fy
    f1 = K.loglik_eta(family, e1, y, NOISE_SD, 0.0)
    f0 = K.loglik_eta(family, e0, y, NOISE_SD, 0.0)
    got = K.loglik_diff_eta(family, e1, e0, y, NOISE_SD)
    assert_allclose(got, f1 - f0, rtol=0, atol=1e-13 * (1.0 + abs(f1) + abs(f0)))
    assert_allclose(K.loglik_diff_eta(family, e0, e1, y, NOISE_SD), -got, rtol=1e-14,
                    atol=1e-13 * (1.0 + abs(f1) + abs(f0)))


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


# --- estimator kernels: control variates -------------------------------------------------------


def cv_cache(args, beta_star):
    """The row cache aux = (y, eta*, f'*, f''*) and g*, H*, as the sampler caches them."""
    d = beta_star.shape[0]
    aux = row_cache(*args, beta_star)
    g, H = np.empty(d), np.empty((d, d))
    K.full_loglik_grad(*args, beta_star, g)
    K.full_hessian(*args, beta_star, H)
    return aux, g, H


def batch_args(args):
    """(family, X, aux-less args...) -> the batch kernels' leading arguments."""
    family, X, _, _, noise_sd, intercept = args
    return family, X, noise_sd, intercept


def work_for(idx):
    """Scratch buffers of the batch kernels, filled with NaN so no stale value can pass."""
    return np.full((3, idx.shape[0]), np.nan)


@pytest.mark.parametrize("cv_order", [0, 1, 2])
def test_batch_residual_diffs(problem, cv_order):
    args, beta, beta_new, beta_star, idx = problem
    aux, _, _ = cv_cache(args, beta_star)
    out = np.full(idx.shape[0], np.nan)
    family, X, noise_sd, intercept = batch_args(args)
    EK.batch_residual_diffs(family, X, aux, noise_sd, intercept, beta_new - beta_star,
                            beta - beta_star, idx, cv_order, out, work_for(idx))
    want = R.residual_diffs(*args, beta_new, beta, beta_star, cv_order, idx)
    assert_allclose(out, want, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("cv_order", [0, 1, 2])
def test_cv_gradient_rows(problem, cv_order):
    args, beta, _, beta_star, idx = problem
    aux, _, _ = cv_cache(args, beta_star)
    out = np.full(beta.shape[0], np.nan)
    family, X, noise_sd, intercept = batch_args(args)
    EK.cv_gradient_rows(family, X, aux, noise_sd, intercept, beta - beta_star, idx, cv_order, out,
                        work_for(idx))
    want = R.cv_gradient_sum(*args, beta, beta_star, cv_order, idx)
    assert_allclose(out, want, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("cv_order", [1, 2])
def test_proxy_sums_equal_row_sums_of_proxies(problem, cv_order):
    args, beta, beta_new, beta_star, _ = problem
    _, g, H = cv_cache(args, beta_star)
    got = EK.proxy_loglik_diff_sum(cv_order, g, H, beta_new, beta, beta_star)
    want = R.proxy_loglik_diff_sum(*args, beta_new, beta, beta_star, cv_order)
    assert_allclose(got, want, rtol=1e-10, atol=1e-11)
    out = np.full(beta.shape[0], np.nan)
    EK.proxy_gradient_sum(cv_order, g, H, beta, beta_star, out)
    assert_allclose(out, R.proxy_gradient_sum(*args, beta, beta_star, cv_order), rtol=1e-10,
                    atol=1e-11)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("intercept", [0, 1])
def test_second_order_cv_is_exact_for_linear_family(dtype, intercept):
    args, beta, beta_new, beta_star, idx = make_problem(K.LINEAR, dtype, intercept, True)
    aux, g, H = cv_cache(args, beta_star)
    diffs = np.full(idx.shape[0], np.nan)
    family, X, noise_sd, intercept_ = batch_args(args)
    EK.batch_residual_diffs(family, X, aux, noise_sd, intercept_, beta_new - beta_star,
                            beta - beta_star, idx, 2, diffs, work_for(idx))
    d_scale = np.abs(R.pointwise_loglik_diff(*args, beta_new, beta, idx)).max()
    assert_allclose(diffs, 0.0, rtol=0, atol=1e-13 * d_scale)
    # so the estimate of sum_i D_i is the proxy sum alone, and it is exact
    assert_allclose(EK.proxy_loglik_diff_sum(2, g, H, beta_new, beta, beta_star),
                    K.full_loglik_diff(*args, beta_new, beta), rtol=1e-12)
    # CV gradient = sum_i grad q_i(beta) + (N/n) sum_{idx} [grad l_i - grad q_i] = full gradient
    proxy, batch = np.empty(beta.shape[0]), np.empty(beta.shape[0])
    EK.proxy_gradient_sum(2, g, H, beta, beta_star, proxy)
    EK.cv_gradient_rows(family, X, aux, noise_sd, intercept_, beta - beta_star, idx, 2, batch,
                        work_for(idx))
    full = np.empty(beta.shape[0])
    K.full_loglik_grad(*args, beta, full)
    assert_allclose(proxy + N_ROWS / idx.shape[0] * batch, full, rtol=1e-12,
                    atol=1e-12 * np.abs(full).max())
    assert_allclose(proxy + N_ROWS / idx.shape[0] * batch,
                    R.cv_gradient(*args, beta, beta_star, 2, idx), rtol=1e-12,
                    atol=1e-12 * np.abs(full).max())


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_cv_gradient_is_unbiased_over_all_batches(family):
    # Averaged over every batch of size 2 from a tiny population, the CV gradient is the full
    # gradient (exact identity, any cv order; Baker et al. 2019).
    g = np.random.default_rng(3)
    X = g.normal(0.0, 0.6, size=(6, 2))
    y = {K.LINEAR: g.normal(size=6), K.LOGISTIC: np.array([0, 1, 1, 0, 1, 0.0]),
         K.POISSON: np.array([0, 2, 1, 4, 1, 0.0])}[family]
    args = (family, X, y, np.zeros(6), NOISE_SD, 1)
    beta, beta_star = np.array([0.1, -0.3, 0.5]), np.array([0.0, -0.2, 0.3])
    full = R.grad_sum(*args, beta)
    for order in (1, 2):
        est = [R.cv_gradient(*args, beta, beta_star, order, np.array(s))
               for s in itertools.combinations(range(6), 2)]
        assert_allclose(np.mean(est, axis=0), full, rtol=1e-12, atol=1e-13)


def test_prior_kernels(rng):
    d = 4
    a = rng.normal(size=(d, d))
    prec = a @ a.T + d * np.eye(d)
    mean, b0, b1 = rng.normal(size=d), rng.normal(size=d), rng.normal(size=d)
    assert_allclose(EK.prior_logpdf_diff(mean, prec, b1, b0), R.prior_logpdf_diff(mean, prec, b1, b0),
                    rtol=1e-12)
    # reference: scipy.stats.multivariate_normal log density difference
    mvn = stats.multivariate_normal(mean, np.linalg.inv(prec))
    assert_allclose(EK.prior_logpdf_diff(mean, prec, b1, b0), mvn.logpdf(b1) - mvn.logpdf(b0),
                    rtol=1e-10)
    out = np.full(d, 2.0)
    EK.add_prior_grad(mean, prec, b0, out)
    assert_allclose(out, 2.0 + R.prior_grad(mean, prec, b0), rtol=1e-13)


# --- estimator kernels: scaled sum and variance ------------------------------------------------


def test_scaled_sum_and_variance_matches_reference_and_scipy(rng):
    values = rng.gamma(2.0, 1.5, size=37)
    n_rows = 1000
    got = EK.scaled_sum_and_variance(values, n_rows)
    assert_allclose(got, R.scaled_sum_and_variance(values, n_rows), rtol=1e-12)
    n = values.size
    # reference: numpy var (ddof=1) and scipy.stats skew / kurtosis (bias=True, Fisher)
    assert_allclose(got[0], n_rows * values.mean(), rtol=1e-14)
    assert_allclose(got[1], n_rows**2 * (1 - n / n_rows) * values.var(ddof=1) / n, rtol=1e-12)
    assert_allclose(got[2], stats.skew(values, bias=True), rtol=1e-12)
    assert_allclose(got[3], stats.kurtosis(values, fisher=True, bias=True), rtol=1e-12)


def test_scaled_variance_is_unbiased_over_all_subsets():
    # Cochran (Sampling Techniques, ch. 2): over all n-subsets of a finite population the mean of
    # N^2 (1 - n/N) s^2 / n equals the variance of N * (batch mean). Exact enumeration.
    pop = np.array([0.3, -1.2, 2.5, 0.0, 4.1, -0.7, 1.9, 3.3])
    n_rows, n = pop.size, 3
    res = [EK.scaled_sum_and_variance(pop[list(s)], n_rows)
           for s in itertools.combinations(range(n_rows), n)]
    est = np.array([r[0] for r in res])
    var = np.array([r[1] for r in res])
    assert_allclose(est.mean(), pop.sum(), rtol=1e-13)
    assert_allclose(var.mean(), est.var(), rtol=1e-12)


def test_scaled_sum_and_variance_edge_cases():
    # n = N: no sampling error; one value: no variance estimate; equal values: shape 0.
    values = np.array([1.0, 2.0, 4.0])
    est, var, _, _ = EK.scaled_sum_and_variance(values, 3)
    assert est == 7.0 and var == 0.0
    assert EK.scaled_sum_and_variance(np.array([2.5]), 10) == (25.0, 0.0, 0.0, 0.0)
    assert EK.scaled_sum_and_variance(np.full(8, 0.5), 100) == (50.0, 0.0, 0.0, 0.0)
    assert R.scaled_sum_and_variance(np.full(8, 0.5), 100) == (50.0, 0.0, 0.0, 0.0)


# --- parallel set-up kernels and their dispatch (tallchain._full_passes) -----------------------

# Three blocks, the last one partial.
N_TALL = 2 * K.BLOCK_ROWS + 1234
MAX_THREADS = min(2, numba.config.NUMBA_NUM_THREADS)


@pytest.fixture(params=CASES)
def tall_problem(request):
    return make_problem(*request.param, n_rows=N_TALL)


def parallel_passes(args, beta, with_const=True):
    """(loglik, grad, hess, eta, f', f'') from the parallel kernels."""
    d = beta.shape[0]
    grad, hess = np.full(d, np.nan), np.full((d, d), np.nan)
    val = K.par_loglik_grad_shifted(*args, beta, grad, with_const)
    K.par_hessian(*args, beta, hess)
    cols = [np.full(N_TALL, np.nan) for _ in range(3)]
    K.par_eta_derivatives(*args, beta, *cols)
    return [np.array(val), grad, hess, *cols]


@pytest.mark.parametrize("with_const", [True, False])
def test_parallel_kernels_match_serial_kernels(tall_problem, with_const):
    args, beta, _, _, _ = tall_problem
    d = beta.shape[0]
    val, grad, hess, eta, f1, f2 = parallel_passes(args, beta, with_const)
    grad0, hess0 = np.empty(d), np.empty((d, d))
    assert_allclose(val, K.full_loglik_grad_shifted(*args, beta, grad0, with_const), rtol=RTOL)
    # blocked and serial sums differ in rounding only; atol covers components that cancel
    assert_allclose(grad, grad0, rtol=RTOL, atol=1e-11)
    K.full_hessian(*args, beta, hess0)
    assert_allclose(hess, hess0, rtol=RTOL, atol=1e-11)
    assert_array_equal(hess, hess.T)
    cols = [np.empty(N_TALL) for _ in range(3)]
    K.full_eta_derivatives(*args, beta, *cols)
    for got, want in zip((eta, f1, f2), cols):
        assert_array_equal(got, want)


def test_parallel_kernels_do_not_depend_on_the_thread_count(tall_problem):
    args, beta, _, _, _ = tall_problem
    before = numba.get_num_threads()
    try:
        runs = []
        for n_threads in (1, MAX_THREADS):
            numba.set_num_threads(n_threads)
            runs.append(parallel_passes(args, beta))
    finally:
        numba.set_num_threads(before)
    for a, b in zip(*runs):
        assert_array_equal(a, b)


def test_parallel_kernels_beyond_float_range():
    # Poisson with eta up to ~1000: -inf log-likelihood in some blocks, finite saturated
    # derivatives, never NaN; as the serial kernels.
    args, beta, _, _, _ = make_problem(K.POISSON, np.float64, 1, False, n_rows=N_TALL)
    beta = 1000.0 * beta / np.abs(beta).max()
    val, grad, hess, *cols = parallel_passes(args, beta)
    grad0, hess0 = np.empty(beta.shape[0]), np.empty_like(hess)
    assert val == K.full_loglik_grad(*args, beta, grad0) == -np.inf
    K.full_hessian(*args, beta, hess0)
    assert np.isfinite(grad).all() and np.isfinite(hess).all()
    assert_allclose(grad, grad0, rtol=RTOL)
    assert_allclose(hess, hess0, rtol=RTOL)


@pytest.mark.parametrize("parallel", [False, True], ids=["serial", "parallel"])
def test_full_passes_dispatch_on_the_number_of_rows(tall_problem, monkeypatch, parallel):
    args, beta, _, beta_star, _ = tall_problem
    monkeypatch.setattr(FP, "PARALLEL_MIN_ROWS", N_TALL if parallel else N_TALL + 1)
    val, grad = FP.loglik_grad(args, beta)
    hess = FP.hessian(args, beta)
    aux = row_cache(*args, beta_star)
    if parallel:
        want = parallel_passes(args, beta)[:3]
    else:
        want = [None, np.empty_like(grad), np.empty_like(hess)]
        want[0] = K.full_loglik_grad(*args, beta, want[1])
        K.full_hessian(*args, beta, want[2])
    for got, w in zip((val, grad, hess), want):
        assert_array_equal(got, w)
    cols = [np.empty(N_TALL) for _ in range(3)]
    K.full_eta_derivatives(*args, beta_star, *cols)
    assert_array_equal(aux, np.column_stack([args[2], *cols]))
    with pytest.raises(ValueError, match="beta"):
        FP.loglik_grad(args, beta[:-1])


def test_concurrent_callers_serialise_and_agree(monkeypatch):
    # Under the lock, threads launching the parallel kernels at once neither crash (a
    # "workqueue" threading layer would abort) nor change each other's values.
    monkeypatch.setattr(FP, "PARALLEL_MIN_ROWS", 0)
    args, beta, _, _, _ = make_problem(K.LOGISTIC, np.float32, 1, True, n_rows=N_TALL)

    def passes(_):
        val, grad = FP.loglik_grad(args, beta)
        aux = row_cache(*args, beta)
        return [np.array(val), grad, FP.hessian(args, beta), aux]

    with ThreadPoolExecutor(4) as pool:
        results = list(pool.map(passes, range(8)))
    for other in results[1:]:
        for a, b in zip(results[0], other):
            assert_array_equal(a, b)
    assert numba.threading_layer() in ("omp", "tbb", "workqueue")
