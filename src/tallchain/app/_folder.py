"""The output folder of a run: what it holds, and what a new run may do with it (private).

A folder holds a finished run (run.json says ``"status": "complete"``), an interrupted one
(a checkpoint, or run.json says ``"interrupted"``), or nothing of ours. A fresh run never
replaces a run silently: it is refused with the options that continue it (``--resume``), add
draws to it (``--extend N``) or replace it (``--overwrite``).
"""

import dataclasses
import json
from pathlib import Path

from .._validation import fail

CHECKPOINT_NAME = "checkpoint.npz"
#: Every file `run` writes into its folder (removed by --overwrite before the new run).
RUN_FILES = ("posterior.nc", "summary.csv", "run.json", CHECKPOINT_NAME, "trace.png",
             "rank.png", "log_ratio_sd.png")


def recorded_run(folder):
    """``(status, draws requested, draws kept)`` of the run recorded in ``folder``'s run.json,
    or None when there is none. A checkpoint without a readable run.json counts as
    interrupted, with unknown counts."""
    folder = Path(folder)
    try:
        record = json.loads((folder / "run.json").read_text())
        return (record.get("status", "complete"), int(record["settings"]["draws"]),
                int(record.get("completed_draws", record["settings"]["draws"])))
    except (OSError, ValueError, KeyError, TypeError):
        return ("interrupted", None, None) if (folder / CHECKPOINT_NAME).exists() else None


def prepare_folder(config, label, *, resume=False, extend=None, overwrite=False):
    """Check what ``config.output_dir`` holds against what the run means to do with it.

    Returns the config to run: with ``extend``, ``sampler.draws`` is the recorded run's
    draws plus ``extend`` (and the run resumes from the checkpoint).
    """
    out = Path(config.output_dir)
    found = recorded_run(out)
    if extend is not None:
        if found is None or found[1] is None or not (out / CHECKPOINT_NAME).exists():
            fail("--extend", f'"{out}" holds no run with a checkpoint to extend',
                 "run it first (the checkpoint stays in the folder), or drop --extend")
        draws = dataclasses.replace(config.sampler, draws=found[1] + extend)
        return dataclasses.replace(config, sampler=draws)
    if resume or found is None:
        return config
    if overwrite:
        for name in RUN_FILES:
            (out / name).unlink(missing_ok=True)
        return config
    status, wanted, kept = found
    if status == "complete":
        fail(label, f'"{out}" holds a finished run ({wanted} draws per chain)',
             "give another --out, add draws with --extend N, or replace it with --overwrite")
    counts = "" if kept is None else f" ({kept} of {wanted} draws per chain kept)"
    fail(label, f'"{out}" holds an interrupted run{counts}',
         "continue it with --resume, or replace it with --overwrite")
