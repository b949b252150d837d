"""numba: the transition loop of a pair of coupled chains at lag L, and its estimator (private).

Chain X runs L steps alone from X_0; then X_t and Y_{t-L} move together (t > L), with
proposals from the reflection-maximal coupling (`_coupling`) and, for the minibatch methods,
the same gradient batch, the same log-ratio batch and the same acceptance uniform. Once
X_t = Y_{t-L} bitwise (the meeting time tau, t >= L) both chains see the same numbers in every
later step, so they stay equal; after tau only X moves (or, for the tests, both keep moving
with ``Plan.keep_met``).

The steps of one chain are those of the single-chain loop (`_transition`): the minibatch
gradient (or the proxy's gradient, in its O(d^2) form, for gradient_batch="proxy"), the Langevin
proposal density, the move and its caches; the estimators of the
log-ratio and its variance (`_estimators`); the acceptance rules (`_acceptance_kernels`). The
log-ratio variance is the batch's own (``log_ratio_variance="same-batch"``).

The loop keeps O(n_coef) memory whatever the number of iterations: it adds each iteration's
terms of the time-averaged unbiased estimator (Biswas, Jacob & Vanetti, NeurIPS 2019, eq. 2;
Jacob, O'Leary & Atchade 2020 for L = 1) of h(theta) = theta and theta^2 as it goes:

    H_{k:m} = 1/(m-k+1) sum_{t=k}^{m} h(X_t)
              + sum_{t=k+L}^{tau-1} min(1, ceil((t-k)/L) / (m-k+1)) (h(X_t) - h(Y_{t-L}))
"""

import math
from collections import namedtuple

import numpy as np

from ._acceptance_kernels import log_accept_probability, noise_penalty
from ._batches import draw_batch
from ._coupling import independent_proposal, reflection_maximal
from ._estimators import (add_prior_grad, batch_residual_diffs, prior_logpdf_diff,
                          proxy_gradient_sum, proxy_loglik_diff_sum, scaled_sum_and_variance)
from ._transition import (BATCH, FULL, PROPOSAL_LANGEVIN, PROPOSAL_RW, PROXY, _batch_gradient,
                          _buffers, _copy, _difference, _langevin_log_density, _move)
from ..models._kernels import full_loglik, full_loglik_grad, jit

Plan = namedtuple("Plan", ["h", "n_batch", "lag", "k", "m", "max_iterations", "keep_met"])
Plan.__doc__ = """The fixed settings of a coupled pair: step ``h`` and ``n_batch`` (tuned by a
warmup run), ``lag`` L, the estimator's window ``k`` .. ``m``, the stop rule
``max_iterations`` (of X) and ``keep_met`` (bool: move Y after the meeting too, for tests)."""

# Where the loop leaves its counts (an int64 array of this length).
OUT_TAU = 0          # the meeting time, or -1 when the pair had not met at max_iterations
OUT_ITERATIONS = 1   # iterations of X (the last t)
OUT_STEPS = 2        # single-chain transitions computed (X's and Y's)
OUT_DIVERGED = 3     # iterations after the meeting where X_t != Y_{t-L} (0 unless broken)
N_OUT = 4


@jit
def _mean_point(langevin, beta, grad, h, mass, mu):
    """mu = beta (+ (h/2) M^{-1} grad for Langevin): the proposal's mean."""
    m_inv = mass.mass_inv
    for a in range(beta.shape[0]):
        mu[a] = beta[a]
        if langevin:
            drift = 0.0
            for b in range(beta.shape[0]):
                drift += m_inv[a, b] * grad[b]
            mu[a] += 0.5 * h * drift


@jit
def _proxy_gradient(prior, rows, beta, out):
    """grad S(beta) = grad log p(beta) + g* + H* (beta - beta*): the proxy's drift
    (`_proxy_drift`), here in the general form: the pair's reflection coupling works in
    beta."""
    proxy_gradient_sum(rows, beta, out)
    add_prior_grad(prior, beta, out)


@jit
def _drift_gradient(data, prior, rows, codes, state, buf, idx_grad):
    """The gradient the proposal drifts along, into buf.grad: the cached full-data one, or the
    batch idx_grad's at the current point."""
    if codes.proposal == PROPOSAL_RW:
        return
    if codes.gradient == BATCH:
        _difference(state.beta, rows.beta_star, buf.delta)
        _batch_gradient(data, prior, rows, state.beta, buf.delta, idx_grad, buf.tmp, buf.work,
                        buf.grad)
    elif codes.gradient == PROXY:
        _proxy_gradient(prior, rows, state.beta, buf.grad)
    else:
        _copy(state.cur_grad, buf.grad)


@jit
def _finish(data, prior, rows, mass, codes, plan, state, buf, shared, log_u):
    """Accept or reject one chain's proposal buf.prop with the shared batches and uniform (the
    same computation as `_transition.run_chain`); returns whether it moved."""
    beta, cur_grad, cur_loglik = state.beta, state.cur_grad, state.cur_loglik
    prop, grad, grad_prop = buf.prop, buf.grad, buf.grad_prop
    n_rows, h = data.X.shape[0], plan.h
    langevin = codes.proposal != PROPOSAL_RW
    _difference(beta, rows.beta_star, buf.delta)
    _difference(prop, rows.beta_star, buf.delta_prop)
    c, loglik_prop, penalty = 0.0, 0.0, 0.0
    if langevin and codes.gradient == FULL:
        loglik_prop = full_loglik_grad(data, prop, grad_prop, False, 0, n_rows)
        add_prior_grad(prior, prop, grad_prop)
    elif langevin and codes.gradient == PROXY:
        _proxy_gradient(prior, rows, prop, grad_prop)
    elif langevin:
        _batch_gradient(data, prior, rows, prop, buf.delta_prop, shared.idx_grad, buf.tmp,
                        buf.work, grad_prop)
    if codes.proposal == PROPOSAL_LANGEVIN:
        # c = log q(beta | beta') - log q(beta' | beta) (METHODS.md section 3)
        c = (_langevin_log_density(beta, prop, grad_prop, h, mass, buf.z)
             - _langevin_log_density(prop, beta, grad, h, mass, buf.z))
    value = prior_logpdf_diff(prior, prop, beta)
    if codes.ratio == FULL:
        if not (langevin and codes.gradient == FULL):
            loglik_prop = full_loglik(data, prop, False, 0, n_rows)
        value += loglik_prop - cur_loglik[0]
    else:
        batch_residual_diffs(data, rows, buf.delta_prop, buf.delta, shared.idx_ratio,
                             buf.diffs, buf.work)
        est, var, _, _ = scaled_sum_and_variance(buf.diffs, n_rows)
        value += est
        if rows.order > 0:
            value += proxy_loglik_diff_sum(rows, prop, beta)
        penalty, _ = noise_penalty(codes.rule, var, plan.n_batch, False)
    log_alpha = log_accept_probability(value, c, penalty)
    accepted = math.isfinite(value + c - penalty) and log_u < log_alpha
    if accepted:
        _move(codes, beta, prop, cur_grad, grad_prop, cur_loglik, loglik_prop)
    return accepted


@jit
def _step(data, prior, rows, mass, codes, plan, x, y, bufs, rng, pair):
    """One transition of X, and of Y with it when ``pair``: shared batches and uniform, the
    proposals coupled. Returns the number of single-chain transitions computed."""
    bx, by, shared = bufs
    n_rows = data.X.shape[0]
    langevin = codes.proposal != PROPOSAL_RW
    if langevin and codes.gradient == BATCH:
        draw_batch(rng, n_rows, shared.idx_grad)
    _drift_gradient(data, prior, rows, codes, x, bx, shared.idx_grad)
    _mean_point(langevin, x.beta, bx.grad, plan.h, mass, shared.tmp)
    if pair:
        _drift_gradient(data, prior, rows, codes, y, by, shared.idx_grad)
        _mean_point(langevin, y.beta, by.grad, plan.h, mass, shared.grad)
        reflection_maximal(mass, plan.h, shared.tmp, shared.grad, rng, shared.xi, shared.z,
                           bx.prop, by.prop)
    else:
        independent_proposal(mass, plan.h, shared.tmp, rng, shared.xi, bx.prop)
    if codes.ratio == BATCH:
        draw_batch(rng, n_rows, shared.idx_ratio)
    log_u = math.log(rng.random())
    _finish(data, prior, rows, mass, codes, plan, x, bx, shared, log_u)
    if pair:
        _finish(data, prior, rows, mass, codes, plan, y, by, shared, log_u)
        return 2
    return 1


@jit
def _same(a, b):
    for j in range(a.shape[0]):
        if a[j] != b[j]:
            return False
    return True


@jit
def _add_terms(plan, t, tau, x, y, sums):
    """Add iteration t's terms of H_{k:m} for h = theta (sums[0]) and theta^2 (sums[1]);
    ``tau`` is the meeting time, or -1 while the chains have not met."""
    k, m, lag = plan.k, plan.m, plan.lag
    span = m - k + 1.0
    if k <= t <= m:
        for a in range(x.shape[0]):
            sums[0, a] += x[a] / span
            sums[1, a] += x[a] * x[a] / span
    if t >= k + lag and (tau < 0 or t < tau):
        w = min(1.0, math.ceil((t - k) / lag) / span)
        for a in range(x.shape[0]):
            sums[0, a] += w * (x[a] - y[a])
            sums[1, a] += w * (x[a] * x[a] - y[a] * y[a])


@jit
def run_pair(data, prior, rows, mass, codes, plan, x, y, rng, sums, out, trace):
    """Run a coupled pair from X_0 = x.beta, Y_0 = y.beta until it has met and reached m, or
    until X's iteration ``plan.max_iterations``.

    Parameters
    ----------
    data, prior, rows, mass, codes
        As for `_transition.run_chain`.
    plan : Plan
    x, y : ChainArrays
        The two chains' states at their starting points (full-data caches initialised for the
        full-data methods); updated in place.
    rng : numpy.random.Generator
        The pair's one stream: every random number of both chains comes from it.
    sums : ndarray of shape (2, n_coef)
        Receives H_{k:m} of theta and of theta^2 (zeroed here).
    out : int64 ndarray of shape (N_OUT,)
        Receives the counts OUT_*.
    trace : ndarray of shape (2, n_trace, n_coef)
        Receives X_t in trace[0, t] and Y_{t-L} in trace[1, t] for t < n_trace (n_trace may
        be 0); Y_{t-L} is written only while Y moves.
    """
    d = x.beta.shape[0]
    bufs = (_buffers(d, plan.n_batch), _buffers(d, plan.n_batch), _buffers(d, plan.n_batch))
    sums[:, :] = 0.0
    out[:] = 0
    out[OUT_TAU] = -1
    n_trace = trace.shape[1]
    if n_trace > 0:
        _copy(x.beta, trace[0, 0])
    _add_terms(plan, 0, -1, x.beta, y.beta, sums)
    tau, t, steps = -1, 0, 0
    while t < plan.max_iterations and (tau < 0 or t < plan.m):
        t += 1
        pair = t > plan.lag and (tau < 0 or plan.keep_met)
        steps += _step(data, prior, rows, mass, codes, plan, x, y, bufs, rng, pair)
        if t >= plan.lag and tau < 0 and _same(x.beta, y.beta):
            tau = t
        elif tau >= 0 and pair and not _same(x.beta, y.beta):
            out[OUT_DIVERGED] += 1
        _add_terms(plan, t, tau, x.beta, y.beta, sums)
        if t < n_trace:
            _copy(x.beta, trace[0, t])
            if t >= plan.lag and (pair or t == plan.lag):
                _copy(y.beta, trace[1, t])
    out[OUT_TAU] = tau
    out[OUT_ITERATIONS] = t
    out[OUT_STEPS] = steps


def new_trace(n_trace, n_coef):
    """The ``trace`` argument of `run_pair`: NaN-filled (2, n_trace, n_coef)."""
    return np.full((2, n_trace, n_coef), np.nan)
