"""Sweeps and the conjugate-twin check on problems with exact answers.

Reference: the exact posterior of the linear-Gaussian model (Bishop PRML eqs. 3.53-3.54).
"""

import json

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import check_on_twin, ks_check, sweep, write_sweep

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def linear():
    rng = np.random.default_rng(11)
    X = rng.standard_normal((3000, 2)) @ np.array([[1.0, 0.5], [0.0, 1.0]])
    y = 0.3 + X @ [1.0, -0.5] + rng.standard_normal(3000)
    return tc.LinearRegression(X, y, noise_sd=1.0)


def test_sweep_shows_sgld_bias_and_recommends_an_unbiased_setting(linear, tmp_path):
    res = sweep(linear, methods=["penalty-mala", "sgld"], draws=2000, warmup=500, seed=1,
                workers=2)
    by = {(r["method"], r["step_size"]): r for r in res.rows}
    steps = sorted({r["step_size"] for r in res.rows})
    big = [by[("sgld", h)] for h in steps[-4:]]
    assert all(r["verdict"] in ("biased", "non-finite draws") for r in big)
    assert max(r["ks_ratio_max"] for r in big if r["verdict"] == "biased") > 1.5
    pen = [by[("penalty-mala", h)] for h in steps]
    assert all(r["ks_ratio_max"] <= 1.5 for r in pen if r["verdict"] != "non-finite draws")
    best = res.recommended
    assert best is not None and best["verdict"] == "within noise"
    # A fresh run at the recommended setting is within the floor.
    r = tc.sample(linear, method=best["method"], step_size=best["step_size"],
                  batch_size=best["batch_size"], draws=2000, warmup=500, seed=77)
    assert ks_check(r.draws, tc.conjugate_posterior(linear)).passed
    write_sweep(res, tmp_path)
    saved = json.loads((tmp_path / "sweep.json").read_text())
    assert saved["recommended"]["step_size"] == best["step_size"]
    header = (tmp_path / "sweep.csv").read_text().splitlines()[0].split(",")
    assert header[:3] == ["method", "step_size", "batch_size"] and "verdict" in header
    # spelled as in run.json
    assert {"acceptance_rate", "data_evaluations_per_draw", "wall_seconds", "ess_bulk_min",
            "ess_per_second", "log_ratio_sd_mean"} <= set(header)
    assert (tmp_path / "sweep.png").stat().st_size > 10_000


def test_sweep_numbers_do_not_depend_on_worker_count(linear):
    kw = dict(methods=["penalty-mala"], step_sizes=[0.5, 1.0], draws=300, warmup=100, seed=3)
    one = sweep(linear, workers=1, **kw)
    two = sweep(linear, workers=2, **kw)
    for a, b in zip(one.rows, two.rows):
        assert a["ks_max"] == b["ks_max"] and a["acceptance_rate"] == b["acceptance_rate"]


@pytest.mark.parametrize("family", ["linear", "logistic"])
def test_sweep_finds_the_mode_once(linear, monkeypatch, family):
    # The mode and row caches are computed once and shared by the tuning run, the reference
    # run (logistic: not conjugate) and every grid point.
    from tallchain.mcmc import _setup as sampling   # prepare() and sample() find the mode here

    model = linear if family == "linear" else tc.LogisticRegression(
        linear.X, (linear.y > np.median(linear.y)).astype(float))
    calls = []
    real = sampling.find_mode
    monkeypatch.setattr(sampling, "find_mode", lambda m, **kw: calls.append(1) or real(m, **kw))
    sweep(model, methods=["penalty-mala", "sgld"], step_sizes=[0.5, 1.0], draws=200,
          warmup=100, seed=3, scheduler="serial")
    assert len(calls) == 1


def test_twin_check_passes_a_sound_setting_and_fails_a_biased_one():
    rng = np.random.default_rng(5)
    X = rng.standard_normal((4000, 3))
    y = (rng.random(4000) < 0.3).astype(float)
    model = tc.LogisticRegression(X, y)
    sound = check_on_twin(model, seed=1, method="penalty-mala", control_variates=False,
                          draws=2000)
    assert sound.passed and sound.response == "prior-predictive"
    with pytest.warns(tc.NoisyLogRatioWarning):
        bad = check_on_twin(model, seed=1, method="naive-mh", control_variates=False,
                            batch_size=50, step_size=2.0, draws=2000)
    assert not bad.passed


@pytest.mark.parametrize("sgld_speed", [10.0, 1.0])
def test_a_biased_baseline_within_noise_is_never_recommended(sgld_speed):
    from tallchain.checks._sweep import recommend

    def row(method, h, ess_s, verdict="within noise"):
        return {"method": method, "step_size": h, "batch_size": 32, "ess_per_second": ess_s,
                "verdict": verdict}

    rows = [row("penalty-mala", 0.5, 2.0), row("penalty-mala", 1.0, 5.0),
            row("penalty-mala", 2.0, 9.0, "biased"), row("sgld", 0.3, sgld_speed)]
    best, notes = recommend(rows)
    assert (best["method"], best["step_size"]) == ("penalty-mala", 1.0)
    if sgld_speed > 5.0:      # faster than the recommendation: the user is told why not
        assert len(notes) == 1 and notes[0].startswith("sgld at step 0.3 was within the noise")
    else:
        assert notes == []
    best, notes = recommend([row("sgld", 0.3, 10.0), row("mala", 1.0, 1.0, "biased")])
    assert best is None
    assert notes[0].startswith("no setting of a method that targets the posterior")
