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
  (proxy)      LANGEVIN    PROXY       BATCH       PENALTY_CD
sgld           LANGEVIN    BATCH       -           NONE
=============  ==========  ==========  ==========  ===========

Preconditioned Langevin proposal (Roberts & Tweedie 1996), with mass matrix M = (L L^T)^{-1}:
    beta' = beta + (h/2) M^{-1} g(beta) + sqrt(h) L xi,    xi ~ N(0, I)
    log q(beta' | beta) = -(1/2h) z^T M z,    z = beta' - beta - (h/2) M^{-1} g(beta)
For a minibatch gradient g_S, the batch S is drawn independently of the state and the reverse
density uses g_S(beta') with the same S (METHODS.md section 3); the log-ratio batch S2 is drawn
independently of S. The kernel runs iterations [first, first + len(draws_out)) and keeps all
of its state in the arrays it is given, so a run can be cut into chunks (progress, checkpoints)
and resumed with bitwise-identical results.

`run_chain` takes its arguments in a few groups (namedtuples, typed structs to numba), each
built once in Python by the object that owns the arrays:

=============  =============================================  ================================
group          fields                                         built by
=============  =============================================  ================================
GLMData        family, X, y, offset, noise_sd, intercept      ``model.glm_data``
PriorArrays    mean, precision                                ``model.prior_arrays``
RowCache       order, beta_star, aux, g_star, H_star          ``ControlVariateCache.rows``
MassMatrix     mass, mass_inv, mass_inv_chol (dense) or       ``Preconditioner.matrices``
               scale, basis, powers (factored)
MethodCodes    proposal, gradient, ratio, rule, variance      ``_driver.ChainJob``
Tuning         adapt_step, n_warmup, acceptance_target,        ``_driver.ChainJob``
               noise_sd_cap
ChainArrays    beta, cur_grad, cur_loglik, adapt, pooled      ``_driver.ChainState.arrays``
=============  =============================================  ================================

An iteration reads: the gradient the proposal drifts along (cached, or `_batch_gradient` on a
fresh batch), the proposal (`_propose`), the gradient at the proposal and the proposal-density
term c (`_langevin_log_density` twice; with the proxy's drift, `propose_along_proxy` gives the
proposal and c in whitened coordinates, reading no rows), the log target ratio on all rows or
on a batch with its variance and penalty (`_noise`), the accept draw (`_accept`), the move
(`_move`), the step-size adaptation (`_adapt_step_size`) and the record of the iteration's
statistics (`_record`). `run_chain` calls the GLM and estimator kernels itself and the
steps in between are leaves that take arrays (see the note above `_buffers` for why). Work
arrays are allocated once per call (`_buffers`), never per iteration.
"""

import math
from collections import namedtuple

import numpy as np

from ._acceptance_kernels import NONE, log_accept_probability, noise_penalty
from ._batches import draw_batch
from ._factored_mass import langevin_log_density_factored, propose_factored
from ._proxy_drift import propose_along_proxy, proxy_log_ratio
from ._estimators import (
    add_prior_grad,
    batch_residual_diffs,
    cv_gradient_rows,
    prior_logpdf_diff,
    proxy_gradient_sum,
    proxy_loglik_diff_sum,
    scaled_sum_and_variance,
)
from ..models._kernels import full_loglik, full_loglik_grad, jit
from ..models._prefetch import prefetch_row_values, prefetch_rows

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
# The drift is the gradient of the control variates' quadratic proxy, with the proxy's
# precision as mass matrix (`_proxy_drift`): no rows read for the proposal; the state's
# gradient slot carries the whitened coordinates w.
PROXY = 3
VAR_SAME = 0
VAR_INDEPENDENT = 1
VAR_POOLED = 2

# Columns of the per-iteration statistics array.
ST_ACCEPTED = 0
ST_ACCEPTANCE_PROBABILITY = 1
ST_LOG_RATIO = 2
ST_LOG_RATIO_SD = 3
ST_STEP_SIZE = 4
ST_BATCH_SIZE = 5
ST_NONFINITE = 6
ST_SKEW = 7
ST_KURT = 8
ST_ROWS_READ = 9
ST_PENALTY_BEYOND_BOUND = 10
N_STATS = 11
STAT_NAMES = (
    "accepted",
    "acceptance_probability",
    "log_ratio",
    "log_ratio_sd",
    "step_size",
    "batch_size",
    "nonfinite",
    "log_ratio_skew",
    "log_ratio_kurtosis",
    "rows_read",
    "penalty_beyond_bound",
)
# Statistics that are not floats: their type in SampleResult.stats.
STAT_TYPES = {"accepted": bool, "nonfinite": bool, "rows_read": np.int64,
              "penalty_beyond_bound": bool}

# Layout of the adaptation state: current log step, averaged log step, running error,
# shrinkage target mu, adaptation iteration count.
AD_LOG_H = 0
AD_LOG_HBAR = 1
AD_ERR = 2
AD_MU = 3
AD_COUNT = 4
N_ADAPT = 5

# Dual averaging constants (Hoffman & Gelman 2014, section 3.2.1).
_DA_GAMMA = 0.05
_DA_T0 = 10.0
_DA_KAPPA = 0.75

MethodCodes = namedtuple("MethodCodes", ["proposal", "gradient", "ratio", "rule", "variance"])
MethodCodes.__doc__ = """A method as integer codes: ``proposal`` (PROPOSAL_*), ``gradient`` (FULL,
BATCH, CARRIED or PROXY), ``ratio`` (FULL or BATCH), ``rule`` (an acceptance rule code of
``_acceptance_kernels``) and ``variance`` (VAR_*: where the log-ratio variance comes from)."""

Tuning = namedtuple("Tuning", ["adapt_step", "n_warmup", "acceptance_target", "noise_sd_cap"])
Tuning.__doc__ = """Step-size tuning: ``adapt_step`` (bool: dual averaging during warmup),
``n_warmup`` (iterations), ``acceptance_target`` (the exact method's target) and ``noise_sd_cap``
(cap on the noise sd that scales the target; 0 for exact methods, see `run_chain`)."""

ChainArrays = namedtuple("ChainArrays", ["beta", "cur_grad", "cur_loglik", "adapt", "pooled"])
ChainArrays.__doc__ = """One chain's state arrays, updated in place: ``beta`` (n_coef,), the
log-posterior gradient ``cur_grad`` (n_coef,) and full-data log-likelihood ``cur_loglik`` (1,)
cached at beta (or the carried batch's gradient), the dual-averaging state ``adapt``
(N_ADAPT,) and the pooled variance sum and count ``pooled`` (2,)."""

# A namedtuple's name must be the module attribute that holds it: numba's cache pickles the
# class by that name, and a class it cannot find again is rebuilt as another type, which then
# does not unify with the one compiled in this process.
_Buffers = namedtuple("_Buffers", ["prop", "delta", "delta_prop", "grad", "grad_prop", "tmp",
                                   "z", "xi", "idx_grad", "idx_ratio", "diffs", "work"])

# An iteration's log target ratio: the value used (exact or estimated), its sd, the penalty
# subtracted from the log acceptance ratio and whether Ceperley-Dewing fell back to sigma^2/2,
# the batch terms' skewness and kurtosis.
_LogRatio = namedtuple("_LogRatio", ["value", "sd", "penalty", "beyond_bound", "skew",
                                     "kurtosis"])

# How the steps take their arguments is set by what numba does per call: a function counts a
# reference (an atomic add) for every array it holds across a call to another kernel, and for
# every array member of a tuple it reads. So the loop reads the groups' members once per
# kernel call, outside the loop, and calls the kernels itself; the steps it calls in between
# are leaves that take arrays. (Steps that took the groups and called the kernels cost 1.2x
# the transition of the single-body loop at N = 10^4.)


@jit
def _buffers(d, n_batch):
    """The work arrays of one kernel call."""
    return _Buffers(np.empty(d), np.empty(d), np.empty(d), np.empty(d), np.empty(d),
                    np.empty(d), np.empty(d), np.empty(d), np.empty(n_batch, dtype=np.int64),
                    np.empty(n_batch, dtype=np.int64), np.empty(n_batch),
                    np.empty((5, n_batch)))


@jit
def _batch_gradient(data, prior, rows, beta, delta, idx, tmp, work, out):
    """Unbiased estimate of grad log pi(beta) from the rows in idx:
    grad log p(beta) + sum_i grad q_i(beta) + (N/n) sum_{i in idx} [grad l_i - grad q_i].
    ``delta`` is beta - beta* (the row cache's reference point); ``tmp`` (n_coef,) and
    ``work`` (3, n) are scratch."""
    n_rows = data.X.shape[0]
    d = beta.shape[0]
    cv_gradient_rows(data, rows, delta, idx, tmp, work)
    scale = n_rows / idx.shape[0]
    if rows.order > 0:
        proxy_gradient_sum(rows, beta, out)
    else:
        out[:] = 0.0
    for a in range(d):
        out[a] += scale * tmp[a]
    add_prior_grad(prior, beta, out)


@jit
def _langevin_log_density(beta_to, beta_from, grad_from, h, mass, z):
    """log q(beta_to | beta_from) up to a constant that cancels in the ratio."""
    if mass.scale.shape[0] > 0:
        return langevin_log_density_factored(beta_to, beta_from, grad_from, h, mass, z)
    d = beta_to.shape[0]
    m, m_inv = mass.mass, mass.mass_inv
    for a in range(d):
        drift = 0.0
        for b in range(d):
            drift += m_inv[a, b] * grad_from[b]
        z[a] = beta_to[a] - beta_from[a] - 0.5 * h * drift
    q = 0.0
    for a in range(d):
        s = 0.0
        for b in range(d):
            s += m[a, b] * z[b]
        q += z[a] * s
    return -0.5 * q / h


@jit
def _proposal_term(proposal, proxy, c_proxy, beta, prop, grad, grad_prop, h, mass, z):
    """c = log q(beta | beta') - log q(beta' | beta) (METHODS.md section 3): the proxy's
    drift computed it with the proposal; 0 for a random walk or the power-check variant."""
    if proposal != PROPOSAL_LANGEVIN:
        return 0.0
    if proxy:
        return c_proxy
    return (_langevin_log_density(beta, prop, grad_prop, h, mass, z)
            - _langevin_log_density(prop, beta, grad, h, mass, z))


@jit
def init_full_state(data, prior, state):
    """Full-data log-likelihood and log-posterior gradient at the starting point."""
    state.cur_loglik[0] = full_loglik_grad(data, state.beta, state.cur_grad, False, 0,
                                           data.X.shape[0])
    add_prior_grad(prior, state.beta, state.cur_grad)


@jit
def init_carried_gradient(data, prior, rows, state, rng, n_batch):
    """Draw the starting batch of a batch-as-state chain and its gradient at the start."""
    beta, beta_star = state.beta, rows.beta_star
    buf = _buffers(beta.shape[0], n_batch)
    delta, idx = buf.delta, buf.idx_grad
    draw_batch(rng, data.X.shape[0], idx)
    _difference(beta, beta_star, delta)
    _batch_gradient(data, prior, rows, beta, delta, idx, buf.tmp, buf.work, state.cur_grad)


@jit
def _difference(a, b, out):
    """out = a - b, elementwise."""
    for j in range(out.shape[0]):
        out[j] = a[j] - b[j]


@jit
def _copy(src, dst):
    """dst = src, elementwise."""
    for j in range(dst.shape[0]):
        dst[j] = src[j]


@jit
def _propose(mass, langevin, beta, grad, h, rng, xi, prop):
    """prop = beta + sqrt(h) L xi (+ (h/2) M^{-1} grad for Langevin), xi ~ N(0, I) drawn into
    ``xi``; L L^T = M^{-1}."""
    if mass.scale.shape[0] > 0:
        propose_factored(mass, langevin, beta, grad, h, rng, xi, prop)
        return
    d = beta.shape[0]
    chol, m_inv = mass.mass_inv_chol, mass.mass_inv
    for a in range(d):
        xi[a] = rng.standard_normal()
    sqrt_h = math.sqrt(h)
    for a in range(d):
        s = 0.0
        for b in range(a + 1):
            s += chol[a, b] * xi[b]
        prop[a] = beta[a] + sqrt_h * s
        if langevin:
            drift = 0.0
            for b in range(d):
                drift += m_inv[a, b] * grad[b]
            prop[a] += 0.5 * h * drift


@jit
def _noise(codes, tuning, pooled, it, var, n_batch):
    """(sd, penalty, fell back) of a batch estimate with variance estimate ``var``. A pooled
    variance is the mean of the batch estimates over the second half of warmup, when step and
    batch have settled (the batch's own estimate until there is one), and is then frozen."""
    if codes.variance == VAR_POOLED:
        if it < tuning.n_warmup and 2 * it >= tuning.n_warmup and math.isfinite(var):
            pooled[0] += var
            pooled[1] += 1.0
        if pooled[1] > 0.0:
            var = pooled[0] / pooled[1]
    sd = math.sqrt(var) if var >= 0.0 else math.nan
    penalty, beyond = noise_penalty(codes.rule, var, n_batch, codes.variance == VAR_POOLED)
    return sd, penalty, beyond


@jit
def _accept(rng, log_ratio, c, penalty):
    """(log acceptance probability, accepted, non-finite): a non-finite log ratio is rejected
    without drawing."""
    log_alpha = log_accept_probability(log_ratio, c, penalty)
    nonfinite = not math.isfinite(log_ratio + c - penalty)
    accepted = False
    if not nonfinite:
        accepted = math.log(rng.random()) < log_alpha
    return log_alpha, accepted, nonfinite


@jit
def _move(codes, beta, prop, cur_grad, grad_prop, cur_loglik, loglik_prop):
    """Take the proposal: beta = beta', with what is cached at beta'."""
    for a in range(beta.shape[0]):
        beta[a] = prop[a]
    if codes.gradient == FULL and codes.rule != NONE:
        cur_loglik[0] = loglik_prop
        if codes.proposal != PROPOSAL_RW:
            for a in range(beta.shape[0]):
                cur_grad[a] = grad_prop[a]
    elif codes.gradient == CARRIED or codes.gradient == PROXY:
        for a in range(beta.shape[0]):
            cur_grad[a] = grad_prop[a]


@jit
def _adapt_step_size(tuning, rule, adapt, it, log_alpha, log_ratio_sd):
    """One dual-averaging update of the log step (Hoffman & Gelman 2014, section 3.2.1) toward
    the acceptance target; at the last warmup iteration the step freezes at the average."""
    alpha = math.exp(log_alpha) if rule != NONE else tuning.acceptance_target
    adapt[AD_COUNT] += 1.0
    m = adapt[AD_COUNT]
    target = tuning.acceptance_target
    cap = tuning.noise_sd_cap
    if cap > 0.0:
        s_noise = min(log_ratio_sd, cap) if math.isfinite(log_ratio_sd) else cap
        # A(0, s) = 2 Phi(-s/2) = erfc(s / (2 sqrt 2)) (METHODS.md section 1)
        target *= math.erfc(s_noise / (2.0 * math.sqrt(2.0)))
    w = 1.0 / (m + _DA_T0)
    adapt[AD_ERR] = (1.0 - w) * adapt[AD_ERR] + w * (target - alpha)
    adapt[AD_LOG_H] = adapt[AD_MU] - math.sqrt(m) / _DA_GAMMA * adapt[AD_ERR]
    eta_w = m ** (-_DA_KAPPA)
    adapt[AD_LOG_HBAR] = eta_w * adapt[AD_LOG_H] + (1.0 - eta_w) * adapt[AD_LOG_HBAR]
    if it == tuning.n_warmup - 1:
        adapt[AD_LOG_H] = adapt[AD_LOG_HBAR]


@jit
def _record(st, rule, ratio, log_alpha, accepted, nonfinite, h, n_batch, rows_read):
    """Write one iteration's statistics into its row ``st`` (columns ST_*)."""
    st[ST_ACCEPTED] = 1.0 if accepted else 0.0
    st[ST_ACCEPTANCE_PROBABILITY] = math.exp(log_alpha) if rule != NONE else 1.0
    st[ST_LOG_RATIO] = ratio.value
    st[ST_LOG_RATIO_SD] = ratio.sd
    st[ST_STEP_SIZE] = h
    st[ST_BATCH_SIZE] = n_batch
    st[ST_NONFINITE] = 1.0 if nonfinite else 0.0
    st[ST_SKEW] = ratio.skew
    st[ST_KURT] = ratio.kurtosis
    st[ST_ROWS_READ] = rows_read
    st[ST_PENALTY_BEYOND_BOUND] = 1.0 if ratio.beyond_bound else 0.0


@jit
def run_chain(data, prior, rows, mass, codes, tuning, state, rng, n_batch, first, draws_out,
              stats_out):
    """Run iterations first .. first + len(draws_out) - 1 of one chain, in place.

    Parameters
    ----------
    data : GLMData
    prior : PriorArrays
    rows : RowCache
    mass : MassMatrix
    codes : MethodCodes
    tuning : Tuning
    state : ChainArrays
        Updated in place, as is the generator ``rng`` (a numpy Generator).
    rng : numpy.random.Generator
    n_batch : int
        Rows per batch (minibatch methods; 1 otherwise).
    first : int
        The iteration number of ``draws_out[0]``.
    draws_out : ndarray of shape (n_iter, n_coef)
    stats_out : ndarray of shape (n_iter, N_STATS)
        Receive iteration first + k in row k (statistics in the columns ST_*, named by
        STAT_NAMES).

    Notes
    -----
    Step-size tuning aims at ``acceptance_target`` times A(0, s) = erfc(s / 2 sqrt 2), the most
    that log-ratio noise of sd s lets through (METHODS.md section 1), with s the iteration's
    own estimated noise sd capped at ``noise_sd_cap`` (0 for exact methods: no scaling), so dual
    averaging aims at the mean of acceptance_target * A(0, s_k) over the iterations. The cap keeps
    a very noisy start from lowering the target to nothing, which would stop the step
    shrinking. (A running average of s_k was tried first: the huge noise of the first
    iterations far from the mode lingered in it for a thousand iterations, so short warmups
    ended at too large a step, acceptance 0.31 instead of 0.57.)
    """
    beta, cur_grad, cur_loglik, adapt, pooled = state
    buf = _buffers(beta.shape[0], n_batch)
    prop, delta, delta_prop, grad, grad_prop, tmp, z, xi, idx_grad, idx_ratio, diffs, work = buf
    beta_star, n_rows = rows.beta_star, data.X.shape[0]
    langevin = codes.proposal != PROPOSAL_RW
    for k in range(draws_out.shape[0]):
        it = first + k
        h = math.exp(adapt[AD_LOG_H])
        read = 0
        # the gradient the Langevin proposal drifts along: cached, or on a fresh batch S
        proxy = codes.gradient == PROXY
        c_proxy = 0.0
        if langevin and codes.gradient == BATCH:
            draw_batch(rng, n_rows, idx_grad)
            _difference(beta, beta_star, delta)
            _batch_gradient(data, prior, rows, beta, delta, idx_grad, tmp, work, grad)
            read += n_batch
        elif langevin and not proxy:
            _copy(cur_grad, grad)
        if proxy:
            # the log-ratio batch first, so that its rows load while the proposal is computed
            draw_batch(rng, n_rows, idx_ratio)
            prefetch_rows(data.X, rows.aux, idx_ratio)
            # grad_prop receives w'
            c_proxy = propose_along_proxy(mass.mass_inv_chol, cur_grad, h, rng, grad_prop, xi,
                                          beta, prop)
            prefetch_row_values(data.X, idx_ratio)
        else:
            _propose(mass, langevin, beta, grad, h, rng, xi, prop)
        _difference(beta, beta_star, delta)
        _difference(prop, beta_star, delta_prop)
        ratio = _LogRatio(math.nan, math.nan, 0.0, False, math.nan, math.nan)
        log_alpha, accepted, nonfinite, loglik_prop, c = 0.0, True, False, 0.0, 0.0
        if codes.rule != NONE:
            # the gradient at beta' (all rows; the batch S, or a fresh one when it is carried)
            # and the proposal-density term c
            if langevin and codes.gradient == FULL:
                loglik_prop = full_loglik_grad(data, prop, grad_prop, False, 0, n_rows)
                add_prior_grad(prior, prop, grad_prop)
                read += n_rows
            elif langevin and not proxy:
                if codes.gradient == CARRIED:
                    draw_batch(rng, n_rows, idx_grad)
                _batch_gradient(data, prior, rows, prop, delta_prop, idx_grad, tmp, work,
                                grad_prop)
                read += n_batch
            c = _proposal_term(codes.proposal, proxy, c_proxy, beta, prop, grad, grad_prop, h,
                               mass, z)
            # the proxy S = log prior + sum of q_i is quadratic in w: its difference is O(d)
            prior_diff = (proxy_log_ratio(grad_prop, cur_grad) if proxy
                          else prior_logpdf_diff(prior, prop, beta))
            if codes.ratio == FULL:
                # exact; full-data MALA has the log-likelihood at beta' from its gradient pass
                if not (langevin and codes.gradient == FULL):
                    loglik_prop = full_loglik(data, prop, False, 0, n_rows)
                    read += n_rows
                ratio = _LogRatio(prior_diff + loglik_prop - cur_loglik[0], 0.0, 0.0, False,
                                  math.nan, math.nan)
            else:
                # on a batch S2 independent of S, with its variance (METHODS.md sections 2, 4)
                if not proxy:
                    draw_batch(rng, n_rows, idx_ratio)
                batch_residual_diffs(data, rows, delta_prop, delta, idx_ratio, diffs, work)
                read += n_batch
                est, var, skew, kurt = scaled_sum_and_variance(diffs, n_rows)
                value = prior_diff + est
                if rows.order > 0 and not proxy:
                    value += proxy_loglik_diff_sum(rows, prop, beta)
                if codes.variance == VAR_INDEPENDENT:
                    draw_batch(rng, n_rows, idx_ratio)
                    batch_residual_diffs(data, rows, delta_prop, delta, idx_ratio, diffs, work)
                    read += n_batch
                    _, var, _, _ = scaled_sum_and_variance(diffs, n_rows)
                sd, penalty, beyond = _noise(codes, tuning, pooled, it, var, n_batch)
                ratio = _LogRatio(value, sd, penalty, beyond, skew, kurt)
            log_alpha, accepted, nonfinite = _accept(rng, ratio.value, c, ratio.penalty)
        if accepted:
            _move(codes, beta, prop, cur_grad, grad_prop, cur_loglik, loglik_prop)
        if it < tuning.n_warmup and tuning.adapt_step:
            _adapt_step_size(tuning, codes.rule, adapt, it, log_alpha, ratio.sd)
        _copy(beta, draws_out[k])
        _record(stats_out[k], codes.rule, ratio, log_alpha, accepted, nonfinite, h, n_batch,
                read)
