"""The public entry point `sample`: settings, set-up, the chains, the result."""

import inspect
import math
import time

import numpy as np

from ..exceptions import SamplingInterrupted
from ..executors import worker_count
from ..models import check_model
from . import _driver
from . import _transition as _chain
from ._advice import noise_advice
from ._checkpoint import Checkpoint
from ._result import SampleResult
from ._runners import Runner, TaskRunner
from ._schedule import Schedule
from ._settings import RunOptions, SamplerSettings, numpydoc_entries, split_options
from ._setup import chain_generators, set_up


def sample(model, settings=None, **options):
    """Draw from the posterior of a regression model.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    settings : SamplerSettings, optional
        What defines the chains; the keyword options below that name a setting replace its
        value (``sample(model, settings, seed=2)``). Default: ``SamplerSettings()``.
    **options
        Any setting of `SamplerSettings` and any run option of `RunOptions`:

{options}

    Returns
    -------
    SampleResult

    Raises
    ------
    InputError
        A bad setting or option, refused before any pass over the data.
    ModeNotFoundError
        The posterior mode, needed for control variates, the Laplace mass matrix or starting
        points, was not found (e.g. separated logistic data under a flat prior).
    SamplingInterrupted
        On Ctrl-C: carries the result with every completed draw (and the checkpoint written).
    WorkerDiedError
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
    check_model(model)
    settings, run = split_options(settings, options)
    settings.check_against(model)
    run.check_against(model)
    ckpt = None
    if run.checkpoint is not None:
        ckpt = Checkpoint(run.checkpoint, checkpoint_identity(model, settings, run),
                          settings.draws)
        if run.resume:
            ckpt.check()   # before the mode: a changed problem is refused at once
    rngs = chain_generators(settings.seed, settings.chains + 1)
    setup = set_up(model, settings, run.preparation, rngs[0])
    setup_seconds = time.perf_counter() - t_setup

    states = [_driver.ChainState(setup.starts[c], model.n_coef, math.log(setup.first_step),
                                 math.log(10.0 * setup.first_step), rngs[c + 1])
              for c in range(settings.chains)]
    spec = settings.spec
    # A resumed run takes this state from its checkpoint: no full pass per chain for it.
    if spec.adjusted and spec.ratio == _chain.FULL and not run.resume:
        for st in states:
            _chain.init_full_state(model.glm_data, model.prior_arrays, st.arrays)
    runner = _runner(model, settings, run, setup)
    schedule = Schedule(settings, model.n_rows)
    if ckpt is not None and run.resume:
        ckpt.restore(states, schedule, runner)

    t_sample = time.perf_counter()
    interrupted = False
    try:
        _driver.drive(runner, states, schedule, checkpoint=ckpt,
                      checkpoint_seconds=run.checkpoint_seconds)
    except _driver.Interrupted:
        interrupted = True
    # Starting and stopping workers (seconds for a cluster) is set-up, not sampling: the
    # ESS per second of the draws does not depend on where they ran.
    t_end = time.perf_counter()
    timings = (setup_seconds + runner.pool_seconds, t_end - t_sample - runner.pool_seconds,
               t_end - t_setup)
    result = _result(model, settings, setup, states, runner, schedule, timings)
    if interrupted:
        raise SamplingInterrupted(result, run.checkpoint)
    noise_advice(result)
    return result


sample.__doc__ = sample.__doc__.replace("{options}",
                                        numpydoc_entries(SamplerSettings, RunOptions, indent=8))
sample.__signature__ = inspect.Signature(
    [inspect.Parameter("model", inspect.Parameter.POSITIONAL_OR_KEYWORD),
     inspect.Parameter("settings", inspect.Parameter.POSITIONAL_OR_KEYWORD, default=None)]
    + [inspect.Parameter(f.name, inspect.Parameter.KEYWORD_ONLY, default=f.default)
       for cls in (SamplerSettings, RunOptions)
       for f in cls.__dataclass_fields__.values()])


def checkpoint_identity(model, settings, run):
    """What a checkpoint must match to be resumed: every setting but ``draws`` (a resume may
    add draws), the model's shape and fingerprint (`model.fingerprint`: one pass over the
    data) and the caller's ``run.checkpoint_extra``."""
    record = {k: v for k, v in settings.record().items() if k != "draws"}
    return {**record, "n_rows": model.n_rows, "n_coef": model.n_coef,
            **model.fingerprint(), **run.checkpoint_extra}


def _runner(model, settings, run, setup):
    """The chains' shared job, and where they advance (threads here, or tasks elsewhere)."""
    n_total = settings.warmup + settings.draws
    all_draws = np.zeros((settings.chains, n_total, model.n_coef))
    all_stats = np.full((settings.chains, n_total, _chain.N_STATS), np.nan)
    job = _driver.ChainJob(model, settings, setup.cache, setup.preconditioner,
                           setup.gradient_batch)
    if run.scheduler in ("threads", "serial"):
        return Runner(job, all_draws, all_stats, run.progress,
                      run.parallel and run.scheduler == "threads")
    return TaskRunner(job, all_draws, all_stats, run.progress, run.scheduler,
                      worker_count(run.workers, settings.chains), run.connect_seconds)


def _result(model, settings, setup, states, runner, schedule, timings):
    """The `SampleResult` of the completed iterations (all of them, or those before an
    interruption)."""
    warmup, spec = settings.warmup, settings.spec
    done = min(st.iteration for st in states)
    n_done = max(0, done - warmup)
    all_stats = runner.all_stats
    stats = {k: all_stats[:, warmup:warmup + n_done, j] for j, k in enumerate(_chain.STAT_NAMES)}
    warm = {k: all_stats[:, :min(done, warmup), j] for j, k in enumerate(_chain.STAT_NAMES)}
    for key, kind in _chain.STAT_TYPES.items():
        stats[key] = stats[key].astype(kind)
        warm[key] = warm[key].astype(kind)
    tuned = {
        "step_size": [float(math.exp(st.adapt[_chain.AD_LOG_H])) for st in states],
        "batch_size": int(schedule.n_batch) if spec.minibatch else None,
        "batch_limited_by": schedule.limited_by,
        "acceptance_target": spec.acceptance_target if settings.adapts_step else None,
        "mass_matrix": setup.preconditioner.kind,
        "gradient_batch": setup.gradient_batch if spec.langevin and spec.minibatch else None,
    }
    # Family parameters sampled on another scale (a log noise sd) are reported on their own.
    return SampleResult(
        draws=model.natural_scale(runner.all_draws[:, warmup:warmup + n_done]), stats=stats,
        warmup_stats=warm, coef_names=model.output_names, settings=settings, tuned=tuned,
        n_rows=model.n_rows, setup_seconds=timings[0], sampling_seconds=timings[1], completed_draws=n_done,
        laplace_mode=None if setup.laplace is None else model.natural_scale(setup.laplace.mode),
        laplace_cov=None if setup.laplace is None else setup.laplace.cov,
        model_record=model.record(), setup_parts=setup.parts, total_seconds=timings[2])
