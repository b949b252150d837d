"""Posterior mode (MAP) by L-BFGS on the full data, and the Laplace approximation there."""

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from .._validation import fail, positive_int, positive_number
from ..exceptions import ModeNotFoundError
from ..models import check_model


@dataclass
class LaplaceApproximation:
    """Gaussian approximation N(mode, cov) of the posterior at its mode.

    Attributes
    ----------
    mode : ndarray of shape (n_coef,)
    precision : ndarray of shape (n_coef, n_coef)
        Negative Hessian of the log posterior at the mode.
    cov : ndarray of shape (n_coef, n_coef)
        Inverse of ``precision``.
    n_evaluations : int
        Full-data passes spent: objective and gradient evaluations plus one for the Hessian.
    converged : bool
    message : str
    """

    mode: np.ndarray
    precision: np.ndarray
    cov: np.ndarray
    n_evaluations: int
    converged: bool
    message: str


def find_mode(model, *, start=None, tol=1e-9, max_iter=1000):
    """Maximise the log posterior by L-BFGS (scipy.optimize, method "L-BFGS-B").

    One objective evaluation is one pass over the rows computing the log-likelihood and its
    gradient together (numba kernel, parallel over rows on tall data). The Hessian at the mode
    is computed exactly in one more pass.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression or PoissonRegression
    start : array-like of shape (n_coef,), optional
        Finite starting point (default: the prior mean).
    tol : float, default=1e-9
        Gradient tolerance (finite, > 0), relative to the gradient size at the start.
    max_iter : int, default=1000
        Most L-BFGS iterations (an integer >= 1).

    Returns
    -------
    LaplaceApproximation

    Raises
    ------
    InputError
        When ``model`` is not a regression model, ``tol`` is not a finite number > 0,
        ``max_iter`` not an integer >= 1, or ``start`` not a finite array of shape (n_coef,);
        raised before any pass over the data.
    ModeNotFoundError
        When L-BFGS stops without meeting the tolerance.
    """
    x0 = _check_arguments(model, start, tol, max_iter)
    n_eval = 0

    def neg_log_post(beta):
        nonlocal n_eval
        n_eval += 1
        ll, g = model.log_likelihood_grad(beta)
        r = beta - model.prior_mean
        pg = model.prior_prec @ r
        val = -(ll - 0.5 * r @ pg)
        grad = -(g - pg)
        if not np.isfinite(val):
            return np.inf, np.zeros_like(beta)
        return val, grad

    _, g0 = neg_log_post(x0)
    gtol = tol * max(1.0, float(np.max(np.abs(g0))))
    res = optimize.minimize(neg_log_post, x0, jac=True, method="L-BFGS-B",
                            options={"maxiter": max_iter, "gtol": gtol, "ftol": 0.0,
                                     "maxcor": 20})
    grad_norm = float(np.max(np.abs(res.jac))) if res.jac is not None else np.inf
    converged = bool(np.all(np.isfinite(res.x)) and grad_norm <= max(gtol, 1e-6 * max(1.0, abs(res.fun))))
    if not converged:
        raise ModeNotFoundError(
            f"mode finding: L-BFGS stopped after {res.nit} iterations with gradient "
            f"{grad_norm:.3g} ({res.message}); check the data for separation (logistic) or "
            "huge counts (Poisson), or use a tighter prior")
    info = -model.log_likelihood_hessian(res.x)
    if model.family_name == "logistic":
        _check_separation(model, res.x, info)
    precision = info + model.prior_prec
    precision = 0.5 * (precision + precision.T)
    try:
        chol = np.linalg.cholesky(precision)
    except np.linalg.LinAlgError as exc:
        raise ModeNotFoundError("mode finding: the Hessian at the mode is not negative "
                                "definite; the posterior may be improper or multimodal") from exc
    inv_chol = np.linalg.inv(chol)
    cov = inv_chol.T @ inv_chol
    return LaplaceApproximation(mode=res.x, precision=precision, cov=0.5 * (cov + cov.T),
                                n_evaluations=n_eval + 1, converged=True, message=str(res.message))


def _check_arguments(model, start, tol, max_iter):
    """The up-front checks of `find_mode`; returns the starting point as a float array."""
    check_model(model)
    positive_number("tol", tol, "give a small positive number such as 1e-9")
    positive_int("max_iter", max_iter, minimum=1)
    if start is None:
        return np.array(model.prior_mean, dtype=float)
    try:
        x0 = np.array(start, dtype=float)
    except (TypeError, ValueError):
        fail("start", f"must be an array of {model.n_coef} numbers, got {repr(start)[:60]}",
             f"give one starting value per coefficient ({model.n_coef}), or leave it out")
    if x0.shape != (model.n_coef,):
        fail("start", f"has shape {x0.shape}, expected ({model.n_coef},)",
             f"give one starting value per coefficient ({', '.join(model.coef_names)})")
    if not np.all(np.isfinite(x0)):
        fail("start", f"contains NaN or inf at position {int(np.argmin(np.isfinite(x0)))}",
             "give finite starting values, or leave it out (the prior mean)")
    return x0


def _check_separation(model, mode, info):
    """Raise when logistic data are (quasi-)separated and the prior is too weak to hold the mode.

    Separation shows as a likelihood that flattens along some direction v as |beta| grows: the
    data curvature v' I(mode) v collapses (here: below 1e-6 of its value at the prior mean,
    where every row still contributes), while the prior along v is far wider than the distance
    the optimiser travelled. With an informative prior the posterior is proper and the mode is
    kept: sampling then works, and no error is raised.
    """
    info0 = -model.log_likelihood_hessian(model.prior_mean)
    evals, evecs = np.linalg.eigh(0.5 * (info0 + info0.T))
    for lam0, v in zip(evals, evecs.T):
        # A direction without information even at the prior mean is collinearity (e.g. a
        # constant column beside the intercept), not separation: the prior decides it.
        if lam0 <= 1e-8 * evals[-1]:
            continue
        collapsed = v @ info @ v < 1e-6 * lam0
        prior_var = v @ model.prior_cov @ v
        travelled = (v @ (mode - model.prior_mean)) ** 2
        if collapsed and prior_var > 100.0 * travelled:
            raise ModeNotFoundError(
                "mode finding: the logistic likelihood keeps rising along a direction of the "
                "coefficients (complete or quasi-complete separation): the maximum likelihood "
                "estimate does not exist and the flat prior cannot hold the posterior; use an "
                "informative prior (e.g. prior_sd = 2.5 on standardised features) or drop the "
                "separating column")
