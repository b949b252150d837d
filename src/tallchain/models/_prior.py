"""Gaussian priors on the regression coefficients."""

import numpy as np

from .._validation import fail, spd_matrix_and_inverse


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

    Notes
    -----
    Coefficients are ordered as the model orders them: the intercept first when the model
    adds one, then the columns of X.
    """

    def __init__(self, mean=0.0, sd=10.0, cov=None):
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
                "prior cov", self.cov, n_coef,
                "give one row and column per coefficient (intercept first)")
            return mean, prec, cov
        sd = _vector("prior sd", self.sd, n_coef)
        if np.any(sd <= 0):
            fail("prior sd", f"must be > 0, got {sd.min()}", "give positive standard deviations")
        return mean, np.diag(1.0 / sd**2), np.diag(sd**2)


def _vector(field, value, n):
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        fail(field, f"has {arr.size} entries, expected 1 or {n}",
             "give a scalar or one value per coefficient (intercept first)")
    if not np.all(np.isfinite(arr)):
        fail(field, "contains NaN or inf", "give finite values")
    return arr
