"""``tallchain estimate``: its files and exit codes; bad options refused before the data are read.

The estimates themselves are checked against the exact posterior in tests/mcmc/test_coupled.py.
"""

import json

import numpy as np
import pytest

from tallchain.app import _service, main

@pytest.fixture()
def config(tmp_path, rng):
    """A writer of a config for ``method`` over 400 rows of a linear model with known noise."""
    X = rng.standard_normal((400, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", 0.3 + X @ [1.0, -0.5] + rng.standard_normal(400))
    sections = {"data": 'x = "X.npy"\ny = "y.npy"', "model": 'family = "linear"\nnoise_sd = 1.0',
                "output": 'dir = "out"'}

    def write(method="penalty-mala"):
        sampler = f'method = "{method}"\nseed = 5\nwarmup = 300'
        text = "".join(f"[{name}]\n{body}\n" for name, body in
                       {**sections, "sampler": sampler}.items())
        (tmp_path / "c.toml").write_text(text)
        return str(tmp_path / "c.toml")

    return write


def test_estimate_writes_its_three_files(config, tmp_path, capsys):
    assert main(["estimate", config(), "--replicates", "6", "--lag", "2",
                 "--scheduler", "serial"]) == 0
    out = tmp_path / "out"
    record = json.loads((out / "estimate.json").read_text())
    assert record["replicates"] == 6 and record["lag"] == 2 and record["unmet"] == 0
    assert record["k"] <= record["m"] and record["batch_size"] >= 2
    assert set(record["coefficients"]) == {"intercept", "x0", "x1"}
    assert (out / "estimate.csv").read_text().splitlines()[0] == "coef,mean,se,lower,upper,sd,sd_se"
    assert (out / "tv_bound.png").stat().st_size > 0
    printed = capsys.readouterr().out
    assert "bound on the distance to the posterior below 0.01 after" in printed


def test_unmet_pairs_exit_3(config, tmp_path, capsys):
    rc = main(["estimate", config("rwm"), "--replicates", "4", "--span", "0,3",
               "--max-iterations", "3", "--scheduler", "serial", "--quiet"])
    assert rc == 3
    assert "did not meet within max_iterations = 3" in capsys.readouterr().err
    assert json.loads((tmp_path / "out" / "estimate.json").read_text())["unmet"] > 0


@pytest.mark.parametrize("args, start", [
    (["--replicates", "1"], "tallchain: error: --replicates: must be >= 2"),
    (["--lag", "0"], "tallchain: error: --lag: must be >= 1"),
    (["--span", "9,3"], "tallchain: error: --span: must be a pair of integers"),
    (["--span", "x"], "tallchain: error: argument --span: must be two whole numbers"),
    (["--method", "naive-mh"], "tallchain: error: sampler.method (from the command line): "
                               "naive-mh has no coupled version"),
])
def test_bad_options_exit_2_in_one_line_before_the_data(config, monkeypatch, capsys, args,
                                                        start):
    def boom(*a, **k):
        raise AssertionError("read the data")

    monkeypatch.setattr(_service, "build_model", boom)
    assert main(["estimate", config(), *args]) == 2
    err = capsys.readouterr().err
    assert err.startswith(start) and len(err.strip().splitlines()) == 1, err
