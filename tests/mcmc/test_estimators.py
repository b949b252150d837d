"""The minibatch kernels (mcmc/_estimators.py) and the numeric steps of the transition loop
(mcmc/_transition.py), against their references in ``tallchain.mcmc._reference``.

What is checked, and against what:

* Every estimator kernel against the reference of the same name, for the three families,
  float64 and float32 X, intercept on and off, with and without an offset, on an unsorted index
  batch with repeats, at control-variate orders 0, 1 and 2. The references rebuild each Taylor
  proxy from the data at beta* (METHODS.md section 4) instead of reading the row cache and g*,
  H*, so the cache is checked too. Different code paths: compared in units of machine epsilon
  (``ulps.assert_ulps_close``) with the budgets of ``glm_problems`` (per-row values within
  ROW_ULPS, a sum of n within ROW_ULPS + n - 1) relative to the size of everything added, a few
  ulps more where a step adds a few terms.
* Control-variate identities: with order 2 on the linear family the residual differences vanish
  to rounding and the control-variate gradient equals the full gradient; averaged over every
  batch of a tiny population the control-variate gradient is the full gradient (Baker,
  Fearnhead, Fox & Nemeth 2019).
* ``scaled_sum_and_variance`` against the reference, numpy and scipy.stats moments, and the
  unbiasedness of its variance estimate by enumerating every subset of a tiny population
  (Cochran, Sampling Techniques, ch. 2).
* The transition steps ``_batch_gradient``, ``_langevin_log_density``, ``_propose`` and
  ``_adapt_step_size`` against ``batch_gradient``, ``langevin_log_density``, ``propose`` and
  ``adapt_step_size``; the Gaussian prior kernels against the reference and scipy.stats.
"""

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from glm_problems import (CASES, FAMILIES, NOISE_SD, N_ROWS, ROW_ULPS, eta_parts, f1_parts,
                          f2_parts, f_parts, make_problem)
from tallchain.mcmc import _estimators as E
from tallchain.mcmc import _reference as MR
from tallchain.mcmc import _transition as T
from tallchain.models import _kernels as K
from tallchain.models import _reference as R
from tallchain.posterior._control_variates import RowCache, row_cache
from tallchain.posterior._mass import MassMatrix
from ulps import assert_ulps_close

# The proxies add up to three more terms per row (f'* u and f''* u^2 / 2, and their
# difference between two points): 4 ulps beyond the per-row budget.
CV_ULPS = ROW_ULPS + 4


@pytest.fixture(params=CASES)
def problem(request):
    return make_problem(*request.param)


def cv_rows(data, beta_star, order):
    """The row cache as the sampler builds it: aux = (y, eta*, f'*, f''*), g* and H* by the
    full-data kernels (order 0: beta* = 0, no sums)."""
    d = beta_star.shape[0]
    if order == 0:
        beta_star = np.zeros(d)
    aux = row_cache(data, beta_star)
    g, H = np.zeros(d), np.zeros((d, d))
    if order >= 1:
        K.full_loglik_grad(data, beta_star, g, True, 0, data.X.shape[0])
    if order >= 2:
        K.full_hessian(data, beta_star, H, 0, data.X.shape[0])
    return RowCache(order, beta_star, aux, g, H)


def work_for(idx):
    """Scratch buffers of the batch kernels, filled with NaN so no stale value can pass."""
    return np.full((3, idx.shape[0]), np.nan)


def proxy_sizes(data, rows, betas, idx=None):
    """Per row: (size of all the linear predictors' terms, |f'*|, |f''*|, f_parts at eta*) for
    the points ``betas`` around rows.beta_star; the proxies' terms are bounded by these."""
    star = rows.beta_star
    e_all = eta_parts(data, star, idx) + sum(eta_parts(data, b, idx) + eta_parts(data, b - star, idx)
                                             for b in betas)
    y = R.rows_of(data.y, idx)
    eta_star = R.linear_predictor(data, star, idx)
    f1s = f1_parts(data.family, eta_star, y, NOISE_SD) if rows.order >= 1 else 0.0
    f2s = f2_parts(data.family, eta_star, NOISE_SD) if rows.order >= 2 else 0.0
    return e_all, f1s, f2s, f_parts(data.family, eta_star, y, NOISE_SD)


def residual_scale(data, rows, b1, b0, idx=None):
    """Per row, the size of the terms of D_i - [q_i(b') - q_i(b)] and of the rounding of the
    linear predictors they are computed from."""
    y = R.rows_of(data.y, idx)
    e1, e0 = R.linear_predictor(data, b1, idx), R.linear_predictor(data, b0, idx)
    u1 = e1 - R.linear_predictor(data, rows.beta_star, idx)
    u0 = e0 - R.linear_predictor(data, rows.beta_star, idx)
    e_all, f1s, f2s, fs = proxy_sizes(data, rows, (b1, b0), idx)
    slopes = (f1_parts(data.family, e1, y, NOISE_SD) + f1_parts(data.family, e0, y, NOISE_SD)
              + f1s + f2s * (np.abs(u1) + np.abs(u0)))
    return (f_parts(data.family, e1, y, NOISE_SD) + f_parts(data.family, e0, y, NOISE_SD)
            + 2.0 * fs + f1s * (np.abs(u1) + np.abs(u0)) + f2s * (u1 * u1 + u0 * u0)
            + slopes * e_all)


def cv_gradient_scale(data, rows, beta, idx=None):
    """Per coefficient, the size of the terms of sum_idx [grad l_i - grad q_i](beta)."""
    y = R.rows_of(data.y, idx)
    eta = R.linear_predictor(data, beta, idx)
    u = eta - R.linear_predictor(data, rows.beta_star, idx)
    e_all, f1s, f2s, _ = proxy_sizes(data, rows, (beta,), idx)
    s = (f1_parts(data.family, eta, y, NOISE_SD) + f1s + f2s * np.abs(u)
         + (f2_parts(data.family, eta, NOISE_SD) + f2s) * e_all)
    return np.abs(R.design(data.X, data.intercept, idx)).T @ s


# --- control variates --------------------------------------------------------------------------


@pytest.mark.parametrize("proxy_order", [0, 1, 2])
def test_batch_residual_diffs(problem, proxy_order):
    data, beta, beta_new, beta_star, idx = problem
    rows = cv_rows(data, beta_star, proxy_order)
    star = rows.beta_star
    out = np.full(idx.shape[0], np.nan)
    E.batch_residual_diffs(data, rows, beta_new - star, beta - star, idx, out, work_for(idx))
    want = MR.batch_residual_diffs(data, rows, beta_new - star, beta - star, idx)
    assert_ulps_close(out, want, ulps=CV_ULPS, scale=residual_scale(data, rows, beta_new, beta, idx))


@pytest.mark.parametrize("proxy_order", [0, 1, 2])
def test_cv_gradient_rows(problem, proxy_order):
    data, beta, _, beta_star, idx = problem
    rows = cv_rows(data, beta_star, proxy_order)
    out = np.full(beta.shape[0], np.nan)
    E.cv_gradient_rows(data, rows, beta - rows.beta_star, idx, out, work_for(idx))
    want = MR.cv_gradient_rows(data, rows, beta - rows.beta_star, idx)
    assert_ulps_close(out, want, ulps=CV_ULPS + idx.shape[0] - 1,
                      scale=cv_gradient_scale(data, rows, beta, idx))


@pytest.mark.parametrize("proxy_order", [1, 2])
def test_proxy_sums_equal_row_sums_of_proxies(problem, proxy_order):
    # The kernels' closed forms in g*, H* (sums of N rows, then d-term products) against the
    # row-by-row sums of the references: N + d terms in another order.
    data, beta, beta_new, beta_star, _ = problem
    rows = cv_rows(data, beta_star, proxy_order)
    d = beta.shape[0]
    got = E.proxy_loglik_diff_sum(rows, beta_new, beta)
    want = MR.proxy_loglik_diff_sum(rows, beta_new, beta, data)
    assert_ulps_close(got, want, ulps=CV_ULPS + N_ROWS + 2 * d,
                      scale=residual_scale(data, rows, beta_new, beta).sum())
    out = np.full(d, np.nan)
    E.proxy_gradient_sum(rows, beta, out)
    assert_ulps_close(out, MR.proxy_gradient_sum(rows, beta, data), ulps=CV_ULPS + N_ROWS + d,
                      scale=cv_gradient_scale(data, rows, beta))


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("intercept", [0, 1])
def test_second_order_cv_is_exact_for_linear_family(dtype, intercept):
    data, beta, beta_new, beta_star, idx = make_problem(K.LINEAR, dtype, intercept, True)
    rows = cv_rows(data, beta_star, 2)
    diffs = np.full(idx.shape[0], np.nan)
    E.batch_residual_diffs(data, rows, beta_new - beta_star, beta - beta_star, idx, diffs,
                           work_for(idx))
    assert_ulps_close(diffs, 0.0, ulps=CV_ULPS,
                      scale=residual_scale(data, rows, beta_new, beta, idx))
    # so the estimate of sum_i D_i is the proxy sum alone, and it is exact
    full_diff = (K.full_loglik(data, beta_new, False, 0, N_ROWS)
                 - K.full_loglik(data, beta, False, 0, N_ROWS))
    assert_ulps_close(E.proxy_loglik_diff_sum(rows, beta_new, beta), full_diff,
                      ulps=CV_ULPS + N_ROWS + 2 * beta.shape[0],
                      scale=residual_scale(data, rows, beta_new, beta).sum())
    # CV gradient = sum_i grad q_i(beta) + (N/n) sum_{idx} [grad l_i - grad q_i] = full gradient
    proxy, batch, full = (np.empty(beta.shape[0]) for _ in range(3))
    E.proxy_gradient_sum(rows, beta, proxy)
    E.cv_gradient_rows(data, rows, beta - beta_star, idx, batch, work_for(idx))
    K.full_loglik_grad(data, beta, full, True, 0, N_ROWS)
    scale = (cv_gradient_scale(data, rows, beta)
             + N_ROWS / idx.shape[0] * cv_gradient_scale(data, rows, beta, idx))
    assert_ulps_close(proxy + N_ROWS / idx.shape[0] * batch, full,
                      ulps=CV_ULPS + N_ROWS + idx.shape[0] + 2, scale=scale)


@pytest.mark.parametrize("family", FAMILIES.values(), ids=FAMILIES.keys())
def test_cv_gradient_is_unbiased_over_all_batches(family):
    # Averaged over every batch of size 2 from a tiny population, the CV gradient is the full
    # gradient (exact identity, any cv order; Baker et al. 2019). Both sides are references:
    # 15 estimates, each a sum of 6 + 2 rows, averaged: 24 ulps of the terms' size.
    g = np.random.default_rng(3)
    X = g.normal(0.0, 0.6, size=(6, 2))
    y = {K.LINEAR: g.normal(size=6), K.LOGISTIC: np.array([0, 1, 1, 0, 1, 0.0]),
         K.POISSON: np.array([0, 2, 1, 4, 1, 0.0])}[family]
    data = K.GLMData(family, X, y, np.zeros(6), NOISE_SD, 1)
    beta, beta_star = np.array([0.1, -0.3, 0.5]), np.array([0.0, -0.2, 0.3])
    prior = K.PriorArrays(np.zeros(3), np.zeros((3, 3)))  # a flat prior adds nothing
    full = R.full_loglik_grad(data, beta)[1]
    for order in (1, 2):
        rows = RowCache(order, beta_star, None, None, None)
        est = [MR.batch_gradient(data, prior, rows, beta, list(s))
               for s in itertools.combinations(range(6), 2)]
        scale = cv_gradient_scale(data, rows, beta) * (1 + 6 / 2)
        assert_ulps_close(np.mean(est, axis=0), full, ulps=24, scale=scale)


# --- prior -------------------------------------------------------------------------------------


def test_prior_kernels(rng):
    d = 4
    a = rng.normal(size=(d, d))
    prec = a @ a.T + d * np.eye(d)
    mean, b0, b1 = rng.normal(size=d), rng.normal(size=d), rng.normal(size=d)
    prior = K.PriorArrays(mean, prec)
    got = E.prior_logpdf_diff(prior, b1, b0)
    # Kernel -1/2 (b'-b)'P(b'+b-2m) and reference -1/2 [(b'-m)'P(b'-m) - (b-m)'P(b-m)]: sums
    # of d^2 products of terms of these sizes, in other orders: d^2 + 4 ulps.
    r1, r0 = np.abs(b1 - mean), np.abs(b0 - mean)
    scale = 0.5 * (r1 @ np.abs(prec) @ r1 + r0 @ np.abs(prec) @ r0
                   + np.abs(b1 - b0) @ np.abs(prec) @ (np.abs(b1) + np.abs(b0) + 2 * np.abs(mean)))
    assert_ulps_close(got, MR.prior_logpdf_diff(prior, b1, b0), ulps=d * d + 4, scale=scale)
    # reference: scipy.stats.multivariate_normal log density difference. SciPy goes through an
    # eigendecomposition of the covariance (backward stable: error about d cond(P) u relative
    # to the quadratic forms; cond(P) is below 10 here), and its normalising constants cancel.
    mvn = stats.multivariate_normal(mean, np.linalg.inv(prec))
    cond = np.linalg.cond(prec)
    assert cond < 10
    assert_ulps_close(got, mvn.logpdf(b1) - mvn.logpdf(b0), ulps=d * d + 4 + 2 * d * cond,
                      scale=scale + abs(mvn.logpdf(b1)) + abs(mvn.logpdf(b0)))
    out = np.full(d, 2.0)
    E.add_prior_grad(prior, b0, out)
    # 2 - sum_b P_ab (b_b - m_b): d + 1 terms
    assert_ulps_close(out, MR.add_prior_grad(prior, b0, np.full(d, 2.0)), ulps=d + 2,
                      scale=2.0 + np.abs(prec) @ (np.abs(b0) + np.abs(mean)))


# --- scaled sum and variance -------------------------------------------------------------------


def moment_scales(values, n_rows):
    """Sizes of the terms of (N mean, variance, skewness, kurtosis): with c_k = v_k - mean and
    a_k = |v_k| + |mean| (the size a centred value is formed from), the estimates' terms are
    bounded by the same sums over a_k."""
    v = np.asarray(values, dtype=float)
    n = v.size
    a = np.abs(v) + np.abs(v.mean())
    m2 = np.mean((v - v.mean()) ** 2)
    return (n_rows * np.mean(np.abs(v)),
            n_rows**2 * (1 - n / n_rows) * np.sum(a**2) / (n - 1) / n,
            np.mean(a**3) / m2**1.5,
            np.mean(a**4) / m2**2 + 3.0)


def test_scaled_sum_and_variance_matches_reference_and_scipy(rng):
    # Sums of n = 37 terms in another order (n ulps), and a few operations on them: the k-th
    # moment adds k roundings per term and its ratio a few more. Relative to moment_scales.
    values = rng.gamma(2.0, 1.5, size=37)
    n_rows = 1000
    n = values.size
    got = E.scaled_sum_and_variance(values, n_rows)
    ulps = (n + 2, n + 6, n + 10, n + 12)
    scales = moment_scales(values, n_rows)
    want = MR.scaled_sum_and_variance(values, n_rows)
    # reference: numpy var (ddof=1) and scipy.stats skew / kurtosis (bias=True, Fisher)
    external = (n_rows * values.mean(), n_rows**2 * (1 - n / n_rows) * values.var(ddof=1) / n,
                stats.skew(values, bias=True), stats.kurtosis(values, fisher=True, bias=True))
    for k in range(4):
        assert_ulps_close(got[k], want[k], ulps=ulps[k], scale=scales[k])
        assert_ulps_close(got[k], external[k], ulps=ulps[k], scale=scales[k])


def test_scaled_variance_is_unbiased_over_all_subsets():
    # Cochran (Sampling Techniques, ch. 2): over all n-subsets of a finite population the mean of
    # N^2 (1 - n/N) s^2 / n equals the variance of N * (batch mean). Exact enumeration; 56
    # subsets: each estimate within n + 6 ulps of its scale, their mean 56 more.
    pop = np.array([0.3, -1.2, 2.5, 0.0, 4.1, -0.7, 1.9, 3.3])
    n_rows, n = pop.size, 3
    subsets = [pop[list(s)] for s in itertools.combinations(range(n_rows), n)]
    res = [E.scaled_sum_and_variance(s, n_rows) for s in subsets]
    est = np.array([r[0] for r in res])
    var = np.array([r[1] for r in res])
    size = n_rows * np.abs(pop).max()  # bounds every |estimate| and every term's size
    assert_ulps_close(est.mean(), pop.sum(), ulps=n + 2 + len(subsets), scale=size)
    # est.var(): squares of differences of estimates, each within (n + 2) u size
    assert_ulps_close(var.mean(), est.var(), ulps=4 * (n + 6 + len(subsets)), scale=4 * size**2)


def test_scaled_sum_and_variance_edge_cases():
    # n = N: no sampling error; one value: no variance estimate; equal values: shape 0.
    values = np.array([1.0, 2.0, 4.0])
    est, var, _, _ = E.scaled_sum_and_variance(values, 3)
    assert est == 7.0 and var == 0.0
    assert E.scaled_sum_and_variance(np.array([2.5]), 10) == (25.0, 0.0, 0.0, 0.0)
    assert E.scaled_sum_and_variance(np.full(8, 0.5), 100) == (50.0, 0.0, 0.0, 0.0)
    assert MR.scaled_sum_and_variance(np.full(8, 0.5), 100) == (50.0, 0.0, 0.0, 0.0)


# --- steps of the transition loop --------------------------------------------------------------


def spd(rng, d):
    a = rng.normal(size=(d, d))
    return a @ a.T + d * np.eye(d)


def mass_matrices(rng, d):
    mass = spd(rng, d)
    mass_inv = np.linalg.inv(mass)
    mass_inv = 0.5 * (mass_inv + mass_inv.T)
    return MassMatrix(mass, mass_inv, np.linalg.cholesky(mass_inv))


@pytest.mark.parametrize("proxy_order", [0, 1, 2])
def test_batch_gradient(problem, proxy_order, rng):
    data, beta, _, beta_star, idx = problem
    rows = cv_rows(data, beta_star, proxy_order)
    d = beta.shape[0]
    prior = K.PriorArrays(rng.normal(size=d), spd(rng, d))
    out = np.full(d, np.nan)
    T._batch_gradient(data, prior, rows, beta, beta - rows.beta_star, idx, np.empty(d),
                      np.empty((3, idx.shape[0])), out)
    # the proxy sum (N rows and d products), N/n times the batch sum, and the prior's d terms
    scale = (cv_gradient_scale(data, rows, beta)
             + N_ROWS / idx.shape[0] * cv_gradient_scale(data, rows, beta, idx)
             + np.abs(prior.precision) @ (np.abs(beta) + np.abs(prior.mean)))
    assert_ulps_close(out, MR.batch_gradient(data, prior, rows, beta, idx),
                      ulps=CV_ULPS + N_ROWS + idx.shape[0] + 2 * d, scale=scale)


def test_langevin_log_density(rng):
    # z = b' - b - (h/2) M^-1 g (d + 2 terms), then -z'Mz / 2h (d^2 terms): relative to the
    # same sums over absolute values, d + 2 + d^2 + 2 ulps.
    d = 5
    mass = mass_matrices(rng, d)
    z = np.empty(d)
    for _ in range(20):
        to, frm, g = rng.normal(size=d), rng.normal(size=d), rng.normal(size=(d,)) * 3
        h = float(rng.uniform(0.05, 2.0))
        got = T._langevin_log_density(to, frm, g, h, mass, z)
        zs = np.abs(to) + np.abs(frm) + 0.5 * h * np.abs(mass.mass_inv) @ np.abs(g)
        assert_ulps_close(got, MR.langevin_log_density(to, frm, g, h, mass),
                          ulps=d * d + d + 4, scale=0.5 * zs @ np.abs(mass.mass) @ zs / h)


@pytest.mark.parametrize("langevin", [False, True], ids=["random-walk", "langevin"])
def test_propose(langevin, rng):
    d, h = 4, 0.37
    mass = mass_matrices(rng, d)
    beta, grad = rng.normal(size=d), rng.normal(size=d) * 5
    xi, prop = np.full(d, np.nan), np.full(d, np.nan)
    T._propose(mass, langevin, beta, grad, h, np.random.default_rng(4), xi, prop)
    # xi comes from the generator; the reference takes the kernel's draws
    assert np.all(np.isfinite(xi)) and np.ptp(xi) > 0
    want = MR.propose(mass, beta, h, xi, grad if langevin else None)
    # beta + sqrt(h) L xi + (h/2) M^-1 g: 2d + 2 terms, 2 more roundings for the factors
    scale = (np.abs(beta) + math.sqrt(h) * np.abs(mass.mass_inv_chol) @ np.abs(xi)
             + (0.5 * h * np.abs(mass.mass_inv) @ np.abs(grad) if langevin else 0.0))
    assert_ulps_close(prop, want, ulps=2 * d + 4, scale=scale)


@pytest.mark.parametrize("noise_sd_cap", [0.0, 1.5])
def test_adapt_step_size(noise_sd_cap, rng):
    # Dual averaging from random states, one update each, including the last warmup iteration
    # (where the step freezes at the average). The kernel's erfc(s / 2 sqrt 2) and the
    # reference's 2 Phi(-s/2) (scipy.special.ndtr) are within a few ulps; each update adds two
    # or three terms: 16 ulps of the terms' size (log_h = mu - sqrt(m)/gamma err loses what
    # the cancellation of its two terms loses).
    tuning = T.Tuning(True, 50, 0.574, noise_sd_cap)
    for it in list(range(5)) + [49]:
        adapt = np.array([rng.normal(), rng.normal(), rng.normal() * 0.1, rng.normal(),
                          float(it)])
        log_alpha = -abs(rng.normal())
        sd = float(rng.choice([0.3, 2.5, np.nan]))
        want = MR.adapt_step_size(tuning, adapt, it, math.exp(log_alpha), sd)
        got = adapt.copy()
        T._adapt_step_size(tuning, 0, got, it, log_alpha, sd)
        m = adapt[4] + 1.0
        err_size = abs(adapt[2]) + 2.0
        log_h_size = abs(adapt[3]) + math.sqrt(m) / MR.DA_GAMMA * err_size
        scale = np.array([log_h_size + abs(adapt[1]), log_h_size + abs(adapt[1]), err_size,
                          abs(adapt[3]), m])
        assert_ulps_close(got, want, ulps=16, scale=scale)
