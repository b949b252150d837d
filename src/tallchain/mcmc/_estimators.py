"""Gradient and log-ratio estimators over a row batch, with optional control variates (private).

Control variates use Taylor proxies of each l_i around a reference point beta* (the mode).
For a GLM, l_i depends on beta only through eta_i, which is linear in beta, so the Taylor proxy
in beta is the Taylor proxy of f in eta:
    q_i(beta) = f(eta*_i) + f'*_i (eta_i - eta*_i) + 1/2 f''*_i (eta_i - eta*_i)^2
(METHODS.md section 4). The row cache (``rows``, a `tallchain.posterior.RowCache`) holds the
control-variate order (0: none, 1 or 2), beta*, the per-row eta*, f'*, f''* cached once per
run, and g* = sum_i grad l_i(beta*), H* = sum_i Hess l_i(beta*). ``data`` is the model's
`GLMData`, ``prior`` its `PriorArrays`.

The pure-NumPy references of these kernels, under the same names, are in ``_reference.py``.
"""

import math

import numba

from ..models._family_params import BINOMIAL, OPTIONS, dloglik_phi, family_value, log_norm_phi
from ..models._kernels import dloglik_eta, jit, loglik_diff_eta, loglik_eta
from ..models._rows import row_axpy, row_dot, row_dot2


@jit
def prior_logpdf_diff(prior, beta_new, beta_old):
    """log p(beta_new) - log p(beta_old) for a Gaussian prior with precision P:
    -1/2 [(b'-m)'P(b'-m) - (b-m)'P(b-m)] = -1/2 (b'-b)' P (b'+b-2m)."""
    prior_mean, prior_prec = prior.mean, prior.precision
    d = beta_new.shape[0]
    acc = 0.0
    for a in range(d):
        s = 0.0
        for b in range(d):
            s += prior_prec[a, b] * (beta_new[b] + beta_old[b] - 2.0 * prior_mean[b])
        acc += (beta_new[a] - beta_old[a]) * s
    return -0.5 * acc


@jit
def add_prior_grad(prior, beta, out):
    """out += -P (beta - m)."""
    prior_mean, prior_prec = prior.mean, prior.precision
    d = beta.shape[0]
    for a in range(d):
        s = 0.0
        for b in range(d):
            s += prior_prec[a, b] * (beta[b] - prior_mean[b])
        out[a] -= s


# Row cache: aux[i] = (y_i, eta*_i, f'*_i, f''*_i), one 32-byte record per row, so a batch row
# costs one cache line besides its row of X (separate arrays cost a cache miss each). eta*_i
# includes the offset; eta_i(beta) = eta*_i + x_i . (beta - beta*) needs no offset array.
# Without control variates beta* = 0 and eta*_i is the offset.
AUX_Y = 0
AUX_ETA = 1
AUX_F1 = 2
AUX_F2 = 3


# Batch kernels work in passes: a first pass reads every batch row (its row of X and its row
# cache record) into small buffers, and later passes compute on the buffers. A row read is a
# cache miss on tall data; with the exp/log of a row in the same loop, the processor waits for
# each miss in turn, while a loop that only reads lets the misses overlap. ``work`` holds the
# buffers: shape (3, n) for a batch of n rows, allocated once per run by the caller.


@jit
def cv_gradient_rows(data, rows, delta, idx, out, work):
    """out = sum over idx of [grad l_i(beta) - grad q_i(beta)] (out overwritten), where
    delta = beta - beta*.

    Order 0 gives the plain sum of gradients; 1 subtracts f'*_i x_i (Baker et al. 2019);
    2 also subtracts f''*_i (eta_i - eta*_i) x_i, the gradient of the second-order proxy.
    """
    if data.n_family:
        _cv_gradient_rows_phi(data.family, data.X, data.intercept, data.weights, rows,
                              delta, idx, out, work)
        return
    family, X, noise_sd, intercept = data.family, data.X, data.noise_sd, data.intercept
    aux, proxy_order, trials, weights = rows.aux, rows.order, data.trials, data.weights
    binomial = family == BINOMIAL
    weighted = weights.shape[0] == X.shape[0]
    n = idx.shape[0]
    w = delta[intercept:]
    d0 = delta[0] if intercept else 0.0
    eta = work[0]
    yv = work[1]
    r = work[2]
    for k in range(n):
        i = idx[k]
        u = d0 + row_dot(X, i, w)
        eta[k] = aux[i, AUX_ETA] + u
        yv[k] = aux[i, AUX_Y]
        if binomial:
            work[3, k] = trials[i]   # the row's trials (work has 4 rows for binomial data)
        if weighted:
            work[4, k] = weights[i]   # its frequency weight (5 rows for weighted data)
        c = 0.0
        if proxy_order >= 1:
            c = aux[i, AUX_F1]
        if proxy_order >= 2:
            c += aux[i, AUX_F2] * u
        r[k] = c
    for k in range(n):
        v = work[3, k] if binomial else noise_sd
        wk = work[4, k] if weighted else 1.0
        r[k] = wk * dloglik_eta(family, eta[k], yv[k], v) - r[k]
    g = out[intercept:]
    out[:] = 0.0
    g0 = 0.0
    for k in range(n):
        i = idx[k]
        rk = r[k]
        g0 += rk
        row_axpy(X, i, rk, g)
    if intercept:
        out[0] = g0


@jit
def proxy_gradient_sum(rows, beta, out):
    """out = sum_i grad q_i(beta) = g* (+ H* (beta - beta*) for the second-order proxy)."""
    proxy_order, g_star, H_star, beta_star = rows.order, rows.g_star, rows.H_star, rows.beta_star
    d = beta.shape[0]
    for a in range(d):
        out[a] = g_star[a]
        if proxy_order >= 2:
            s = 0.0
            for b in range(d):
                s += H_star[a, b] * (beta[b] - beta_star[b])
            out[a] += s


@jit
def proxy_loglik_diff_sum(rows, beta_new, beta_old):
    """Q(b') - Q(b) = g*'(b'-b) + 1/2 (b'-b)' H* (b'+b-2b*)  (METHODS.md section 4)."""
    proxy_order, g_star, H_star, beta_star = rows.order, rows.g_star, rows.H_star, rows.beta_star
    d = beta_new.shape[0]
    acc = 0.0
    for a in range(d):
        db = beta_new[a] - beta_old[a]
        acc += g_star[a] * db
        if proxy_order >= 2:
            s = 0.0
            for b in range(d):
                s += H_star[a, b] * (beta_new[b] + beta_old[b] - 2.0 * beta_star[b])
            acc += 0.5 * db * s
    return acc


@numba.njit(inline="always", **OPTIONS)
def _read_pair(X, aux, i, k, d1, w1, d0, w0, e1, e0, yv):
    """Read batch row i (the k-th) for a log-ratio: u1 = d1 + x_i . w1 and u0 = d0 + x_i . w0
    in one pass over row i of X, e1[k], e0[k] = eta*_i + u1, eta*_i + u0, yv[k] = y_i;
    returns (i, u1, u0, eta*_i)."""
    s1, s0 = row_dot2(X, i, w1, w0)
    u1 = d1 + s1
    u0 = d0 + s0
    eta_star = aux[i, AUX_ETA]
    e1[k] = eta_star + u1
    e0[k] = eta_star + u0
    yv[k] = aux[i, AUX_Y]
    return i, u1, u0, eta_star


@jit
def batch_residual_diffs(data, rows, delta_new, delta_old, idx, out, work):
    """out[k] = D_i - [q_i(b') - q_i(b)] for i = idx[k], with D_i = l_i(b') - l_i(b) and
    delta_new = b' - beta*, delta_old = b - beta* (passes and ``work`` as above)."""
    if data.n_family:
        _residual_diffs_phi(data.family, data.X, data.intercept, data.weights, rows,
                            delta_new, delta_old, idx, out, work)
        return
    family, X, noise_sd, intercept = data.family, data.X, data.noise_sd, data.intercept
    aux, proxy_order, trials, weights = rows.aux, rows.order, data.trials, data.weights
    binomial = family == BINOMIAL
    weighted = weights.shape[0] == X.shape[0]
    n = idx.shape[0]
    w1 = delta_new[intercept:]
    w0 = delta_old[intercept:]
    d1 = delta_new[0] if intercept else 0.0
    d0 = delta_old[0] if intercept else 0.0
    e1 = work[0]
    e0 = work[1]
    yv = work[2]
    for k in range(n):
        i, u1, u0, eta_star = _read_pair(X, aux, idx[k], k, d1, w1, d0, w0, e1, e0, yv)
        if binomial:
            work[3, k] = trials[i]
        if weighted:
            work[4, k] = weights[i]
        c = 0.0
        if proxy_order >= 1:
            c = aux[i, AUX_F1] * (u1 - u0)
        if proxy_order >= 2:
            c += 0.5 * aux[i, AUX_F2] * (u1 * u1 - u0 * u0)
        out[k] = c
    for k in range(n):
        v = work[3, k] if binomial else noise_sd
        wk = work[4, k] if weighted else 1.0
        out[k] = wk * loglik_diff_eta(family, e1[k], e0[k], yv[k], v) - out[k]


# Families with a sampled parameter: theta = (beta, phi), phi the last entry (log s for the
# linear family, log alpha for NB2). The proxy is second order in (eta, phi) around
# (eta*_i, phi*); phi's derivatives at the reference point follow from y_i, eta*_i and the
# family value v* (`dloglik_phi`), so the row record stays (y, eta*, f'*, f''*). ``work``
# needs 4 rows here.


@jit
def _cv_gradient_rows_phi(family, X, intercept, weights, rows, delta, idx, out, work):
    """`cv_gradient_rows` with phi: out[:nb] as there with the proxy's eta-gradient
    f'* + f''* u + l_ephi* dphi, out[nb] = sum of dl/dphi - (l_phi* + l_ephi* u + l_pp* dphi),
    every row's terms times its frequency weight (kept in work[4])."""
    aux, proxy_order, beta_star = rows.aux, rows.order, rows.beta_star
    weighted = weights.shape[0] == X.shape[0]
    n = idx.shape[0]
    p = X.shape[1]
    nb = p + intercept
    w = delta[intercept:]
    d0 = delta[0] if intercept else 0.0
    dphi = delta[nb]
    v_star = family_value(family, beta_star[nb])
    v = family_value(family, beta_star[nb] + dphi)
    eta, yv, r, r_phi = work[0], work[1], work[2], work[3]
    for k in range(n):
        i = idx[k]
        u = d0 + row_dot(X, i, w)
        eta_star = aux[i, AUX_ETA]
        eta[k] = eta_star + u
        yv[k] = aux[i, AUX_Y]
        wk = weights[i] if weighted else 1.0
        work[4, k] = wk
        c = 0.0
        c_phi = 0.0
        if proxy_order >= 1:
            l_p, l_ep, l_pp = dloglik_phi(family, eta_star, yv[k], v_star)
            c = aux[i, AUX_F1]   # weighted in the row cache already
            c_phi = wk * l_p
            if proxy_order >= 2:
                c += aux[i, AUX_F2] * u + wk * l_ep * dphi
                c_phi += wk * (l_ep * u + l_pp * dphi)
        r[k] = c
        r_phi[k] = c_phi
    for k in range(n):
        wk = work[4, k]
        r[k] = wk * dloglik_eta(family, eta[k], yv[k], v) - r[k]
        r_phi[k] = wk * dloglik_phi(family, eta[k], yv[k], v)[0] - r_phi[k]
    g = out[intercept:]
    out[:] = 0.0
    g0 = 0.0
    g_phi = 0.0
    for k in range(n):
        i = idx[k]
        rk = r[k]
        g0 += rk
        g_phi += r_phi[k]
        row_axpy(X, i, rk, g)
    if intercept:
        out[0] = g0
    out[nb] = g_phi


@jit
def _residual_diffs_phi(family, X, intercept, weights, rows, delta_new, delta_old, idx, out,
                        work):
    """`batch_residual_diffs` with phi: D_i = l_i(eta', phi') - l_i(eta, phi), and the proxy
    difference with the phi terms l_phi* dphi, l_ephi* u dphi and l_pp* dphi^2 / 2, every
    row's terms times its frequency weight (kept in work[4])."""
    aux, proxy_order, beta_star = rows.aux, rows.order, rows.beta_star
    weighted = weights.shape[0] == X.shape[0]
    n = idx.shape[0]
    p = X.shape[1]
    nb = p + intercept
    w1 = delta_new[intercept:]
    w0 = delta_old[intercept:]
    d1 = delta_new[0] if intercept else 0.0
    d0 = delta_old[0] if intercept else 0.0
    p1 = delta_new[nb]
    p0 = delta_old[nb]
    v_star = family_value(family, beta_star[nb])
    v1 = family_value(family, beta_star[nb] + p1)
    v0 = family_value(family, beta_star[nb] + p0)
    e1, e0, yv = work[0], work[1], work[2]
    for k in range(n):
        i, u1, u0, eta_star = _read_pair(X, aux, idx[k], k, d1, w1, d0, w0, e1, e0, yv)
        wk = weights[i] if weighted else 1.0
        work[4, k] = wk
        c = 0.0
        if proxy_order >= 1:
            l_p, l_ep, l_pp = dloglik_phi(family, eta_star, yv[k], v_star)
            c = aux[i, AUX_F1] * (u1 - u0) + wk * l_p * (p1 - p0)   # F1, F2: weighted
            if proxy_order >= 2:
                c += (0.5 * aux[i, AUX_F2] * (u1 * u1 - u0 * u0)
                      + wk * (l_ep * (u1 * p1 - u0 * p0) + 0.5 * l_pp * (p1 * p1 - p0 * p0)))
        out[k] = c
    for k in range(n):
        y = yv[k]
        d = (loglik_eta(family, e1[k], y, v1, log_norm_phi(family, y, v1))
             - loglik_eta(family, e0[k], y, v0, log_norm_phi(family, y, v0)))
        out[k] = work[4, k] * d - out[k]


@jit
def scaled_sum_and_variance(values, n_rows):
    """For a simple random sample of size n from N rows: the estimate N * mean of the sum over
    all rows, its variance estimate N^2 (1 - n/N) s^2 / n (Cochran 1977, ch. 2), and the
    sample skewness and excess kurtosis of the values (METHODS.md section 2)."""
    n = values.shape[0]
    mean = 0.0
    for k in range(n):
        mean += values[k]
    mean /= n
    m2 = 0.0
    m3 = 0.0
    m4 = 0.0
    for k in range(n):
        c = values[k] - mean
        c2 = c * c
        m2 += c2
        m3 += c2 * c
        m4 += c2 * c2
    s2 = m2 / (n - 1) if n > 1 else 0.0
    fpc = 1.0 - n / n_rows
    var = n_rows * n_rows * fpc * s2 / n
    skew = 0.0
    kurt = 0.0
    if m2 > 0.0:
        mm2 = m2 / n
        skew = (m3 / n) / (mm2 * math.sqrt(mm2))
        kurt = (m4 / n) / (mm2 * mm2) - 3.0
    return n_rows * mean, var, skew, kurt
