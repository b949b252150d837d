"""Small GLM problems for the kernel tests, and the sizes that rounding errors scale with.

Import in a test as ``from glm_problems import ...`` (``tests`` is on pytest's path).

Rounding budgets of the kernel tests (``assert_ulps_close``; eps = 2u, u the unit roundoff):

* A linear predictor eta_i = sum_j x_ij beta_j + beta_0 + offset_i is p + 2 terms: (p + 1)
  additions, each within u of the running sum, so each evaluation is within (p + 1) u of
  ``eta_parts`` (the sum of the terms' absolute values); two evaluations in another order differ
  by at most (p + 1) eps, i.e. p + 1 ulps of ``eta_parts``.
* f, f', f'' at a given eta: exp, log1p, lgamma and expit are within 1-2 ulps in the C library
  and in NumPy/SciPy, and combine at most three terms: 4 u per evaluation, 4 ulps for two, of
  the sum of the absolute values of their terms (``f_parts``, ``f1_parts``, ``f2_parts``); one more
  rounding where the value is multiplied by x_ij.
* A rounding in eta moves f by |f'| times it, f' by |f''| and f'' by |f'''| <= f2_parts (logistic:
  |f'''| = |f''| |1 - 2 sigma| <= sigma; Poisson: e^eta; linear: 0), so the scale of a per-row
  value adds the derivative times ``eta_parts``.
* A sum of n such values, added in another order (serial, vectorised, pairwise, blocked): each
  evaluation is within (n - 1) u of the sum of the terms' absolute values (first-order bound),
  so two differ by at most n - 1 ulps of it (in practice about sqrt(n)).

So a per-row value is allowed ``ROW_ULPS`` ulps of its scale, and a sum of n of them
``ROW_ULPS + n - 1`` ulps of the sum of the scales.
"""

import numpy as np
import pytest
from scipy import special

from tallchain.models import _kernels as K
from tallchain.models import _reference as R

FAMILIES = {"linear": K.LINEAR, "logistic": K.LOGISTIC, "poisson": K.POISSON}
# The sizes below are at least the smallest normal number: eps times a subnormal size is not
# representable (it rounds to 0).
TINY = np.finfo(np.float64).tiny
N_ROWS, N_COLS = 50, 3
NOISE_SD = 0.7
# (p + 1) for the linear predictor, 4 for f and its derivatives, 1 for a product with x_ij,
# 1 for the term that combines them (see the module docstring).
ROW_ULPS = (N_COLS + 1) + 4 + 1 + 1


def sum_ulps(n_terms):
    """ulps allowed between two sums of n_terms per-row values, added in different orders."""
    return ROW_ULPS + n_terms - 1


def make_problem(family, dtype, intercept, with_offset, seed=7, n_rows=N_ROWS):
    """A small GLM problem with moderate linear predictors: (data, beta, beta_new, beta_star,
    idx), with idx an unsorted batch with repeats."""
    g = np.random.default_rng(seed)
    d = N_COLS + intercept
    X = np.ascontiguousarray(g.normal(0.0, 0.6, size=(n_rows, N_COLS)).astype(dtype))
    offset = g.uniform(-0.5, 0.5, n_rows) if with_offset else np.zeros(n_rows)
    beta = g.normal(0.0, 0.4, d)
    eta = R.design(X, intercept) @ beta + offset
    if family == K.LINEAR:
        y = eta + NOISE_SD * g.normal(size=n_rows)
    elif family == K.LOGISTIC:
        y = (g.random(n_rows) < special.expit(eta)).astype(np.float64)
    else:
        y = g.poisson(np.exp(eta)).astype(np.float64)
    data = K.GLMData(family, X, y, offset, NOISE_SD, intercept)
    beta_new = beta + g.normal(0.0, 0.3, d)
    beta_star = beta + g.normal(0.0, 0.1, d)
    idx = g.integers(0, n_rows, 20).astype(np.int64)
    return data, beta, beta_new, beta_star, idx


CASES = [pytest.param((fam, dt, ic, off),
                      id=f"{name}-{np.dtype(dt).name}-ic{ic}-{'off' if off else 'nooff'}")
         for name, fam in FAMILIES.items() for dt in (np.float64, np.float32)
         for ic in (0, 1) for off in (False, True)]


# --- sizes of the terms ------------------------------------------------------------------------


def f_parts(family, eta, y, noise_sd, log_norm=0.0):
    """Sum of the absolute values of the terms of f(eta; y) + log_norm."""
    eta, y = np.asarray(eta, dtype=float), np.asarray(y, dtype=float)
    if family == K.LINEAR:
        parts = 0.5 * ((y - eta) / noise_sd) ** 2 + np.abs(log_norm)
    elif family == K.LOGISTIC:
        parts = np.abs(y * eta) + R.softplus(eta) + np.abs(log_norm)
    else:
        with np.errstate(over="ignore"):
            parts = np.abs(y * eta) + np.exp(eta) + np.abs(log_norm)
    return np.maximum(parts, TINY)


def f1_parts(family, eta, y, noise_sd):
    """Sum of the absolute values of the terms of f'(eta; y); also a bound on |f'|."""
    eta, y = np.asarray(eta, dtype=float), np.asarray(y, dtype=float)
    if family == K.LINEAR:
        parts = (np.abs(y) + np.abs(eta)) / noise_sd**2
    elif family == K.LOGISTIC:
        parts = np.abs(y) + R.sigmoid(eta)
    else:
        parts = np.abs(y) + np.exp(eta)
    return np.maximum(parts, TINY)


def f2_parts(family, eta, noise_sd):
    """The size f'' is formed at: 1/s^2, sigma(eta) (the kernel's sigma (1 - sigma) is within a
    few u of sigma, not of the product), e^eta; also a bound on |f''| and |f'''|."""
    eta = np.asarray(eta, dtype=float)
    if family == K.LINEAR:
        return np.full(eta.shape, 1.0 / noise_sd**2)
    return np.maximum(R.sigmoid(eta) if family == K.LOGISTIC else np.exp(eta), TINY)


def eta_parts(data, beta, idx=None):
    """Per row: sum_j |x_ij beta_j| + |beta_0| + |offset_i|."""
    phi = np.abs(R.design(data.X, data.intercept, idx))
    return phi @ np.abs(beta) + np.abs(R.rows_of(data.offset, idx))


def loglik_scale(data, beta, idx=None, with_const=True):
    """Per row, the scale of l_i(beta): f_parts + |f'| eta_parts."""
    y = R.rows_of(data.y, idx)
    eta = R.linear_predictor(data, beta, idx)
    ln = R.log_norm_const(data.family, y, data.noise_sd) if with_const else 0.0
    return (f_parts(data.family, eta, y, data.noise_sd, ln)
            + f1_parts(data.family, eta, y, data.noise_sd) * eta_parts(data, beta, idx))


def grad_scale(data, beta, idx=None):
    """Per row and coefficient, the scale of f'(eta_i) Phi_ij: |Phi_ij| (f1_parts + |f''| eta_parts)."""
    y = R.rows_of(data.y, idx)
    eta = R.linear_predictor(data, beta, idx)
    s = (f1_parts(data.family, eta, y, data.noise_sd)
         + f2_parts(data.family, eta, data.noise_sd) * eta_parts(data, beta, idx))
    return np.abs(R.design(data.X, data.intercept, idx)) * s[:, None]


def hessian_scale(data, beta):
    """Per coefficient pair, the scale of sum_i f''(eta_i) Phi_ia Phi_ib."""
    eta = R.linear_predictor(data, beta)
    s = f2_parts(data.family, eta, data.noise_sd) * (1.0 + eta_parts(data, beta))
    phi = np.abs(R.design(data.X, data.intercept))
    return phi.T @ (s[:, None] * phi)
