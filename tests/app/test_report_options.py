"""The report's options on the command line: the interval level (``--interval``, config key
``[output] interval``, default 0.9) and the coefficient plot written with ``--plots``."""

import csv
import re

import numpy as np
import pytest
from app.test_cli import FAST, _logistic_data, _run
from app.test_cli import _setup as _setup_run


def _setup(folder, output=""):
    """test_cli's logistic run config (2 chains x 150 draws), with an [output] section."""
    return _setup_run(folder, *_logistic_data(np.random.default_rng(20_261_203)),
                      rest=f"{FAST}{output}")


def _header(folder):
    with open(folder / "summary.csv") as fh:
        return next(csv.reader(fh))


def test_the_default_interval_is_90_percent(tmp_path, capsys):
    code, out, _ = _run(capsys, "run", _setup(tmp_path), "--out", tmp_path / "a")
    assert code == 0
    assert _header(tmp_path / "a")[3:9] == ["lower_90", "median", "upper_90", "odds_ratio",
                                            "odds_ratio_lower_90", "odds_ratio_upper_90"]
    assert re.search(r"^coefficient +mean +sd +90% interval +odds ratio +90% interval", out, re.M)


def test_interval_from_the_config_and_the_command_line(tmp_path, capsys):
    path = _setup(tmp_path, "[output]\ninterval = 0.95\n")
    assert _run(capsys, "run", path, "--out", tmp_path / "a", "--quiet")[0] == 0
    assert _header(tmp_path / "a")[3:6] == ["lower_95", "median", "upper_95"]
    code, out, _ = _run(capsys, "run", path, "--out", tmp_path / "b", "--interval", "0.5",
                        "--plots")
    assert code == 0
    assert _header(tmp_path / "b")[3:6] == ["lower_50", "median", "upper_50"]
    assert re.search(r"^coefficient +mean +sd +50% interval", out, re.M)
    assert (tmp_path / "b" / "coefficients.png").read_bytes()[:4] == b"\x89PNG"
    assert "coefficients.png" in out


@pytest.mark.parametrize("where, value, label", [
    ("file", "1.5", r"output\.interval"),
    ("file", '"0.9"', r"output\.interval"),
    ("option", "0", r"output\.interval \(from the command line\)"),
])
def test_a_bad_interval_is_one_line_and_exit_2(tmp_path, capsys, where, value, label):
    path = _setup(tmp_path, f"[output]\ninterval = {value}\n" if where == "file" else "")
    extra = ("--interval", value) if where == "option" else ()
    code, out, err = _run(capsys, "run", path, "--out", tmp_path / "a", *extra)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("tallchain: error: ")
    assert re.match(rf"tallchain: error: {label}: must be", lines[0]), lines[0]
    assert not (tmp_path / "a").exists()
