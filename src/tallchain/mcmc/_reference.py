"""Pure-NumPy references for the minibatch kernels of ``_estimators.py`` and the numeric steps of
``_transition.py`` (private; used by the tests).

Each function has the name of the kernel it checks (without the leading underscore of a private
step) and computes, with whole-array NumPy, what that kernel computes; where the kernel writes
into an output array, the reference returns the value. The control-variate references rebuild
each Taylor proxy from the data at beta* (``rows.beta_star``, ``rows.order``) instead of reading
the row cache and the sums g*, H*, so they check the cache too; those that sum over all rows
take the data as one more argument.

Conventions as in ``tallchain.models._reference``: ``data`` a ``GLMData``, ``prior`` a
``PriorArrays``, ``rows`` a ``RowCache``, ``mass`` a ``MassMatrix``, ``idx`` a batch of rows.
The proxy of order k (0, 1 or 2) is (METHODS.md section 4)

    q_i(beta) = f(eta*_i) + f'(eta*_i) (eta_i - eta*_i) + 1/2 f''(eta*_i) (eta_i - eta*_i)^2,

truncated after the term of order k (order 0: no control variates, q_i contributes nothing).
"""

import math

import numpy as np
from scipy import special

from ..models import _reference as R
from . import _transition as T
from ._acceptance_kernels import NONE, PENALTY, PENALTY_CD
from ._acceptance_rules import ceperley_dewing_closed_form, validity_bound

# Dual averaging constants (Hoffman & Gelman 2014, section 3.2.1), as in _transition.
DA_GAMMA, DA_T0, DA_KAPPA = 0.05, 10.0, 0.75


# ---------------------------------------------------------------------------------------------
# Prior
# ---------------------------------------------------------------------------------------------


def prior_logpdf_diff(prior, beta_new, beta_old):
    """log p(b') - log p(b) for N(m, P^{-1}): -1/2 (b'-m)'P(b'-m) + 1/2 (b-m)'P(b-m)."""
    r1 = np.asarray(beta_new) - prior.mean
    r0 = np.asarray(beta_old) - prior.mean
    return float(-0.5 * r1 @ prior.precision @ r1 + 0.5 * r0 @ prior.precision @ r0)


def add_prior_grad(prior, beta, out):
    """out + grad log p(beta) = out - P (beta - m) (the kernel adds in place)."""
    return np.asarray(out) - np.asarray(prior.precision) @ (np.asarray(beta) - prior.mean)


# ---------------------------------------------------------------------------------------------
# Control variates
# ---------------------------------------------------------------------------------------------


def _proxy_weights(data, rows, beta, idx):
    """(q_i(beta), dq_i/deta_i) for the rows idx (all rows when None)."""
    y = R.rows_of(data.y, idx)
    eta = R.linear_predictor(data, beta, idx)
    eta_star = R.linear_predictor(data, rows.beta_star, idx)
    u = eta - eta_star
    q = np.zeros(eta.shape)
    w = np.zeros(eta.shape)
    if rows.order >= 1:
        f1 = R.dloglik_eta(data.family, eta_star, y, data.noise_sd)
        q = R.loglik_eta(data.family, eta_star, y, data.noise_sd, 0.0) + f1 * u
        w = f1
    if rows.order >= 2:
        f2 = R.d2loglik_eta(data.family, eta_star, y, data.noise_sd)
        q = q + 0.5 * f2 * u * u
        w = w + f2 * u
    return q, w


def cv_gradient_rows(data, rows, delta, idx):
    """sum_{i in idx} [grad l_i(beta) - grad q_i(beta)] at beta = beta* + delta."""
    beta = np.asarray(rows.beta_star) + delta
    _, w = _proxy_weights(data, rows, beta, idx)
    proxy = w[:, None] * R.design(data.X, data.intercept, idx)
    return (R.grad_rows(data, beta, idx) - proxy).sum(axis=0)


def proxy_gradient_sum(rows, beta, data):
    """sum_i grad q_i(beta) over all rows of ``data``, row by row (the kernel uses the closed
    form g* + H* (beta - beta*))."""
    _, w = _proxy_weights(data, rows, beta, None)
    return (w[:, None] * R.design(data.X, data.intercept)).sum(axis=0)


def proxy_loglik_diff_sum(rows, beta_new, beta_old, data):
    """Q(b') - Q(b) = sum_i [q_i(b') - q_i(b)] over all rows of ``data``, row by row (the kernel
    uses the closed form g*'(b'-b) + 1/2 (b'-b)' H* (b'+b-2b*))."""
    q1, _ = _proxy_weights(data, rows, beta_new, None)
    q0, _ = _proxy_weights(data, rows, beta_old, None)
    return float(np.sum(q1 - q0))


def batch_residual_diffs(data, rows, delta_new, delta_old, idx):
    """r_i(b') - r_i(b) = D_i - [q_i(b') - q_i(b)] for i in idx, with D_i = l_i(b') - l_i(b),
    b' = beta* + delta_new and b = beta* + delta_old."""
    b1 = np.asarray(rows.beta_star) + delta_new
    b0 = np.asarray(rows.beta_star) + delta_old
    d = R.batch_loglik(data, b1, idx) - R.batch_loglik(data, b0, idx)
    q1, _ = _proxy_weights(data, rows, b1, idx)
    q0, _ = _proxy_weights(data, rows, b0, idx)
    return d - (q1 - q0)


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


# ---------------------------------------------------------------------------------------------
# Steps of the transition loop
# ---------------------------------------------------------------------------------------------


def batch_gradient(data, prior, rows, beta, idx):
    """The control-variate estimate of grad log pi(beta) from the batch idx:
    grad log p(beta) + sum_i grad q_i(beta) + (N/n) sum_{i in idx} [grad l_i - grad q_i]
    (Baker, Fearnhead, Fox & Nemeth 2019; METHODS.md section 4)."""
    n_rows = np.asarray(data.X).shape[0]
    delta = np.asarray(beta) - rows.beta_star
    est = (proxy_gradient_sum(rows, beta, data)
           + n_rows / len(idx) * cv_gradient_rows(data, rows, delta, idx))
    return add_prior_grad(prior, beta, est)


def proxy_drift_gradient(data, prior, rows, beta):
    """grad S(beta) = grad log p(beta) + sum_i grad q_i(beta), row by row: the drift of
    gradient_batch="proxy" (the kernel follows it in whitened coordinates, `_proxy_drift`)."""
    return add_prior_grad(prior, beta, proxy_gradient_sum(rows, beta, data))


def langevin_log_density(beta_to, beta_from, grad_from, h, mass):
    """log q(beta_to | beta_from) = -(1/2h) z'Mz, z = beta_to - beta_from - (h/2) M^{-1} g,
    up to a constant (Roberts & Tweedie 1996)."""
    z = np.asarray(beta_to) - beta_from - 0.5 * h * (mass.mass_inv @ grad_from)
    return float(-0.5 * z @ mass.mass @ z / h)


def propose(mass, beta, h, xi, grad=None):
    """beta + sqrt(h) L xi (+ (h/2) M^{-1} grad for a Langevin proposal), L L' = M^{-1}."""
    prop = np.asarray(beta) + math.sqrt(h) * (mass.mass_inv_chol @ xi)
    if grad is not None:
        prop = prop + 0.5 * h * (mass.mass_inv @ grad)
    return prop


def adapt_step_size(tuning, adapt, it, alpha, log_ratio_sd):
    """The dual-averaging state after one update toward the acceptance target, with ``alpha``
    the iteration's acceptance probability (adapt: log h, log h-bar, running error, mu, count).

    The target is acceptance_target x A(0, s) = acceptance_target x 2 Phi(-s/2) (METHODS.md section 1),
    s the iteration's noise sd capped at ``noise_sd_cap`` (no scaling when the cap is 0).
    """
    log_h, log_hbar, err, mu, m = adapt
    m += 1.0
    target = tuning.acceptance_target
    if tuning.noise_sd_cap > 0.0:
        s = min(log_ratio_sd, tuning.noise_sd_cap) if np.isfinite(log_ratio_sd) \
            else tuning.noise_sd_cap
        target *= 2.0 * special.ndtr(-s / 2.0)
    w = 1.0 / (m + DA_T0)
    err = (1.0 - w) * err + w * (target - alpha)
    log_h = mu - math.sqrt(m) / DA_GAMMA * err
    eta_w = m ** (-DA_KAPPA)
    log_hbar = eta_w * log_h + (1.0 - eta_w) * log_hbar
    if it == tuning.n_warmup - 1:
        log_h = log_hbar
    return np.array([log_h, log_hbar, err, mu, m])


# ---------------------------------------------------------------------------------------------
# The whole transition loop
# ---------------------------------------------------------------------------------------------


def draw_batch(rng, n_rows, n):
    """The kernel's sorted simple random sample of n rows, drawing from ``rng`` in its order:
    all rows when n >= N; selection sampling when 8 n > N; else n draws floor(U N), sorted,
    duplicates redrawn in place until none is left."""
    if n >= n_rows:
        return np.arange(n)
    if 8 * n > n_rows:
        out = []
        for i in range(n_rows):
            if (n_rows - i) * rng.random() < n - len(out):
                out.append(i)
                if len(out) == n:
                    break
        return np.array(out, dtype=np.int64)

    def index():
        return min(int(rng.random() * n_rows), n_rows - 1)

    out = np.sort(np.array([index() for _ in range(n)], dtype=np.int64))
    while True:
        dup = 0
        for k in range(1, n):
            if out[k] == out[k - 1]:
                out[k] = index()
                dup += 1
        if dup == 0:
            return out
        out.sort()


def noise_penalty(rule, var, n_batch, var_is_known):
    """(penalty, fell back): 0 (exact, plug-in), var/2 (penalty, or a variance treated as
    known), u_B by its Bessel closed form (Ceperley-Dewing), and var/2 where the kernel gives
    up on u_B: chi^2 > 16, or at or beyond the validity bound (the first Bessel zero)."""
    if rule == PENALTY or (rule == PENALTY_CD and var_is_known):
        return 0.5 * var, False
    if rule == PENALTY_CD:
        if var <= 0.0:
            return 0.0, False
        if var > 16.0 or (n_batch >= 2 and var >= validity_bound(n_batch)):
            return 0.5 * var, True
        u = float(ceperley_dewing_closed_form(var, n_batch))
        return (0.5 * var, True) if math.isnan(u) else (u, False)
    return 0.0, False


def _batch_log_ratio(data, rows, codes, tuning, chain, rng, prop, it, prior_diff):
    """(log ratio, sd, penalty, fell back, skew, kurtosis, rows read) on a batch."""
    beta, star, n_rows, n = chain["beta"], rows.beta_star, np.shape(data.X)[0], chain["n_batch"]
    idx = chain.pop("idx_ratio", None)
    if idx is None:
        idx = draw_batch(rng, n_rows, n)
    diffs = batch_residual_diffs(data, rows, prop - star, beta - star, idx)
    est, var, skew, kurt = scaled_sum_and_variance(diffs, n_rows)
    value = prior_diff + est
    if rows.order > 0:
        value += proxy_loglik_diff_sum(rows, prop, beta, data)
    read = n
    if codes.variance == T.VAR_INDEPENDENT:
        diffs = batch_residual_diffs(data, rows, prop - star, beta - star,
                                     draw_batch(rng, n_rows, n))
        var = scaled_sum_and_variance(diffs, n_rows)[1]
        read += n
    elif codes.variance == T.VAR_POOLED:
        pooled = chain["pooled"]
        if it < tuning.n_warmup and 2 * it >= tuning.n_warmup and math.isfinite(var):
            pooled += [var, 1.0]
        if pooled[1] > 0.0:
            var = pooled[0] / pooled[1]
    sd = math.sqrt(var) if var >= 0.0 else math.nan
    penalty, beyond = noise_penalty(codes.rule, var, n, codes.variance == T.VAR_POOLED)
    return value, sd, penalty, beyond, skew, kurt, read


def _metropolis_test(data, prior, rows, mass, codes, tuning, chain, rng, prop, h, it):
    """(log ratio record, log acceptance probability, accepted, non-finite, rows read)."""
    beta, n_rows, n = chain["beta"], np.shape(data.X)[0], chain["n_batch"]
    langevin, read, c = codes.proposal != T.PROPOSAL_RW, 0, 0.0
    chain["loglik_prop"] = 0.0
    if langevin and codes.gradient == T.FULL:
        chain["loglik_prop"], g = R.full_loglik_grad(data, prop, with_const=False)
        chain["grad_prop"], read = add_prior_grad(prior, prop, g), n_rows
    elif langevin and codes.gradient == T.PROXY:
        chain["grad_prop"] = proxy_drift_gradient(data, prior, rows, prop)
    elif langevin:
        if codes.gradient == T.CARRIED:
            chain["idx_grad"] = draw_batch(rng, n_rows, n)
        chain["grad_prop"] = batch_gradient(data, prior, rows, prop, chain["idx_grad"])
        read = n
    if codes.proposal == T.PROPOSAL_LANGEVIN:
        c = (langevin_log_density(beta, prop, chain["grad_prop"], h, mass)
             - langevin_log_density(prop, beta, chain["grad"], h, mass))
    prior_diff = prior_logpdf_diff(prior, prop, beta)
    if codes.ratio == T.FULL:
        if not (langevin and codes.gradient == T.FULL):
            chain["loglik_prop"], read = R.full_loglik(data, prop, False), read + n_rows
        ratio = (prior_diff + chain["loglik_prop"] - chain["cur_loglik"], 0.0, 0.0, False,
                 math.nan, math.nan, 0)
    else:
        ratio = _batch_log_ratio(data, rows, codes, tuning, chain, rng, prop, it, prior_diff)
    z = ratio[0] + c - ratio[2]
    if not math.isfinite(z):
        return ratio, -math.inf, False, True, read + ratio[6]
    log_alpha = min(z, 0.0)
    return ratio, log_alpha, math.log(rng.random()) < log_alpha, False, read + ratio[6]


def run_chain(data, prior, rows, mass, codes, tuning, chain, rng, first, n_iter):
    """The transition loop, one iteration at a time in NumPy, from the references above.

    ``chain`` is a dict with the kernel's state (``beta``, ``cur_grad``, ``cur_loglik``,
    ``adapt``, ``pooled``) and ``n_batch``, updated in place; ``rng`` a numpy Generator, drawn
    from in the kernel's order. Returns (draws, stats) of iterations first .. first + n_iter - 1
    with the columns of ``_transition.STAT_NAMES``.
    """
    n_rows, n, d = np.shape(data.X)[0], chain["n_batch"], chain["beta"].shape[0]
    langevin = codes.proposal != T.PROPOSAL_RW
    no_ratio = (math.nan, math.nan, 0.0, False, math.nan, math.nan, 0)
    draws, stats = np.empty((n_iter, d)), np.empty((n_iter, T.N_STATS))
    for k in range(n_iter):
        it, beta = first + k, chain["beta"]
        h, read, chain["grad"] = math.exp(chain["adapt"][T.AD_LOG_H]), 0, chain["cur_grad"]
        if langevin and codes.gradient == T.BATCH:
            chain["idx_grad"] = draw_batch(rng, n_rows, n)
            chain["grad"] = batch_gradient(data, prior, rows, beta, chain["idx_grad"])
            read = n
        elif langevin and codes.gradient == T.PROXY:
            chain["grad"] = proxy_drift_gradient(data, prior, rows, beta)
            # the kernel draws the log-ratio batch before the proposal (to prefetch its rows)
            chain["idx_ratio"] = draw_batch(rng, n_rows, n)
        prop = propose(mass, beta, h, rng.standard_normal(d), chain["grad"] if langevin else None)
        ratio, log_alpha, accepted, nonfinite = no_ratio, 0.0, True, False
        if codes.rule != NONE:
            ratio, log_alpha, accepted, nonfinite, more = _metropolis_test(
                data, prior, rows, mass, codes, tuning, chain, rng, prop, h, it)
            read += more
        if accepted:
            chain["beta"] = prop
            if codes.gradient == T.FULL and codes.rule != NONE:
                chain["cur_loglik"] = chain["loglik_prop"]
                if langevin:
                    chain["cur_grad"] = chain["grad_prop"]
            elif codes.gradient == T.CARRIED:
                chain["cur_grad"] = chain["grad_prop"]
        if it < tuning.n_warmup and tuning.adapt_step:
            alpha = math.exp(log_alpha) if codes.rule != NONE else tuning.acceptance_target
            chain["adapt"] = adapt_step_size(tuning, chain["adapt"], it, alpha, ratio[1])
        draws[k] = chain["beta"]
        stats[k] = (accepted, math.exp(log_alpha) if codes.rule != NONE else 1.0, ratio[0],
                    ratio[1], h, n, nonfinite, ratio[4], ratio[5], read, ratio[3])
    return draws, stats
