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
import json
import math
import os
import textwrap
import warnings
from dataclasses import dataclass, field, fields, replace

import numpy as np

from .._validation import (check_flag, check_seed, did_you_mean, fail, is_number, one_of,
                           positive_int, positive_number, show_value, spd_matrix_and_inverse)
from ..executors import CONNECT_SECONDS, check_scheduler, check_workers
from ..posterior import MASS_MATRIX_KINDS
from . import _transition as _loop
from ._methods import BROKEN_METHODS, LOG_RATIO_VARIANCE, METHODS

INIT_KINDS = ("laplace", "mode", "prior-mean")
GRADIENT_BATCHES = ("fresh", "carried")


def _setting(default, rule, type_line, doc):
    """A field of a settings class: its default, its rule ``rule(name, value) -> value`` and
    the numpydoc type line and text of its documentation."""
    return field(default=default, metadata={"rule": rule, "type": type_line, "doc": doc})


# ------------------------------------------------------------------------------- rules
# Each rule takes (name, value), raises InputError naming ``name`` or returns the value
# standardised. Rules are idempotent: a standardised value passes unchanged.


def _method(name, value):
    if isinstance(value, str) and value in BROKEN_METHODS:   # power checks of the tests only
        return value
    return one_of(name, value, tuple(METHODS), "method")


def _auto_or(rule, what, fix):
    """A rule that takes "auto" or what ``rule`` takes."""
    def check(name, value):
        if isinstance(value, str):
            if value != "auto":
                fail(name, f'must be {what} or "auto", got {show_value(value)}', fix)
            return value
        return rule(name, value)

    return check


def _positive_step(name, value):
    if not is_number(value):
        fail(name, f'must be a number > 0 or "auto", got {show_value(value)}',
             'give a positive number or "auto"')
    if not math.isfinite(value) or value <= 0:
        fail(name, f"must be > 0, got {show_value(value)}", 'give a positive number or "auto"')
    return float(value)


_step_size = _auto_or(_positive_step, "a number > 0", 'give a positive number or "auto"')
_batch_size = _auto_or(lambda name, value: positive_int(name, value, minimum=2), "an integer",
                       'give an integer in [2, N] or "auto"')


def _optional_flag(name, value):
    if value is not None and not isinstance(value, (bool, np.bool_)):
        fail(name, f"must be True, False or None, got {show_value(value)}",
             "give a bool (None: on for minibatch methods)")
    return None if value is None else bool(value)


def _proxy_order(name, value):
    if isinstance(value, (bool, np.bool_)) or value not in (1, 2):
        fail(name, f"must be 1 or 2, got {show_value(value)}",
             "use 2 (second-order Taylor proxies) or 1 (first-order)")
    return int(value)


def _integer_from(minimum):
    return lambda name, value: positive_int(name, value, minimum=minimum)


def _choice(choices, what="value"):
    return lambda name, value: one_of(name, value, choices, what)


def _read_only(a):
    a = np.array(a, dtype=float)
    a.flags.writeable = False
    return a


def _mass_matrix(name, value):
    if isinstance(value, str) or value is None:
        return one_of(name, value, MASS_MATRIX_KINDS)
    m = np.asarray(value, dtype=float) if _numeric(value) else None
    if m is None or m.ndim != 2 or m.shape[0] != m.shape[1]:
        fail(name, f"must be {', '.join(MASS_MATRIX_KINDS)} or a square matrix, got "
             f"{show_value(value)}", "give a name or an (n_coef, n_coef) SPD matrix")
    spd_matrix_and_inverse(name, m, m.shape[0], "give one row and column per coefficient")
    return _read_only(m)


def _init(name, value):
    if isinstance(value, str) or value is None:
        return one_of(name, value, INIT_KINDS)
    start = np.asarray(value, dtype=float) if _numeric(value) else None
    if start is None or start.ndim not in (1, 2):
        fail(name, f"must be {', '.join(INIT_KINDS)} or an array of starting points, got "
             f"{show_value(value)}", "give (n_coef,) or (chains, n_coef) finite values")
    bad = np.argwhere(~np.isfinite(start))
    if bad.size:
        where = ", ".join(str(int(i)) for i in bad[0])
        fail(name, f"contains {start[tuple(bad[0])]} at position ({where})",
             "give finite starting values")
    return _read_only(start)


def _numeric(value):
    try:
        return np.asarray(value).dtype.kind in "fiu"
    except (TypeError, ValueError):
        return False


def _seed(name, value):
    return check_seed(value, name)


def _positive_number(name, value):
    return positive_number(name, value, "give a positive number such as 1.0")


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
        "fresh", _choice(GRADIENT_BATCHES), '{"fresh", "carried"}, default="fresh"',
        "penalty-mala only. \"fresh\": a new gradient batch each step, used at both ends of the "
        "proposal. \"carried\": the batch is part of the chain's state and the gradient at the "
        "current point is reused (two batches per step instead of three); both are exact.")
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
        if self.gradient_batch == "carried" and not (spec.gradient == _loop.BATCH
                                                     and spec.adjusted):
            fail("gradient_batch", f'"carried" applies to penalty-mala, not {self.method}',
                 'use gradient_batch="fresh" or method="penalty-mala"')
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


def _path_or_none(name, value):
    if value is not None and not isinstance(value, (str, os.PathLike)):
        fail(name, f"must be a file path, got {show_value(value)}", "give a path, or leave it out")
    return value


def _extra(name, value):
    if value is None:
        return {}
    if not isinstance(value, dict) or not all(isinstance(k, str) for k in value):
        fail(name, f"must be a dict with string keys, got {show_value(value)}",
             'give e.g. {"standardization": None}, or leave it out')
    try:
        return json.loads(json.dumps(value, allow_nan=False))   # as the checkpoint reads it
    except (TypeError, ValueError) as exc:
        fail(name, f"must hold JSON values ({exc})", "give numbers, strings, lists and dicts")


def _preparation(name, value):
    from ._setup import Preparation

    if value is not None and not isinstance(value, Preparation):
        fail(name, f"must come from tallchain.mcmc.prepare, got {type(value).__name__}",
             "pass prepare(model), or leave it out")
    return value


def _scheduler(value):
    check_scheduler(value, threads=True)
    return value


def _workers(value):
    check_workers(value)
    return None if value is None else int(value)


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
