"""Mass matrices (preconditioners) from the Laplace approximation or given (private)."""

from collections import namedtuple
from dataclasses import dataclass

import numpy as np

from .._arrays import spd_inverse
from .._validation import one_of, spd_matrix_and_inverse


MassMatrix = namedtuple("MassMatrix", ["mass", "mass_inv", "mass_inv_chol"])
MassMatrix.__doc__ = """A mass matrix as the transition kernel takes it.

Attributes
----------
mass : ndarray of shape (n_coef, n_coef)
    M, symmetric positive definite.
mass_inv : ndarray of shape (n_coef, n_coef)
    M^{-1}.
mass_inv_chol : ndarray of shape (n_coef, n_coef)
    L, lower triangular with L L^T = M^{-1}.
"""


@dataclass
class Preconditioner:
    """Mass matrix M with its inverse and the lower Cholesky factor L of M^{-1} (L L^T = M^{-1})."""

    kind: str
    mass: np.ndarray
    mass_inv: np.ndarray
    mass_inv_chol: np.ndarray

    @property
    def matrices(self):
        """The matrices as the kernel takes them: ``MassMatrix(mass, mass_inv, mass_inv_chol)``."""
        return MassMatrix(self.mass, self.mass_inv, self.mass_inv_chol)


MASS_MATRIX_KINDS = ("laplace", "laplace-diagonal", "identity")


def make_preconditioner(mass_matrix, n_coef, laplace):
    """Build the preconditioner from a setting: "identity", "laplace", "laplace-diagonal" or an
    (n_coef, n_coef) symmetric positive definite array (checked by `tallchain.SamplerSettings`);
    ``laplace`` is the `LaplaceApproximation` of the posterior (unused for the identity or an
    array)."""
    if isinstance(mass_matrix, str):
        one_of("mass_matrix", mass_matrix, MASS_MATRIX_KINDS)
        if mass_matrix == "identity":
            mass_inv = np.eye(n_coef)
        elif mass_matrix == "laplace":
            mass_inv = laplace.cov
        else:
            mass_inv = np.diag(np.diag(laplace.cov))
        kind = mass_matrix
        mass_inv = np.array(mass_inv, dtype=float)
        chol = np.linalg.cholesky(mass_inv)
        mass = spd_inverse(mass_inv)
    else:
        kind = "given"
        mass, mass_inv = spd_matrix_and_inverse("mass_matrix", mass_matrix, n_coef,
                                                "give one row and column per coefficient")
        chol = np.linalg.cholesky(0.5 * (mass_inv + mass_inv.T))
    return Preconditioner(kind, np.ascontiguousarray(0.5 * (mass + mass.T)),
                          np.ascontiguousarray(0.5 * (mass_inv + mass_inv.T)),
                          np.ascontiguousarray(np.tril(chol)))
