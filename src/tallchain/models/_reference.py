"""Pure-NumPy references for the numba kernels of ``_kernels.py`` (private; used by the tests).

Each public function here has the name of the kernel it checks and computes, with whole-array
NumPy and no attention to speed, what that kernel computes row by row; where the kernel writes
into an output array, the reference returns the value instead. They are the documentation of
those kernels: read a reference to learn what a kernel returns. (The parallel kernels
``par_loglik_grad``, ``par_hessian`` and ``par_eta_derivatives`` compute what `full_loglik_grad`,
`full_hessian` and `full_eta_derivatives` compute over all rows.) The references of the
minibatch estimators are in ``tallchain.mcmc._reference``.

Conventions, shared with the kernels:

* ``data`` is a ``GLMData(family, X, y, offset, noise_sd, intercept)`` (``model.glm_data``).
* ``family`` is ``LINEAR`` (0), ``LOGISTIC`` (1) or ``POISSON`` (2).
* The linear predictor is eta_i = [beta_0] + x_i . beta_{intercept:} + offset_i: with
  ``intercept`` true, coefficient 0 is the intercept and ``X`` has no column of ones.
* The per-datum log-likelihood is l_i(beta) = f(eta_i; y_i) with (METHODS.md section 4)

  ========  ===========================================  ===============  ==============
  family    f(eta; y)                                    f'               f''
  ========  ===========================================  ===============  ==============
  linear    -(y - eta)^2 / (2 s^2) - log(s sqrt(2 pi))   (y - eta) / s^2  -1 / s^2
  logistic  y eta - log(1 + e^eta),  y in {0, 1}         y - sigmoid      -sig (1 - sig)
  Poisson   y eta - e^eta - log(y!)                      y - e^eta        -e^eta
  ========  ===========================================  ===============  ==============

  with s the known noise sd of the linear family.
* ``idx`` selects rows; ``lo, hi`` a range of rows (default: all rows, in order).

The references evaluate the definitions directly (l(b') - l(b) is a plain subtraction), so they
are meant for moderate linear predictors; the kernels' behaviour at extreme |eta| is tested
against exact values instead.
"""

import numpy as np
from scipy import special

LINEAR = 0
LOGISTIC = 1
POISSON = 2


# ---------------------------------------------------------------------------------------------
# Scalar functions of eta
# ---------------------------------------------------------------------------------------------


def softplus(z):
    """log(1 + e^z), elementwise."""
    return np.logaddexp(0.0, np.asarray(z, dtype=np.float64))


def sigmoid(z):
    """1 / (1 + e^-z), elementwise."""
    return special.expit(np.asarray(z, dtype=np.float64))


def log_norm_const(family, y, noise_sd):
    """The datum's constant: -log(s sqrt(2 pi)) (linear), -log(y!) (Poisson), 0 (logistic)."""
    y = np.asarray(y, dtype=np.float64)
    if family == LINEAR:
        return np.full(y.shape, -np.log(noise_sd) - 0.5 * np.log(2.0 * np.pi))
    if family == POISSON:
        return -special.gammaln(y + 1.0)
    return np.zeros(y.shape)


def loglik_eta(family, eta, y, noise_sd, log_norm):
    """f(eta; y) + log_norm (the kernel adds the constant it is given)."""
    eta = np.asarray(eta, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if family == LINEAR:
        return -0.5 * ((y - eta) / noise_sd) ** 2 + log_norm
    if family == LOGISTIC:
        return y * eta - softplus(eta) + log_norm
    with np.errstate(over="ignore"):
        return y * eta - np.exp(eta) + log_norm


def dloglik_eta(family, eta, y, noise_sd):
    """f'(eta; y)."""
    eta = np.asarray(eta, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if family == LINEAR:
        return (y - eta) / noise_sd**2
    if family == LOGISTIC:
        return y - sigmoid(eta)
    return y - np.exp(eta)


def d2loglik_eta(family, eta, y, noise_sd):
    """f''(eta; y)."""
    eta = np.asarray(eta, dtype=np.float64)
    if family == LINEAR:
        return np.full(eta.shape, -1.0 / noise_sd**2)
    if family == LOGISTIC:
        # sigma (1 - sigma) = sigma(eta) sigma(-eta), accurate in both tails
        return -sigmoid(eta) * sigmoid(-eta)
    return -np.exp(eta)


def loglik_and_dloglik_eta(family, eta, y, noise_sd, log_norm):
    """(f(eta; y) + log_norm, f'(eta; y))."""
    return (loglik_eta(family, eta, y, noise_sd, log_norm),
            dloglik_eta(family, eta, y, noise_sd))


def loglik_diff_eta(family, eta_new, eta_old, y, noise_sd):
    """f(eta_new) - f(eta_old), as a plain difference (moderate eta only)."""
    return (loglik_eta(family, eta_new, y, noise_sd, 0.0)
            - loglik_eta(family, eta_old, y, noise_sd, 0.0))


# ---------------------------------------------------------------------------------------------
# Design and linear predictor
# ---------------------------------------------------------------------------------------------


def design(X, intercept, idx=None):
    """Phi: the rows ``idx`` of X in float64, with a column of ones first when ``intercept``."""
    X = np.asarray(X)
    rows = X if idx is None else X[np.asarray(idx)]
    rows = rows.astype(np.float64)
    if intercept:
        rows = np.column_stack([np.ones(rows.shape[0]), rows])
    return rows


def linear_predictor(data, beta, idx=None):
    """eta_i = Phi_i . beta + offset_i for the rows ``idx`` (kernel ``linear_predictor``, one
    row at a time)."""
    off = np.asarray(data.offset, dtype=np.float64)
    if idx is not None:
        off = off[np.asarray(idx)]
    return design(data.X, data.intercept, idx) @ np.asarray(beta, dtype=np.float64) + off


def rows_of(values, idx=None, lo=0, hi=None):
    """values[idx], or values[lo:hi] when idx is None, as float64."""
    v = np.asarray(values, dtype=np.float64)
    return v[np.asarray(idx)] if idx is not None else v[lo:hi]


def _range(data, lo, hi):
    """The row indices lo .. hi - 1 (hi None: all rows)."""
    n = np.asarray(data.X).shape[0]
    return np.arange(lo, n if hi is None else hi)


# ---------------------------------------------------------------------------------------------
# The batch kernel
# ---------------------------------------------------------------------------------------------


def batch_loglik(data, beta, idx):
    """l_i(beta) for i in idx, constants included."""
    y = rows_of(data.y, idx)
    eta = linear_predictor(data, beta, idx)
    return loglik_eta(data.family, eta, y, data.noise_sd,
                      log_norm_const(data.family, y, data.noise_sd))


def grad_rows(data, beta, idx):
    """Row k is grad l_{idx[k]}(beta) = f'(eta_i) Phi_i (the terms the gradient kernels sum)."""
    eta = linear_predictor(data, beta, idx)
    f1 = dloglik_eta(data.family, eta, rows_of(data.y, idx), data.noise_sd)
    return f1[:, None] * design(data.X, data.intercept, idx)


# ---------------------------------------------------------------------------------------------
# Full-data sums over the rows [lo, hi)
# ---------------------------------------------------------------------------------------------


def full_loglik(data, beta, with_const=True, lo=0, hi=None):
    """sum_{lo <= i < hi} l_i(beta); with ``with_const`` False without the per-datum constants
    (``log_norm_const``)."""
    idx = _range(data, lo, hi)
    total = np.sum(batch_loglik(data, beta, idx))
    if not with_const:
        total -= np.sum(log_norm_const(data.family, rows_of(data.y, idx), data.noise_sd))
    return float(total)


def full_loglik_grad(data, beta, with_const=True, lo=0, hi=None):
    """(sum_i l_i(beta), sum_i grad l_i(beta)) over the rows [lo, hi) (the kernel writes the
    gradient into its ``grad`` argument)."""
    return (full_loglik(data, beta, with_const, lo, hi),
            grad_rows(data, beta, _range(data, lo, hi)).sum(axis=0))


def full_hessian(data, beta, lo=0, hi=None):
    """sum_i f''(eta_i) Phi_i Phi_i^T = Phi^T diag(f'') Phi over the rows [lo, hi)."""
    idx = _range(data, lo, hi)
    phi = design(data.X, data.intercept, idx)
    eta = linear_predictor(data, beta, idx)
    w = d2loglik_eta(data.family, eta, rows_of(data.y, idx), data.noise_sd)
    return phi.T @ (w[:, None] * phi)


def full_eta_derivatives(data, beta, lo=0, hi=None):
    """(eta_i, f'(eta_i), f''(eta_i)) for the rows [lo, hi) (the kernel writes them into rows
    lo .. hi - 1 of its three output arrays)."""
    idx = _range(data, lo, hi)
    eta = linear_predictor(data, beta, idx)
    y = rows_of(data.y, idx)
    return (eta, dloglik_eta(data.family, eta, y, data.noise_sd),
            d2loglik_eta(data.family, eta, y, data.noise_sd))
