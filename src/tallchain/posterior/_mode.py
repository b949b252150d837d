"""Posterior mode (MAP) by L-BFGS on the full data, and the Laplace approximation there."""

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from .._arrays import spd_inverse, symmetrized
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
        Full-data passes spent: objective and gradient evaluations, one for the Hessian at the
        mode, and those of the family's check of the mode (one more Hessian for logistic
        regression, see `LogisticRegression.check_mode`).
    message : str
        L-BFGS's own account of how it stopped. A `LaplaceApproximation` exists only for a
        mode that met the tolerance (`find_mode` raises otherwise).
    """

    mode: np.ndarray
    precision: np.ndarray
    cov: np.ndarray
    n_evaluations: int
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
        Gradient tolerance (finite, > 0), relative to the gradient size at the start: the mode
        is accepted when the largest gradient component of the negative log posterior is at
        most ``tol`` times that size, or at most 1e-6 times the objective's size (the
        objective is a sum over N rows, so its rounding alone makes smaller gradients
        unreachable on tall data).
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
    tolerance = max(gtol, 1e-6 * max(1.0, abs(res.fun)))
    if not (np.all(np.isfinite(res.x)) and grad_norm <= tolerance):
        raise ModeNotFoundError(
            f"mode finding: L-BFGS stopped after {res.nit} iterations with gradient "
            f"{grad_norm:.3g} ({res.message}); check the data for separation (logistic) or "
            "huge counts (Poisson), or use a tighter prior")
    info = -model.log_likelihood_hessian(res.x)
    check_passes = model.check_mode(res.x, info)
    precision = symmetrized(info + model.prior_prec)
    try:
        cov = spd_inverse(precision)
    except np.linalg.LinAlgError as exc:
        raise ModeNotFoundError("mode finding: the Hessian at the mode is not negative "
                                "definite; the posterior may be improper or multimodal") from exc
    return LaplaceApproximation(mode=res.x, precision=precision, cov=cov,
                                n_evaluations=n_eval + 1 + check_passes,
                                message=str(res.message))


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
