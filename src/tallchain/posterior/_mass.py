"""Mass matrices (preconditioners) from the Laplace approximation or given (private).

Two forms reach the kernel. Dense: M, M^{-1} and the Cholesky factor of M^{-1}, O(d^2) per
step. Factored: M^{-1} = S C_k S with S the diagonal of Laplace standard deviations and C_k the
Laplace correlation matrix C = Q diag(lambda) Q^T truncated to its k eigenpairs farthest from 1
(largest |log lambda|), C_k = I + Q_k diag(lambda_k - 1) Q_k^T: exact along those k directions
and the identity across the others, so C_k^{-1} C has the eigenvalues 1 (kept) and the
remaining lambda. Since Q_k has orthonormal columns, C_k^p = I + Q_k diag(lambda_k^p - 1)
Q_k^T for every power p, so the kernel applies M^{-1} (p = 1), M (p = -1) and a square root
of M^{-1} (p = 1/2) in O(d k) per step. k = 0 is the diagonal Laplace mass matrix.
"""

from collections import namedtuple
from dataclasses import dataclass

import numpy as np

from .._arrays import spd_inverse
from .._validation import one_of, spd_matrix_and_inverse

# Eigen-directions of the Laplace correlation kept by "laplace-lowrank" (at most d - 1). The
# dense "laplace" stays the default: it had the best ESS per second at d = 10, 100 and 500
# (benchmarks/bench_wide.py; DEVELOPERS.md, "Wide designs and the time to an answer").
LOW_RANK = 10

_EMPTY_VECTOR = np.empty(0)
_EMPTY_MATRIX = np.empty((0, 0))

MassMatrix = namedtuple("MassMatrix", ["mass", "mass_inv", "mass_inv_chol", "scale", "basis",
                                       "powers"],
                        defaults=(_EMPTY_VECTOR, _EMPTY_MATRIX, _EMPTY_MATRIX))
MassMatrix.__doc__ = """A mass matrix as the transition kernel takes it: dense (``scale`` empty)
or factored (``mass``, ``mass_inv`` and ``mass_inv_chol`` empty).

Attributes
----------
mass : ndarray of shape (n_coef, n_coef)
    M, symmetric positive definite.
mass_inv : ndarray of shape (n_coef, n_coef)
    M^{-1}.
mass_inv_chol : ndarray of shape (n_coef, n_coef)
    L, lower triangular with L L^T = M^{-1}.
scale : ndarray of shape (n_coef,)
    S, the Laplace standard deviations (factored form).
basis : ndarray of shape (n_coef, k)
    Q_k, orthonormal eigenvectors of the Laplace correlation matrix.
powers : ndarray of shape (3, k)
    lambda_k - 1, sqrt(lambda_k) - 1 and 1 / lambda_k - 1: the powers 1, 1/2 and -1 of C_k.
"""


@dataclass
class Preconditioner:
    """Mass matrix M with its inverse and a square root L of M^{-1} (L L^T = M^{-1}; the lower
    Cholesky factor for the dense kinds, S C_k^{1/2} for the factored ones).

    ``factors`` is None for the dense kinds, else ``(scale, basis, powers)`` (see
    `MassMatrix`); the dense matrices are then kept for what runs once (references, tests)
    and the kernel gets the factors only. ``centre`` is the mode of the control variates'
    quadratic proxy for `proxy_preconditioner`, else None.
    """

    kind: str
    mass: np.ndarray
    mass_inv: np.ndarray
    mass_inv_chol: np.ndarray
    factors: tuple | None = None
    centre: np.ndarray | None = None

    @property
    def matrices(self):
        """The matrices as the kernel takes them (`MassMatrix`)."""
        if self.factors is None:
            return MassMatrix(self.mass, self.mass_inv, self.mass_inv_chol)
        return MassMatrix(_EMPTY_MATRIX, _EMPTY_MATRIX, _EMPTY_MATRIX, *self.factors)

    @property
    def dense_matrices(self):
        """``MassMatrix(mass, mass_inv, mass_inv_chol)`` in dense form, whatever the kind."""
        return MassMatrix(self.mass, self.mass_inv, self.mass_inv_chol)


MASS_MATRIX_KINDS = ("laplace", "laplace-lowrank", "laplace-diagonal", "identity")


def make_preconditioner(mass_matrix, n_coef, laplace):
    """Build the preconditioner from a setting: "identity", "laplace", "laplace-lowrank",
    "laplace-diagonal" or an (n_coef, n_coef) symmetric positive definite
    array (checked by `tallchain.SamplerSettings`); ``laplace`` is the `LaplaceApproximation`
    of the posterior (unused for the identity or an array)."""
    if isinstance(mass_matrix, str):
        one_of("mass_matrix", mass_matrix, MASS_MATRIX_KINDS)
        if mass_matrix == "laplace-lowrank":
            return factored_preconditioner(mass_matrix, laplace.cov, min(LOW_RANK, n_coef - 1))
        if mass_matrix == "laplace-diagonal":
            return factored_preconditioner(mass_matrix, laplace.cov, 0)
        mass_inv = np.eye(n_coef) if mass_matrix == "identity" else laplace.cov
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


def factored_preconditioner(kind, cov, rank):
    """The factored mass matrix M^{-1} = S C_k S of covariance ``cov`` with the ``rank``
    eigenpairs of its correlation matrix farthest from 1 (module docstring); one O(d^3)
    eigendecomposition, at set-up."""
    cov = np.asarray(cov, dtype=float)
    scale = np.sqrt(np.diag(cov))
    corr = cov / scale[:, None] / scale[None, :]
    lam, vec = np.linalg.eigh(0.5 * (corr + corr.T))
    keep = np.argsort(-np.abs(np.log(lam)), kind="stable")[:rank]
    lam, basis = lam[keep], np.ascontiguousarray(vec[:, keep])
    powers = np.ascontiguousarray(np.stack([lam - 1.0, np.sqrt(lam) - 1.0, 1.0 / lam - 1.0]))

    eye = np.eye(scale.shape[0])
    mass_inv = scale[:, None] * (eye + (basis * powers[0]) @ basis.T) * scale[None, :]
    mass = (eye + (basis * powers[2]) @ basis.T) / scale[:, None] / scale[None, :]
    root = scale[:, None] * (eye + (basis * powers[1]) @ basis.T)
    return Preconditioner(kind, np.ascontiguousarray(0.5 * (mass + mass.T)),
                          np.ascontiguousarray(0.5 * (mass_inv + mass_inv.T)),
                          np.ascontiguousarray(root), (scale, basis, powers))


def proxy_preconditioner(rows, prior):
    """The precision Lambda = P - H* of the quadratic proxy S = log p + sum_i q_i of a
    second-order row cache ``rows`` (`RowCache`) and Gaussian prior ``prior`` (`PriorArrays`),
    as a dense preconditioner whose ``centre`` is the proxy's mode
    mu = beta* + Lambda^{-1} grad S(beta*), grad S(beta*) = g* - P (beta* - m).

    Returns None when Lambda is not positive definite (beta* is then not a mode of S).
    """
    prec = np.asarray(prior.precision, dtype=float)
    lam = prec - rows.H_star
    lam = 0.5 * (lam + lam.T)
    try:
        mass_inv = spd_inverse(lam)
        chol = np.linalg.cholesky(mass_inv)
    except np.linalg.LinAlgError:
        return None
    grad = rows.g_star - prec @ (rows.beta_star - prior.mean)
    centre = rows.beta_star + mass_inv @ grad
    return Preconditioner("laplace", np.ascontiguousarray(lam),
                          np.ascontiguousarray(0.5 * (mass_inv + mass_inv.T)),
                          np.ascontiguousarray(np.tril(chol)), centre=centre)
