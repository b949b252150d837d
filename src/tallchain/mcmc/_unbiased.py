"""`estimate`: unbiased estimates of posterior means and sds from coupled chains (private).

A tuned warmup run (`sample`) fixes the step size and batch size; then R independent pairs of
coupled chains at lag L (`_coupled_loop`) each give H_{k:m}, an unbiased estimate of the
posterior mean of theta and of theta^2; their average, its standard error and a t interval
come from the R replicates. The pairs run on the local pool or on Dask (`executors.run_tasks`),
each with its own child of the seed, so the results do not depend on where they ran.
"""

import math
import time
import warnings
from dataclasses import replace

import numpy as np

from .._validation import check_flag, fail, is_integer, positive_int
from ..exceptions import ConvergenceWarning, NoisyLogRatioWarning
from ..executors import check_scheduler, check_workers, run_tasks, worker_count
from ..models import check_model
from . import _coupled_loop as _pair
from . import _transition as _chain
from ._driver import ChainJob
from ._estimate_result import EstimateResult, summarize_replicates
from ._sampling import sample
from ._settings import settings_from
from ._setup import prepare, set_up, spawn_seeds

# Methods that target the posterior and have a coupled loop (and the power checks' variant).
COUPLED_METHODS = ("mala", "rwm", "penalty-mala", "penalty-rwm")
_BROKEN = ("_mala-without-proposal-term", "_penalty-mala-without-proposal-term")
# The tuning run's defaults, where estimate() is given no SamplerSettings: only its warmup is
# used (the step and batch size it ends with).
_TUNING_DEFAULTS = {"chains": 2, "warmup": 500, "draws": 100}
# Pilot pairs run to their meeting only, to choose k and m.
PILOT_PAIRS = 20
# k = this quantile of the pilot's meeting times, m = M_PER_K * k (Jacob, O'Leary & Atchade
# 2020, section 3.1, suggest k a large quantile of tau and m a multiple of k; from memory).
K_QUANTILE = 0.99
M_PER_K = 10
# Starting law of both chains: N(mode, (INIT_WIDTH^2) Sigma_Laplace).
INIT_WIDTH = 2.0


def check_estimate_arguments(replicates, lag, span, max_iterations, level):
    """estimate()'s own arguments checked and standardised (InputError naming the first bad
    one); also used by the CLI before it reads the data."""
    replicates = positive_int("replicates", replicates, minimum=2)
    lag = positive_int("lag", lag, minimum=1)
    max_iterations = positive_int("max_iterations", max_iterations, minimum=2)
    if span is not None:
        if (not isinstance(span, (tuple, list)) or len(span) != 2
                or not all(is_integer(v) for v in span) or not 0 <= span[0] <= span[1]):
            fail("span", f"must be a pair of integers (k, m) with 0 <= k <= m, got {span!r}",
                 "give k <= m, e.g. 100 and 1000, or leave it out to choose k and m from a "
                 "pilot")
        span = (int(span[0]), int(span[1]))
        if span[1] > max_iterations:
            fail("span", f"ends at m = {span[1]}, beyond max_iterations = {max_iterations}",
                 "raise max_iterations or lower m")
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0 < level < 1:
        fail("level", f"must be a number in (0, 1), got {level!r}", "give e.g. 0.95")
    return replicates, lag, span, max_iterations, float(level)


def check_coupled_settings(settings):
    """Refuse the settings that have no coupled version (InputError)."""
    method = settings.method
    if method not in COUPLED_METHODS + _BROKEN:
        fail("method", f"{method} has no coupled version (it does not target the posterior "
             "exactly)", f"choose one of {', '.join(COUPLED_METHODS)}")
    if settings.gradient_batch == "carried":
        fail("gradient_batch", '"carried" is not coupled (the batch would be part of the '
             "state)", 'use gradient_batch="fresh"')
    if settings.log_ratio_variance != "same-batch":
        fail("log_ratio_variance", f'"{settings.log_ratio_variance}" is not coupled',
             'use log_ratio_variance="same-batch"')


def run_one_pair(shared, seed, span, *, keep_met=False, n_trace=0):
    """One pair from its seed: (H (2, n_coef), counts OUT_* (int64), trace (2, n_trace,
    n_coef)); ``shared`` is what `coupled_setup` returns, ``span`` is (k, m).

    Both starting points are drawn from the pair's stream: N(mode, INIT_WIDTH^2 Sigma) with
    the Laplace approximation's mode and covariance (the same law for both chains)."""
    job, plan, start_mean, start_chol = shared
    plan = plan._replace(k=span[0], m=span[1], keep_met=keep_met)
    rng = np.random.Generator(np.random.PCG64(seed))
    d = start_mean.shape[0]
    starts = start_mean + INIT_WIDTH * rng.standard_normal((2, d)) @ start_chol.T
    states = [_chain.ChainArrays(starts[c].copy(), np.zeros(d), np.zeros(1),
                                 np.zeros(_chain.N_ADAPT), np.zeros(2)) for c in range(2)]
    data, prior = job.model.glm_data, job.model.prior_arrays
    if job.codes.ratio == _chain.FULL:
        for st in states:
            _chain.init_full_state(data, prior, st)
    sums = np.zeros((2, d))
    out = np.zeros(_pair.N_OUT, dtype=np.int64)
    trace = _pair.new_trace(n_trace, d)
    _pair.run_pair(data, prior, job.cache.rows, job.pre.matrices, job.codes, plan, *states,
                   rng, sums, out, trace)
    return sums, out, trace


def _pair_task(shared, task):
    """One pair of `estimate`: (H, counts) from (seed, (k, m))."""
    sums, out, _ = run_one_pair(shared, *task)
    return sums, out


def coupled_setup(model, settings, preparation=None):
    """What every pair of a run shares, ``(job, plan, mode, chol of the Laplace covariance)``,
    after a tuned warmup run of ``settings`` (checked) has fixed the step and batch size
    (``plan.h``, ``plan.n_batch``); ``plan``'s lag, k, m and stop rule are set by the caller."""
    prep = preparation or prepare(model, proxy_orders=(settings.proxy_order_used,))
    h, n_batch = _tuned(model, settings, prep)
    setup = set_up(model, settings, prep, np.random.default_rng(0))
    job = ChainJob(model, settings, setup.cache, setup.preconditioner, setup.gradient_batch)
    plan = _pair.Plan(h, n_batch, 1, 0, 0, 1, False)
    lap = prep.laplace
    return job, plan, lap.mode, np.linalg.cholesky(lap.cov)


def _tuned(model, settings, preparation):
    """(step size, batch size) at the end of a tuned warmup run of ``settings``: the median
    of the chains' tuned steps, and the batch size warmup chose (1 for full-data methods).

    The run's advice on its log-ratio noise stays (the pairs use the same step and batch);
    what it says about its own few draws (ESS, R-hat) does not concern the pairs."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        warnings.simplefilter("default", NoisyLogRatioWarning)
        run = sample(model, settings, preparation=preparation, parallel=False)
    h = float(np.median(run.tuned["step_size"]))
    n_batch = int(run.tuned["batch_size"] or 1)
    return h, n_batch


def estimate(model, settings=None, *, replicates=20, lag=1, span=None, max_iterations=100_000,
             level=0.95, scheduler="processes", workers=None, progress=False, **options):
    """Unbiased estimates of posterior means and sds from R independent coupled pairs.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    settings : SamplerSettings, optional
        The tuning run's settings (method, warmup, seed, ...); its warmup fixes the step size
        and batch size of the pairs. Default: ``SamplerSettings(chains=2, warmup=500,
        draws=100)`` with the keyword options below.
    replicates : int, default=20
        R, independent pairs (>= 2); standard errors and intervals come from their spread.
    lag : int, default=1
        L: chain X runs L steps ahead of Y; a larger lag sharpens the bound on the distance
        to the posterior.
    span : (int, int), optional
        (k, m), the iterations the estimator averages. Default: k the 0.99 quantile of the
        meeting times of 20 pilot pairs, m = 10 k.
    max_iterations : int, default=100000
        The stop rule: a pair that has not met by then is counted as unmet, and left out.
    level : float, default=0.95
        Probability of the intervals (Student t with R - 1 degrees of freedom).
    scheduler : str or distributed.Client, default="processes"
        Where the pairs run: see `tallchain.executors`.
    workers : int, optional
        Worker processes (default: the number of cores, at most ``replicates``).
    progress : bool, default=False
        Show a progress line as the pairs finish.
    **options
        Settings of `tallchain.SamplerSettings` (``method`` one of mala, rwm, penalty-mala,
        penalty-rwm; ``seed``; ...).

    Returns
    -------
    EstimateResult

    Raises
    ------
    InputError
        A bad argument or setting, refused before the mode is found; or pilot pairs that do
        not meet within ``max_iterations`` (no k can be chosen).

    Warns
    -----
    ConvergenceWarning
        Some pairs did not meet within ``max_iterations`` (the estimate leaves them out, so it
        is no longer unbiased).

    References
    ----------
    Jacob, O'Leary & Atchade (2020), JRSS-B 82, 543 (unbiased MCMC with couplings).
    Biswas, Jacob & Vanetti (2019), NeurIPS (lag L; the bound on the total variation).
    Bou-Rabee, Eberle & Zimmer (2020), Ann. Appl. Probab. 30, 1209 (reflection coupling).
    """
    t0 = time.perf_counter()
    check_model(model)
    replicates, lag, span, max_iterations, level = check_estimate_arguments(
        replicates, lag, span, max_iterations, level)
    check_scheduler(scheduler)
    check_workers(workers)
    check_flag("progress", progress)
    settings = settings_from(settings, options, owner="estimate()",
                             defaults=_TUNING_DEFAULTS).check_against(model)
    check_coupled_settings(settings)

    tune_seed, pair_root = spawn_seeds(settings.seed, 2)
    job, plan, mode, chol = coupled_setup(model, replace(settings, seed=tune_seed))
    plan = plan._replace(lag=lag, max_iterations=max_iterations)
    shared = (job, plan, mode, chol)
    h, n_batch = plan.h, plan.n_batch
    seeds = (pair_root.spawn(PILOT_PAIRS + replicates)
             if isinstance(pair_root, np.random.SeedSequence)
             else [s.bit_generator.seed_seq for s in pair_root.spawn(PILOT_PAIRS + replicates)])
    run = {"scheduler": scheduler, "workers": worker_count(workers, replicates)}
    pilot_tau = None
    if span is None:
        pilot = run_tasks(_pair_task, shared, [(s, (0, 0)) for s in seeds[:PILOT_PAIRS]],
                          **run, progress="pilot pairs" if progress else None)
        pilot_tau = np.array([out[_pair.OUT_TAU] for _, out in pilot])
        span = _span_from_pilot(pilot_tau, max_iterations)
    results = run_tasks(_pair_task, shared, [(s, span) for s in seeds[PILOT_PAIRS:]], **run,
                        progress="coupled pairs" if progress else None)
    res = summarize_replicates(
        [r[0] for r in results], np.array([r[1] for r in results]), coef_names=model.coef_names,
        level=level, lag=lag, span=span, method=settings.method, step_size=h,
        batch_size=n_batch if settings.spec.minibatch else None, pilot_meeting_times=pilot_tau,
        max_iterations=max_iterations)
    res.seconds = time.perf_counter() - t0
    if res.unmet:
        warnings.warn(f"{res.unmet} of {replicates} pairs did not meet within max_iterations = "
                      f"{max_iterations}; the estimates leave them out and are no longer "
                      "unbiased: raise max_iterations", ConvergenceWarning, stacklevel=2)
    return res


def _span_from_pilot(tau, max_iterations):
    """(k, m) from the pilot's meeting times (the rule of K_QUANTILE, M_PER_K)."""
    unmet = int(np.sum(tau < 0))
    if unmet:
        fail("max_iterations", f"{unmet} of {tau.size} pilot pairs did not meet within "
             f"{max_iterations} iterations, so k cannot be chosen", "raise max_iterations, "
             "or give span=(k, m) yourself")
    k = int(math.ceil(np.quantile(tau, K_QUANTILE)))
    m = min(M_PER_K * k, max_iterations)
    return k, m
