"""Numba kernels for generalised linear models (private).

Every model is a GLM: with linear predictor eta_i = x_i . beta (+ intercept) (+ offset_i) the
per-datum log-likelihood is l_i(beta) = f(eta_i; y_i), and its gradient is f'(eta_i) x_i.
The family is a small integer code, so one compiled kernel serves all families.

Every kernel that reads rows takes the model's data as its first argument, one `GLMData`
(``model.glm_data``). Batch kernels touch only the rows of an index batch ``idx`` (int64);
serial full-data kernels sum the rows [lo, hi), so that the parallel kernels run them on
blocks of rows without slicing.

The pure-NumPy references in ``_reference.py`` carry the names of these kernels, compute the
same quantities and are the documentation of what is computed here.
"""

import math
from collections import namedtuple

import numba
import numpy as np

from ._family_params import (BINOMIAL, LINEAR, LOGISTIC, NEG_BINOMIAL, OPTIONS, POISSON,
                             dloglik_phi, family_value, log_norm_phi, nb_d2loglik, nb_dloglik,
                             nb_loglik)
from ._rows import design_join, design_parts, row_axpy, row_dot, row_outer

# exp() overflows past this; Poisson gradients saturate here instead of producing inf * 0 = NaN.
_EXP_MAX = 700.0
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)

# The options (fastmath without "nnan"/"ninf"/"arcp") are set once, in _family_params.
jit = numba.njit(**OPTIONS)
pjit = numba.njit(parallel=True, **OPTIONS)

# The parallel set-up passes split the rows into blocks of this size, whatever the thread count.
BLOCK_ROWS = 4096

# A binomial model's trials per row, and frequency weights per row; one-entry placeholders
# when absent (a model has at least 2 rows, so the length tells them apart).
NO_TRIALS = np.ones(1)
NO_TRIALS.flags.writeable = False
NO_WEIGHTS = NO_TRIALS


def kernel_view(a):
    """A read-only view of ``a`` (an array, or a `CSRArrays` part by part), no copy.

    numba types a read-only array apart from a writable one and compiles every kernel again
    for each mix of flags in the groups it is given. The data and the row cache reach the
    kernels read-only whatever the caller's arrays are (the placeholders above are read-only
    too), so the kernels compile once per dtype and storage, not per flag combination.
    """
    if hasattr(a, "_fields"):   # CSRArrays: data, indices, indptr, shape
        return type(a)(*(kernel_view(p) if isinstance(p, np.ndarray) else p for p in a))
    v = a.view()
    v.flags.writeable = False
    return v

GLMData = namedtuple("GLMData", ["family", "X", "y", "offset", "noise_sd", "intercept",
                                 "n_family", "trials", "weights"],
                     defaults=(0, NO_TRIALS, NO_WEIGHTS))
GLMData.__doc__ = """The data of a GLM as the kernels take it (numba reads a namedtuple as a typed struct).

Attributes
----------
family : int
    ``LINEAR``, ``LOGISTIC`` or ``POISSON``.
X : ndarray of shape (N, p), float32 or float64, C order; or CSRArrays
    The design matrix as the model keeps it (possibly a memory map; never copied): dense, or
    compressed sparse rows (`tallchain.data.CSRArrays`). Kernels read rows only through the
    helpers of ``_rows.py`` (`row_dot`, `row_axpy`, `row_outer`), written once per storage.
y, offset : ndarray of shape (N,), float64
noise_sd : float
    The linear family's known noise sd (unused by the others, and when it is sampled).
intercept : int
    1 when coefficient 0 is an intercept (X has no column of ones), else 0.
n_family : int, default 0
    The number of family parameters sampled after the coefficients: 1 for the linear family
    with unknown noise sd, whose log is ``theta[n_beta]`` (n_beta = p + intercept), else 0.
    The parameter vector is theta = (coefficients, family parameters).
trials : ndarray of shape (N,) or (1,), float64
    ``BINOMIAL``: each row's number of trials m_i, the value its row functions take in place
    of the noise sd (`row_value`); a placeholder otherwise.
weights : ndarray of shape (N,) or (1,), float64
    Frequency weights: row i's log-likelihood counts weights[i] times (`row_weight`); a
    one-entry placeholder when the model has none.
"""

PriorArrays = namedtuple("PriorArrays", ["mean", "precision"])
PriorArrays.__doc__ = """A Gaussian prior N(mean, precision^{-1}) as the kernels take it.

Attributes
----------
mean : ndarray of shape (n_coef,)
precision : ndarray of shape (n_coef, n_coef)
"""


@jit
def softplus(z):
    """log(1 + e^z) without overflow for any finite z."""
    if z > 0.0:
        return z + math.log1p(math.exp(-z))
    return math.log1p(math.exp(z))


@jit
def sigmoid(z):
    """1 / (1 + e^-z) without overflow."""
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@jit
def loglik_eta(family, eta, y, noise_sd, log_norm):
    """f(eta; y): the per-datum log-likelihood as a function of the linear predictor.

    ``log_norm`` is the datum's constant (-log(s sqrt(2 pi)) for linear, -log(y!) for Poisson).
    """
    if family == LINEAR:
        r = (y - eta) / noise_sd
        return -0.5 * r * r + log_norm
    if family == LOGISTIC:
        return y * eta - softplus(eta)
    if family == BINOMIAL:
        return y * eta - noise_sd * softplus(eta) + log_norm
    if family == NEG_BINOMIAL:
        return nb_loglik(eta, y, noise_sd, log_norm)
    # Poisson, log link: y eta - e^eta - log y!  (-inf below float range for eta > ~709)
    return y * eta - math.exp(eta) + log_norm


@jit
def dloglik_eta(family, eta, y, noise_sd):
    """f'(eta; y)."""
    if family == LINEAR:
        return (y - eta) / (noise_sd * noise_sd)
    if family == LOGISTIC:
        return y - sigmoid(eta)
    if family == BINOMIAL:
        return y - noise_sd * sigmoid(eta)
    if family == NEG_BINOMIAL:
        return nb_dloglik(eta, y, noise_sd)
    return y - math.exp(min(eta, _EXP_MAX))


@jit
def d2loglik_eta(family, eta, y, noise_sd):
    """f''(eta; y) (METHODS.md section 4 table)."""
    if family == LINEAR:
        return -1.0 / (noise_sd * noise_sd)
    if family == LOGISTIC:
        s = sigmoid(eta)
        return -s * (1.0 - s)
    if family == BINOMIAL:
        s = sigmoid(eta)
        return -noise_sd * s * (1.0 - s)
    if family == NEG_BINOMIAL:
        return nb_d2loglik(eta, y, noise_sd)
    return -math.exp(min(eta, _EXP_MAX))


@jit
def loglik_and_dloglik_eta(family, eta, y, noise_sd, log_norm):
    """(f(eta), f'(eta)) together; for the logistic family they share one exp(-|eta|)."""
    if family == LOGISTIC:
        e = math.exp(-abs(eta))
        soft = (eta if eta > 0.0 else 0.0) + math.log1p(e)
        sig = 1.0 / (1.0 + e) if eta >= 0.0 else e / (1.0 + e)
        return y * eta - soft, y - sig
    return loglik_eta(family, eta, y, noise_sd, log_norm), dloglik_eta(family, eta, y, noise_sd)


@jit
def loglik_diff_eta(family, eta_new, eta_old, y, noise_sd):
    """f(eta_new) - f(eta_old), computed so that large |eta| does not cancel into NaN."""
    de = eta_new - eta_old
    if family == LINEAR:
        # -(1/2s^2)[(y-e')^2 - (y-e)^2] = -(1/2s^2)(e'-e)(e'+e-2y)
        return -0.5 * de * (eta_new + eta_old - 2.0 * y) / (noise_sd * noise_sd)
    if family == LOGISTIC or family == BINOMIAL:
        # softplus(a) - softplus(b) = max(a,0) - max(b,0) + log[(1 + e^-|a|) / (1 + e^-|b|)],
        # one log instead of two: log1p((e^-|a| - e^-|b|) / (1 + e^-|b|)).
        ea = math.exp(-abs(eta_new))
        eb = math.exp(-abs(eta_old))
        soft = (max(eta_new, 0.0) - max(eta_old, 0.0)) + math.log1p((ea - eb) / (1.0 + eb))
        if family == BINOMIAL:
            soft *= noise_sd   # the row's trials
        return y * de - soft
    # y de - (e^{eta'} - e^{eta}), with |e^{eta'} - e^{eta}| = e^{hi} (1 - e^{-|de|}) and hi the
    # larger predictor: no 0 * inf when the smaller e^eta underflows, and past exp's range the
    # product is formed in log space, so it is inf only when the true value is beyond float range.
    if de == 0.0:
        return 0.0
    hi = max(eta_new, eta_old)
    a = -math.expm1(-abs(de))
    m = math.exp(hi + math.log(a)) if hi > _EXP_MAX else math.exp(hi) * a
    return y * de - m if de > 0.0 else y * de + m


@jit
def scale_of(data, beta):
    """The family value the rows use (the ``noise_sd`` argument of the per-row functions): from
    the sampled theta[n_beta] when ``data.n_family`` (`family_value`: a noise sd, or NB2's
    r = 1/alpha), else the known ``data.noise_sd``."""
    if data.n_family:
        return family_value(data.family, beta[data.X.shape[1] + data.intercept])
    return data.noise_sd


@jit
def linear_predictor(X, offset, intercept, i, beta):
    """eta_i = [beta_0] + sum_j X[i, j] beta_{j + intercept} + offset_i.

    Takes the arrays, not the GLMData: a kernel reads its members once, outside its row loop
    (numba counts a reference for every read of a tuple's array member).
    """
    acc = row_dot(X, i, beta[intercept:])
    if intercept:
        acc += beta[0]
    return acc + offset[i]


@jit
def log_norm_const(family, y_i, noise_sd):
    if family == LINEAR:
        return -math.log(noise_sd) - _HALF_LOG_2PI
    if family == POISSON:
        return -math.lgamma(y_i + 1.0)
    if family == NEG_BINOMIAL:
        return log_norm_phi(family, y_i, noise_sd) - math.lgamma(y_i + 1.0)
    if family == BINOMIAL:   # log C(m, y), m the row's trials
        return (math.lgamma(noise_sd + 1.0) - math.lgamma(y_i + 1.0)
                - math.lgamma(noise_sd - y_i + 1.0))
    return 0.0


@jit
def row_weight(weights, n_rows, i):
    """Row i's frequency weight: weights[i], or 1 when the model has none (placeholder)."""
    if weights.shape[0] == n_rows:
        return weights[i]
    return 1.0


@jit
def row_value(family, trials, i, v):
    """The value row i's functions take: its trials (binomial), else the model's ``v``."""
    if family == BINOMIAL:
        return trials[i]
    return v


# ---------------------------------------------------------------------------------------------
# Batch kernel (rows in idx only): the model's pointwise log-likelihood
# ---------------------------------------------------------------------------------------------


@jit
def batch_loglik(data, beta, idx, out):
    """out[k] = l_{idx[k]}(beta), constants included."""
    family, X, y, offset, noise_sd = data.family, data.X, data.y, data.offset, scale_of(data, beta)
    trials, weights, n_rows = data.trials, data.weights, data.X.shape[0]
    intercept = data.intercept
    for k in range(idx.shape[0]):
        i = idx[k]
        eta = linear_predictor(X, offset, intercept, i, beta)
        v = row_value(family, trials, i, noise_sd)
        out[k] = row_weight(weights, n_rows, i) * loglik_eta(family, eta, y[i], v,
                                                             log_norm_const(family, y[i], v))


# ---------------------------------------------------------------------------------------------
# Serial full-data kernels over the rows [lo, hi) (exact samplers, mode finding, set-up)
# ---------------------------------------------------------------------------------------------


@jit
def full_loglik(data, beta, with_const, lo, hi):
    """sum_{lo <= i < hi} l_i(beta); with ``with_const`` False the per-datum constants
    (-log s sqrt(2 pi), -log y!) are left out: MCMC needs only differences, and the constants
    cost a log or lgamma per row). The part that depends on a sampled family parameter
    (`log_norm_phi`) is kept either way."""
    family, X, y, offset, noise_sd = data.family, data.X, data.y, data.offset, scale_of(data, beta)
    trials, weights, n_rows = data.trials, data.weights, data.X.shape[0]
    n_family = data.n_family
    w = beta[data.intercept:]
    b0 = beta[0] if data.intercept else 0.0
    acc = 0.0
    for i in range(lo, hi):
        eta = row_dot(X, i, w) + b0 + offset[i]
        v = row_value(family, trials, i, noise_sd)
        c = _row_const(family, y[i], v, with_const, n_family)
        acc += row_weight(weights, n_rows, i) * loglik_eta(family, eta, y[i], v, c)
    return acc


@jit
def _row_const(family, y_i, v, with_const, n_family):
    """The row's constant as a pass keeps it: all of it, or only its phi-dependent part."""
    if with_const:
        return log_norm_const(family, y_i, v)
    if n_family:
        return log_norm_phi(family, y_i, v)
    return 0.0


@jit
def full_loglik_grad(data, beta, grad, with_const, lo, hi):
    """sum_{lo <= i < hi} l_i(beta), with the sum of grad l_i(beta) written into ``grad``; one
    pass over the rows (``with_const`` as in `full_loglik`)."""
    family, X, y, offset, noise_sd = data.family, data.X, data.y, data.offset, scale_of(data, beta)
    trials, weights, n_rows = data.trials, data.weights, data.X.shape[0]
    intercept, n_family = data.intercept, data.n_family
    p = X.shape[1]
    w = beta[intercept:]
    b0 = beta[0] if intercept else 0.0
    g = np.zeros(p)
    g0 = 0.0
    g_phi = 0.0
    acc = 0.0
    for i in range(lo, hi):
        eta = row_dot(X, i, w) + b0 + offset[i]
        v = row_value(family, trials, i, noise_sd)
        c = _row_const(family, y[i], v, with_const, n_family)
        li, r = loglik_and_dloglik_eta(family, eta, y[i], v, c)
        wi = row_weight(weights, n_rows, i)
        li *= wi
        r *= wi
        acc += li
        g0 += r
        row_axpy(X, i, r, g)
        if n_family:
            g_phi += wi * dloglik_phi(family, eta, y[i], noise_sd)[0]
    if intercept:
        grad[0] = g0
    grad[intercept:intercept + p] = g
    if n_family:
        grad[intercept + p] = g_phi
    return acc


@jit
def full_hessian(data, beta, hess, lo, hi):
    """hess = sum_{lo <= i < hi} f''(eta_i) x_i x_i^T (the log-likelihood Hessian; overwritten);
    with a sampled noise sd, also its row and column in phi = log s (`dloglik_phi`)."""
    family, X, y, offset, noise_sd = data.family, data.X, data.y, data.offset, scale_of(data, beta)
    trials, weights, n_rows = data.trials, data.weights, data.X.shape[0]
    intercept, n_family = data.intercept, data.n_family
    p = X.shape[1]
    nb = p + intercept
    d = nb + n_family
    hess[:, :] = 0.0
    xi = np.empty(nb)
    for i in range(lo, hi):
        eta = linear_predictor(X, offset, intercept, i, beta)
        wi = row_weight(weights, n_rows, i)
        w = wi * d2loglik_eta(family, eta, y[i], row_value(family, trials, i, noise_sd))
        row_outer(X, i, w, hess, intercept, xi)
        if n_family:
            _, l_ep, l_pp = dloglik_phi(family, eta, y[i], noise_sd)
            c = wi * l_ep
            if intercept:
                hess[nb, 0] += c
            row_axpy(X, i, c, hess[nb, intercept:])
            hess[nb, nb] += wi * l_pp
    for a in range(d):
        for b in range(a):
            hess[b, a] = hess[a, b]


@jit
def full_eta_derivatives(data, beta, eta, f1, f2, lo, hi):
    """eta[i], f1[i], f2[i] = eta_i, f'(eta_i), f''(eta_i) at beta for lo <= i < hi (the row
    cache of the control variates; phi's derivatives follow from y, eta and s, see
    `dloglik_phi`). f1 and f2 include the row's frequency weight."""
    family, X, y, offset, noise_sd = data.family, data.X, data.y, data.offset, scale_of(data, beta)
    trials, weights, n_rows = data.trials, data.weights, data.X.shape[0]
    intercept = data.intercept
    for i in range(lo, hi):
        e = linear_predictor(X, offset, intercept, i, beta)
        eta[i] = e
        v = row_value(family, trials, i, noise_sd)
        wi = row_weight(weights, n_rows, i)
        f1[i] = wi * dloglik_eta(family, e, y[i], v)
        f2[i] = wi * d2loglik_eta(family, e, y[i], v)


# ---------------------------------------------------------------------------------------------
# Parallel full-data kernels (set-up passes: mode finding, Hessian, row cache)
#
# Each fixed block of BLOCK_ROWS rows is summed serially by the serial kernel above, and the
# block sums are added in block order: the result does not depend on the number of threads.
# Callers must not launch these from two Python threads at once (see tallchain.models._passes).
# ---------------------------------------------------------------------------------------------


@jit
def _split(data):
    """``data`` as (design arrays, shape, the other fields), for a parallel loop (`_joined`)."""
    parts, shape = design_parts(data.X)
    return parts, shape, (data.family, data.y, data.offset, data.noise_sd, data.intercept,
                          data.n_family, data.trials, data.weights)


@jit
def _joined(parts, shape, rest):
    """The GLMData of `_split`."""
    family, y, offset, noise_sd, intercept, n_family, trials, weights = rest
    return GLMData(family, design_join(parts, shape), y, offset, noise_sd, intercept, n_family,
                   trials, weights)


@jit
def _block_bounds(b, n):
    """Rows [lo, hi) of block b of n rows."""
    lo = b * BLOCK_ROWS
    return lo, min(lo + BLOCK_ROWS, n)


@pjit
def par_loglik_grad(data, beta, grad, with_const):
    """As `full_loglik_grad` over all rows, parallel over blocks of rows."""
    n = data.X.shape[0]
    d = grad.shape[0]
    nb = (n + BLOCK_ROWS - 1) // BLOCK_ROWS
    part = np.empty((nb, d + 1))
    parts, shape, rest = _split(data)
    for b in numba.prange(nb):
        lo, hi = _block_bounds(b, n)
        part[b, 0] = full_loglik_grad(_joined(parts, shape, rest), beta, part[b, 1:],
                                      with_const, lo, hi)
    acc = 0.0
    for j in range(d):
        grad[j] = 0.0
    for b in range(nb):
        acc += part[b, 0]
        for j in range(d):
            grad[j] += part[b, j + 1]
    return acc


@pjit
def par_hessian(data, beta, hess):
    """As `full_hessian` over all rows, parallel over blocks of rows (hess is overwritten)."""
    n = data.X.shape[0]
    d = hess.shape[0]
    nb = (n + BLOCK_ROWS - 1) // BLOCK_ROWS
    part = np.empty((nb, d, d))
    parts, shape, rest = _split(data)
    for b in numba.prange(nb):
        lo, hi = _block_bounds(b, n)
        full_hessian(_joined(parts, shape, rest), beta, part[b], lo, hi)
    for a in range(d):
        for c in range(d):
            acc = 0.0
            for b in range(nb):
                acc += part[b, a, c]
            hess[a, c] = acc


@pjit
def par_eta_derivatives(data, beta, eta, f1, f2):
    """As `full_eta_derivatives` over all rows, parallel over blocks of rows (each row is
    independent)."""
    n = data.X.shape[0]
    nb = (n + BLOCK_ROWS - 1) // BLOCK_ROWS
    parts, shape, rest = _split(data)
    for b in numba.prange(nb):
        lo, hi = _block_bounds(b, n)
        full_eta_derivatives(_joined(parts, shape, rest), beta, eta, f1, f2, lo, hi)
