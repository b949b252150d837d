"""Output files of a run: posterior.nc, summary.csv, run.json (written atomically)."""

import contextlib
import json
import math
import os
from pathlib import Path

import numpy as np

from ._validation import check_folder, fail


def atomic_write(path, write):
    """Call ``write(tmp_path)`` and then rename onto ``path``: a crash never leaves a torn file."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def check_writable(field, folder):
    """Create ``folder`` if needed and write (and remove) a small file in it, so that a folder
    that cannot be written is refused in one line before any work, not after sampling."""
    folder = Path(folder)
    check_folder(field, folder)
    probe = folder / f".tallchain-write-test-{os.getpid()}"
    try:
        folder.mkdir(parents=True, exist_ok=True)
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        fail(field, f'cannot write to "{folder}" ({exc.strerror or exc})',
             "give a folder you can create and write to (--out DIR or [output] dir)")


@contextlib.contextmanager
def removed_if_left_empty(folder):
    """Remove ``folder`` again when the block fails, if the block created it and left it
    empty: a run refused for its data (after `check_writable` made the folder) leaves no empty
    output folder behind. A folder that existed before, or holds any file, is kept."""
    folder = Path(folder)
    existed = folder.exists()
    try:
        yield
    except BaseException:
        if not existed:
            with contextlib.suppress(OSError):    # not empty, or already gone: keep it
                folder.rmdir()
        raise


def write_npz(path, **arrays):
    """`numpy.savez` of ``arrays`` to ``path``, atomically (pickle-free arrays only)."""
    def _write(tmp):
        with open(tmp, "wb") as fh:   # a file object: savez adds no ".npz" to the name
            np.savez(fh, **arrays)

    atomic_write(path, _write)


def write_json(path, obj):
    def _write(tmp):
        with open(tmp, "w") as fh:
            json.dump(_jsonable(obj), fh, indent=2, allow_nan=False)
            fh.write("\n")

    atomic_write(path, _write)


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return obj


def run_record(result, summary, wall_seconds=None):
    """The run.json content (keys of the interface contract plus the settings after tuning).

    ``summary`` is None for a run interrupted before its first draw: the figures that need
    draws are then null, and ``status`` says "interrupted" with ``completed_draws`` 0.
    """
    run = summary.run if summary is not None else {}
    return {
        "status": result.status,
        "completed_draws": result.completed_draws,
        "settings": result.settings.record(),
        "tuned": result.tuned,
        "coef_names": result.coef_names,
        "model": result.model_record,
        "n_rows": result.n_rows,
        "setup_seconds": result.setup_seconds,
        "sampling_seconds": result.sampling_seconds,
        "wall_seconds": wall_seconds if wall_seconds is not None
        else result.time_to_last_draw,
        # start to the last draw: loading, set-up (mode, Laplace, caches) and sampling
        "timing": result.timing,
        "ess_per_total_second": run.get("ess_per_total_second"),
        "data_evaluations": result.data_evaluations,
        "data_evaluations_per_draw": result.data_evaluations
        / max(1, result.n_chains * (result.settings.warmup + result.completed_draws)),
        **{key: run.get(key) for key in ("acceptance_rate", "log_ratio_sd_mean", "ess_bulk_min",
                                         "ess_per_second", "ess_per_data_pass")},
        "data_passes": run.get("data_passes", result.data_passes),
        "nonfinite_count": result.nonfinite_count,
        "penalty_beyond_bound_count": result.penalty_beyond_bound_count,
        "penalty_error_bound": result.penalty_error_bound,
        "warmup_counts": result.warmup_counts,
        "warnings": list(result.warnings) + list(summary.warnings if summary else ()),
    }


def save_result(result, directory, *, summary=None, wall_seconds=None, extra=None,
                interval=0.9):
    """Write posterior.nc, summary.csv and run.json of ``result`` into ``directory`` (created
    if needed); ``summary`` is ``result.summary(warn=False, interval=interval)`` unless given.
    A run interrupted before its first draw gets no summary.csv (there is nothing to
    summarise); run.json and posterior.nc say ``status`` "interrupted", 0 draws kept.

    Returns the summary (None without draws), so a caller can report it without recomputing.
    """
    if not isinstance(directory, (str, os.PathLike)):
        fail("directory", f"must be a folder path, got {type(directory).__name__}",
             'give a path such as "runs/example"')
    out = Path(directory)
    check_folder("directory", out)
    if summary is None and result.completed_draws:
        summary = result.summary(warn=False, interval=interval)
    out.mkdir(parents=True, exist_ok=True)
    tree = result.to_arviz()
    atomic_write(out / "posterior.nc", lambda tmp: tree.to_netcdf(tmp, engine="h5netcdf"))
    if summary is not None:
        atomic_write(out / "summary.csv", summary.to_csv)
    else:   # interrupted in warmup: no table of NaN, and none left from an earlier run
        (out / "summary.csv").unlink(missing_ok=True)
    record = run_record(result, summary, wall_seconds)
    if extra:
        record.update(extra)
    write_json(out / "run.json", record)
    return summary
