"""The checking commands end to end: validate's exit codes, sweep and calibrate outputs."""

import json

import numpy as np
import pytest

from tallchain.app import main

pytestmark = pytest.mark.slow

BASE = """
[data]
x = "X.npy"
y = "y.npy"
[model]
family = "linear"
noise_sd = 1.0
[sampler]
{sampler}
seed = 5
[output]
dir = "{out}"
"""


@pytest.fixture()
def folder(tmp_path, rng):
    X = rng.standard_normal((3000, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", 0.3 + X @ [1.0, -0.5] + rng.standard_normal(3000))
    return tmp_path


def _config(folder, name, sampler):
    path = folder / f"{name}.toml"
    path.write_text(BASE.format(sampler=sampler, out=name))
    return str(path)


def test_validate_exits_1_on_a_biased_setting_and_0_on_a_sound_one(folder, capsys):
    bad = _config(folder, "bad", 'method = "naive-mh"\nstep_size = 1.0\nbatch_size = 100\n'
                                 "control_variates = false\ndraws = 3000")
    good = _config(folder, "good", 'method = "penalty-mala"\ncontrol_variates = false\n'
                                   "draws = 3000")
    assert main(["validate", bad, "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "tallchain: warning: the minibatch log-ratio sd is" in err  # the advice reaches the user
    record = json.loads((folder / "bad" / "validate.json").read_text())
    assert record["passed"] is False and "biased" in record["ks"]["verdict"]
    assert main(["validate", good, "--quiet"]) == 0
    assert json.loads((folder / "good" / "validate.json").read_text())["passed"] is True


def test_validate_exits_3_when_too_few_effective_draws(folder, capsys):
    # validate once said "passed" at bulk ESS 7-19: now it says inconclusive, exit code 3
    short = _config(folder, "short", 'method = "mala"\nchains = 1\ndraws = 60\nwarmup = 200')
    assert main(["validate", short]) == 3
    out = capsys.readouterr().out
    assert "below 100: too few effective draws to judge; raise draws" in out
    assert out.splitlines()[-1].startswith("inconclusive (false-alarm rate 0.05 over 3 "
                                           "coefficients, threshold 1.")
    assert json.loads((folder / "short" / "validate.json").read_text())["verdict"] == \
        "inconclusive"


def test_sweep_and_calibrate_write_their_files(folder):
    cfg = _config(folder, "grid", "draws = 400\nwarmup = 200\nchains = 2")
    assert main(["sweep", cfg, "--methods", "penalty-mala,sgld", "--step-sizes", "0.5,2",
                 "--quiet", "--scheduler", "serial"]) == 0
    for name in ("sweep.csv", "sweep.json", "sweep.png"):
        assert (folder / "grid" / name).exists()
    assert not (folder / "grid" / "sweep.partial.jsonl").exists()
    # --draws is draws per chain here as everywhere; the ranks use --thinned-draws of them.
    rc = main(["calibrate", cfg, "--replications", "12", "--thinned-draws", "9", "--draws",
               "300", "--quiet", "--scheduler", "serial"])
    assert rc in (0, 1)
    record = json.loads((folder / "grid" / "calibrate.json").read_text())
    assert record["replications"] == 12 and len(record["coefficients"]) == 3
    assert record["n_draws"] == 9 and record["settings"]["draws"] == 300
    assert rc == (0 if record["passed"] else 1)
    assert (folder / "grid" / "calibrate.png").exists()


def test_calibrate_names_the_option_that_asked_for_too_many_thinned_draws(folder, capsys):
    cfg = _config(folder, "c", "draws = 10\nchains = 2")
    assert main(["calibrate", cfg, "--thinned-draws", "30", "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert err.startswith("tallchain: error: --thinned-draws: is 30, more than the 20 draws ")
    assert main(["calibrate", cfg, "--thinned-draws", "30", "--draws", "5", "--quiet"]) == 2
    assert "raise draws (or chains), or give thinned_draws <= 10" in capsys.readouterr().err


def test_unknown_scheduler_is_bad_input(folder, capsys):
    cfg = _config(folder, "s", "draws = 100")
    assert main(["sweep", cfg, "--scheduler", "cluster-please", "--quiet"]) == 2
    assert "scheduler: unknown scheduler 'cluster-please'" in capsys.readouterr().err
    assert main(["sweep", cfg, "--workers", "0", "--quiet"]) == 2
    assert "workers: must be a whole number >= 1, got 0" in capsys.readouterr().err
