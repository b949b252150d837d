"""Gaussian priors on the regression coefficients."""

import numpy as np

from .._validation import fail


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
            cov = np.array(self.cov, dtype=float)
            if cov.shape != (n_coef, n_coef):
                fail("prior cov", f"has shape {cov.shape}, expected ({n_coef}, {n_coef})",
                     "give one row and column per coefficient (intercept first)")
            if not np.all(np.isfinite(cov)) or not np.allclose(cov, cov.T, rtol=1e-10, atol=1e-12):
                fail("prior cov", "is not symmetric", "give a symmetric positive definite matrix")
            try:
                chol = np.linalg.cholesky(cov)
            except np.linalg.LinAlgError:
                fail("prior cov", "is not positive definite",
                     "give a symmetric positive definite matrix")
            inv_chol = np.linalg.inv(chol)
            prec = inv_chol.T @ inv_chol
            return mean, 0.5 * (prec + prec.T), cov
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
