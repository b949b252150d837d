"""Posterior mode (MAP) by damped Newton on the full data, and the Laplace approximation there.

The Newton step solves (-H_loglik + P_prior) d = grad log posterior, the iteration of the
standard GLM fit (iteratively reweighted least squares: McCullagh & Nelder 1989, Generalized
Linear Models, 2nd ed., section 2.5) with the prior added. Newton's step is invariant under a
linear change of the coefficients, so a column in dollars (~1e5) beside one in [0, 1] takes the
same iterations as the two standardised; the linear system is solved after scaling the
precision to a unit diagonal, so its rounding does not depend on column scale either. A
backtracking line search on the log posterior (Armijo's condition: Nocedal & Wright 2006,
Numerical Optimization, 2nd ed., eq. 3.4) damps the first steps far from the mode, where an
exp in the Poisson likelihood can overflow.
"""

from dataclasses import dataclass

import numpy as np

from .._arrays import row_blocks, spd_inverse, symmetrized
from .._validation import fail, positive_int, positive_number
from ..exceptions import ModeNotFoundError
from ..models import check_model
from ._start import SUBSAMPLE_TOL, subsample_start

# Armijo's sufficient-increase constant and the most step halvings of one line search.
_ARMIJO = 1e-4
_MAX_HALVINGS = 40
# Below this Newton decrement (posterior sds) a decrement that no longer halves per iteration
# is the rounding floor of the full-data sums, not slow convergence: the mode is accepted.
_ROUNDING_FLOOR_SD = 1e-4


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
        Full-data passes spent: log-likelihood-and-gradient passes (one per line-search
        trial), Hessian passes (one per Newton iteration, the last at the mode), and those of
        the family's check of the mode (one more Hessian for logistic regression, see
        `LogisticRegression.check_mode`), and the subsample start's passes in full-data
        passes, rounded up.
    message : str
        How Newton stopped: iterations and the last Newton decrement. A
        `LaplaceApproximation` exists only for a mode that met the tolerance (`find_mode`
        raises otherwise).
    loglik_derivatives : tuple of ndarray or None
        (gradient, Hessian) of the log-likelihood at ``mode`` from the passes Newton made
        there, so that the second-order row cache need not repeat them; None when unknown.
    """

    mode: np.ndarray
    precision: np.ndarray
    cov: np.ndarray
    n_evaluations: int
    message: str
    loglik_derivatives: tuple | None = None


class _Objective:
    """The log posterior, its gradient and its precision, counting full-data passes."""

    def __init__(self, model):
        self.model = model
        self.passes = 0
        self.last_grad = self.last_hessian = (None, None)

    def value_grad(self, beta):
        """(log posterior, gradient) at beta: one pass."""
        self.passes += 1
        m = self.model
        ll, g = m.log_likelihood_grad(beta)
        self.last_grad = (np.array(beta, dtype=float), g)
        r = beta - m.prior_mean
        pg = m.prior_prec @ r
        return ll - 0.5 * r @ pg, g - pg

    def information(self, beta):
        """The negative log-likelihood Hessian at beta: one pass."""
        self.passes += 1
        hess = self.model.log_likelihood_hessian(beta)
        self.last_hessian = (np.array(beta, dtype=float), hess)
        return symmetrized(-hess)

    def derivatives_at(self, beta):
        """The log-likelihood's (gradient, Hessian) of the last passes if both were at beta."""
        (xg, g), (xh, h) = self.last_grad, self.last_hessian
        if xg is None or xh is None or not (np.array_equal(xg, beta) and np.array_equal(xh, beta)):
            return None
        return g.copy(), h.copy()


def find_mode(model, *, start=None, tol=1e-8, max_iter=100):
    """Maximise the log posterior by damped Newton (the GLM fit of McCullagh & Nelder 1989).

    Each iteration takes one pass over the rows for the Hessian and one per line-search trial
    for the log posterior and its gradient together (numba kernels, parallel over rows on tall
    data); near the mode every trial is the full Newton step. The result does not depend on
    the scale of X's columns.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    start : array-like of shape (n_coef,), optional
        Finite starting point. Default: on tall data (from 400,000 rows) the mode of a weighted
        subsample of 100,000 rows (`_start.subsample_start`), else the prior mean.
    tol : float, default=1e-8
        Stop when the Newton decrement sqrt(g' P^-1 g) (g the gradient and P the precision of
        the log posterior), the length of the remaining Newton step in posterior sds, is at
        most ``tol`` (finite, > 0). Where the rounding of the full-data sums keeps the
        decrement from shrinking, below 1e-4 sds, that point is accepted.
    max_iter : int, default=100
        Most Newton iterations (an integer >= 1).

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
        When no mode meeting the tolerance is found; the message names the cause found:
        values that are not finite (overflow, with the column of largest magnitude), collinear
        columns, or a likelihood that keeps rising (separation).
    """
    x = _check_arguments(model, start, tol, max_iter)
    spent = 0
    if start is None:
        cheap, spent = subsample_start(
            model, lambda view, x0: _newton(view, x0, max(tol, SUBSAMPLE_TOL), max_iter))
        x = x if cheap is None else cheap
    lap = _newton(model, x, tol, max_iter)
    lap.n_evaluations += spent
    return lap


def _newton(model, x, tol, max_iter):
    """Damped Newton from x (`find_mode` after its checks); ``model`` is a model or a
    `_start._Subsample` of one."""
    obj = _Objective(model)
    f, g = obj.value_grad(x)
    if not (np.isfinite(f) and np.all(np.isfinite(g))):
        _raise_not_finite(model, x, "at the starting point")
    decrement_before = np.inf
    for it in range(max_iter + 1):
        info = obj.information(x)
        precision = symmetrized(info + model.prior_prec)
        if not np.all(np.isfinite(precision)):
            _raise_not_finite(model, x, f"in the Hessian after {it} Newton iterations")
        step, decrement = _newton_step(model, precision, g)
        # At the rounding floor the decrement stops halving, or no step increases the sums.
        stalled = decrement > 0.5 * decrement_before
        found = None
        if decrement > tol and not (stalled and decrement <= _ROUNDING_FLOOR_SD):
            if it == max_iter:
                break
            found = _line_search(obj, x, f, g, step, decrement)
            if found is None and decrement > _ROUNDING_FLOOR_SD:
                decrement_before = decrement   # no increase along the Newton direction
                break
        if found is None:
            check_passes = model.check_mode(x, info)
            note = "" if decrement <= tol else ", the rounding floor of the sums"
            laplace = _laplace(x, precision, obj.passes + check_passes,
                               f"Newton converged in {it} iterations (decrement "
                               f"{decrement:.2g} posterior sds{note})")
            laplace.loglik_derivatives = obj.derivatives_at(x)
            return laplace
        x, f, g = found
        decrement_before = decrement
    _raise_not_converged(model, x, info, it, decrement, decrement_before)


def _newton_step(model, precision, grad):
    """The Newton step P^-1 g and the decrement sqrt(g' P^-1 g), solved with P scaled to a unit
    diagonal (Jacobi), so that the Cholesky factorisation sees column correlations, not column
    scales.

    The coefficients' block of P is positive definite for every family (the GLM information
    plus the prior); the family parameters (a log noise sd) can make P indefinite far from the
    mode, where the scaled matrix is shifted by mu I, mu = 1e-3, 1e-2, ... until it is
    positive definite (a Hessian modification: Nocedal & Wright 2006, section 3.4), which
    keeps the step an ascent direction.
    """
    nb = model.n_beta
    diag = np.diag(precision)
    if not np.all(diag[:nb] > 0):
        raise ModeNotFoundError(
            f"mode finding: the posterior has no curvature along coefficient "
            f"'{model.coef_names[int(np.argmin(diag[:nb]))]}' (a zero column with a flat "
            "prior?); drop the column or use a proper prior")
    s = 1.0 / np.sqrt(np.where(diag > 0, diag, np.maximum(np.abs(diag), 1.0)))
    scaled = precision * s[:, None] * s[None, :]
    try:
        np.linalg.cholesky(scaled[:nb, :nb])
    except np.linalg.LinAlgError as exc:
        raise ModeNotFoundError(
            "mode finding: the columns of X are collinear (the Hessian of the log posterior, "
            "scaled to a unit diagonal, is singular); drop the redundant columns or use a "
            "tighter prior") from exc
    for mu in [0.0] + [10.0**k for k in range(-3, 9)]:
        try:
            chol = np.linalg.cholesky(scaled + mu * np.eye(scaled.shape[0]))
            break
        except np.linalg.LinAlgError:
            continue
    z = np.linalg.solve(chol.T, np.linalg.solve(chol, s * grad))
    step = s * z
    return step, float(np.sqrt(max(grad @ step, 0.0)))


def _line_search(obj, x, f, g, step, decrement):
    """Halve t from 1 until f(x + t step) >= f + c t decrement^2 (Armijo) with finite values;
    (x, f, g) at the point found, or None after `_MAX_HALVINGS` halvings.

    Within `_ROUNDING_FLOOR_SD` posterior sds of the mode the full step is taken as long as
    its values are finite: the Newton step's own error is of the order of the decrement
    squared there (quadratic convergence: Nocedal & Wright 2006, theorem 3.5), while the gain
    it promises, decrement^2 / 2, can be below the rounding of the full-data sums, so the
    Armijo test would halve t on rounding noise (20-30 passes seen on a weighted subsample).
    """
    if decrement <= _ROUNDING_FLOOR_SD:
        x_new = x + step
        f_new, g_new = obj.value_grad(x_new)
        return (x_new, f_new, g_new) if np.isfinite(f_new) and np.all(np.isfinite(g_new)) \
            else None
    t = 1.0
    for _ in range(_MAX_HALVINGS):
        x_new = x + t * step
        f_new, g_new = obj.value_grad(x_new)
        if (np.isfinite(f_new) and np.all(np.isfinite(g_new))
                and f_new >= f + _ARMIJO * t * decrement**2):
            return x_new, f_new, g_new
        t *= 0.5
    return None


def _laplace(mode, precision, passes, message):
    try:
        cov = spd_inverse(precision)
    except np.linalg.LinAlgError as exc:
        raise ModeNotFoundError("mode finding: the Hessian at the mode is not negative "
                                "definite; the posterior may be improper or multimodal") from exc
    return LaplaceApproximation(mode=mode, precision=precision, cov=cov, n_evaluations=passes,
                                message=message)


def _raise_not_converged(model, x, info, iterations, decrement, decrement_before):
    """The cause of a Newton run that did not converge: too few iterations while the decrement
    still falls fast, else the family's own check (separation in logistic regression), else a
    likelihood that keeps rising in general."""
    if np.isfinite(decrement_before) and decrement < 0.25 * decrement_before:
        raise ModeNotFoundError(
            f"mode finding: Newton was still converging when it stopped after {iterations} "
            f"iterations (remaining step {decrement:.3g} posterior sds, "
            f"{decrement_before / decrement:.3g}x shorter than the one before); raise max_iter")
    model.check_mode(x, info)
    raise ModeNotFoundError(
        f"mode finding: Newton stopped after {iterations} iterations with the remaining step "
        f"{decrement:.3g} posterior sds long: the log posterior may have no maximum (a "
        "likelihood that keeps rising along some coefficients, such as a category whose "
        "responses are all 0); use a tighter prior or drop that column")


def _raise_not_finite(model, x, where):
    """Non-finite log posterior: name the column of largest magnitude when its scale is the
    likely cause (an exp that overflows), else the coefficients."""
    col_max = np.zeros(model.X.shape[1])
    for _, block in row_blocks(model.X):
        np.maximum(col_max, np.max(np.abs(block), axis=0), out=col_max)
    names = model.feature_names
    if col_max.size and col_max.max() > 1e3:
        j = int(np.argmax(col_max))
        raise ModeNotFoundError(
            f"mode finding: the log posterior is not finite {where} (an exp overflows); column "
            f"'{names[j]}' reaches {col_max[j]:.3g}: rescale it (e.g. thousands of dollars), "
            "set standardize = true, or give a start nearer the mode")
    raise ModeNotFoundError(
        f"mode finding: the log posterior is not finite {where} (coefficients "
        f"{np.array2string(x, precision=3, max_line_width=200)}); give a start nearer the "
        "mode or a tighter prior")


def _check_arguments(model, start, tol, max_iter):
    """The up-front checks of `find_mode`; returns the starting point as a float array."""
    check_model(model)
    positive_number("tol", tol, "give a small positive number such as 1e-8")
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
