"""Interrupting a run and resuming it gives the draws of the uninterrupted run, bit for bit."""

from pathlib import Path

import numpy as np
import pytest

import tallchain as tc
from tallchain.exceptions import SamplingInterrupted
from interrupts import interrupt_after, interrupt_on_rounds


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(8)
    X = rng.standard_normal((3000, 3))
    y = (rng.random(3000) < 1 / (1 + np.exp(-(X @ [0.5, -1.0, 0.25])))).astype(float)
    return tc.LogisticRegression(X, y)


SETTINGS = dict(chains=3, draws=1500, warmup=1200, seed=31)
INTERRUPTED = r"^interrupted after \d+ draws per chain$"


def assert_interrupted(exc, checkpoint):
    """The message counts the draws the result keeps, and names where the checkpoint went."""
    assert str(exc) == f"interrupted after {exc.result.completed_draws} draws per chain"
    assert exc.checkpoint is not None and Path(exc.checkpoint) == Path(checkpoint)
    assert Path(checkpoint).exists()


@pytest.mark.parametrize("method,extra", [
    ("penalty-mala", {"batch_size": "auto"}),   # resumes inside the batch-size pilot phases
    ("penalty-mala", {"batch_size": 64, "gradient_batch": "carried"}),
    ("mala", {}),
])
def test_two_interrupts_and_two_resumes_equal_the_uninterrupted_run(model, tmp_path, monkeypatch,
                                                                   method, extra):
    full = tc.sample(model, method=method, **SETTINGS, **extra)
    ckpt = tmp_path / "run.ckpt.npz"
    count = interrupt_on_rounds(monkeypatch, {2, 4})
    with pytest.raises(SamplingInterrupted, match=INTERRUPTED) as first:
        tc.sample(model, method=method, checkpoint=ckpt, **SETTINGS, **extra)
    assert_interrupted(first.value, ckpt)
    assert first.value.result.completed_draws < SETTINGS["draws"]
    with pytest.raises(SamplingInterrupted, match=INTERRUPTED) as second:
        tc.sample(model, method=method, checkpoint=ckpt, resume=True, **SETTINGS, **extra)
    assert_interrupted(second.value, ckpt)
    assert second.value.result.completed_draws >= first.value.result.completed_draws
    done = tc.sample(model, method=method, checkpoint=ckpt, resume=True, **SETTINGS, **extra)
    assert count["n"] > 4
    # the same code resumed from its saved state: bitwise equal, statistics included
    assert np.array_equal(done.draws, full.draws)
    assert done.stats.keys() == full.stats.keys() and "accepted" in full.stats
    for key in full.stats:
        assert np.array_equal(done.stats[key], full.stats[key], equal_nan=True), key
    assert done.data_evaluations == full.data_evaluations
    # what tuning chose, the batch rule that set the batch and the drift included
    assert done.tuned == full.tuned


def test_a_run_resumed_after_warmup_reports_what_tuning_chose(model, tmp_path, monkeypatch):
    # Past warmup nothing rebatches, so the rule that set the batch must come from the
    # checkpoint (it used to come back as None).
    full = tc.sample(model, method="penalty-mala", **SETTINGS)
    ckpt = tmp_path / "run.ckpt.npz"
    with monkeypatch.context() as mp:
        interrupt_after(mp, SETTINGS["warmup"] + 1)
        with pytest.raises(SamplingInterrupted):
            tc.sample(model, method="penalty-mala", checkpoint=ckpt, **SETTINGS)
    done = tc.sample(model, method="penalty-mala", checkpoint=ckpt, resume=True, **SETTINGS)
    assert np.array_equal(done.draws, full.draws)
    assert full.tuned["batch_limited_by"] is not None
    assert done.tuned == full.tuned


def test_interrupted_result_keeps_completed_draws(model, tmp_path, monkeypatch):
    interrupt_on_rounds(monkeypatch, {3})
    with pytest.raises(SamplingInterrupted, match=INTERRUPTED) as info:
        tc.sample(model, method="mala", checkpoint=tmp_path / "c.npz", **SETTINGS)
    assert_interrupted(info.value, tmp_path / "c.npz")
    r = info.value.result
    assert 0 < r.completed_draws < SETTINGS["draws"]
    assert r.draws.shape == (3, r.completed_draws, 4) and np.all(np.isfinite(r.draws))


def test_resume_with_other_settings_is_refused(model, tmp_path, monkeypatch):
    interrupt_on_rounds(monkeypatch, {2})
    ckpt = tmp_path / "c.npz"
    with pytest.raises(SamplingInterrupted, match=INTERRUPTED):
        tc.sample(model, method="mala", checkpoint=ckpt, **SETTINGS)
    with pytest.raises(tc.InputError, match=r"resume: the checkpoint was made with other "
                                            r"settings or data \(changed: seed\)"):
        tc.sample(model, method="mala", checkpoint=ckpt, resume=True,
                  **dict(SETTINGS, seed=32))
    with pytest.raises(tc.InputError, match="resume: no checkpoint at"):
        tc.sample(model, method="mala", checkpoint=tmp_path / "none.npz", resume=True, **SETTINGS)


def test_a_checkpoint_of_an_older_version_is_refused(model, tmp_path, monkeypatch):
    # Version 2 still stored integer counters beside the chains; the counts now come from the
    # per-iteration statistics, so such a file cannot be resumed.
    import json

    interrupt_on_rounds(monkeypatch, {2})
    ckpt = tmp_path / "c.npz"
    with pytest.raises(SamplingInterrupted):
        tc.sample(model, method="mala", checkpoint=ckpt, **SETTINGS)
    with np.load(ckpt) as z:
        arrays = dict(z)
    meta = json.loads(str(arrays["meta"]))
    meta["version"] = 2
    arrays["meta"] = np.array(json.dumps(meta))
    np.savez(ckpt, **arrays)
    with pytest.raises(tc.InputError, match=r"resume: the checkpoint was made with other "
                                            r"settings or data \(changed: checkpoint version\)"):
        tc.sample(model, method="mala", checkpoint=ckpt, resume=True, **SETTINGS)
