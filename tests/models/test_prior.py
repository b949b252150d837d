"""`GaussianPrior`: its construction checks, and `resolve` (mean vector, precision and
covariance, and its input errors)."""

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from ulps import assert_ulps_close

import tallchain as tc
from tallchain import InputError

# The diagonal priors below are sd**2 and 1/sd**2: one or two correctly rounded IEEE operations
# (each within half an ulp), compared with the same closed form written here. 2 ulps.
ROUNDED_TWICE = 2


def _assert_diagonal_prior(resolved, mean, sd):
    got_mean, prec, cov = resolved
    sd = np.asarray(sd, dtype=float)
    for arr in (got_mean, prec, cov):
        assert arr.dtype == np.float64
    assert_array_equal(got_mean, mean)  # the given values, copied: no arithmetic
    assert_ulps_close(cov, np.diag(sd**2), ulps=ROUNDED_TWICE)
    assert_ulps_close(prec, np.diag(1.0 / sd**2), ulps=ROUNDED_TWICE)


def test_default_is_isotropic_sd_10():
    _assert_diagonal_prior(tc.GaussianPrior().resolve(3), np.zeros(3), np.full(3, 10.0))


def test_isotropic_with_scalar_mean():
    _assert_diagonal_prior(tc.GaussianPrior(mean=1.5, sd=2.0).resolve(4), np.full(4, 1.5),
                           np.full(4, 2.0))


def test_per_coefficient_sd_and_mean():
    sd = [1.0, 0.5, 4.0]
    _assert_diagonal_prior(tc.GaussianPrior(mean=[0.0, -1.0, 2.0], sd=sd).resolve(3),
                           [0.0, -1.0, 2.0], sd)


def test_full_covariance(rng):
    a = rng.normal(size=(4, 4))
    c = a @ a.T + 0.5 * np.eye(4)
    cov_in = 0.5 * (c + c.T)  # symmetric to the bit, whatever the BLAS did with a @ a.T
    mean, prec, cov = tc.GaussianPrior(mean=[1.0, 2.0, 3.0, 4.0], cov=cov_in, sd=-1.0).resolve(4)
    # sd is ignored when cov is given; the matrix comes back as given (symmetrising a
    # symmetric matrix, 0.5 * (m + m), is exact).
    assert_array_equal(cov, cov_in)
    assert_array_equal(prec, prec.T)
    # The precision (inverse through the Cholesky factor) against LAPACK's LU inverse: two
    # backward-stable inversions each err by about n * cond(cov) * eps relative to the size
    # of the inverse (Higham, Accuracy and Stability of Numerical Algorithms, ch. 14; from
    # memory), so allow 4 n cond(cov) ulps of max|inverse|; same for the residual prec @ cov - I.
    ulps = 4 * 4 * np.linalg.cond(cov_in)
    inv = np.linalg.inv(cov_in)
    assert_ulps_close(prec, inv, ulps=ulps, scale=np.abs(inv).max())
    assert_ulps_close(prec @ cov_in, np.eye(4), ulps=ulps, scale=1.0)
    assert_array_equal(mean, [1.0, 2.0, 3.0, 4.0])


def test_model_resolves_prior_with_intercept_first(rng):
    X = rng.normal(size=(10, 2))
    y = rng.normal(size=10)
    model = tc.LinearRegression(X, y, noise_sd=1.0, prior=tc.GaussianPrior(sd=[5.0, 1.0, 2.0]))
    assert_ulps_close(np.diag(model.prior_cov), [25.0, 1.0, 4.0], ulps=ROUNDED_TWICE)
    with pytest.raises(InputError, match=r"prior sd: has 3 entries, expected 1 or 2"):
        tc.LinearRegression(X, y, add_intercept=False, prior=tc.GaussianPrior(sd=[5.0, 1.0, 2.0]))
    with pytest.raises(InputError, match=r"prior: must be a GaussianPrior, got float"):
        tc.LinearRegression(X, y, prior=10.0)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"sd": -1.0}, r"^prior sd: must be > 0, got -1\.0; give positive standard deviations$"),
    ({"sd": -1}, r"^prior sd: must be > 0, got -1\.0; give positive"),
    ({"sd": 0.0}, r"^prior sd: must be > 0, got 0\.0"),
    ({"sd": [1.0, -2.0, 3.0]}, r"^prior sd: must be > 0, got -2\.0"),
    ({"sd": [1.0, np.inf, 1.0]}, r"^prior sd: contains NaN or inf; give finite values$"),
    ({"sd": "wide"}, r"^prior sd: must be a number or a list of numbers, got 'wide'; give a "
                     r"number or a list of numbers$"),
    ({"sd": None}, r"^prior sd: must be a number or a list of numbers, got None"),
    ({"sd": [1.0, "x"]}, r"^prior sd: must be a number or a list of numbers, got \[1\.0, 'x'\]"),
    ({"sd": [1.0, [2.0, 3.0]]}, r"^prior sd: must be a number or a list of numbers"),
    ({"mean": np.nan}, r"^prior mean: contains NaN or inf"),
    ({"mean": "zero"}, r"^prior mean: must be a number or a list of numbers, got 'zero'"),
    ({"cov": [[1.0, 0.5], [0.0, 1.0]]}, r"^prior cov: is not symmetric"),
    ({"cov": [[1.0, 2.0], [2.0, 1.0]]}, r"^prior cov: is not positive definite"),
    ({"cov": [[1.0, 0.0], [0.0, 0.0]]}, r"^prior cov: is not positive definite"),
    ({"cov": -np.eye(2)}, r"^prior cov: is not positive definite"),
    ({"cov": [[1.0, np.nan], [np.nan, 1.0]]}, r"^prior cov: contains NaN or inf"),
    ({"cov": np.ones((2, 3))}, r"^prior cov: has shape \(2, 3\), not square; give an "
                               r"\(n_coef, n_coef\) matrix"),
    ({"cov": [1.0, 2.0]}, r"^prior cov: has shape \(2,\), not square"),
    ({"cov": "eye"}, r"^prior cov: must be a matrix of numbers, got 'eye'"),
], ids=["negative-sd", "negative-int-sd", "zero-sd", "one-negative-sd", "inf-sd", "string-sd",
        "none-sd", "string-in-sd", "ragged-sd", "nan-mean", "string-mean", "cov-asymmetric",
        "cov-indefinite", "cov-singular", "cov-negative", "cov-nan", "cov-not-square",
        "cov-1d", "cov-string"])
def test_construction_errors(kwargs, match):
    # values are checked when the prior is made, not only when a model is built
    with pytest.raises(InputError, match=match):
        tc.GaussianPrior(**kwargs)


def test_construction_accepts_numpy_and_integer_values():
    # numpy scalars, integers and float32 arrays are numbers: they resolve to the float64
    # mean, precision and covariance the same values give as Python floats.
    _assert_diagonal_prior(tc.GaussianPrior(mean=np.float32(1.0), sd=np.int64(3)).resolve(2),
                           [1.0, 1.0], [3.0, 3.0])
    _assert_diagonal_prior(
        tc.GaussianPrior(mean=[0, 1], sd=np.array([1.0, 2.0], dtype=np.float32)).resolve(2),
        [0.0, 1.0], [1.0, 2.0])
    mean, prec, cov = tc.GaussianPrior(cov=np.eye(3, dtype=np.float32), sd=None).resolve(3)
    assert mean.dtype == prec.dtype == cov.dtype == np.float64
    assert_array_equal(mean, np.zeros(3))
    assert_array_equal(cov, np.eye(3))  # sd is ignored with cov; float32 ones are exact
    # the inverse of the identity through its Cholesky factor (the identity): exact up to the
    # rounding of the LAPACK inverse, 2 ulps
    assert_ulps_close(prec, np.eye(3), ulps=ROUNDED_TWICE)


@pytest.mark.parametrize(("prior", "n", "match"), [
    (tc.GaussianPrior(sd=[1.0, 2.0]), 3, r"prior sd: has 2 entries, expected 1 or 3"),
    (tc.GaussianPrior(sd=np.ones((3, 1))), 3, r"prior sd: has 3 entries, expected 1 or 3"),
    (tc.GaussianPrior(mean=[0.0, 1.0]), 3, r"prior mean: has 2 entries, expected 1 or 3"),
    (tc.GaussianPrior(cov=np.eye(2)), 3, r"prior cov: has shape \(2, 2\), expected \(3, 3\)"),
], ids=["short-sd", "2d-sd", "short-mean", "cov-shape"])
def test_resolve_errors(prior, n, match):
    # lengths can only be checked against the model's number of coefficients
    with pytest.raises(InputError, match=match):
        prior.resolve(n)


def test_resolve_checks_values_changed_after_construction():
    prior = tc.GaussianPrior()
    prior.sd = -1.0
    with pytest.raises(InputError, match=r"prior sd: must be > 0, got -1\.0"):
        prior.resolve(2)
    prior.sd = "wide"
    with pytest.raises(InputError, match=r"prior sd: must be a number or a list of numbers"):
        prior.resolve(2)


def test_repr_names_the_parameters():
    assert repr(tc.GaussianPrior(sd=2.0)) == "GaussianPrior(mean=0.0, sd=2.0)"
    assert repr(tc.GaussianPrior(cov=np.eye(3))) == "GaussianPrior(mean=0.0, cov=<(3, 3) matrix>)"
