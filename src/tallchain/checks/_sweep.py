"""Step-size and batch-size sweeps: bias against cost, one table, one recommendation."""

import hashlib
import math
import time
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from .._arrays import row_blocks
from .._validation import check_flag, fail, is_integer, is_number, one_of
from ..data import is_csr_design
from ..executors import check_scheduler, check_workers, run_tasks, worker_count
from ..mcmc import METHODS, ess_bulk, prepare, sample, settings_from, spawn_seeds
from ..models import check_model
from ..outputs import atomic_write, write_json, write_npz
from ..posterior import conjugate_posterior
from ._extrapolation import (add_batch_extrapolations, bias_columns, moments,
                             reference_moments, step_extrapolation)
from ._ks import MIN_ESS_FOR_VERDICT, check_level, ecdf_ess, family_threshold, ks_check

# The quantities run.json also reports are spelled as there.
COLUMNS = ("method", "step_size", "batch_size", "ks_max", "ks_ratio_max", "ks_floor",
           "ess_bulk_min", "ess_ecdf_min", "ess_per_second", "acceptance_rate", "log_ratio_sd_mean",
           "data_evaluations_per_draw", "wall_seconds", "verdict", "bias_estimate_sd",
           "bias_estimate_mcse_sd", "extrapolated_error_mcse")
DEFAULT_STEP_FACTORS = tuple(2.0**k for k in range(-3, 4))
# Below this ESS of the empirical CDF the noise floor is so wide that "within noise" says
# little (common practice: ESS of a few hundred for stable tail summaries; we ask for 100).


@dataclass
class SweepJournal:
    """What a sweep records as it goes, for resuming an interrupted one.

    Attributes
    ----------
    done_rows : list of dict
        Rows of an interrupted sweep over the same grid: those points are not run again.
    on_row : callable, optional
        Called with each finished row (e.g. to write it out at once).
    """

    done_rows: list = field(default_factory=list)
    on_row: object = None


@dataclass
class SweepResult:
    """Rows of a sweep, the reference used, and the recommended setting.

    Attributes
    ----------
    rows : list of dict
        One per grid point, with the keys in `COLUMNS`.
    recommended : dict or None
        The row with the highest ESS per second among those judged unbiased, of a method that
        targets the posterior (never sgld or naive-mh; see `recommend`).
    notes : list of str
        Why nothing was recommended, or that a biased baseline was faster.
    reference : str
        "exact posterior" (conjugate model) or "full-data mala run (cached)".
    tuned_step_size : float
        The step size the grid is centred on.
    level : float
        The false-alarm rate of the whole table: the chance that a setting without bias is
        called "biased" anywhere in it is at most this.
    n_tests : int
        The KS tests of the table: grid points x coefficients.
    tolerance : float
        The threshold that follows from them, in noise floors (`family_threshold`).
    """

    rows: list
    recommended: dict | None
    reference: str
    tuned_step_size: float
    level: float
    n_tests: int
    tolerance: float
    notes: list = field(default_factory=list)

    @property
    def per_test_level(self):
        return self.level / self.n_tests

    def false_alarm_rule(self):
        """One sentence on how the verdicts control false alarms."""
        return (f"a point is 'biased' when some coefficient's KS distance exceeds "
                f"{self.tolerance:.3f} noise floors: each of the {self.n_tests} tests (grid "
                f"points x coefficients) at level {self.per_test_level:.3g}, so that a setting "
                f"without bias is called biased anywhere in the table with probability at "
                f"most {self.level:g} (Bonferroni; Kolmogorov distribution with the ESS of "
                f"the empirical CDF as n)")

    def as_dict(self):
        return {"recommended": self.recommended, "reference": self.reference,
                "tuned_step_size": self.tuned_step_size,
                "false_alarms": {"level": self.level, "tests": self.n_tests,
                                 "per_test_level": self.per_test_level,
                                 "threshold_in_floors": self.tolerance,
                                 "rule": self.false_alarm_rule()},
                "notes": self.notes, "rows": self.rows}


def model_fingerprint(model):
    """A hash of the data, prior and family: the key of the cached reference run."""
    h = hashlib.sha1()
    h.update(f"{model.family_name}|{model.add_intercept}|{model.noise_sd}|{model.X.shape}|"
             f"{model.X.dtype}".encode())
    for _, block in row_blocks(model.X, dtype=None):
        h.update(np.ascontiguousarray(block).tobytes())
    for arr in (model.y, model.offset, model.prior_mean, model.prior_prec):
        h.update(np.ascontiguousarray(arr).tobytes())
    for name in ("weights", "trials"):   # per-row data of some models: part of the likelihood
        arr = getattr(model, name)
        h.update(name.encode() + (b"-" if arr is None else np.ascontiguousarray(arr).tobytes()))
    return h.hexdigest()[:16]


def reference_draws(model, *, cache_dir=None, draws=20_000, seed=0, preparation=None):
    """Long full-data MALA run used as the reference for non-conjugate models.

    The draws are thinned to about one per effective sample of their empirical CDF
    (`ecdf_ess`), so the two-sample KS floor can treat them as independent. Cached as
    ``reference-<fingerprint>.npz`` in ``cache_dir``.
    A `Preparation` of the model, when given, spares the run its own mode search.
    """
    path = None
    if cache_dir is not None:
        path = Path(cache_dir) / f"reference-{model_fingerprint(model)}.npz"
        if path.exists():
            with np.load(path, allow_pickle=False) as z:
                return z["draws"]
    r = sample(model, method="mala", chains=4, draws=draws // 4, warmup=1000, seed=seed,
               preparation=preparation)
    ess = float(np.min(ecdf_ess(r.draws)))
    thin = max(1, int(math.floor(r.draws.shape[0] * r.draws.shape[1] / max(ess, 1.0))))
    flat = r.draws[:, ::thin].reshape(-1, r.draws.shape[2])
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_npz(path, draws=flat)
    return flat


# The kernels this process has already run, by what decides their compiled types.
_WARMED = set()


def _warm_kernels(model, settings, options):
    """Run the point's kernels once, untimed, before its timed run.

    numba compiles a kernel (or loads it from its cache) at its first call in a process for
    the argument types of that call, which depend on the model's arrays and the settings. A
    sweep's first point on each worker paid that inside its timed run (on an idle 2-core
    machine 0.26-0.46 s against 0.036 s for the same work at the next points), which
    deflated its ESS per second, the figure the recommendation ranks by. A run of one chain
    and two draws, with everything else as the point's, calls the same kernels with the same
    types; it is done once per process and kind of run.
    """
    arrays = tuple((a.dtype.str, a.ndim, a.flags.c_contiguous, a.flags.writeable)
                   for a in (*_design_parts(model.X), model.y, model.offset) if a is not None)
    record = settings.record()
    key = (type(model).__name__, arrays,
           tuple(sorted((k, repr(v)) for k, v in record.items()
                        if k not in ("step_size", "seed", "chains", "draws", "warmup"))),
           settings.warmup > 0)
    if key in _WARMED:
        return
    tiny = replace(settings, chains=1, draws=2, warmup=min(settings.warmup, 2), seed=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sample(model, tiny, **options)
    _WARMED.add(key)


def _run_point(model, reference, tolerance, settings, options, extrapolate):
    method, step, batch = settings.method, settings.step_size, settings.batch_size
    _warm_kernels(model, settings, options)
    t = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = sample(model, settings, **options)
    seconds = time.perf_counter() - t
    nan = float("nan")
    ks_max = ratio_max = floor = ess_min = ess_ecdf_min = nan
    if not np.all(np.isfinite(r.draws)):
        verdict = "non-finite draws"
    else:
        k = ks_check(r.draws, reference, tolerance=tolerance)
        ratio = np.where(np.isfinite(k.ratio), k.ratio, np.inf)
        j = int(np.argmax(ratio))
        ks_max, ratio_max, floor = float(np.max(k.ks)), float(ratio[j]), float(k.floor[j])
        ess_min = float(np.min(ess_bulk(r.draws)))
        ess_ecdf_min = float(np.min(k.ess))
        if not k.conclusive:
            verdict = f"inconclusive (ECDF ESS < {MIN_ESS_FOR_VERDICT})"
        else:
            verdict = "within noise" if ratio_max <= tolerance else "biased"
    sd = r.stats["log_ratio_sd"]
    iters = r.n_chains * (settings.warmup + r.n_draws)
    finite = bool(np.all(np.isfinite(r.draws)))
    row = {
        "method": method, "step_size": float(step),
        "batch_size": int(batch) if METHODS[method].minibatch else None,
        "ks_max": ks_max, "ks_ratio_max": ratio_max, "ks_floor": floor, "ess_bulk_min": ess_min,
        "ess_ecdf_min": ess_ecdf_min,
        "ess_per_second": ess_min / r.sampling_seconds if r.sampling_seconds > 0 else nan,
        "acceptance_rate": r.acceptance_rate,
        "log_ratio_sd_mean": float(np.nanmean(sd)) if np.isfinite(sd).any() else float("nan"),
        "data_evaluations_per_draw": r.data_evaluations / iters, "wall_seconds": seconds,
        "verdict": verdict, "moments": moments(r.draws) if finite else None,
        "extrapolation": None,
    }
    if extrapolate and finite and method == "sgld":
        row["extrapolation"] = step_extrapolation(model, settings, options["preparation"])
    row.update(bias_columns(row, reference_moments(reference)))
    return row


def _sweep_task(shared, task):
    model, reference, tolerance, base, options, extrapolate = shared
    method, step, batch, seed = task
    settings = replace(base, method=method, step_size=step, batch_size=batch, seed=seed)
    return _run_point(model, reference, tolerance, settings, options, extrapolate)


# Settings that sweep() sets itself for each grid point, and what to use instead.
_SWEEP_OWNS = {
    "method": "use methods=[...] (the methods of the grid)",
    "step_size": "use step_sizes=[...] (the step sizes of the grid)",
    "batch_size": "use batch_sizes=[...] (the batch sizes of the grid)",
}


def _grid_values(field, values, what, example):
    """``values`` as a non-empty list (not a string or a scalar), or InputError."""
    if isinstance(values, (str, bytes, dict)):
        fail(field, f"must be a list of {what}, got the {type(values).__name__} {values!r}",
             f"give a list, e.g. {field}={example}")
    try:
        out = list(values)
    except TypeError:
        fail(field, f"must be a list of {what}, got {values!r}",
             f"give a list, e.g. {field}={example}")
    if not out:
        fail(field, "is empty, so the grid has no points", f"give at least one, e.g. "
             f"{field}={example}, or leave it out for the default")
    return out


def _check_grid(model, methods, step_sizes, batch_sizes):
    methods = _grid_values("methods", methods, "method names", '["penalty-mala", "sgld"]')
    for m in methods:
        one_of("methods", m, tuple(METHODS), "method")
    if step_sizes is not None:
        step_sizes = _grid_values("step_sizes", step_sizes, "numbers > 0", "[0.05, 0.1, 0.2]")
        for h in step_sizes:
            if not is_number(h) or not math.isfinite(h) or h <= 0:
                fail("step_sizes", f"must be finite numbers > 0, got {h!r}",
                     "give positive step sizes, or leave step_sizes out (the tuned step x "
                     "1/8 ... 8)")
    if batch_sizes is not None:
        batch_sizes = _grid_values("batch_sizes", batch_sizes, "integers >= 2", "[100, 300]")
        for n in batch_sizes:
            if not is_integer(n) or not 2 <= n <= model.n_rows:
                fail("batch_sizes", f"must be integers from 2 to {model.n_rows} (N), got {n!r}",
                     "give whole numbers of rows, or leave batch_sizes out (the tuned size)")
    return methods, step_sizes, batch_sizes


def sweep(model, settings=None, *, methods=("penalty-mala", "sgld"), step_sizes=None,
          batch_sizes=None, level=0.05, workers=None, scheduler="processes", cache_dir=None,
          progress=False, journal=None, extrapolate=True, **options):
    """Run a grid of (method, step size, batch size) and measure bias against cost.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    settings : SamplerSettings, optional
        The settings held fixed across the grid (chains, draws, warmup, seed, control
        variates, ...); its method, step size and batch size are replaced by the grid's.
        Default: ``SamplerSettings(seed=1)``, so that a sweep is reproducible.
    methods : sequence of str, default=("penalty-mala", "sgld")
        A non-empty list of method names (not a single string).
    step_sizes : sequence of float, optional
        Finite step sizes > 0. Default: the step size that ``penalty-mala`` (or the first
        adjusted method) tunes, times 1/8, 1/4, ..., 8 - wide enough to show where each
        method breaks.
    batch_sizes : sequence of int, optional
        Batch sizes of the minibatch methods, integers in [2, N]. Default: the batch size
        chosen by that tuning run (``batch_size="auto"``).
    level : float, default=0.05
        The false-alarm rate of the whole table, strictly between 0 and 1: a point is
        "biased" when some coefficient's KS distance to the reference exceeds the threshold
        at which each of the table's grid points x coefficients tests has level
        ``level / (points x coefficients)`` (Bonferroni; see `family_threshold`), so that
        a setting without bias is flagged anywhere in the table with probability at most
        ``level``.
    workers : int, optional
        Worker processes (default: the number of cores, at most the number of points).
    scheduler : str or distributed.Client, default="processes"
        Where grid points run: see `tallchain.executors`.
    cache_dir : path, optional
        Where the reference run of a non-conjugate model is cached.
    progress : bool, default=False
        Show a progress line as grid points finish.
    journal : SweepJournal, optional
        Rows of an interrupted sweep over the same grid (``done_rows``: those points are not
        run again) and a function called with each finished row (``on_row``).
    extrapolate : bool, default=True
        Estimate posterior means and sds in the limit of each biased setting, with their
        Monte Carlo errors (checks/_extrapolation.py): for ``sgld`` at each step h, paired
        chains at h and h/2 with shared noise (Richardson-Romberg; Durmus, Simsekli,
        Moulines, Badeau & Richard, NeurIPS 2016), which costs each sgld point about three
        times its own run; for the penalty methods, the jackknife in 1/n between consecutive
        batch sizes of the grid at the same step (the residual bias of the larger batch).
    **options
        Settings of `tallchain.SamplerSettings` that replace those of ``settings`` (chains,
        draws, warmup, seed, control_variates, ...). Not ``method``, ``step_size`` or
        ``batch_size`` (use ``methods``, ``step_sizes``, ``batch_sizes``), nor a run option
        (sweep prepares the model once and chooses where the points run).

    Notes
    -----
    The tuning run that centres the grid uses 2 chains, 200 draws and ``max(warmup, 200)``
    warmup iterations. Grid point k gets child k of ``SeedSequence(seed)``: results do not
    depend on the number of workers or the order of completion.

    Returns
    -------
    SweepResult

    Raises
    ------
    InputError
        For a bad grid (an empty or scalar ``methods``/``step_sizes``/``batch_sizes``, an
        unknown method, a step size that is not finite and > 0, a batch size outside
        [2, N]), a bad ``level``, ``seed``, ``scheduler`` or ``workers``, or a setting
        `tallchain.sample` would refuse for any method of the grid (``chains=0``, an unknown
        keyword, ...). Every check runs before the mode is found, the tuning run, the
        reference run and any worker.
    ModeNotFoundError
        When the posterior mode cannot be found.
    """
    check_model(model)
    methods, step_sizes, batch_sizes = _check_grid(model, methods, step_sizes, batch_sizes)
    level = check_level(level)
    check_scheduler(scheduler)
    check_workers(workers)
    check_flag("progress", progress)
    check_flag("extrapolate", extrapolate)
    journal = journal if journal is not None else SweepJournal()
    on_row, done_rows = journal.on_row, journal.done_rows
    if on_row is not None and not callable(on_row):
        fail("on_row", f"must be callable, got {type(on_row).__name__}",
             "give a function of one row (a dict), or leave it out")
    base = settings_from(settings, options, owner="sweep()", owned=_SWEEP_OWNS,
                         defaults={"seed": 1})
    tuner = next((m for m in methods if METHODS[m].adjusted), "penalty-mala")
    # Every grid point's settings (numeric step and batch sizes; a tuned size when not given)
    # and the tuning run's are checked before any pass over the data.
    for m in methods:
        replace(base, method=m, step_size=(step_sizes or [1.0])[0],
                batch_size=(batch_sizes or [2])[0]).check_against(model)
    tuning = replace(base, method=tuner, chains=2, draws=200, warmup=max(base.warmup, 200),
                     step_size="auto", batch_size=batch_sizes[0] if batch_sizes else "auto")
    tuning.check_against(model)

    # The mode and row caches are computed here once and travel with the model to every
    # worker; neither the tuning run nor any grid point recomputes them.
    orders = (0,) if base.control_variates is False else (base.proxy_order, 0)
    preparation = prepare(model, proxy_orders=orders)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tuned = sample(model, tuning, preparation=preparation)
    h_star = float(np.mean(tuned.tuned["step_size"]))
    if step_sizes is None:
        step_sizes = [h_star * f for f in DEFAULT_STEP_FACTORS]
    if batch_sizes is None:
        batch_sizes = [tuned.tuned["batch_size"] or 100]
    grid = []
    for m in methods:
        for n in (batch_sizes if METHODS[m].minibatch else [None]):
            for h in step_sizes:
                grid.append((m, float(h), None if n is None else int(n)))

    tolerance, _ = family_threshold(level, len(grid) * model.n_coef)
    if model.closed_form_posterior:
        reference, ref_kind = conjugate_posterior(model), "exact posterior"
    else:
        reference, ref_kind = reference_draws(model, cache_dir=cache_dir, seed=base.seed,
                                              preparation=preparation), \
            "full-data mala run (cached)"

    seeds = spawn_seeds(base.seed, len(grid))
    n_workers = worker_count(workers, len(grid))
    local = scheduler == "serial" or (scheduler == "processes" and n_workers == 1)
    run_options = {"parallel": local, "preparation": preparation}
    rows = [None] * len(grid)
    known = {(r["method"], r["step_size"], r["batch_size"]): r for r in (done_rows or [])}
    todo = []
    for i, (m, h, n) in enumerate(grid):
        key = (m, h, n if METHODS[m].minibatch else None)
        if key in known:
            rows[i] = known[key]
        else:
            todo.append(i)
    def _done(k, row):
        rows[todo[k]] = row
        if on_row is not None:
            on_row(row)

    tasks = [(grid[i][0], grid[i][1], grid[i][2] or 2, seeds[i]) for i in todo]
    run_tasks(_sweep_task, (model, reference, tolerance, base, run_options, extrapolate), tasks,
              scheduler=scheduler, workers=n_workers, on_result=_done,
              progress="sweep" if progress else None)

    if extrapolate:
        add_batch_extrapolations(rows, reference_moments(reference),
                                 lambda m: METHODS[m].penalised)
    best, notes = recommend(rows)
    return SweepResult(rows=rows, recommended=best, reference=ref_kind, tuned_step_size=h_star,
                       level=float(level), n_tests=len(grid) * model.n_coef,
                       tolerance=tolerance, notes=notes)


def recommend(rows):
    """The fastest row (ESS per second) judged within noise, among methods that target the
    posterior; and notes for the user.

    A biased baseline (sgld, naive-mh) within the noise floor has a bias below what the sweep
    can detect, not none, and is never recommended; a note says when one was faster.
    """
    ok = [r for r in rows if r["verdict"] == "within noise" and np.isfinite(r["ess_per_second"])]
    sound = [r for r in ok if METHODS[r["method"]].targets_posterior]
    best = max(sound, key=lambda r: r["ess_per_second"]) if sound else None
    notes = []
    if best is None:
        notes.append("no setting of a method that targets the posterior was within the noise "
                     "floor: widen the grid toward smaller steps or larger batches")
    faster = [r for r in ok if not METHODS[r["method"]].targets_posterior
              and (best is None or r["ess_per_second"] > best["ess_per_second"])]
    if faster:
        r = max(faster, key=lambda r: r["ess_per_second"])
        notes.append(f"{r['method']} at step {r['step_size']:.4g} was within the noise floor "
                     f"with {r['ess_per_second']:.4g} ESS/s, but it is biased by construction "
                     "(its bias is below what this sweep detects, not zero): not recommended")
    return best, notes


def write_sweep(result, directory):
    """Write sweep.csv, sweep.json and sweep.png into ``directory``."""
    from ..plots import plot_sweep

    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)

    def _csv(tmp):
        with open(tmp, "w") as fh:
            fh.write(",".join(COLUMNS) + "\n")
            for r in result.rows:
                fh.write(",".join("" if r.get(c) is None else str(r[c]) for c in COLUMNS)
                         + "\n")

    atomic_write(out / "sweep.csv", _csv)
    write_json(out / "sweep.json", result.as_dict())
    plot_sweep(result, out / "sweep.png")


def _design_parts(X):
    """The arrays a kernel's compiled types depend on: X, or a sparse X's three arrays."""
    return (X.data, X.indices, X.indptr) if is_csr_design(X) else (X,)
