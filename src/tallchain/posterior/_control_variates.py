"""Control-variate caches: Taylor proxies of every l_i around the mode (private)."""

from collections import namedtuple
from dataclasses import dataclass

import numpy as np

from ..models import _passes
from ..models._kernels import kernel_view

RowCache = namedtuple("RowCache", ["order", "beta_star", "aux", "g_star", "H_star"])
RowCache.__doc__ = """The row cache and proxy sums as the estimator kernels take them.

Attributes
----------
order : int
    Control-variate order: 0 (none), 1 or 2.
beta_star : ndarray of shape (n_coef,)
    The reference point beta* (the mode; zeros without control variates).
aux : ndarray of shape (N, 4)
    ``aux[i] = (y_i, eta*_i, f'*_i, f''*_i)``: one 32-byte record per row.
g_star : ndarray of shape (n_coef,)
    sum_i grad l_i(beta*).
H_star : ndarray of shape (n_coef, n_coef)
    sum_i Hess l_i(beta*) (zeros below order 2).
"""


@dataclass
class ControlVariateCache:
    """The row cache of the batch kernels and the proxy sums (O(N d^2) once).

    ``aux[i] = (y_i, eta*_i, f'*_i, f''*_i)`` at the reference point ``beta_star`` (see
    `tallchain.mcmc._estimators`); ``g_star`` and ``H_star`` are the full-data gradient and
    Hessian of the log-likelihood there. With ``order = 0`` (no control variates) beta* = 0,
    eta*_i is the offset and the derivative columns are unused.
    """

    order: int
    beta_star: np.ndarray
    aux: np.ndarray
    g_star: np.ndarray
    H_star: np.ndarray

    @classmethod
    def empty(cls, n_coef):
        """Placeholder for full-data methods, which never read the row cache."""
        return cls(0, np.zeros(n_coef), np.zeros((1, 4)), np.zeros(n_coef),
                   np.zeros((n_coef, n_coef)))

    @property
    def rows(self):
        """The cache as the kernels take it: ``RowCache(order, beta_star, aux, g_star, H_star)``,
        read-only views (`models.kernel_view`)."""
        return RowCache(self.order, *(kernel_view(a) for a in (self.beta_star, self.aux,
                                                               self.g_star, self.H_star)))


def row_cache(data, beta_star):
    """aux[i] = (y_i, eta_i, f'(eta_i), f''(eta_i)) at beta_star, for every row of ``data``
    (a GLMData)."""
    aux = np.empty((data.X.shape[0], 4))
    aux[:, 0] = data.y
    # written straight into the columns: no N-length temporaries beside the cache
    _passes.eta_derivatives(data, beta_star, aux[:, 1], aux[:, 2], aux[:, 3])
    return aux


def control_variate_cache(model, beta_star, order, known=None):
    """Cache the Taylor proxies of every l_i around beta_star (METHODS.md section 4);
    ``order = 0`` builds the plain row cache (beta* = 0) for runs without control variates.
    ``known``: the log-likelihood's (gradient, Hessian) at beta_star when a pass already made
    them (`LaplaceApproximation.loglik_derivatives`), which spares those two passes."""
    d = model.n_coef
    beta_star = np.zeros(d) if order == 0 else np.ascontiguousarray(beta_star, dtype=float)
    aux = row_cache(model.glm_data, beta_star)
    if order == 0:
        return ControlVariateCache(0, beta_star, aux, np.zeros(d), np.zeros((d, d)))
    if known is not None:
        g_star, H_star = known
    else:
        _, g_star = model.log_likelihood_grad(beta_star)
        H_star = model.log_likelihood_hessian(beta_star) if order >= 2 else None
    H_star = H_star if order >= 2 else np.zeros((d, d))
    return ControlVariateCache(order, beta_star, aux, g_star, H_star)


def cache_passes(order, known):
    """Full-data passes `control_variate_cache` makes: the row cache, and the gradient and
    (second order) Hessian at beta* unless known."""
    return 1 if order == 0 or known is not None else 1 + min(order, 2)
