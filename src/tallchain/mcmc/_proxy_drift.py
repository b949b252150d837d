"""Langevin proposals that drift along the control variates' proxy (private).

With second-order control variates the log posterior has a quadratic proxy
    S(beta) = log p(beta) + sum_i q_i(beta)        (METHODS.md section 4),
a Gaussian in beta with precision Lambda = P - H* (P the prior precision, H* the sum of the
rows' Hessians at beta*) and mode mu. A Langevin proposal (Roberts & Tweedie 1996) that drifts
along grad S, with Lambda as its mass matrix, reads no rows. With L L^T = Lambda^{-1} (lower
Cholesky factor) and the whitened coordinates w = L^{-1} (beta - mu):

    (h/2) Lambda^{-1} grad S(beta) = -(h/2) L w,   so
    w' = (1 - h/2) w + sqrt(h) xi,                 beta' = beta + L (w' - w),
    c = log q(beta | beta') - log q(beta' | beta) = |xi|^2 / 2 - |w - (1 - h/2) w'|^2 / (2h),
    S(beta') - S(beta) = (|w|^2 - |w'|^2) / 2.

The proposal is a deterministic function of the state and the noise xi, with a density ratio
known exactly, so the Metropolis-Hastings chain stays exact whatever the drift (Tierney 1994,
Ann. Statist. 22, 1701); only the log target ratio is estimated, on one batch: S(beta') -
S(beta) plus the batch's residuals l_i - q_i. A step costs one triangular product, O(d^2 / 2),
and one batch of rows, where batch gradients cost two more batch reads and about ten dense
O(d^2) matrix-vector products (drift, c, proxy sums, prior).
The chain carries w in the gradient slot of its state; `proxy_coordinates` computes it once
from beta at the start of a run.
"""

import math

import numpy as np
from scipy.linalg import solve_triangular

from ..models._kernels import jit


@jit
def propose_along_proxy(chol, w, h, rng, w_new, step, beta, prop):
    """Draw xi ~ N(0, I) and set w_new = (1 - h/2) w + sqrt(h) xi and prop = beta + L (w_new -
    w), with ``chol`` = L and ``step`` (n_coef,) scratch; return the proposal-density term c
    (module docstring)."""
    d = w.shape[0]
    shrink = 1.0 - 0.5 * h
    sqrt_h = math.sqrt(h)
    forward = 0.0
    backward = 0.0
    for a in range(d):
        xi = rng.standard_normal()
        forward += xi * xi
        w_new[a] = shrink * w[a] + sqrt_h * xi
        step[a] = w_new[a] - w[a]
        r = w[a] - shrink * w_new[a]
        backward += r * r
    for a in range(d):
        s = 0.0
        for b in range(a + 1):
            s += chol[a, b] * step[b]
        prop[a] = beta[a] + s
    return 0.5 * forward - 0.5 * backward / h


@jit
def proxy_log_ratio(w_new, w):
    """S(beta') - S(beta) = (|w|^2 - |w'|^2) / 2."""
    acc = 0.0
    for a in range(w.shape[0]):
        acc += (w[a] - w_new[a]) * (w[a] + w_new[a])
    return 0.5 * acc


def proxy_coordinates(pre, beta):
    """w = L^{-1} (beta - mu) for the proxy preconditioner ``pre`` (its ``centre`` is mu)."""
    return solve_triangular(pre.mass_inv_chol, np.asarray(beta) - pre.centre, lower=True)
