"""The three families' log-likelihood in plain NumPy, independent of the package's numba kernels.

Per datum, with eta = x'beta + offset (METHODS.md section 4 table; the constants as the
package's models include them):

* linear, known s: -(y - eta)^2 / (2 s^2) - log s - log(2 pi)/2
* logistic: y eta - log(1 + e^eta)
* Poisson, log link: y eta - e^eta - log y!

Used as a reference (gradient, Hessian) and for the size of a rounding error: a sum of N terms
computed in any order is within (N - 1)/2 ulps of the sum of |terms| (Higham, Accuracy and
Stability of Numerical Algorithms, ch. 4; from memory).

Import in a test as ``from numpy_glm import ...`` (``tests`` is on pytest's path).
"""

import numpy as np
from scipy import special

EPS = np.finfo(np.float64).eps


def design(model):
    """X as float64, with the column of ones first when the model adds an intercept."""
    X = np.asarray(model.X, dtype=np.float64)
    return np.column_stack([np.ones(X.shape[0]), X]) if model.add_intercept else X


def _rows(model, beta):
    """eta, f'(eta), -f''(eta) and the size |each term| of the per-datum log-likelihood."""
    y = model.y
    eta = design(model) @ beta + model.offset
    if model.family_name == "logistic":
        mu = special.expit(eta)  # scipy.special.expit
        return eta, y - mu, mu * (1.0 - mu), np.abs(y * eta) + np.logaddexp(0.0, eta)
    if model.family_name == "poisson":
        mu = np.exp(eta)
        return eta, y - mu, mu, np.abs(y * eta) + mu + special.gammaln(y + 1.0)
    s2 = model.noise_sd**2
    size = 0.5 * (y - eta) ** 2 / s2 + abs(np.log(model.noise_sd)) + 0.5 * np.log(2 * np.pi)
    return eta, (y - eta) / s2, np.full(eta.shape, 1.0 / s2), size


def log_likelihood_size(model, beta):
    """The sum over rows of the sizes of each row's log-likelihood terms."""
    return float(np.sum(_rows(model, beta)[3]))


def log_posterior_grad_precision(model, beta):
    """Gradient and negative Hessian of the log posterior at beta, and the sum of |terms| of
    the negative Hessian (the size of its rounding error)."""
    X1 = design(model)
    _, f1, w, _ = _rows(model, beta)
    grad = X1.T @ f1 - model.prior_prec @ (beta - model.prior_mean)
    precision = X1.T @ (w[:, None] * X1) + model.prior_prec
    size = np.abs(X1).T @ (w[:, None] * np.abs(X1)) + np.abs(model.prior_prec)
    return grad, precision, size


def mode_sd_tolerance(model, mode):
    """How closely, in posterior sds, any minimiser of the log posterior can place its mode.

    Near the mode the log posterior falls by delta^2 / 2 at delta posterior sds (along an
    eigendirection of the precision), while its value is known only to its rounding, at most
    (N - 1)/2 ulps of the sum of |terms| (this module's docstring) on each evaluation: an
    optimiser that compares values cannot tell points within delta = sqrt(2 N eps |terms|)
    apart. At N = 500 (logistic) this is about 1e-5 sd.
    """
    r = mode - model.prior_mean
    size = log_likelihood_size(model, mode) + 0.5 * abs(r @ model.prior_prec @ r)
    return float(np.sqrt(2.0 * model.n_rows * EPS * size))
