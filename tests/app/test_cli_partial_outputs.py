"""Partial outputs say they are partial, finished runs are not replaced silently, and a run can
be extended from its checkpoint: through the command line, exit codes and one-line messages,
draws compared bit for bit (the same code continued from its saved state)."""

import json
import re
import shlex
import warnings

import arviz as az
import numpy as np
import pytest

from interrupts import interrupt_after
from tallchain.app import _cli as cli

CONFIG = """\
[sampler]
chains = 2
warmup = 200
draws = 300
seed = 11
[model]
family = "logistic"
[data]
x = "X.npy"
y = "y.npy"
"""


@pytest.fixture
def config(tmp_path, rng):
    X = rng.standard_normal((600, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", (rng.random(600) < 1 / (1 + np.exp(-X @ [1.0, -0.5])))
            .astype(float))
    (tmp_path / "run.toml").write_text(CONFIG)
    return tmp_path / "run.toml"


def _main(capsys, *argv):
    code = cli.main([str(a) for a in argv])
    return code, capsys.readouterr().err


def _beta(folder):
    return az.from_netcdf(folder / "posterior.nc")["posterior"]["beta"].values


def _record(folder):
    return json.loads((folder / "run.json").read_text())


def _one_error(code, err, pattern):
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err
    assert re.search(pattern, lines[0]), lines[0]


def test_an_interrupted_run_says_so_and_its_hint_repeats_the_options(config, tmp_path, capsys,
                                                                     monkeypatch):
    options = ["--out", tmp_path / "cut", "--method", "mala", "--draws", "1500",
               "--warmup", "150", "--quiet"]
    assert _main(capsys, "run", config, "--out", tmp_path / "full", *options[2:])[0] == 0
    with monkeypatch.context() as mp:
        interrupt_after(mp, 600)
        code, err = _main(capsys, "run", config, *options)
    assert code == 130 and "Traceback" not in err
    line = err.strip().splitlines()[-1]
    m = re.fullmatch(r"tallchain: interrupted: (\d+) of 1500 draws per chain kept in (.*) "
                     r"\(status interrupted\); continue with: (tallchain run .*)", line)
    assert m, line
    kept = int(m[1])
    assert 0 < kept < 1500
    hint = shlex.split(m[3])
    assert hint[2:] == [str(config), *map(str, options[:2]), "--draws", "1500", "--warmup",
                        "150", "--method", "mala", "--quiet", "--resume"]
    assert _record(tmp_path / "cut")["status"] == "interrupted"
    assert _record(tmp_path / "cut")["completed_draws"] == kept
    tree = az.from_netcdf(tmp_path / "cut" / "posterior.nc")
    assert tree["posterior"].attrs["status"] == "interrupted"
    assert int(tree["posterior"].attrs["completed_draws"]) == kept == _beta(tmp_path / "cut").shape[1]

    code, err = _main(capsys, *hint[1:])   # the hint, as given (after "tallchain")
    assert code == 0, err
    assert np.array_equal(_beta(tmp_path / "cut"), _beta(tmp_path / "full"))
    assert _record(tmp_path / "cut")["status"] == "complete"
    assert az.from_netcdf(tmp_path / "cut" / "posterior.nc")["posterior"].attrs["status"] \
        == "complete"


def test_an_interrupt_in_warmup_writes_no_summary_and_no_shape_warnings(config, tmp_path,
                                                                        capsys, monkeypatch):
    out = tmp_path / "o"
    with monkeypatch.context() as mp:
        interrupt_after(mp, 0, partial=50)
        code, err = _main(capsys, "run", config, "--out", out, "--quiet")
    assert code == 130
    assert err.strip().splitlines() == [line for line in err.strip().splitlines()
                                        if line.startswith("tallchain: interrupted: 0 of 300")]
    assert not (out / "summary.csv").exists()
    assert _record(out)["status"] == "interrupted" and _record(out)["completed_draws"] == 0
    assert _record(out)["ess_bulk_min"] is None
    assert "warmup_sample_stats" in az.from_netcdf(out / "posterior.nc")
    # Power: ArviZ does warn on such a draw dimension when the warning is not filtered.
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        az.from_dict({"posterior": {"beta": np.zeros((2, 0, 3))}}, dims={"beta": ["coef"]})
    assert any("chain dimension to be longer than draw" in str(w.message) for w in seen)


def test_a_finished_folder_is_not_replaced_without_overwrite(config, tmp_path, capsys):
    out = tmp_path / "o"
    assert _main(capsys, "run", config, "--out", out, "--quiet")[0] == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    code, err = _main(capsys, "run", config, "--out", out, "--seed", "12", "--quiet")
    _one_error(code, err, r'^tallchain: error: output\.dir \(from the command line\): ".*/o" '
                          r"holds a finished run \(300 draws per chain\); give another --out, add "
                          r"draws with --extend N, or replace it with --overwrite$")
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    code, err = _main(capsys, "run", config, "--out", out, "--seed", "12", "--overwrite",
                      "--quiet")
    assert code == 0, err
    assert _record(out)["settings"]["seed"] == 12   # power: --overwrite did replace it


def test_an_interrupted_folder_is_not_restarted_without_overwrite(config, tmp_path, capsys,
                                                                  monkeypatch):
    out = tmp_path / "o"
    with monkeypatch.context() as mp:
        interrupt_after(mp, 200, partial=100)
        assert _main(capsys, "run", config, "--out", out, "--quiet")[0] == 130
    kept = _record(out)["completed_draws"]
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    code, err = _main(capsys, "run", config, "--out", out, "--quiet")
    _one_error(code, err, rf'holds an interrupted run \({kept} of 300 draws per chain kept\); '
                          r"continue it with --resume, or replace it with --overwrite$")
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_extend_gives_the_draws_of_a_run_started_with_the_larger_count(config, tmp_path,
                                                                       capsys):
    # penalty-mala with batch_size "auto": warmup has five segments; the extension re-enters
    # the last (sampling) segment, whose kernel does not depend on the draw count.
    assert _main(capsys, "run", config, "--out", tmp_path / "long", "--draws", "500",
                 "--quiet")[0] == 0
    assert _main(capsys, "run", config, "--out", tmp_path / "ext", "--quiet")[0] == 0
    code, err = _main(capsys, "run", config, "--out", tmp_path / "ext", "--extend", "200",
                      "--quiet")
    assert code == 0, err
    assert _beta(tmp_path / "ext").shape == (2, 500, 3)
    assert np.array_equal(_beta(tmp_path / "ext"), _beta(tmp_path / "long"))
    record = _record(tmp_path / "ext")
    assert record["status"] == "complete" and record["settings"]["draws"] == 500
    # Power: the first 300 draws alone are not the 500 (the comparison can fail).
    assert not np.array_equal(_beta(tmp_path / "ext")[:, :300], _beta(tmp_path / "long"))


def test_an_interrupted_extension_is_continued_by_its_hint(config, tmp_path, capsys,
                                                          monkeypatch):
    out = tmp_path / "ext"
    assert _main(capsys, "run", config, "--out", out, "--draws", "1500", "--quiet")[0] == 0
    with monkeypatch.context() as mp:
        interrupt_after(mp, 200 + 1500 + 100)
        code, err = _main(capsys, "run", config, "--out", out, "--extend", "1500", "--quiet")
    assert code == 130
    hint = shlex.split(err.strip().splitlines()[-1].split("continue with: ")[1])
    assert hint[-4:] == ["--quiet", "--draws", "3000", "--resume"]
    assert _main(capsys, *hint[1:])[0] == 0
    assert _main(capsys, "run", config, "--out", tmp_path / "long", "--draws", "3000",
                 "--quiet")[0] == 0
    assert np.array_equal(_beta(out), _beta(tmp_path / "long"))


@pytest.mark.parametrize("argv,pattern", [
    (["--extend", "100", "--draws", "50"],
     r"--extend: adds draws to the recorded run, so --draws does not apply; give one of"),
    (["--extend", "100", "--overwrite"], r"--overwrite: cannot be combined with --extend"),
    (["--resume", "--overwrite"], r"--overwrite: cannot be combined with --resume"),
    (["--extend", "0"], r"--extend: must be >= 1, got 0"),
    (["--extend", "100"], r'--extend: ".*/empty" holds no run with a checkpoint to extend; run '
                          r"it first"),
])
def test_folder_options_are_checked_before_any_work(config, tmp_path, capsys, argv, pattern):
    code, err = _main(capsys, "run", config, "--out", tmp_path / "empty", *argv)
    _one_error(code, err, "^tallchain: error: " + pattern)


def test_a_resume_with_fewer_draws_than_kept_is_refused_and_keeps_the_run(config, tmp_path,
                                                                          capsys):
    out = tmp_path / "o"
    assert _main(capsys, "run", config, "--out", out, "--quiet")[0] == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    finished = _beta(out)
    code, err = _main(capsys, "run", config, "--out", out, "--resume", "--draws", "100",
                      "--quiet")
    _one_error(code, err, r"^tallchain: error: sampler\.draws \(from the command line\): is 100, "
                          r"fewer than the 300 draws per chain the checkpoint holds; give at "
                          r"least as many draws to resume this run$")
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    # Power: as many draws as kept resumes the finished run to the same draws.
    assert _main(capsys, "run", config, "--out", out, "--resume", "--draws", "300",
                 "--quiet")[0] == 0
    assert np.array_equal(_beta(out), finished)
