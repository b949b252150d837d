"""Gaussian priors on the regression coefficients."""

import numpy as np

from .._validation import fail, show_value, spd_matrix_and_inverse


class GaussianPrior:
    """Multivariate normal prior on the coefficient vector.

    Parameters
    ----------
    mean : float or array-like of shape (n_coef,), default=0.0
        Prior mean; a scalar is used for every coefficient.
    sd : float or array-like of shape (n_coef,), default=10.0
        Prior standard deviation: isotropic (scalar) or one per coefficient. Ignored when
        ``cov`` is given.
    cov : array-like of shape (n_coef, n_coef), optional
        Full prior covariance, symmetric positive definite.

    Raises
    ------
    InputError
        If ``mean`` or ``sd`` is not a number or a list of numbers, holds NaN or inf, or ``sd``
        is not > 0 (``sd`` is not checked when ``cov`` is given); if ``cov`` is not a finite,
        square, symmetric positive definite matrix. Whether the lengths match the model's
        coefficients is checked when a model is built (`resolve`).

    Notes
    -----
    Coefficients are ordered as the model orders them: the intercept first when the model
    adds one, then the columns of X.
    """

    def __init__(self, mean=0.0, sd=10.0, cov=None):
        # Values are checked here; lengths only against a model, in `resolve`.
        _finite("prior mean", mean)
        if cov is None:
            _positive(_finite("prior sd", sd))
        else:
            m = _numbers("prior cov", cov)
            if m.ndim != 2 or m.shape[0] != m.shape[1]:
                fail("prior cov", f"has shape {m.shape}, not square",
                     "give an (n_coef, n_coef) matrix, intercept first")
            spd_matrix_and_inverse("prior cov", m, m.shape[0],
                                   "give an (n_coef, n_coef) matrix, intercept first")
        self.mean = mean
        self.sd = sd
        self.cov = cov

    def __repr__(self):
        if self.cov is not None:
            return f"GaussianPrior(mean={self.mean!r}, cov=<{np.shape(self.cov)} matrix>)"
        return f"GaussianPrior(mean={self.mean!r}, sd={self.sd!r})"

    def resolve(self, n_coef):
        """Return (mean vector, precision matrix, covariance matrix) for ``n_coef`` coefficients."""
        mean = _vector("prior mean", self.mean, n_coef)
        if self.cov is not None:
            cov, prec = spd_matrix_and_inverse(
                "prior cov", _numbers("prior cov", self.cov), n_coef,
                "give one row and column per coefficient (intercept first)")
            return mean, prec, cov
        sd = _positive(_vector("prior sd", self.sd, n_coef))
        return mean, np.diag(1.0 / sd**2), np.diag(sd**2)


def _numbers(field, value):
    """``value`` as a float array; anything but numbers (a string, None, a ragged list) refused."""
    what = ("a matrix of numbers" if field == "prior cov" else "a number or a list of numbers")
    fix = f"give {what}"
    if value is None or isinstance(value, (str, bytes)):
        fail(field, f"must be {what}, got {show_value(value)}", fix)
    try:
        arr = np.asarray(value)
        if arr.dtype.kind not in "fiubO":
            raise ValueError
        return np.array(arr, dtype=float)
    except (TypeError, ValueError):
        fail(field, f"must be {what}, got {show_value(value)}", fix)


def _finite(field, value):
    arr = _numbers(field, value)
    if not np.all(np.isfinite(arr)):
        fail(field, "contains NaN or inf", "give finite values")
    return arr


def _positive(sd):
    if np.any(sd <= 0):
        fail("prior sd", f"must be > 0, got {sd.min()}", "give positive standard deviations")
    return sd


def _vector(field, value, n):
    arr = _numbers(field, value)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        fail(field, f"has {arr.size} entries, expected 1 or {n}",
             "give a scalar or one value per coefficient (intercept first)")
    if not np.all(np.isfinite(arr)):
        fail(field, "contains NaN or inf", "give finite values")
    return arr
