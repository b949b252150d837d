"""The public entry point `sample`: validation, set-up, warmup, many chains."""

import math
import time
import warnings
from dataclasses import dataclass

import numpy as np

from .._validation import check_flag, check_seed, fail, is_number, positive_int, positive_number
from ..exceptions import NoisyLogRatioWarning, SamplingInterrupted
from ..executors import check_scheduler, check_workers, worker_count
from ..models import check_model
from ..posterior import (ControlVariateCache, check_mass_matrix, control_variate_cache, find_mode,
                         make_preconditioner)
from . import _acceptance_kernels as _acc
from . import _driver
from ._checkpoint import Checkpoint
from ._runners import Runner, TaskRunner
from ._schedule import Schedule
from . import _transition as _chain
from ._methods import BROKEN_METHODS, METHODS, NOISE_VARIANCE
from ._result import SampleResult

# Default target sd of the minibatch log-ratio for batch_size="auto"; the measurement behind it
# (benchmarks/bench_noise_target.py) is in the README, under "Batch size".
DEFAULT_TARGET_LOG_RATIO_SD = 1.5
DEFAULT_BATCH_FLOOR = 32
DEFAULT_BATCH_CEILING = 100_000
_PILOT_BATCH = 64


@dataclass
class Preparation:
    """What `sample` computes from the full data before it samples, kept for reuse.

    Attributes
    ----------
    laplace : LaplaceApproximation
    caches : dict of int to ControlVariateCache
        Row caches by control-variate order (0: none).
    n_rows, n_coef : int
        Of the model it was made for.
    """

    laplace: object
    caches: dict
    n_rows: int
    n_coef: int

    def check(self, model):
        if (model.n_rows, model.n_coef) != (self.n_rows, self.n_coef):
            fail("preparation", f"was made for {self.n_rows} rows and {self.n_coef} "
                 f"coefficients, not {model.n_rows} and {model.n_coef}",
                 "prepare() the model you sample")


def prepare(model, *, cv_orders=(2, 0)):
    """Find the mode and build the row caches of ``model`` once (O(N d^2)).

    Parameters
    ----------
    model : LinearRegression, LogisticRegression or PoissonRegression
    cv_orders : sequence of int, default=(2, 0)
        Control-variate orders to cache (0 is the cache of runs without control variates).

    Returns
    -------
    Preparation
    """
    laplace = find_mode(model)
    caches = {k: control_variate_cache(model, laplace.mode if k else None, k) for k in cv_orders}
    return Preparation(laplace, caches, model.n_rows, model.n_coef)


def spawn_seeds(seed, n):
    """n independent children of ``seed``: Generators of a Generator, else SeedSequences of
    ``SeedSequence(seed)``. Spawning advances a Generator or SeedSequence, so each caller
    (sample, a sweep, a calibration) spawns once."""
    check_seed(seed)
    if isinstance(seed, np.random.Generator):
        return seed.spawn(n)
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    return root.spawn(n)


def _resolve_seed(seed, n_children):
    return [s if isinstance(s, np.random.Generator) else np.random.Generator(np.random.PCG64(s))
            for s in spawn_seeds(seed, n_children)]


def _check_settings(model, method, step_size, batch_size, chains, draws, warmup, noise_variance,
                    control_variates, cv_order, target_log_ratio_sd, gradient_batch="fresh",
                    batch_floor=DEFAULT_BATCH_FLOOR, batch_ceiling=DEFAULT_BATCH_CEILING):
    if not isinstance(method, str) or (method not in METHODS and method not in BROKEN_METHODS):
        from difflib import get_close_matches

        near = get_close_matches(str(method), METHODS, n=1)
        hint = f'did you mean "{near[0]}"? ' if near else ""
        fail("method", f"unknown method {method!r}", f"{hint}choose one of {', '.join(METHODS)}")
    spec = METHODS.get(method) or BROKEN_METHODS[method]
    if isinstance(step_size, str):
        if step_size != "auto":
            fail("step_size", f"must be a number > 0 or \"auto\", got {step_size!r}",
                 'give a positive number or "auto"')
        if not spec.adjusted:
            fail("step_size", f'"auto" is not available for {method} (it has no accept step to '
                 "tune against)", "give a number, e.g. the step size tuned by penalty-mala")
    elif not is_number(step_size) or not math.isfinite(step_size) or step_size <= 0:
        fail("step_size", f"must be > 0, got {step_size!r}", 'give a positive number or "auto"')
    chains = positive_int("chains", chains)
    draws = positive_int("draws", draws)
    warmup = positive_int("warmup", warmup, minimum=0)
    if step_size == "auto" and warmup < 20:
        fail("warmup", f'is {warmup}, too short to tune step_size="auto"',
             "give warmup >= 20 (a few hundred is usual) or a numeric step_size")
    if spec.minibatch:
        if isinstance(batch_size, str):
            if batch_size != "auto":
                fail("batch_size", f"must be an integer or \"auto\", got {batch_size!r}",
                     'give an integer in [2, N] or "auto"')
            if warmup < 40:
                fail("warmup", f'is {warmup}, too short to choose batch_size="auto"',
                     "give warmup >= 40 or an integer batch_size")
        else:
            if isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)):
                fail("batch_size", f"must be an integer, got {batch_size!r}",
                     'give an integer in [2, N] or "auto"')
            if not 2 <= batch_size <= model.n_rows:
                fail("batch_size", f"must be in [2, {model.n_rows}] (N), got {batch_size}",
                     "give at least 2 rows and at most the number of rows")
        if noise_variance not in NOISE_VARIANCE:
            fail("noise_variance", f"unknown value {noise_variance!r}",
                 f"choose one of {', '.join(NOISE_VARIANCE)}")
    if cv_order not in (1, 2):
        fail("cv_order", f"must be 1 or 2, got {cv_order!r}",
             "use 2 (second-order Taylor proxies) or 1 (first-order)")
    positive_number("target_log_ratio_sd", target_log_ratio_sd,
                    "give a positive number such as 1.0")
    floor = positive_int("batch_floor", batch_floor, minimum=2)
    ceiling = positive_int("batch_ceiling", batch_ceiling, minimum=2)
    if ceiling < floor:
        fail("batch_ceiling", f"is {ceiling}, below batch_floor {floor}",
             "give batch_ceiling >= batch_floor")
    if gradient_batch not in ("fresh", "carried"):
        fail("gradient_batch", f"unknown value {gradient_batch!r}", 'use "fresh" or "carried"')
    if gradient_batch == "carried" and not (spec.gradient == _chain.BATCH and spec.adjusted):
        fail("gradient_batch", f'"carried" applies to penalty-mala, not {method}',
             'use gradient_batch="fresh" or method="penalty-mala"')
    if control_variates is not None and not isinstance(control_variates, (bool, np.bool_)):
        fail("control_variates", f"must be True, False or None, got {control_variates!r}",
             "give a bool (None: on for minibatch methods)")
    cv = bool(spec.minibatch if control_variates is None else control_variates)
    if control_variates and not spec.minibatch:
        warnings.warn(f"control_variates is ignored by the full-data method {method}",
                      UserWarning, stacklevel=3)
        cv = False
    return spec, chains, draws, warmup, cv


def _check_up_front(model, *, method, step_size, batch_size, control_variates, cv_order,
                    chains, draws, warmup, seed, mass_matrix, init, noise_variance,
                    gradient_batch, checkpoint, resume, checkpoint_seconds, preparation,
                    target_log_ratio_sd, batch_floor, batch_ceiling, progress, parallel,
                    scheduler, workers):
    """Every check of `sample` that needs no pass over the data; returns what sample uses."""
    check_model(model)
    check_scheduler(scheduler, threads=True)
    check_workers(workers)
    for name, flag in (("resume", resume), ("progress", progress), ("parallel", parallel)):
        check_flag(name, flag)
    spec, chains, draws, warmup, cv = _check_settings(
        model, method, step_size, batch_size, chains, draws, warmup, noise_variance,
        control_variates, cv_order, target_log_ratio_sd, gradient_batch, batch_floor,
        batch_ceiling)
    check_seed(seed)
    check_mass_matrix(mass_matrix, model.n_coef)
    _given_starts(init, model, chains)
    if resume and checkpoint is None:
        fail("resume", "needs a checkpoint path", "pass checkpoint=<file> (the CLI does this)")
    if not is_number(checkpoint_seconds) or not checkpoint_seconds > 0:
        fail("checkpoint_seconds", f"must be a number > 0, got {checkpoint_seconds!r}",
             "give the seconds between checkpoint writes, e.g. 30")
    if preparation is not None:
        if not isinstance(preparation, Preparation):
            fail("preparation", f"must come from tallchain.mcmc.prepare, got "
                 f"{type(preparation).__name__}", "pass prepare(model), or leave it out")
        preparation.check(model)
    return spec, chains, draws, warmup, cv


def check_sample_settings(model, **settings):
    """Run every check of `sample` on these settings without touching the data.

    For callers that run `sample` later, after costly work of their own (a sweep's reference
    run, a calibration's mode): bad settings are refused first, with sample's messages.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression or PoissonRegression
    **settings
        Keyword arguments of `sample`.

    Raises
    ------
    InputError
        For the first bad setting, or a keyword that `sample` does not take.
    """
    import inspect

    params = inspect.signature(sample).parameters
    for name in settings:
        if name not in params or name == "model":
            from difflib import get_close_matches

            near = get_close_matches(name, params, n=1)
            hint = f'did you mean "{near[0]}"? ' if near else ""
            fail(name, "is not a setting of sample()", f"{hint}see help(tallchain.sample)")
    bound = inspect.signature(sample).bind(model, **settings)
    bound.apply_defaults()
    args = dict(bound.arguments)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # advice belongs to the run, which gives it again
        _check_up_front(args.pop("model"), **args)


def _given_starts(init, model, n_chains):
    """The (n_chains, n_coef) starting points of an array ``init``, None for a named one;
    InputError for anything else (needs no mode)."""
    d = model.n_coef
    if isinstance(init, str) or init is None:
        if init not in ("laplace", "mode", "prior-mean"):
            fail("init", f"unknown value {init!r}",
                 'use "laplace", "mode", "prior-mean" or an array of starting points')
        return None
    start = np.asarray(init, dtype=float)
    if start.shape == (d,):
        start = np.tile(start, (n_chains, 1))
    if start.shape != (n_chains, d) or not np.all(np.isfinite(start)):
        fail("init", f"has shape {start.shape}", f"give ({d},) or ({n_chains}, {d}) finite values")
    return start


def _initial_points(init, model, laplace, n_chains, rng):
    start = _given_starts(init, model, n_chains)
    if start is not None:
        return start
    if init == "laplace":
        # Overdispersed: twice the Laplace standard deviation (common practice for
        # starting points that let R-hat detect non-convergence).
        chol = np.linalg.cholesky(laplace.cov)
        return laplace.mode + 2.0 * rng.standard_normal((n_chains, model.n_coef)) @ chol.T
    if init == "mode":
        return np.tile(laplace.mode, (n_chains, 1))
    return np.tile(model.prior_mean, (n_chains, 1))


def _default_step(spec, pre, laplace, n_coef):
    # Optimal scalings (Roberts, Gelman & Gilks 1997; Roberts & Rosenthal 1998), in units of the
    # mass matrix: proposal variance 2.38^2/d for RWM, 1.65^2 d^(-1/3) for MALA.
    h = 2.38**2 / n_coef if spec.proposal == _chain.PROPOSAL_RW else 1.65**2 * n_coef ** (-1 / 3)
    if pre.kind == "identity" and laplace is not None:
        h *= float(np.mean(np.diag(laplace.cov)))
    return h


def sample(model, *, method="penalty-mala", step_size="auto", batch_size="auto",
           control_variates=None, cv_order=2, chains=4, draws=2000, warmup=500, seed=None,
           mass_matrix="laplace", init="laplace", noise_variance="same-batch",
           gradient_batch="fresh", checkpoint=None, resume=False, checkpoint_seconds=30.0,
           preparation=None,
           target_log_ratio_sd=DEFAULT_TARGET_LOG_RATIO_SD, batch_floor=DEFAULT_BATCH_FLOOR,
           batch_ceiling=DEFAULT_BATCH_CEILING, progress=False, parallel=True,
           scheduler="threads", workers=None):
    """Draw from the posterior of a regression model.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression or PoissonRegression
    method : {"penalty-mala", "penalty-rwm", "mala", "rwm", "naive-mh", "sgld"}, default="penalty-mala"
        ``mala`` and ``rwm`` use every row at every step (exact MH). ``penalty-*`` test on a
        minibatch with the penalty correction. ``naive-mh`` and ``sgld`` are biased baselines.
    step_size : float or "auto", default="auto"
        Step h of the proposal (variance h M^{-1}). "auto": dual averaging during warmup toward
        acceptance 0.574 (Langevin) or 0.234 (random walk), then frozen.
    batch_size : int or "auto", default="auto"
        Rows per minibatch (minibatch methods). "auto": chosen during warmup so that the
        log-ratio sd sits near ``target_log_ratio_sd``, within [batch_floor, batch_ceiling].
    control_variates : bool, optional
        Taylor proxies around the mode for the log-ratio and the gradient. Default: on for
        minibatch methods.
    cv_order : {2, 1}, default=2
        Order of the Taylor proxies.
    chains, draws, warmup : int, default=4, 2000, 500
    seed : int, numpy.random.Generator or SeedSequence, optional
        The same seed gives bitwise-identical draws. Chains get independent streams via
        ``SeedSequence.spawn``.
    mass_matrix : "laplace", "laplace-diagonal", "identity" or array, default="laplace"
        The preconditioner M; "laplace" uses the negative Hessian of the log posterior at the mode.
    init : "laplace", "mode", "prior-mean" or array, default="laplace"
        Starting points; "laplace" draws overdispersed points from the Laplace approximation.
    noise_variance : {"same-batch", "independent-batch", "pooled"}, default="same-batch"
        Where the variance of the minibatch log-ratio comes from: the batch of the estimate, an
        independent batch of the same size, or a pooled mean over the second half of warmup,
        then frozen.
    gradient_batch : {"fresh", "carried"}, default="fresh"
        penalty-mala only. "fresh": a new gradient batch each step, used at both ends of the
        proposal. "carried": the batch is part of the chain's state and the gradient at the
        current point is reused (two batches per step instead of three); both are exact.
    target_log_ratio_sd : float, default=1.5
        The log-ratio sd that ``batch_size="auto"`` aims at (measured default, see
        benchmarks/bench_noise_target.py); also caps the noise level that the step tuning
        of penalty methods allows for.
    batch_floor, batch_ceiling : int, default=32, 100000
        Bounds of ``batch_size="auto"``.
    checkpoint : path, optional
        File (.npz) to which the run's state is written every ``checkpoint_seconds``, at the
        end, and when the run is interrupted.
    resume : bool, default=False
        Continue from ``checkpoint``; the settings must be those of the interrupted run.
    checkpoint_seconds : float, default=30.0
    preparation : Preparation, optional
        The mode, Laplace approximation and row caches of this model from `prepare`, reused
        instead of recomputed (a sweep prepares once for all its grid points).
    progress : bool, default=False
        Show a progress bar (only on a terminal).
    parallel : bool, default=True
        Run chains in threads (the kernel releases the GIL); results do not depend on it.
    scheduler : str or distributed.Client, default="threads"
        Where the chains run. "threads": threads of this process; "serial": one after another
        here; "processes": local worker processes; "dask-local" (a LocalCluster started and
        closed here), a Dask scheduler address ("tcp://host:8786") or a Client: each chain's
        next stretch of iterations is one Dask task, retried if its worker dies. The draws
        are the same, bit for bit, wherever the chains run.
    workers : int, optional
        Worker processes for "processes" and "dask-local" (default: one per chain, at most the
        number of cores).

    Returns
    -------
    SampleResult

    Raises
    ------
    InputError
        A bad setting, refused before any pass over the data (see `check_sample_settings`).
    ModeNotFoundError
        The posterior mode, needed for control variates, the Laplace mass matrix or starting
        points, was not found (e.g. separated logistic data under a flat prior).
    SamplingInterrupted
        On Ctrl-C: carries the result with every completed draw (and the checkpoint written).
    WorkerLostError
        A worker process died (scheduler="processes").

    Warns
    -----
    NoisyLogRatioWarning
        The minibatch log-ratio is too noisy or too far from Gaussian for the penalty
        correction to be trusted; the advice is also kept in ``result.warnings``.

    References
    ----------
    Ceperley & Dewing (1999), J. Chem. Phys. 110, 9812 (penalty method).
    Roberts & Tweedie (1996), Bernoulli 2, 341 (Langevin proposals).
    Hoffman & Gelman (2014), JMLR 15, 1593 (dual averaging).
    Welling & Teh (2011), ICML (SGLD).
    """
    t_setup = time.perf_counter()
    spec, chains, draws, warmup, cv = _check_up_front(
        model, method=method, step_size=step_size, batch_size=batch_size,
        control_variates=control_variates, cv_order=cv_order, chains=chains, draws=draws,
        warmup=warmup, seed=seed, mass_matrix=mass_matrix, init=init,
        noise_variance=noise_variance, gradient_batch=gradient_batch, checkpoint=checkpoint,
        resume=resume, checkpoint_seconds=checkpoint_seconds, preparation=preparation,
        target_log_ratio_sd=target_log_ratio_sd, batch_floor=batch_floor,
        batch_ceiling=batch_ceiling, progress=progress, parallel=parallel,
        scheduler=scheduler, workers=workers)
    rngs = _resolve_seed(seed, chains + 1)
    need_laplace = (cv or (isinstance(mass_matrix, str) and mass_matrix.startswith("laplace"))
                    or (isinstance(init, str) and init in ("laplace", "mode"))
                    or step_size == "auto")
    laplace = None
    if need_laplace:
        laplace = preparation.laplace if preparation is not None else find_mode(model)
    pre = make_preconditioner(mass_matrix, model.n_coef, laplace)
    order = cv_order if cv else 0
    if not spec.minibatch:
        cache = ControlVariateCache.empty(model.n_coef)
    elif preparation is not None and order in preparation.caches:
        cache = preparation.caches[order]
    else:
        cache = control_variate_cache(model, laplace.mode if cv else None, order)
    starts = _initial_points(init, model, laplace, chains, rngs[0])
    setup_seconds = time.perf_counter() - t_setup

    h0 = _default_step(spec, pre, laplace, model.n_coef) if step_size == "auto" else float(step_size)
    adapt_step = step_size == "auto"
    states = [_driver.ChainState(starts[c], model.n_coef, math.log(h0), math.log(10.0 * h0),
                                 rngs[c + 1]) for c in range(chains)]
    # A resumed run takes this state from its checkpoint: no full pass per chain for it.
    needs_full_state = spec.adjusted and spec.ratio == _chain.FULL and not resume
    for st in states if needs_full_state else ():
        _chain.init_full_state(model.glm_data, model.prior_arrays, st.arrays)
    n_total = warmup + draws
    all_draws = np.zeros((chains, n_total, model.n_coef))
    all_stats = np.full((chains, n_total, _chain.N_STATS), np.nan)
    var_code = NOISE_VARIANCE.get(noise_variance, _chain.VAR_SAME)
    carried = gradient_batch == "carried"
    # Penalty methods aim at the exact-method rate times the share that the noise lets through
    # (see run_chain); target_log_ratio_sd caps the noise level used for that share.
    noise_cap = target_log_ratio_sd if spec.rule in (_acc.PENALTY, _acc.PENALTY_CD) else 0.0
    job = _driver.ChainJob(model, spec, _chain.CARRIED if carried else spec.gradient, var_code,
                           noise_cap, cache, pre, warmup, adapt_step)
    if scheduler in ("threads", "serial"):
        runner = Runner(job, all_draws, all_stats, progress,
                                parallel and scheduler == "threads")
    else:
        runner = TaskRunner(job, all_draws, all_stats, progress, scheduler,
                                    worker_count(workers, chains))
    schedule = Schedule(spec, batch_size, model.n_rows, warmup, draws,
                                target_log_ratio_sd, batch_floor, batch_ceiling, _PILOT_BATCH)
    ckpt = None
    if checkpoint is not None:
        identity = {"method": method, "step_size": str(step_size), "batch_size": str(batch_size),
                    "control_variates": cv, "cv_order": cv_order, "chains": chains,
                    "draws": draws, "warmup": warmup, "seed": repr(seed),
                    "mass_matrix": str(mass_matrix) if isinstance(mass_matrix, str) else "given",
                    "noise_variance": noise_variance, "gradient_batch": gradient_batch,
                    "target_log_ratio_sd": float(target_log_ratio_sd),
                    "n_rows": model.n_rows, "n_coef": model.n_coef, "family": model.family_name}
        ckpt = Checkpoint(checkpoint, identity)
        if resume:
            ckpt.restore(states, schedule, runner)

    t_sample = time.perf_counter()
    interrupted = False
    try:
        _driver.drive(runner, states, schedule, checkpoint=ckpt,
                      checkpoint_seconds=checkpoint_seconds)
    except _driver.Interrupted:
        interrupted = True
    chosen_batch = schedule.n_batch
    # Starting and stopping workers (seconds for a cluster) is set-up, not sampling: the
    # ESS per second of the draws does not depend on where they ran.
    sampling_seconds = time.perf_counter() - t_sample - runner.pool_seconds
    setup_seconds += runner.pool_seconds

    done = min(st.iteration for st in states)
    n_done = max(0, done - warmup)
    names = _chain.STAT_NAMES
    stats = {k: all_stats[:, warmup:warmup + n_done, j] for j, k in enumerate(names)}
    warm = {k: all_stats[:, :min(done, warmup), j] for j, k in enumerate(names)}
    for key, kind in _chain.STAT_TYPES.items():
        stats[key] = stats[key].astype(kind)
        warm[key] = warm[key].astype(kind)
    settings = {
        "method": method,
        "step_size": [float(math.exp(st.adapt[_chain.AD_LOG_H])) for st in states],
        "step_size_setting": step_size,
        "batch_size": int(chosen_batch) if spec.minibatch else None,
        "batch_size_setting": batch_size if spec.minibatch else None,
        "control_variates": cv,
        "cv_order": cv_order if cv else None,
        "noise_variance": noise_variance if spec.minibatch and spec.adjusted else None,
        "gradient_batch": gradient_batch if spec.gradient == _chain.BATCH and spec.adjusted else None,
        "target_accept": spec.target_accept if adapt_step else None,
        "target_log_ratio_sd": target_log_ratio_sd if batch_size == "auto" and spec.minibatch else None,
        "chains": chains,
        "draws": draws,
        "warmup": warmup,
        "seed": seed if isinstance(seed, (int, np.integer)) or seed is None else repr(seed),
        "mass_matrix": pre.kind,
        "init": init if isinstance(init, str) else "given",
    }
    result = SampleResult(
        draws=all_draws[:, warmup:warmup + n_done].copy(), stats=stats, warmup_stats=warm,
        coef_names=list(model.coef_names), method=method, settings=settings,
        n_rows=model.n_rows, setup_seconds=setup_seconds, sampling_seconds=sampling_seconds,
        completed_draws=n_done, laplace_mode=None if laplace is None else laplace.mode)
    if interrupted:
        raise SamplingInterrupted(result, checkpoint)
    _noise_advice(result, spec)
    return result


def _noise_advice(result, spec):
    if not (spec.minibatch and spec.adjusted) or result.n_draws == 0:
        return
    sd = result.stats["log_ratio_sd"]
    med = float(np.nanmedian(sd))
    n = result.settings["batch_size"]
    msgs = []
    if med > 2.0:
        msgs.append(f"the minibatch log-ratio sd is {med:.2f} (median) > 2: acceptance drops as "
                    "exp(-sigma^2/2) and the Gaussian noise assumption is strained; use a larger "
                    "batch_size or control_variates=True")
    skew = float(np.nanmedian(np.abs(result.stats["log_ratio_skew"])))
    kurt = float(np.nanmedian(result.stats["log_ratio_kurtosis"]))
    # Error of the penalty's Gaussian assumption: sigma^3 g1/(6 sqrt(n)) + sigma^4 g2/(24 n)
    # (METHODS.md section 2); flag when it could move log acceptance by more than 0.05.
    err = med**3 * skew / (6 * math.sqrt(n)) + med**4 * abs(kurt) / (24 * n)
    if err > 0.05:
        msgs.append(f"the batch log-ratio terms are far from Gaussian (median |skewness| "
                    f"{skew:.2f}, excess kurtosis {kurt:.2f}; error term {err:.3f}); the penalty "
                    "correction may be biased: use a larger batch_size or control_variates=True")
    if result.penalty_beyond_bound_count:
        k = result.penalty_beyond_bound_count
        msgs.append(f"{k} iteration{'s were' if k > 1 else ' was'} beyond the validity bound of "
                    "the Ceperley-Dewing penalty and used the plug-in sigma^2/2 instead; use a "
                    "larger batch_size")
    if msgs:
        result.warnings.extend(msgs)
        warnings.warn("; and ".join(msgs), NoisyLogRatioWarning, stacklevel=3)
