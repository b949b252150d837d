"""The transition loop: one numba kernel strings together every method's transitions (private).

A method is a combination of small integer codes:

=============  ==========  ==========  ==========  ===========
method         proposal    gradient    log-ratio   rule
=============  ==========  ==========  ==========  ===========
rwm            RW          -           FULL        EXACT
mala           LANGEVIN    FULL        FULL        EXACT
naive-mh       RW          -           BATCH       PLUGIN
penalty-rwm    RW          -           BATCH       PENALTY_CD
penalty-mala   LANGEVIN    BATCH       BATCH       PENALTY_CD
sgld           LANGEVIN    BATCH       -           NONE
=============  ==========  ==========  ==========  ===========

Preconditioned Langevin proposal (Roberts & Tweedie 1996), with mass matrix M = (L L^T)^{-1}:
    beta' = beta + (h/2) M^{-1} g(beta) + sqrt(h) L xi,    xi ~ N(0, I)
    log q(beta' | beta) = -(1/2h) z^T M z,    z = beta' - beta - (h/2) M^{-1} g(beta)
For a minibatch gradient g_S, the batch S is drawn independently of the state and the reverse
density uses g_S(beta') with the same S (METHODS.md section 3); the log-ratio batch S2 is drawn
independently of S. The kernel runs iterations [it_start, it_start + n_iter) and keeps all of
its state in the arrays it is given, so a run can be cut into chunks (progress, checkpoints)
and resumed with bitwise-identical results.
"""

import math

import numpy as np

from ._acceptance_kernels import NONE, log_accept_probability, noise_penalty
from ._batches import draw_batch
from ._estimators import (
    add_prior_grad,
    batch_residual_diffs,
    cv_gradient_rows,
    prior_logpdf_diff,
    proxy_gradient_sum,
    proxy_loglik_diff_sum,
    scaled_sum_and_variance,
)
from ..models._kernels import full_loglik_grad_shifted, full_loglik_shifted, jit

PROPOSAL_RW = 0
PROPOSAL_LANGEVIN = 1
# Langevin proposal whose MH ratio omits the proposal-density term c: a deliberately wrong
# variant, kept only so the statistical tests can show that they detect it (power checks).
PROPOSAL_LANGEVIN_NO_C = 2
FULL = 0
BATCH = 1
# Batch-as-state (METHODS.md section 3): the gradient batch is part of the state; the reverse
# density uses a fresh batch at beta', which becomes the state's batch on acceptance, so the
# gradient at the current point is reused (2 batches per step instead of 3).
CARRIED = 2
VAR_SAME = 0
VAR_INDEPENDENT = 1
VAR_POOLED = 2

# Columns of the per-iteration statistics array.
ST_ACCEPTED = 0
ST_ACCEPT_PROB = 1
ST_LOG_RATIO = 2
ST_LOG_RATIO_SD = 3
ST_STEP_SIZE = 4
ST_BATCH_SIZE = 5
ST_NONFINITE = 6
ST_SKEW = 7
ST_KURT = 8
N_STATS = 9
STAT_NAMES = (
    "accepted",
    "accept_prob",
    "log_ratio",
    "log_ratio_sd",
    "step_size",
    "batch_size",
    "nonfinite",
    "log_ratio_skew",
    "log_ratio_kurtosis",
)

# Layout of the adaptation state: current log step, averaged log step, running error,
# shrinkage target mu, adaptation iteration count.
AD_LOG_H = 0
AD_LOG_HBAR = 1
AD_ERR = 2
AD_MU = 3
AD_COUNT = 4
N_ADAPT = 5

# Integer counters.
CT_DATA_EVALS = 0
CT_NONFINITE = 1
CT_CD_FALLBACK = 2
N_COUNTERS = 3

# Dual averaging constants (Hoffman & Gelman 2014, section 3.2.1).
_DA_GAMMA = 0.05
_DA_T0 = 10.0
_DA_KAPPA = 0.75


@jit
def _batch_gradient(family, X, aux, noise_sd, intercept, prior_mean, prior_prec,
                    cv_order, beta_star, g_star, H_star, beta, delta, idx, tmp, work, out):
    """Unbiased estimate of grad log pi(beta) from the rows in idx:
    grad log p(beta) + sum_i grad q_i(beta) + (N/n) sum_{i in idx} [grad l_i - grad q_i].
    ``delta`` is beta - beta* (the row cache's reference point)."""
    n_rows = X.shape[0]
    d = beta.shape[0]
    cv_gradient_rows(family, X, aux, noise_sd, intercept, delta, idx, cv_order, tmp, work)
    scale = n_rows / idx.shape[0]
    if cv_order > 0:
        proxy_gradient_sum(cv_order, g_star, H_star, beta, beta_star, out)
    else:
        out[:] = 0.0
    for a in range(d):
        out[a] += scale * tmp[a]
    add_prior_grad(prior_mean, prior_prec, beta, out)


@jit
def _langevin_log_density(beta_to, beta_from, grad_from, h, mass, mass_inv, z):
    """log q(beta_to | beta_from) up to a constant that cancels in the ratio."""
    d = beta_to.shape[0]
    for a in range(d):
        drift = 0.0
        for b in range(d):
            drift += mass_inv[a, b] * grad_from[b]
        z[a] = beta_to[a] - beta_from[a] - 0.5 * h * drift
    q = 0.0
    for a in range(d):
        s = 0.0
        for b in range(d):
            s += mass[a, b] * z[b]
        q += z[a] * s
    return -0.5 * q / h


@jit
def init_full_state(family, X, y, offset, noise_sd, intercept, prior_mean, prior_prec, beta,
                    cur_grad, cur_loglik):
    """Full-data log-likelihood and log-posterior gradient at the starting point."""
    cur_loglik[0] = full_loglik_grad_shifted(family, X, y, offset, noise_sd, intercept, beta,
                                             cur_grad, False)
    add_prior_grad(prior_mean, prior_prec, beta, cur_grad)


@jit
def init_carried_gradient(family, X, aux, noise_sd, intercept, prior_mean, prior_prec, cv_order,
                          beta_star, g_star, H_star, n_batch, rng, beta, cur_grad):
    """Draw the starting batch of a batch-as-state chain and its gradient at the start."""
    d = beta.shape[0]
    idx = np.empty(n_batch, dtype=np.int64)
    draw_batch(rng, X.shape[0], idx)
    delta = beta - beta_star
    _batch_gradient(family, X, aux, noise_sd, intercept, prior_mean, prior_prec, cv_order,
                    beta_star, g_star, H_star, beta, delta, idx, np.empty(d),
                    np.empty((3, n_batch)), cur_grad)


@jit
def run_chain(family, X, y, offset, noise_sd, intercept, prior_mean, prior_prec,
              proposal, grad_mode, ratio_mode, rule, var_mode, cv_order,
              beta_star, aux, g_star, H_star,
              mass, mass_inv, mass_inv_chol, n_batch, rng,
              beta, cur_grad, cur_loglik, adapt, pooled, counters,
              it_start, n_iter, n_warmup, adapt_step, target_accept, noise_sd_cap,
              draws_out, stats_out):
    """Run iterations it_start .. it_start + n_iter - 1 of one chain, in place.

    State arrays (beta, cur_grad, cur_loglik, adapt, pooled, counters) and the generator are
    updated in place; draws_out[k] and stats_out[k] receive iteration it_start + k.

    Step-size tuning aims at ``target_accept`` times A(0, s) = erfc(s / 2 sqrt 2), the most that
    log-ratio noise of sd s lets through (METHODS.md section 1), with s the iteration's own
    estimated noise sd capped at ``noise_sd_cap`` (0 for exact methods: no scaling), so dual
    averaging aims at the mean of target_accept * A(0, s_k) over the iterations. The cap keeps
    a very noisy start from lowering the target to nothing, which would stop the step shrinking.
    (A running average of s_k was tried first: the huge noise of the first iterations far from
    the mode lingered in it for a thousand iterations, so short warmups ended at too large a
    step, acceptance 0.31 instead of 0.57.)
    """
    n_rows = X.shape[0]
    d = beta.shape[0]
    prop = np.empty(d)
    delta = np.empty(d)
    delta_prop = np.empty(d)
    grad = np.empty(d)
    grad_prop = np.empty(d)
    tmp = np.empty(d)
    z = np.empty(d)
    xi = np.empty(d)
    idx_grad = np.empty(n_batch, dtype=np.int64)
    idx_ratio = np.empty(n_batch, dtype=np.int64)
    diffs = np.empty(n_batch)
    work = np.empty((3, n_batch))
    loglik_prop = 0.0

    for k in range(n_iter):
        it = it_start + k
        in_warmup = it < n_warmup
        h = math.exp(adapt[AD_LOG_H])

        # --- gradient at the current state -------------------------------------------------
        langevin = proposal != PROPOSAL_RW
        if langevin:
            if grad_mode == FULL or grad_mode == CARRIED:
                grad[:] = cur_grad
            else:
                draw_batch(rng, n_rows, idx_grad)
                for a in range(d):
                    delta[a] = beta[a] - beta_star[a]
                _batch_gradient(family, X, aux, noise_sd, intercept, prior_mean, prior_prec,
                                cv_order, beta_star, g_star, H_star, beta, delta, idx_grad, tmp,
                                work, grad)
                counters[CT_DATA_EVALS] += n_batch

        # --- proposal ----------------------------------------------------------------------
        for a in range(d):
            xi[a] = rng.standard_normal()
        sqrt_h = math.sqrt(h)
        for a in range(d):
            s = 0.0
            for b in range(a + 1):
                s += mass_inv_chol[a, b] * xi[b]
            prop[a] = beta[a] + sqrt_h * s
            if langevin:
                drift = 0.0
                for b in range(d):
                    drift += mass_inv[a, b] * grad[b]
                prop[a] += 0.5 * h * drift

        for a in range(d):
            delta[a] = beta[a] - beta_star[a]
            delta_prop[a] = prop[a] - beta_star[a]
        log_ratio = math.nan
        log_ratio_sd = math.nan
        skew = math.nan
        kurt = math.nan
        log_alpha = 0.0
        accepted = False
        nonfinite = False

        if rule == NONE:
            accepted = True
        else:
            # --- proposal-density term c = log q(beta | beta') - log q(beta' | beta) ---------
            c = 0.0
            if langevin:
                if grad_mode == FULL:
                    loglik_prop = full_loglik_grad_shifted(family, X, y, offset, noise_sd,
                                                           intercept, prop, grad_prop, False)
                    add_prior_grad(prior_mean, prior_prec, prop, grad_prop)
                    counters[CT_DATA_EVALS] += n_rows
                else:
                    if grad_mode == CARRIED:
                        draw_batch(rng, n_rows, idx_grad)
                    _batch_gradient(family, X, aux, noise_sd, intercept, prior_mean,
                                    prior_prec, cv_order, beta_star, g_star, H_star, prop,
                                    delta_prop, idx_grad, tmp, work, grad_prop)
                    counters[CT_DATA_EVALS] += n_batch
                if proposal == PROPOSAL_LANGEVIN:
                    c = (_langevin_log_density(beta, prop, grad_prop, h, mass, mass_inv, z)
                         - _langevin_log_density(prop, beta, grad, h, mass, mass_inv, z))

            # --- log target ratio ------------------------------------------------------------
            prior_diff = prior_logpdf_diff(prior_mean, prior_prec, prop, beta)
            penalty = 0.0
            if ratio_mode == FULL:
                if not (langevin and grad_mode == FULL):
                    loglik_prop = full_loglik_shifted(family, X, y, offset, noise_sd, intercept,
                                                      prop, False)
                    counters[CT_DATA_EVALS] += n_rows
                log_ratio = prior_diff + loglik_prop - cur_loglik[0]
                log_ratio_sd = 0.0
            else:
                draw_batch(rng, n_rows, idx_ratio)
                batch_residual_diffs(family, X, aux, noise_sd, intercept, delta_prop, delta,
                                     idx_ratio, cv_order, diffs, work)
                counters[CT_DATA_EVALS] += n_batch
                est, var, skew, kurt = scaled_sum_and_variance(diffs, n_rows)
                log_ratio = prior_diff + est
                if cv_order > 0:
                    log_ratio += proxy_loglik_diff_sum(cv_order, g_star, H_star, prop, beta,
                                                       beta_star)
                if var_mode == VAR_INDEPENDENT:
                    draw_batch(rng, n_rows, idx_ratio)
                    batch_residual_diffs(family, X, aux, noise_sd, intercept, delta_prop,
                                         delta, idx_ratio, cv_order, diffs, work)
                    counters[CT_DATA_EVALS] += n_batch
                    _, var, _, _ = scaled_sum_and_variance(diffs, n_rows)
                elif var_mode == VAR_POOLED:
                    # Pool over the second half of warmup only, when step and batch have settled.
                    if in_warmup and 2 * it >= n_warmup and math.isfinite(var):
                        pooled[0] += var
                        pooled[1] += 1.0
                    if pooled[1] > 0.0:
                        var = pooled[0] / pooled[1]
                log_ratio_sd = math.sqrt(var) if var >= 0.0 else math.nan
                penalty, fell_back = noise_penalty(rule, var, n_batch, var_mode == VAR_POOLED)
                if fell_back:
                    counters[CT_CD_FALLBACK] += 1

            # --- accept or reject --------------------------------------------------------------
            log_alpha = log_accept_probability(log_ratio, c, penalty)
            if not math.isfinite(log_ratio + c - penalty):
                nonfinite = True
                counters[CT_NONFINITE] += 1
            else:
                accepted = math.log(rng.random()) < log_alpha

        if accepted:
            beta[:] = prop
            if grad_mode == FULL and rule != NONE:
                cur_loglik[0] = loglik_prop
                if langevin:
                    cur_grad[:] = grad_prop
            elif grad_mode == CARRIED:
                cur_grad[:] = grad_prop

        # --- step-size adaptation in warmup (dual averaging), frozen afterwards --------------
        if in_warmup and adapt_step:
            alpha = math.exp(log_alpha) if rule != NONE else target_accept
            adapt[AD_COUNT] += 1.0
            m = adapt[AD_COUNT]
            target = target_accept
            if noise_sd_cap > 0.0:
                s_noise = min(log_ratio_sd, noise_sd_cap) if math.isfinite(log_ratio_sd) \
                    else noise_sd_cap
                target *= math.erfc(s_noise / (2.0 * math.sqrt(2.0)))
            w = 1.0 / (m + _DA_T0)
            adapt[AD_ERR] = (1.0 - w) * adapt[AD_ERR] + w * (target - alpha)
            adapt[AD_LOG_H] = adapt[AD_MU] - math.sqrt(m) / _DA_GAMMA * adapt[AD_ERR]
            eta_w = m ** (-_DA_KAPPA)
            adapt[AD_LOG_HBAR] = eta_w * adapt[AD_LOG_H] + (1.0 - eta_w) * adapt[AD_LOG_HBAR]
            if it == n_warmup - 1:
                adapt[AD_LOG_H] = adapt[AD_LOG_HBAR]

        draws_out[k, :] = beta
        st = stats_out[k]
        st[ST_ACCEPTED] = 1.0 if accepted else 0.0
        st[ST_ACCEPT_PROB] = math.exp(log_alpha) if rule != NONE else 1.0
        st[ST_LOG_RATIO] = log_ratio
        st[ST_LOG_RATIO_SD] = log_ratio_sd
        st[ST_STEP_SIZE] = h
        st[ST_BATCH_SIZE] = n_batch
        st[ST_NONFINITE] = 1.0 if nonfinite else 0.0
        st[ST_SKEW] = skew
        st[ST_KURT] = kurt
