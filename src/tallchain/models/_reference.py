"""Pure-NumPy references for the numba kernels (private; used by the tests).

Each function here computes, with whole-array NumPy and no attention to speed, what one kernel
in ``_kernels.py`` (GLM log-likelihoods, gradients, Hessians) or ``.._estimator_kernels.py``
(control-variate estimators) computes row by row. They are the documentation of those kernels:
read a reference to learn what a kernel returns.

Conventions, shared with the kernels:

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
* ``idx`` selects rows (default: all rows, in order).

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


def loglik_eta(family, eta, y, noise_sd):
    """f(eta; y), including the normalising constant."""
    eta = np.asarray(eta, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if family == LINEAR:
        return -0.5 * ((y - eta) / noise_sd) ** 2 + log_norm_const(family, y, noise_sd)
    if family == LOGISTIC:
        return y * eta - softplus(eta)
    with np.errstate(over="ignore"):
        return y * eta - np.exp(eta) + log_norm_const(family, y, noise_sd)


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


def linear_predictor(X, beta, intercept, offset, idx=None):
    """eta_i = Phi_i . beta + offset_i for the rows ``idx``."""
    off = np.asarray(offset, dtype=np.float64)
    if idx is not None:
        off = off[np.asarray(idx)]
    return design(X, intercept, idx) @ np.asarray(beta, dtype=np.float64) + off


def _rows(y, idx):
    y = np.asarray(y, dtype=np.float64)
    return y if idx is None else y[np.asarray(idx)]


# ---------------------------------------------------------------------------------------------
# Per-datum quantities (batch_loglik, batch_loglik_diff, batch_grad_rows, batch_grad_sum)
# ---------------------------------------------------------------------------------------------


def pointwise_loglik(family, X, y, offset, noise_sd, intercept, beta, idx=None):
    """l_i(beta) for i in idx (kernel ``batch_loglik``)."""
    eta = linear_predictor(X, beta, intercept, offset, idx)
    return loglik_eta(family, eta, _rows(y, idx), noise_sd)


def pointwise_loglik_diff(family, X, y, offset, noise_sd, intercept, beta_new, beta_old, idx=None):
    """D_i = l_i(beta_new) - l_i(beta_old) for i in idx (kernel ``batch_loglik_diff``)."""
    args = (family, X, y, offset, noise_sd, intercept)
    return pointwise_loglik(*args, beta_new, idx) - pointwise_loglik(*args, beta_old, idx)


def grad_rows(family, X, y, offset, noise_sd, intercept, beta, idx=None):
    """Row k is grad l_{idx[k]}(beta) = f'(eta_i) Phi_i (kernel ``batch_grad_rows``)."""
    eta = linear_predictor(X, beta, intercept, offset, idx)
    return dloglik_eta(family, eta, _rows(y, idx), noise_sd)[:, None] * design(X, intercept, idx)


def grad_sum(family, X, y, offset, noise_sd, intercept, beta, idx=None):
    """sum_{i in idx} grad l_i(beta) (kernel ``batch_grad_sum``)."""
    return grad_rows(family, X, y, offset, noise_sd, intercept, beta, idx).sum(axis=0)


# ---------------------------------------------------------------------------------------------
# Full-data sums (full_loglik, full_loglik_grad, full_loglik_diff, full_hessian,
# full_eta_derivatives)
# ---------------------------------------------------------------------------------------------


def loglik(family, X, y, offset, noise_sd, intercept, beta, *, with_const=True):
    """sum_i l_i(beta) (kernels ``full_loglik`` and the value of ``full_loglik_grad``).

    With ``with_const=False`` the per-datum constants (``log_norm_const``) are left out, as in
    ``full_loglik_shifted`` and ``full_loglik_grad_shifted`` with ``with_const`` false.
    """
    total = np.sum(pointwise_loglik(family, X, y, offset, noise_sd, intercept, beta))
    if not with_const:
        total -= np.sum(log_norm_const(family, y, noise_sd))
    return float(total)


def loglik_diff(family, X, y, offset, noise_sd, intercept, beta_new, beta_old):
    """sum_i [l_i(beta_new) - l_i(beta_old)] (kernel ``full_loglik_diff``)."""
    return float(np.sum(pointwise_loglik_diff(family, X, y, offset, noise_sd, intercept,
                                              beta_new, beta_old)))


def hessian(family, X, y, offset, noise_sd, intercept, beta):
    """sum_i f''(eta_i) Phi_i Phi_i^T = Phi^T diag(f'') Phi (kernel ``full_hessian``)."""
    phi = design(X, intercept)
    eta = linear_predictor(X, beta, intercept, offset)
    w = d2loglik_eta(family, eta, y, noise_sd)
    return phi.T @ (w[:, None] * phi)


def eta_derivatives(family, X, y, offset, noise_sd, intercept, beta):
    """(eta_i, f'(eta_i), f''(eta_i)) for every row (kernel ``full_eta_derivatives``)."""
    eta = linear_predictor(X, beta, intercept, offset)
    return eta, dloglik_eta(family, eta, y, noise_sd), d2loglik_eta(family, eta, y, noise_sd)


# ---------------------------------------------------------------------------------------------
# Control variates and estimators (.._estimator_kernels)
# ---------------------------------------------------------------------------------------------


def proxy_rows(family, X, y, offset, noise_sd, intercept, beta, beta_star, cv_order, idx=None):
    """q_i(beta): the Taylor proxy of l_i around beta_star, of order ``cv_order`` (0, 1 or 2).

    q_i = f(eta*_i) + f'(eta*_i) (eta_i - eta*_i) [+ 1/2 f''(eta*_i) (eta_i - eta*_i)^2]
    (METHODS.md section 4). Order 0 is the constant f(eta*_i).
    """
    yy = _rows(y, idx)
    eta = linear_predictor(X, beta, intercept, offset, idx)
    eta_star = linear_predictor(X, beta_star, intercept, offset, idx)
    u = eta - eta_star
    q = loglik_eta(family, eta_star, yy, noise_sd)
    if cv_order >= 1:
        q = q + dloglik_eta(family, eta_star, yy, noise_sd) * u
    if cv_order >= 2:
        q = q + 0.5 * d2loglik_eta(family, eta_star, yy, noise_sd) * u * u
    return q


def proxy_grad_rows(family, X, y, offset, noise_sd, intercept, beta, beta_star, cv_order,
                    idx=None):
    """Row k is grad q_{idx[k]}(beta) = [f'*_i (+ f''*_i (eta_i - eta*_i))] Phi_i (0 for order 0)."""
    yy = _rows(y, idx)
    phi = design(X, intercept, idx)
    eta = linear_predictor(X, beta, intercept, offset, idx)
    eta_star = linear_predictor(X, beta_star, intercept, offset, idx)
    w = np.zeros(eta.shape)
    if cv_order >= 1:
        w = w + dloglik_eta(family, eta_star, yy, noise_sd)
    if cv_order >= 2:
        w = w + d2loglik_eta(family, eta_star, yy, noise_sd) * (eta - eta_star)
    return w[:, None] * phi


def residual_diffs(family, X, y, offset, noise_sd, intercept, beta_new, beta_old, beta_star,
                   cv_order, idx=None):
    """r_i(b') - r_i(b) = D_i - [q_i(b') - q_i(b)] for i in idx (kernel ``batch_residual_diffs``)."""
    args = (family, X, y, offset, noise_sd, intercept)
    d = pointwise_loglik_diff(*args, beta_new, beta_old, idx)
    dq = (proxy_rows(*args, beta_new, beta_star, cv_order, idx)
          - proxy_rows(*args, beta_old, beta_star, cv_order, idx))
    return d - dq


def cv_gradient_sum(family, X, y, offset, noise_sd, intercept, beta, beta_star, cv_order, idx):
    """sum_{i in idx} [grad l_i(beta) - grad q_i(beta)] (kernel ``cv_gradient_rows``)."""
    args = (family, X, y, offset, noise_sd, intercept)
    return (grad_rows(*args, beta, idx)
            - proxy_grad_rows(*args, beta, beta_star, cv_order, idx)).sum(axis=0)


def proxy_gradient_sum(family, X, y, offset, noise_sd, intercept, beta, beta_star, cv_order):
    """sum_i grad q_i(beta) over all rows (kernel ``proxy_gradient_sum``, which uses g*, H*)."""
    return proxy_grad_rows(family, X, y, offset, noise_sd, intercept, beta, beta_star,
                           cv_order).sum(axis=0)


def proxy_loglik_diff_sum(family, X, y, offset, noise_sd, intercept, beta_new, beta_old,
                          beta_star, cv_order):
    """Q(b') - Q(b) = sum_i [q_i(b') - q_i(b)] over all rows, summed row by row
    (kernel ``proxy_loglik_diff_sum``, which uses the closed form in g*, H*)."""
    args = (family, X, y, offset, noise_sd, intercept)
    return float(np.sum(proxy_rows(*args, beta_new, beta_star, cv_order)
                        - proxy_rows(*args, beta_old, beta_star, cv_order)))


def cv_gradient(family, X, y, offset, noise_sd, intercept, beta, beta_star, cv_order, idx):
    """The control-variate gradient estimate of sum_i grad l_i(beta) from the batch idx:
    sum_i grad q_i(beta) + (N/n) sum_{i in idx} [grad l_i(beta) - grad q_i(beta)]
    (Baker, Fearnhead, Fox & Nemeth 2019; METHODS.md section 4)."""
    args = (family, X, y, offset, noise_sd, intercept)
    n_rows = np.asarray(X).shape[0]
    n = np.asarray(idx).shape[0]
    return (proxy_gradient_sum(*args, beta, beta_star, cv_order)
            + n_rows / n * cv_gradient_sum(*args, beta, beta_star, cv_order, idx))


def prior_logpdf_diff(prior_mean, prior_prec, beta_new, beta_old):
    """log p(b') - log p(b) for N(m, P^{-1}): -1/2 (b'-m)'P(b'-m) + 1/2 (b-m)'P(b-m)."""
    r1 = np.asarray(beta_new) - prior_mean
    r0 = np.asarray(beta_old) - prior_mean
    return float(-0.5 * r1 @ prior_prec @ r1 + 0.5 * r0 @ prior_prec @ r0)


def prior_grad(prior_mean, prior_prec, beta):
    """grad log p(beta) = -P (beta - m) (what kernel ``add_prior_grad`` adds)."""
    return -np.asarray(prior_prec) @ (np.asarray(beta) - prior_mean)


def scaled_sum_and_variance(values, n_rows):
    """(N mean, N^2 (1 - n/N) s^2 / n, skewness g1, excess kurtosis g2) of a batch of n values.

    s^2 is the sample variance with divisor n - 1 (0 when n = 1): the unbiased estimate of the
    population variance S^2 under simple random sampling without replacement, so the second
    entry estimates Var(N mean) without bias (Cochran, Sampling Techniques, ch. 2). The shape
    statistics are the moment ratios g1 = m3 / m2^{3/2} and g2 = m4 / m2^2 - 3 with divisor n
    (both 0 when the values are all equal).
    """
    v = np.asarray(values, dtype=np.float64)
    n = v.shape[0]
    mean = v.mean()
    c = v - mean
    s2 = c @ c / (n - 1) if n > 1 else 0.0
    var = n_rows**2 * (1.0 - n / n_rows) * s2 / n
    m2 = np.mean(c**2)
    if m2 > 0.0:
        skew = np.mean(c**3) / m2**1.5
        kurt = np.mean(c**4) / m2**2 - 3.0
    else:
        skew = kurt = 0.0
    return float(n_rows * mean), float(var), float(skew), float(kurt)
