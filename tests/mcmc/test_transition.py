"""The transition loop ``_transition.run_chain`` against its NumPy reference ``_reference.run_chain``.

The reference strings together the step references (tested one by one in test_estimators.py)
one iteration at a time, drawing from a generator with the same seed in the kernel's order, so
both follow the same path: every method's codes, with and without control variates, every
noise-variance source, the carried gradient batch, the proxy drift (the kernel's whitened
recursion against the reference's drift, proposal density and proxy sums computed row by row
from their definitions), and step-size adaptation in warmup. Checked:

* the decisions and counts exactly: accepted, non-finite, rows read, batch size, beyond the
  Ceperley-Dewing bound (a rounding-level difference never flips an accept decision here:
  that would need log u within about 1e-12 of log alpha);
* the draws, the step size and the continuous statistics in units of machine epsilon. Each
  iteration computes the proposal from a gradient estimate that is a sum of up to N + n + 2d
  terms (glm_problems: per-row budget ROW_ULPS, one ulp per added term, relative to the size
  of the terms), so a draw differs by at most STEP_ULPS of the sizes involved in one iteration;
  the chain carries these differences along without amplifying them (each step adds its own),
  so after k iterations the budget is k x STEP_ULPS. Step-size adaptation feeds the difference
  in the acceptance probability into log h through sqrt(m)/gamma times a running weight
  w_j = 1/(j + 10) (Hoffman & Gelman 2014, section 3.2.1): at most sqrt(k)/(0.05 * 10) = 2 sqrt(k)
  per iteration, so with adaptation the budget is multiplied by 2 sqrt(k) per iteration summed,
  i.e. by ADAPT_FACTOR.
"""

import math

import numpy as np
import pytest

import tallchain as tc
from glm_problems import ROW_ULPS, loglik_scale
from tallchain.mcmc import _acceptance_kernels as A
from tallchain.mcmc import _reference as MR
from tallchain.mcmc import _transition as T
from tallchain.mcmc._proxy_drift import proxy_coordinates
from tallchain.posterior import (control_variate_cache, find_mode, make_preconditioner,
                                 proxy_preconditioner)
from ulps import assert_ulps_close

N, N_BATCH, N_ITER, N_WARMUP = 300, 24, 40, 20
D = 3
STEP_ULPS = ROW_ULPS + N + N_BATCH + 2 * D
ADAPT_FACTOR = sum(2.0 * math.sqrt(k + 1) for k in range(N_WARMUP))


@pytest.fixture(scope="module")
def setup():
    rng = np.random.default_rng(17)
    X = rng.standard_normal((N, D - 1))
    y = (rng.random(N) < 1 / (1 + np.exp(-(0.3 + X @ [0.9, -0.6])))).astype(float)
    model = tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=4.0))
    laplace = find_mode(model)
    pre = make_preconditioner("laplace", model.n_coef, laplace)
    caches = {k: control_variate_cache(model, laplace.mode if k else None, k) for k in (0, 1, 2)}
    return model, laplace, pre, caches


R_, L_, LNC = T.PROPOSAL_RW, T.PROPOSAL_LANGEVIN, T.PROPOSAL_LANGEVIN_NO_C
F_, B_, C_, P_ = T.FULL, T.BATCH, T.CARRIED, T.PROXY
METHODS = {
    "mala": ((L_, F_, F_, A.EXACT, T.VAR_SAME), 0, 0.5),
    "rwm": ((R_, F_, F_, A.EXACT, T.VAR_SAME), 0, 0.8),
    "mala-without-c": ((LNC, F_, F_, A.EXACT, T.VAR_SAME), 0, 0.5),
    "naive-mh": ((R_, F_, B_, A.PLUGIN, T.VAR_SAME), 1, 0.8),
    "penalty-rwm": ((R_, F_, B_, A.PENALTY_CD, T.VAR_SAME), 0, 0.3),
    "penalty-mala": ((L_, B_, B_, A.PENALTY_CD, T.VAR_SAME), 2, 0.5),
    "penalty-mala-independent": ((L_, B_, B_, A.PENALTY_CD, T.VAR_INDEPENDENT), 1, 0.5),
    "penalty-mala-pooled": ((L_, B_, B_, A.PENALTY, T.VAR_POOLED), 0, 0.2),
    "penalty-mala-carried": ((L_, C_, B_, A.PENALTY_CD, T.VAR_SAME), 2, 0.5),
    "penalty-mala-proxy": ((L_, P_, B_, A.PENALTY_CD, T.VAR_SAME), 2, 0.5),
    "sgld": ((L_, B_, F_, A.NONE, T.VAR_SAME), 2, 0.05),
}


def run_both(setup, method, adapt):
    model, laplace, pre, caches = setup
    code_tuple, order, h = METHODS[method]
    codes = T.MethodCodes(*code_tuple)
    data, prior, rows, mass = (model.glm_data, model.prior_arrays, caches[order].rows,
                               pre.matrices)
    if codes.gradient == T.PROXY:
        pre = proxy_preconditioner(rows, prior)
        mass = pre.matrices
    noise_cap = 1.5 if codes.rule in (A.PENALTY, A.PENALTY_CD) else 0.0
    tuning = T.Tuning(adapt, N_WARMUP, 0.574, noise_cap)
    start = laplace.mode + 0.3 * np.sqrt(np.diag(laplace.cov))
    state = T.ChainArrays(start.copy(), np.zeros(D), np.zeros(1), np.zeros(T.N_ADAPT),
                          np.zeros(2))
    state.adapt[T.AD_LOG_H] = math.log(h)
    state.adapt[T.AD_MU] = math.log(10 * h)
    rng = np.random.default_rng(99)
    if codes.rule != A.NONE and codes.ratio == T.FULL:
        T.init_full_state(data, prior, state)
    if codes.gradient == T.CARRIED:
        T.init_carried_gradient(data, prior, rows, state, rng, N_BATCH)
    if codes.gradient == T.PROXY:
        state.cur_grad[:] = proxy_coordinates(pre, state.beta)
    chain = {"beta": state.beta.copy(), "cur_grad": state.cur_grad.copy(),
             "cur_loglik": float(state.cur_loglik[0]), "adapt": state.adapt.copy(),
             "pooled": state.pooled.copy(), "n_batch": N_BATCH}
    ref_rng = np.random.default_rng()
    ref_rng.bit_generator.state = rng.bit_generator.state
    draws, stats = np.zeros((N_ITER, D)), np.full((N_ITER, T.N_STATS), np.nan)
    # in two calls, as the driver cuts a run into chunks
    T.run_chain(data, prior, rows, mass, codes, tuning, state, rng, N_BATCH, 0, draws[:13],
                stats[:13])
    T.run_chain(data, prior, rows, mass, codes, tuning, state, rng, N_BATCH, 13, draws[13:],
                stats[13:])
    ref_draws, ref_stats = MR.run_chain(data, prior, rows, mass, codes, tuning, chain, ref_rng,
                                        0, N_ITER)
    return model, draws, stats, ref_draws, ref_stats


def check_same_path(model, draws, stats, ref_draws, ref_stats, factor):
    exact = [T.ST_ACCEPTED, T.ST_NONFINITE, T.ST_ROWS_READ, T.ST_BATCH_SIZE,
             T.ST_PENALTY_BEYOND_BOUND]
    np.testing.assert_array_equal(stats[:, exact], ref_stats[:, exact])
    ulps = N_ITER * STEP_ULPS * factor
    # sizes: the coefficients (at least 1), and the log ratio's sums of N per-row terms, of at
    # most twice the largest row size at the draws (the proposals lie within a step of them)
    assert_ulps_close(draws, ref_draws, ulps=ulps, scale=np.maximum(np.abs(ref_draws), 1.0))
    row = max(loglik_scale(model.glm_data, b).max() for b in ref_draws)
    lr_size = 2.0 * N * row
    for col, size in ((T.ST_STEP_SIZE, None), (T.ST_ACCEPTANCE_PROBABILITY, lr_size),
                      (T.ST_LOG_RATIO, lr_size), (T.ST_LOG_RATIO_SD, lr_size)):
        assert_ulps_close(stats[:, col], ref_stats[:, col], ulps=ulps, scale=size,
                          err_msg=T.STAT_NAMES[col])
    for col in (T.ST_SKEW, T.ST_KURT):  # their values: test_estimators.py
        np.testing.assert_array_equal(np.isnan(stats[:, col]), np.isnan(ref_stats[:, col]))


@pytest.mark.parametrize("method", METHODS)
def test_run_chain_follows_the_reference_at_a_fixed_step(setup, method):
    model, draws, stats, ref_draws, ref_stats = run_both(setup, method, adapt=False)
    assert 0 < stats[:, T.ST_ACCEPTED].sum() and np.ptp(draws[:, 0]) > 0
    check_same_path(model, draws, stats, ref_draws, ref_stats, 1.0)


@pytest.mark.parametrize("method", ["mala", "penalty-mala", "penalty-rwm", "sgld",
                                    "penalty-mala-proxy"])
def test_run_chain_follows_the_reference_while_tuning_the_step(setup, method):
    model, draws, stats, ref_draws, ref_stats = run_both(setup, method, adapt=True)
    steps = stats[:, T.ST_STEP_SIZE]
    if method != "sgld":
        assert np.ptp(steps[:N_WARMUP]) > 0  # tuned in warmup
    assert np.ptp(steps[N_WARMUP:]) == 0  # frozen after
    check_same_path(model, draws, stats, ref_draws, ref_stats, ADAPT_FACTOR)
