"""A real signal to a real `tallchain run`: completed draws are kept, --resume finishes the run
bitwise identical to an uninterrupted one."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import arviz as az
import numpy as np
import pytest

pytestmark = pytest.mark.slow

TALLCHAIN = Path(sys.executable).with_name("tallchain")

CONFIG = """
[data]
x = "X.npy"
y = "y.npy"
[model]
family = "logistic"
[sampler]
method = "mala"
chains = 2
draws = 8000
warmup = 300
seed = 4
[output]
dir = "{out}"
"""


def _write(tmp_path, name):
    (tmp_path / f"{name}.toml").write_text(CONFIG.format(out=name))
    return tmp_path / f"{name}.toml"


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_signal_keeps_draws_and_resume_is_bitwise_identical(tmp_path, rng, sig):
    X = rng.standard_normal((20_000, 3))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", (rng.random(20_000) < 1 / (1 + np.exp(-X @ [1, -1, 0.5])))
            .astype(float))
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    full = subprocess.run([TALLCHAIN, "run", _write(tmp_path, "full"), "--quiet"], cwd=tmp_path,
                          env=env, capture_output=True, text=True, timeout=300)
    assert full.returncode == 0, full.stderr

    cfg = _write(tmp_path, "cut")
    proc = subprocess.Popen([TALLCHAIN, "run", cfg, "--quiet"], cwd=tmp_path, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ckpt = tmp_path / "cut" / "checkpoint.npz"
    deadline = time.monotonic() + 120
    while not ckpt.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)  # the checkpoint appears at the end of warmup
    assert proc.poll() is None, "the run ended before it could be interrupted"
    time.sleep(0.2)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    assert "interrupted:" in err and "--resume" in err
    kept = az.from_netcdf(tmp_path / "cut" / "posterior.nc")["posterior"]["beta"]
    assert 0 < kept.sizes["draw"] < 8000

    resumed = subprocess.run([TALLCHAIN, "run", cfg, "--resume", "--quiet"], cwd=tmp_path,
                             env=env, capture_output=True, text=True, timeout=300)
    assert resumed.returncode == 0, resumed.stderr
    a = az.from_netcdf(tmp_path / "full" / "posterior.nc")["posterior"]["beta"].values
    b = az.from_netcdf(tmp_path / "cut" / "posterior.nc")["posterior"]["beta"].values
    assert np.array_equal(a, b)  # the same code resumed from its saved state: bitwise
    assert json.loads((tmp_path / "cut" / "run.json").read_text())["status"] == "complete"
    assert ckpt.exists()   # kept for --extend


def test_an_interrupt_while_writing_the_outputs_keeps_every_draw_for_resume(tmp_path, rng, capsys,
                                                                           monkeypatch):
    from tallchain.app import _cli as cli
    from tallchain.app import _service

    X = rng.standard_normal((2000, 3))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", (rng.random(2000) < 1 / (1 + np.exp(-X @ [1, -1, 0.5])))
            .astype(float))
    small = CONFIG.replace("draws = 8000", "draws = 500")
    for name in ("full", "cut"):
        (tmp_path / f"{name}.toml").write_text(small.format(out=tmp_path / name))
    assert cli.main(["run", str(tmp_path / "full.toml"), "--quiet"]) == 0

    real = _service.save_result
    calls = {"n": 0}

    def interrupted_once(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 1:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(_service, "save_result", interrupted_once)
    capsys.readouterr()
    assert cli.main(["run", str(tmp_path / "cut.toml"), "--quiet"]) == 130
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "interrupted: while writing the outputs" in err[0], err
    assert "--resume" in err[0] and (tmp_path / "cut" / "checkpoint.npz").exists()

    assert cli.main(["run", str(tmp_path / "cut.toml"), "--resume", "--quiet"]) == 0
    a = az.from_netcdf(tmp_path / "full" / "posterior.nc")["posterior"]["beta"].values
    b = az.from_netcdf(tmp_path / "cut" / "posterior.nc")["posterior"]["beta"].values
    assert np.array_equal(a, b)  # the same code resumed from its saved state: bitwise
    assert json.loads((tmp_path / "cut" / "run.json").read_text())["status"] == "complete"
