"""Mass matrices and control-variate caches built from the Laplace approximation (private)."""

from dataclasses import dataclass

import numpy as np

from . import _full_passes
from ._validation import fail, spd_matrix_and_inverse


@dataclass
class Preconditioner:
    """Mass matrix M with its inverse and the lower Cholesky factor L of M^{-1} (L L^T = M^{-1})."""

    kind: str
    mass: np.ndarray
    mass_inv: np.ndarray
    mass_inv_chol: np.ndarray


MASS_MATRIX_KINDS = ("laplace", "laplace-diagonal", "identity")


def check_mass_matrix(mass_matrix, n_coef):
    """Refuse a mass-matrix setting that `make_preconditioner` would refuse, without the mode."""
    if isinstance(mass_matrix, str) or mass_matrix is None:
        if mass_matrix not in MASS_MATRIX_KINDS:
            fail("mass_matrix", f"unknown value {mass_matrix!r}",
                 'use "laplace", "laplace-diagonal", "identity" or an array')
    else:
        spd_matrix_and_inverse("mass_matrix", mass_matrix, n_coef,
                               "give one row and column per coefficient")


def make_preconditioner(mass_matrix, n_coef, laplace):
    """Build the preconditioner from a setting: "identity", "laplace", "laplace-diagonal" or an
    (n_coef, n_coef) symmetric positive definite array."""
    if isinstance(mass_matrix, str) or mass_matrix is None:
        check_mass_matrix(mass_matrix, n_coef)
        if mass_matrix == "identity":
            mass_inv = np.eye(n_coef)
        elif mass_matrix == "laplace":
            mass_inv = laplace.cov
        else:
            mass_inv = np.diag(np.diag(laplace.cov))
        kind = mass_matrix
        mass_inv = np.array(mass_inv, dtype=float)
        chol = np.linalg.cholesky(mass_inv)
        inv_chol = np.linalg.inv(chol)
        mass = inv_chol.T @ inv_chol
    else:
        kind = "given"
        mass, mass_inv = spd_matrix_and_inverse("mass_matrix", mass_matrix, n_coef,
                                                "give one row and column per coefficient")
        chol = np.linalg.cholesky(0.5 * (mass_inv + mass_inv.T))
    return Preconditioner(kind, np.ascontiguousarray(0.5 * (mass + mass.T)),
                          np.ascontiguousarray(0.5 * (mass_inv + mass_inv.T)),
                          np.ascontiguousarray(np.tril(chol)))


@dataclass
class ControlVariateCache:
    """The row cache of the batch kernels and the proxy sums (O(N d^2) once).

    ``aux[i] = (y_i, eta*_i, f'*_i, f''*_i)`` at the reference point ``beta_star`` (see
    `_estimator_kernels`); ``g_star`` and ``H_star`` are the full-data gradient and Hessian of
    the log-likelihood there. With ``order = 0`` (no control variates) beta* = 0, eta*_i is the
    offset and the derivative columns are unused.
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


def row_cache(family, X, y, offset, noise_sd, intercept, beta_star):
    """aux[i] = (y_i, eta_i, f'(eta_i), f''(eta_i)) at beta_star, for every row."""
    aux = np.empty((X.shape[0], 4))
    aux[:, 0] = y
    # written straight into the columns: no N-length temporaries beside the cache
    _full_passes.eta_derivatives((family, X, y, offset, noise_sd, intercept), beta_star,
                                 aux[:, 1], aux[:, 2], aux[:, 3])
    return aux


def control_variate_cache(model, beta_star, order):
    """Cache the Taylor proxies of every l_i around beta_star (METHODS.md section 4);
    ``order = 0`` builds the plain row cache (beta* = 0) for runs without control variates."""
    d = model.n_coef
    beta_star = np.zeros(d) if order == 0 else np.ascontiguousarray(beta_star, dtype=float)
    aux = row_cache(*model.kernel_args, beta_star)
    if order == 0:
        return ControlVariateCache(0, beta_star, aux, np.zeros(d), np.zeros((d, d)))
    _, g_star = model.log_likelihood_grad(beta_star)
    H_star = model.log_likelihood_hessian(beta_star) if order >= 2 else np.zeros((d, d))
    return ControlVariateCache(order, beta_star, aux, g_star, H_star)
