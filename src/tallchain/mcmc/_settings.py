"""The sampler's settings: every name, default and constraint written once (private).

`SamplerSettings` holds what defines the chains (method, step and batch size, control
variates, chains, draws, seed, ...); `RunOptions` holds where and how a run executes
(checkpoint, progress, scheduler, ...). Each field is declared once below with its default, the
rule that checks it and its documentation. Building either object checks every value and keeps
it standardised (Python ints and floats, read-only arrays), so `sample`, the config, sweeps,
calibration, the checkpoint identity and `SampleResult.settings` all read one object and never
a raw argument. Checks that need the model (a batch size above N, an array of the wrong shape)
are `SamplerSettings.check_against`.
"""

import hashlib
import os
import textwrap
import warnings
from dataclasses import dataclass, field, fields, replace

import numpy as np

from .._validation import check_flag, did_you_mean, fail, positive_number
from ..executors import CONNECT_SECONDS
from . import _transition as _loop
from ._methods import BROKEN_METHODS, LOG_RATIO_VARIANCE, METHODS
from ._setting_rules import (_batch_size, _choice, _extra, _init, _integer_from, _mass_matrix,
                             _method, _optional_flag, _path_or_none, _positive_number,
                             _preparation, _proxy_order, _scheduler, _seed, _step_size,
                             _workers)

GRADIENT_BATCHES = ("fresh", "carried", "proxy", "auto")


def _setting(default, rule, type_line, doc):
    """A field of a settings class: its default, its rule ``rule(name, value) -> value`` and
    the numpydoc type line and text of its documentation."""
    return field(default=default, metadata={"rule": rule, "type": type_line, "doc": doc})


# ------------------------------------------------------------------------- settings


@dataclass(frozen=True, eq=False)
class SamplerSettings:
    """What defines the chains of a run; every value checked and standardised when built.

    Build one with keywords (``SamplerSettings(method="mala", chains=2)``) or change one with
    `dataclasses.replace`; either checks every value and raises `tallchain.InputError` naming
    the first bad one. Checks that need the model are `check_against`.

    Attributes
    ----------
    {attributes}
    """

    method: str = _setting(
        "penalty-mala", _method,
        '{"penalty-mala", "penalty-rwm", "mala", "rwm", "naive-mh", "sgld"}, default="penalty-mala"',
        "``mala`` and ``rwm`` use every row at every step (exact MH). ``penalty-*`` test on a "
        "minibatch with the penalty correction. ``naive-mh`` and ``sgld`` are biased baselines.")
    step_size: float | str = _setting(
        "auto", _step_size, 'float or "auto", default="auto"',
        "Step h of the proposal (variance h M^{-1}). \"auto\": dual averaging during warmup "
        "toward acceptance 0.574 (Langevin) or 0.234 (random walk), then frozen.")
    batch_size: int | str = _setting(
        "auto", _batch_size, 'int or "auto", default="auto"',
        "Rows per minibatch (minibatch methods). \"auto\": chosen during warmup so that the "
        "log-ratio sd sits near ``target_log_ratio_sd``, within [batch_floor, batch_ceiling].")
    control_variates: bool | None = _setting(
        None, _optional_flag, "bool, optional",
        "Taylor proxies around the mode for the log-ratio and the gradient. Default: on for "
        "minibatch methods.")
    proxy_order: int = _setting(
        2, _proxy_order, "{2, 1}, default=2", "Order of the Taylor proxies of the control variates.")
    chains: int = _setting(4, _integer_from(1), "int, default=4", "Number of chains.")
    draws: int = _setting(2000, _integer_from(1), "int, default=2000",
                          "Draws per chain after warmup.")
    warmup: int = _setting(500, _integer_from(0), "int, default=500",
                           "Warmup (tuning) iterations per chain, discarded.")
    seed: int | np.random.Generator | np.random.SeedSequence | None = _setting(
        None, _seed, "int, numpy.random.Generator or SeedSequence, optional",
        "The same seed gives bitwise-identical draws. Chains get independent streams via "
        "``SeedSequence.spawn``. An integer from 0 to 2**64 - 1.")
    mass_matrix: str | np.ndarray = _setting(
        "laplace", _mass_matrix,
        '"laplace", "laplace-lowrank", "laplace-diagonal", "identity" or array, '
        'default="laplace"',
        "The preconditioner M; \"laplace\" uses the negative Hessian of the log posterior at the "
        "mode (O(d^2) per step); \"laplace-lowrank\" keeps the Laplace standard deviations and "
        "the 10 eigen-directions of its correlation farthest from 1, \"laplace-diagonal\" the "
        "standard deviations only (O(d) per step); an array must be symmetric positive "
        "definite.")
    init: str | np.ndarray = _setting(
        "laplace", _init, '"laplace", "mode", "prior-mean" or array, default="laplace"',
        "Starting points; \"laplace\" draws overdispersed points from the Laplace "
        "approximation; an array gives one point (n_coef,) or one per chain (chains, n_coef).")
    log_ratio_variance: str = _setting(
        "same-batch", _choice(tuple(LOG_RATIO_VARIANCE)),
        '{"same-batch", "independent-batch", "pooled"}, default="same-batch"',
        "Where the variance of the minibatch log-ratio comes from: the batch of the estimate, an "
        "independent batch of the same size, or a pooled mean over the second half of warmup, "
        "then frozen.")
    gradient_batch: str = _setting(
        "auto", _choice(GRADIENT_BATCHES), '{"fresh", "carried", "proxy", "auto"}, '
        'default="auto"',
        "Where penalty-mala's drift comes from. \"fresh\": a new gradient batch each step, used "
        "at both ends of the proposal. \"carried\": the batch is part of the chain's state and "
        "the gradient at the current point is reused (two batches per step instead of three). "
        "\"proxy\": the gradient of the control variates' quadratic proxy, with the proxy's "
        "precision (the Laplace precision at the mode) as mass matrix: no rows read for the "
        "proposal, one batch per step; needs second-order control variates and "
        "mass_matrix=\"laplace\". \"auto\": \"proxy\" where it applies, else \"fresh\". "
        "All are exact.")
    target_log_ratio_sd: float = _setting(
        1.5, _positive_number, "float, default=1.5",
        "The log-ratio sd that ``batch_size=\"auto\"`` aims at (measured default, see "
        "benchmarks/bench_noise_target.py); also caps the noise level that the step tuning of "
        "penalty methods allows for.")
    batch_floor: int = _setting(32, _integer_from(2), "int, default=32",
                                "Smallest batch ``batch_size=\"auto\"`` may choose.")
    batch_ceiling: int = _setting(100_000, _integer_from(2), "int, default=100000",
                                  "Largest batch ``batch_size=\"auto\"`` may choose.")

    def __post_init__(self):
        for f in fields(self):
            object.__setattr__(self, f.name, f.metadata["rule"](f.name, getattr(self, f.name)))
        self._check_together()

    def _check_together(self):
        spec = self.spec
        if self.step_size == "auto":
            if not spec.adjusted:
                fail("step_size", f'"auto" is not available for {self.method} (it has no '
                     "accept step to tune against)",
                     "give a number, e.g. the step size tuned by penalty-mala")
            if self.warmup < 20:
                fail("warmup", f'is {self.warmup}, too short to tune step_size="auto"',
                     "give warmup >= 20 (a few hundred is usual) or a numeric step_size")
        if self.auto_batch and self.warmup < 40:
            fail("warmup", f'is {self.warmup}, too short to choose batch_size="auto"',
                 "give warmup >= 40 or an integer batch_size")
        if self.batch_ceiling < self.batch_floor:
            fail("batch_ceiling", f"is {self.batch_ceiling}, below batch_floor {self.batch_floor}",
                 "give batch_ceiling >= batch_floor")
        if self.gradient_batch in ("carried", "proxy") and not (spec.gradient == _loop.BATCH
                                                                and spec.adjusted):
            fail("gradient_batch", f'"{self.gradient_batch}" applies to penalty-mala, not '
                 f"{self.method}", 'use gradient_batch="fresh" or method="penalty-mala"')
        if self.gradient_batch == "proxy" and not self.proxy_drift_applies:
            fail("gradient_batch", '"proxy" needs second-order control variates and '
                 'mass_matrix="laplace"', 'use gradient_batch="fresh", or control_variates=True, '
                 'proxy_order=2 and mass_matrix="laplace"')
        if self.control_variates and not spec.minibatch:
            warnings.warn(f"control_variates is ignored by the full-data method {self.method}",
                          UserWarning, stacklevel=4)

    # -- what the settings mean for a run -------------------------------------------------

    @property
    def spec(self):
        """The method's entry in the method table (`MethodSpec`)."""
        return METHODS.get(self.method) or BROKEN_METHODS[self.method]

    @property
    def uses_control_variates(self):
        """Control variates are on: asked for (or by default) with a minibatch method."""
        on = self.spec.minibatch if self.control_variates is None else self.control_variates
        return bool(on and self.spec.minibatch)

    @property
    def proxy_order_used(self):
        """The order of the row cache the chains read: ``proxy_order``, or 0 without control
        variates."""
        return self.proxy_order if self.uses_control_variates else 0

    @property
    def proxy_drift_applies(self):
        """gradient_batch="proxy" can run: penalty-mala with second-order control variates and
        the dense Laplace mass matrix."""
        return (self.spec.gradient == _loop.BATCH and self.spec.adjusted
                and self.proxy_order_used == 2
                and isinstance(self.mass_matrix, str) and self.mass_matrix == "laplace")

    @property
    def adapts_step(self):
        return self.step_size == "auto"

    @property
    def auto_batch(self):
        """The batch size is chosen in warmup (a minibatch method with ``batch_size="auto"``)."""
        return self.spec.minibatch and self.batch_size == "auto"

    @property
    def needs_laplace(self):
        """The run needs the mode: for control variates, a Laplace mass matrix or starting
        point, or the default step size."""
        return (self.uses_control_variates or self.adapts_step
                or (isinstance(self.mass_matrix, str) and self.mass_matrix.startswith("laplace"))
                or (isinstance(self.init, str) and self.init in ("laplace", "mode")))

    def check_against(self, model):
        """Refuse the settings that do not fit ``model`` (InputError), before any data pass:
        an integer batch size above N, a mass matrix or starting points of the wrong shape."""
        d = model.n_coef
        if self.spec.minibatch and not isinstance(self.batch_size, str) \
                and self.batch_size > model.n_rows:
            fail("batch_size", f"must be in [2, {model.n_rows}] (N), got {self.batch_size}",
                 "give at least 2 rows and at most the number of rows")
        if isinstance(self.mass_matrix, np.ndarray) and self.mass_matrix.shape != (d, d):
            fail("mass_matrix", f"has shape {self.mass_matrix.shape}, expected ({d}, {d})",
                 "give one row and column per coefficient")
        if isinstance(self.init, np.ndarray) \
                and self.init.shape not in ((d,), (self.chains, d)):
            fail("init", f"has shape {self.init.shape}, expected ({d},) or ({self.chains}, {d})",
                 "give one starting point, or one per chain")
        return self

    def starting_points(self):
        """Given starting points as (chains, n_coef), or None for a named kind."""
        if isinstance(self.init, str):
            return None
        return np.array(np.broadcast_to(self.init, (self.chains, self.init.shape[-1])))

    # -- records ------------------------------------------------------------------------

    def record(self):
        """Every setting as a JSON-ready dict; a given array as a short description with a
        hash of its values, a seed object by its kind."""
        return {f.name: _recorded(getattr(self, f.name)) for f in fields(self)}

    def __eq__(self, other):
        return isinstance(other, SamplerSettings) and self.record() == other.record()

    __hash__ = None

    @classmethod
    def names(cls):
        """The setting names, in declaration order."""
        return tuple(f.name for f in fields(cls))


def _recorded(value):
    if isinstance(value, np.ndarray):
        digest = hashlib.sha1(np.ascontiguousarray(value).tobytes()).hexdigest()[:12]
        return f"array {'x'.join(map(str, value.shape))} sha1:{digest}"
    if isinstance(value, (np.random.Generator, np.random.SeedSequence)):
        return f"a {type(value).__name__}"
    return value


@dataclass(frozen=True, eq=False)
class RunOptions:
    """Where and how a run executes; none of these changes the draws.

    Attributes
    ----------
    {attributes}
    """

    checkpoint: str | os.PathLike | None = _setting(
        None, lambda name, v: _path_or_none(name, v), "path, optional",
        "File (.npz) to which the run's state is written every ``checkpoint_seconds``, at the "
        "end, and when the run is interrupted.")
    resume: bool = _setting(False, check_flag, "bool, default=False",
                            "Continue from ``checkpoint``; the settings must be those of the "
                            "interrupted run.")
    checkpoint_extra: dict = _setting(
        None, lambda name, v: _extra(name, v), "dict, optional",
        "More items a resume must match, recorded in the checkpoint beside the settings and "
        "the model's fingerprint (JSON-ready values, e.g. how the data were standardised); "
        "a key that differs is named in the refusal.")
    checkpoint_seconds: float = _setting(
        30.0, lambda name, v: positive_number(name, v, "give the seconds between checkpoint "
                                              "writes, e.g. 30"),
        "float, default=30.0", "Seconds between two checkpoint writes.")
    preparation: object = _setting(
        None, lambda name, v: _preparation(name, v), "Preparation, optional",
        "The mode, Laplace approximation and row caches of this model from `prepare`, reused "
        "instead of recomputed (a sweep prepares once for all its grid points).")
    progress: bool = _setting(False, check_flag, "bool, default=False",
                              "Show a progress bar (only on a terminal).")
    parallel: bool = _setting(True, check_flag, "bool, default=True",
                              "Run chains in threads (the kernel releases the GIL); results do "
                              "not depend on it.")
    scheduler: object = _setting(
        "threads", lambda name, v: _scheduler(v), 'str or distributed.Client, default="threads"',
        "Where the chains run. \"threads\": threads of this process; \"serial\": one after "
        "another here; \"processes\": local worker processes; \"dask-local\" (a LocalCluster "
        "started and closed here), a Dask scheduler address (\"tcp://host:8786\") or a Client: "
        "each chain's next stretch of iterations is one Dask task, retried if its worker dies. "
        "The draws are the same, bit for bit, wherever the chains run.")
    workers: int | None = _setting(
        None, lambda name, v: _workers(v), "int, optional",
        "Worker processes for \"processes\" and \"dask-local\" (default: one per chain, at most "
        "the number of cores).")
    connect_seconds: float = _setting(
        CONNECT_SECONDS, lambda name, v: positive_number(
            name, v, "give the seconds to wait for the scheduler, e.g. 10"),
        f"float, default={CONNECT_SECONDS}",
        "Seconds to wait for a Dask scheduler at an address to answer before the run stops "
        "with an error (the address itself is checked when the options are built).")

    def __post_init__(self):
        for f in fields(self):
            object.__setattr__(self, f.name, f.metadata["rule"](f.name, getattr(self, f.name)))
        if self.resume and self.checkpoint is None:
            fail("resume", "needs a checkpoint path", "pass checkpoint=<file> (the CLI does this)")

    def check_against(self, model):
        """Refuse a preparation made for another model."""
        if self.preparation is not None:
            self.preparation.check(model)
        return self

    @classmethod
    def names(cls):
        return tuple(f.name for f in fields(cls))


def split_options(settings, options, *, owner="sample()"):
    """`SamplerSettings` and `RunOptions` from ``settings`` (or the defaults) and keyword
    ``options`` naming fields of either; an unknown name is refused with a suggestion."""
    if settings is not None and not isinstance(settings, SamplerSettings):
        fail("settings", f"must be a SamplerSettings, got {type(settings).__name__}",
             "build one with tallchain.SamplerSettings(...), or pass the settings as keywords")
    chain_names, run_names = SamplerSettings.names(), RunOptions.names()
    for name in options:
        if name not in chain_names and name not in run_names:
            fail(name, f"is not a setting of {owner}",
                 f"{did_you_mean(name, chain_names + run_names)}see help(tallchain.SamplerSettings)")
    chain = {k: v for k, v in options.items() if k in chain_names}
    run = RunOptions(**{k: v for k, v in options.items() if k in run_names})
    if settings is None:
        return SamplerSettings(**chain), run
    return (replace(settings, **chain) if chain else settings), run


def settings_from(settings, options, *, owner, owned=None, defaults=None):
    """`SamplerSettings` for a caller of `sample` (sweep, calibration, twin check):
    ``settings`` (or ``defaults``, or the class defaults) with keyword ``options`` applied.

    ``owned`` maps the names the caller sets itself to the advice shown when one is given.
    """
    for name, fix in (owned or {}).items():
        if name in options:
            fail(name, f"is set by {owner} itself", fix)
    run = [name for name in options if name in RunOptions.names()]
    if run:
        fail(run[0], f"is a run option of sample(), not a setting {owner} takes (it decides "
             "where and how its runs execute)", f"leave {run[0]} out")
    if settings is None:
        options = {**(defaults or {}), **options}
    chain, _ = split_options(settings, options, owner=owner)
    return chain


def numpydoc_entries(*classes, indent=4):
    """The numpydoc entries (name : type, then the wrapped text) of every field of ``classes``,
    indented by ``indent`` spaces: the one source of the settings' documentation."""
    pad = " " * indent
    lines = []
    for cls in classes:
        for f in fields(cls):
            lines.append(f"{pad}{f.name} : {f.metadata['type']}")
            lines.extend(textwrap.wrap(f.metadata["doc"], 92 - indent, break_on_hyphens=False,
                                       initial_indent=pad + "    ",
                                       subsequent_indent=pad + "    "))
    return "\n".join(lines)


for _cls in (SamplerSettings, RunOptions):
    _cls.__doc__ = _cls.__doc__.replace("    {attributes}", numpydoc_entries(_cls))
