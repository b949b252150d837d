"""The command line: end-to-end runs, exit codes, and one-line messages for every bad input.

``main([...])`` runs in-process (capsys); two real subprocess calls of the installed
``tallchain`` script prove that no traceback escapes.
"""

import csv
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import arviz as az
import numpy as np
import pytest

import tallchain as tc
from tallchain.app import _cli as cli
from tallchain.app import _demo as demo
from tallchain.app import _registry
from tallchain.data import _load_table

SCRIPT = Path(sys.executable).with_name("tallchain")
RUN_KEYS = ("setup_seconds", "sampling_seconds", "wall_seconds", "data_evaluations",
            "acceptance_rate", "log_ratio_sd_mean", "ess_bulk_min", "ess_per_second",
            "ess_per_data_pass")
FAST = """\
[sampler]
method = "penalty-mala"
chains = 2
draws = 150
warmup = 100
seed = 3
"""


def _logistic_data(rng, n=400):
    X = rng.standard_normal((n, 2))
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-(0.3 + X @ [1.0, -0.5])))).astype(float)
    return X, y


def _setup(folder, X, y, family="logistic", model_extra="", rest=FAST, data_extra=""):
    np.save(folder / "X.npy", X)
    np.save(folder / "y.npy", y)
    path = folder / "run.toml"
    path.write_text(f'[data]\nx = "X.npy"\ny = "y.npy"\n{data_extra}\n'
                    f'[model]\nfamily = "{family}"\n{model_extra}\n{rest}')
    return path


def _run(capsys, *argv):
    code = cli.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _assert_one_error(code, err, pattern):
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("tallchain: error: ")
    assert "Traceback" not in err
    assert re.search(pattern, lines[0]), lines[0]


def test_run_writes_the_contract_files(tmp_path, rng, capsys):
    path = _setup(tmp_path, *_logistic_data(rng))
    code, out, err = _run(capsys, "run", path, "--out", tmp_path / "out")
    assert code == 0
    tree = az.from_netcdf(tmp_path / "out" / "posterior.nc")
    beta = tree["posterior"]["beta"]
    assert beta.dims == ("chain", "draw", "coef")
    assert beta.shape == (2, 150, 3)
    assert list(beta["coef"].values) == ["intercept", "x0", "x1"]
    for name in ("accepted", "log_ratio_sd", "step_size", "batch_size"):
        assert name in tree["sample_stats"]
    with open(tmp_path / "out" / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["coef"] for r in rows] == ["intercept", "x0", "x1"]
    assert list(rows[0]) == ["coef", "mean", "sd", "lower_90", "median", "upper_90",
                             "odds_ratio", "odds_ratio_lower_90", "odds_ratio_upper_90",
                             "ess_bulk", "ess_tail", "r_hat", "mcse_mean", "laplace_ks",
                             "ks_floor", "laplace_shift", "laplace_sd_ratio"]
    record = json.loads((tmp_path / "out" / "run.json").read_text())
    for key in RUN_KEYS:
        assert key in record
    assert record["wall_seconds"] >= record["sampling_seconds"]
    assert record["settings"]["draws"] == 150 and record["family"] == "logistic"
    # the human summary and where the files went
    assert "penalty-mala: 2 chains x 150 draws after 100 warmup, N = 400 rows" in out
    assert re.search(r"^coefficient +mean +sd +90% interval +odds ratio +90% interval "
                     r"+ESS \(bulk\) +R-hat +Laplace KS/floor$", out, re.M)
    # the intercept has no odds ratio ("-"); the Laplace gap is in noise floors
    assert re.search(r"^intercept +\S+ +\S+ +\[ *\S+, +\S+\] +- +- +\d+ +\d\.\d{3} +\d+\.\d\d$",
                     out, re.M)
    assert "ESS/s" in out
    assert f"wrote posterior.nc, summary.csv, run.json to {tmp_path / 'out'}" in out
    # 150 draws are too few for the ESS rule: reported as one warning line each, no traceback
    lines = err.strip().splitlines()
    assert lines and all(line.startswith("tallchain: warning: ") for line in lines)
    assert any("smallest ESS" in line for line in lines)


@pytest.mark.slow
def test_run_on_worker_processes_writes_the_draws_of_a_run_in_threads(tmp_path, rng, capsys):
    path = _setup(tmp_path, *_logistic_data(rng))
    assert _run(capsys, "run", path, "--out", tmp_path / "threads", "--quiet")[0] == 0
    code = _run(capsys, "run", path, "--out", tmp_path / "procs", "--quiet",
                "--scheduler", "processes", "--workers", "2")[0]
    assert code == 0
    a = az.from_netcdf(tmp_path / "threads" / "posterior.nc")["posterior"]["beta"].values
    b = az.from_netcdf(tmp_path / "procs" / "posterior.nc")["posterior"]["beta"].values
    assert np.array_equal(a, b)  # the same kernel from the same seeds: bitwise


def test_options_override_the_config(tmp_path, rng, capsys):
    path = _setup(tmp_path, *_logistic_data(rng))
    code, out, _ = _run(capsys, "run", path, "--out", tmp_path / "o", "--method", "penalty-rwm",
                        "--draws", "40", "--chains", "1", "--warmup", "60", "--seed", "9",
                        "--step-size", "0.5", "--batch-size", "50", "--quiet")
    assert code == 0 and out == ""
    record = json.loads((tmp_path / "o" / "run.json").read_text())
    settings = record["settings"]
    assert (settings["method"], settings["draws"], settings["chains"], settings["warmup"],
            settings["seed"], settings["step_size"], settings["batch_size"]) == \
        ("penalty-rwm", 40, 1, 60, 9, 0.5, 50)
    assert record["tuned"]["step_size"] == [0.5] and record["tuned"]["batch_size"] == 50


def test_csv_with_standardize_end_to_end_and_cached(tmp_path, rng, capsys, monkeypatch):
    X, y = _logistic_data(rng, 600)
    X = X * [3.0, 0.2] + [10.0, -1.0]
    table = np.column_stack([X, y])
    np.savetxt(tmp_path / "d.csv", table, delimiter=",", header="temp,load,late", comments="")
    (tmp_path / "run.toml").write_text('[data]\nx = "d.csv"\ny = "late"\nstandardize = true\n'
                                       '[model]\nfamily = "logistic"\n' + FAST)
    code, out, _ = _run(capsys, "run", tmp_path / "run.toml", "--out", tmp_path / "a")
    assert code == 0
    assert "coefficients below are on the original scale" in out
    caches = sorted(tmp_path.glob(".tallchain-cache/d.csv-*/*.npy"))
    assert [p.name for p in caches] == ["X.npy", "y.npy"]
    # Reported on the original scale: the posterior mean sits near the mode of the model fitted
    # to the unstandardised columns (within 4 posterior sd; the Laplace sd is the yardstick).
    # The prior sd 10 on the standardised scale is weak here, so the two modes nearly agree.
    laplace = tc.find_mode(tc.LogisticRegression(X, y))
    with open(tmp_path / "a" / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    mean = np.array([float(r["mean"]) for r in rows])
    sd = np.sqrt(np.diag(laplace.cov))
    assert np.all(np.abs(mean - laplace.mode) < 4 * sd), (mean, laplace.mode, sd)
    assert [r["coef"] for r in rows] == ["intercept", "temp", "load"]
    record = json.loads((tmp_path / "a" / "run.json").read_text())
    st = record["data"]["standardization"]
    # the recorded scale is the column's sd (its rounding is tested in tests/data/test_io.py)
    assert st["scale"][0] == pytest.approx(X[:, 0].std(), rel=1e-6)
    # Power check: the coefficients of the standardised columns, as the sampler saw them
    # (b_z = b_x s, a_z = a_x + b_x . c), are not within 4 sd of the original-scale mode.
    seen = np.r_[mean[0] + mean[1:] @ np.array(st["center"]), mean[1:] * np.array(st["scale"])]
    assert not np.all(np.abs(seen - laplace.mode) < 4 * sd), (seen, laplace.mode, sd)

    # The second run memory-maps the cache and does not parse the CSV.
    def no_parse(*args, **kwargs):
        raise AssertionError("the CSV was parsed again")

    monkeypatch.setattr(_load_table, "_fill", no_parse)
    code, _, _ = _run(capsys, "run", tmp_path / "run.toml", "--out", tmp_path / "b", "--quiet")
    assert code == 0
    assert sorted(tmp_path.glob(".tallchain-cache/d.csv-*/*.npy")) == caches
    assert (tmp_path / "b" / "posterior.nc").exists()


def test_constant_column_is_a_warning_line(tmp_path, rng, capsys):
    # Without an intercept: a constant column beside an intercept makes mode finding report
    # separation (see the report to the lead), which is not what this test is about.
    X, y = _logistic_data(rng)
    X[:, 1] = 1.0
    path = _setup(tmp_path, X, y, data_extra="add_intercept = false",
                  rest=FAST.replace("draws = 150", "draws = 30"))
    code, _, err = _run(capsys, "run", path, "--out", tmp_path / "o", "--quiet")
    assert code == 0, err
    assert "tallchain: warning: constant column(s) x1: their coefficients are informed by the " \
           "prior alone; drop them from data.columns" in err


def _bad_x_nan(X, y):
    X[7, 1] = np.nan
    return X, y


def _bad_y_inf(X, y):
    y[5] = np.inf
    return X, y


def _bad_label(X, y):
    y[3] = 2.0
    return X, y


def _short_y(X, y):
    return X, y[:-1]


def _object_x(X, y):
    return np.array([object()] * 4, dtype=object), y


@pytest.mark.parametrize("change, family, pattern", [
    (_bad_x_nan, "logistic", r"data\.x: contains nan in row 7, column 1; remove or impute"),
    (_bad_y_inf, "linear", r"data\.y: contains inf in row 5; remove or impute"),
    (_bad_label, "logistic", r"data\.y: has label 2 in row 3 \(1 row outside \{0, 1\}\); "
                             r"logistic regression needs labels 0 or 1"),
    (_short_y, "logistic", r"data\.y: has 399 rows but X has 400; give X and y with the same"),
])
def test_bad_data_exits_2_with_row_and_column(tmp_path, rng, capsys, change, family, pattern):
    path = _setup(tmp_path, *change(*_logistic_data(rng)), family=family)
    _assert_one_error(*_run(capsys, "run", path)[::2], pattern)


@pytest.mark.parametrize("y_bad, pattern", [
    (-1.0, r"data\.y: has count -1 in row 4 \(1 row not a count\); Poisson regression needs "
           r"non-negative integer counts"),
    (1.5, r"data\.y: has count 1\.5 in row 4"),
])
def test_bad_poisson_counts(tmp_path, rng, capsys, y_bad, pattern):
    X = rng.standard_normal((50, 2))
    y = rng.poisson(2.0, 50).astype(float)
    y[4] = y_bad
    path = _setup(tmp_path, X, y, family="poisson")
    _assert_one_error(*_run(capsys, "run", path)[::2], pattern)


def test_pickled_array_exits_2(tmp_path, rng, capsys):
    X, y = _logistic_data(rng)
    path = _setup(tmp_path, X, y)
    np.save(tmp_path / "X.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    _assert_one_error(*_run(capsys, "run", path)[::2],
                      r"data\.x: X\.npy holds Python objects \(a pickle\); pickles are never read")


@pytest.mark.parametrize("argv, model_extra, rest, pattern", [
    (["--step-size", "0"], "", FAST,
     r"sampler\.step_size \(from the command line\): must be > 0, got 0\.0"),
    (["--step-size", "-1"], "", FAST, r"sampler\.step_size \(from the command line\): must be > 0"),
    (["--batch-size", "1"], "", FAST,
     r"sampler\.batch_size \(from the command line\): must be >= 2, got 1"),
    ([], "", FAST + "batch_size = 1000\n",
     r"sampler\.batch_size: must be in \[2, 400\] \(N\), got 1000; give at least 2 rows"),
    (["--chains", "0"], "", FAST, r"sampler\.chains \(from the command line\): must be >= 1"),
    (["--method", "exact"], "", FAST,
     r"sampler\.method \(from the command line\): unknown method 'exact'; .*choose one of"),
    ([], "", FAST + "stepsize = 0.1\n",
     r'sampler\.stepsize: unknown key; did you mean "step_size"\?'),
    ([], "prior_sd = -2.0\n", FAST, r"model\.prior_sd: must be > 0, got -2\.0"),
    ([], "prior_mean = [0.0, 1.0]\n", FAST,
     r"model\.prior_mean: has 2 entries, expected 1 or 3; give a scalar or one value per"),
    ([], 'prior_cov = "cov.npy"\n', FAST, r"model\.prior_cov: is not positive definite"),
    ([], "", FAST.replace("[sampler]", "[sampler]\ndraws ="), r"run\.toml: malformed TOML at line"),
    (["--scheduler", "gpu"], "", FAST,
     r"scheduler: unknown scheduler 'gpu'; use \"threads\", \"processes\", \"serial\""),
    (["--workers", "0"], "", FAST, r"workers: must be a whole number >= 1, got 0"),
    ([], "", FAST + '[compute]\nscheduler = "gpu"\n', r"compute\.scheduler: unknown scheduler"),
])
def test_bad_settings_exit_2(tmp_path, rng, capsys, argv, model_extra, rest, pattern):
    np.save(tmp_path / "cov.npy", -np.eye(3))
    path = _setup(tmp_path, *_logistic_data(rng), model_extra=model_extra, rest=rest)
    _assert_one_error(*_run(capsys, "run", path, *argv)[::2], pattern)


def test_unknown_family_and_missing_files_exit_2(tmp_path, rng, capsys):
    path = _setup(tmp_path, *_logistic_data(rng), family="probit")
    _assert_one_error(*_run(capsys, "run", path)[::2],
                      r"model\.family: unknown family 'probit'; choose one of linear, logistic")
    _assert_one_error(*_run(capsys, "run", tmp_path / "none.toml")[::2],
                      r"none\.toml: config file does not exist")
    path = _setup(tmp_path, *_logistic_data(rng))
    (tmp_path / "y.npy").unlink()
    _assert_one_error(*_run(capsys, "run", path)[::2], r'data\.y: file ".*y\.npy" does not exist')


def test_a_folder_for_a_file_and_a_file_for_a_folder_exit_2(tmp_path, rng, capsys):
    path = _setup(tmp_path, *_logistic_data(rng))
    (tmp_path / "sub").mkdir()
    path.write_text(path.read_text().replace('x = "X.npy"', 'x = "sub"'))
    _assert_one_error(*_run(capsys, "run", path)[::2],
                      r'data\.x: ".*sub" is a folder, not a file; give a \.npy, \.npz or \.csv')
    path = _setup(tmp_path, *_logistic_data(rng))
    (tmp_path / "afile").write_text("")
    _assert_one_error(*_run(capsys, "run", path, "--out", tmp_path / "afile")[::2],
                      r'output\.dir \(from the command line\): ".*afile" is a file, not a folder')


@pytest.mark.parametrize("argv, pattern", [
    (["--thinned-draws", "0"], r"--thinned-draws: must be >= 1, got 0"),
    (["--draws", "0"], r"sampler\.draws \(from the command line\): must be >= 1, got 0"),
    (["--replications", "1"], r"--replications: must be >= 2, got 1"),
    (["--level", "2"], r"--level: must be a probability strictly between 0 and 1, got 2\.0"),
])
def test_bad_calibrate_options_name_the_option(tmp_path, rng, capsys, argv, pattern):
    path = _setup(tmp_path, *_logistic_data(rng))
    _assert_one_error(*_run(capsys, "calibrate", path, *argv)[::2], pattern)


def test_mode_not_found_exits_2(tmp_path, capsys):
    X = np.linspace(-1.0, 1.0, 200).reshape(-1, 1)
    y = (X[:, 0] > 0).astype(float)  # completely separated
    path = _setup(tmp_path, X, y, model_extra="prior_sd = 1e8\n")
    _assert_one_error(*_run(capsys, "run", path)[::2], r"mode finding: ")


@pytest.mark.parametrize("argv, pattern", [
    (["run"], r"the following arguments are required: CONFIG \(see 'tallchain run --help'\)"),
    (["run", "c.toml", "--bogus"], r"unrecognized arguments: --bogus"),
    (["run", "c.toml", "--step-size", "abc"],
     r"argument --step-size: must be a number or \"auto\", got 'abc'"),
    (["run", "c.toml", "--draws", "1.5"], r"argument --draws: invalid int value: '1\.5'"),
    (["sample"], r"argument COMMAND: invalid choice: 'sample'"),
    (["sweep", "c.toml", "--step-sizes", "1,abc"],
     r"argument --step-sizes: must be numbers separated by commas, like 0\.5,1,2; got '1,abc'"),
    (["sweep", "c.toml", "--batch-sizes", "32,1.5"],
     r"argument --batch-sizes: must be whole numbers separated by commas"),
])
def test_usage_errors_exit_2_in_one_line(capsys, argv, pattern):
    _assert_one_error(*_run(capsys, *argv)[::2], pattern)


def test_help_and_no_command(capsys):
    code, out, _ = _run(capsys, "--help")
    assert code == 0 and "run" in out and "demo" in out
    code, _, err = _run(capsys)
    assert code == 2 and "usage: tallchain" in err


def test_commands_are_registered_by_a_function(capsys):
    def add(parser):
        parser.add_argument("word")

    @_registry.command("echo-test", "say a word", add)
    def _echo(args):
        print(args.word)
        return 1

    try:
        assert _run(capsys, "echo-test", "hello")[:2] == (1, "hello\n")
    finally:
        del _registry.COMMANDS["echo-test"]


def test_demo_writes_its_folder(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(demo, "N_ROWS", 3000)
    code, out, err = _run(capsys, "demo")
    assert code == 0, err
    folder = tmp_path / "tallchain-demo"
    assert f"writing into {folder}" in out
    assert "INVENTED DATA" in out and "3,000 sailings" in out
    assert "beside the posterior" in out
    for name in ("wind_speed", "wave_height", "passengers_booked", "weekend", "inbound_late"):
        assert re.search(rf"^{name} +-?\d+\.\d+ +-?\d+\.\d+  \[", out, re.M), name
    for name in ("X.npy", "y.npy", "config.toml", "truth.json", "posterior.nc", "summary.csv",
                 "run.json"):
        assert (folder / name).exists(), name
    assert all(line.startswith("tallchain: warning: ") for line in err.strip().splitlines() if line)


def _subprocess(args, cwd):
    env = {**os.environ, "PYTHONWARNINGS": "error"}
    return subprocess.run([str(SCRIPT), *args], cwd=cwd, capture_output=True, text=True,
                          env=env, timeout=120)


def test_installed_script_reports_bad_input_without_traceback(tmp_path, rng):
    proc = _subprocess(["run", "missing.toml"], tmp_path)
    assert proc.returncode == 2
    assert proc.stderr.strip() == "tallchain: error: missing.toml: config file does not exist; " \
                                  "give the path of a .toml file"
    X, y = _logistic_data(rng)
    X[2, 0] = np.inf
    path = _setup(tmp_path, X, y)
    proc = _subprocess(["run", str(path)], tmp_path)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip() == "tallchain: error: data.x: contains inf in row 2, column 0; " \
                                  "remove or impute that value"



def test_the_module_runs_as_a_script_and_states_its_version():
    # `python -m tallchain.app._cli` once failed with a NameError: the main guard ran before
    # the helpers below it were defined.
    from importlib.metadata import version

    done = subprocess.run([sys.executable, "-W", "ignore::RuntimeWarning", "-m",
                           "tallchain.app._cli", "--version"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == f"tallchain {version('tallchain')}"


def _timed_run(tmp_path, rng, capsys):
    path = _setup(tmp_path, *_logistic_data(rng))
    code, out, _ = _run(capsys, "run", path, "--out", tmp_path / "out")
    assert code == 0
    return json.loads((tmp_path / "out" / "run.json").read_text()), out


def test_run_json_timing_parts_are_present_and_add_up(tmp_path, rng, capsys):
    record, _ = _timed_run(tmp_path, rng, capsys)
    t = record["timing"]
    parts = ("load_seconds", "setup_seconds", "sampling_seconds")
    for key in parts + ("total_seconds", "setup_mode_seconds", "setup_cache_seconds"):
        assert t[key] >= 0.0, key
    # the parts are measured one after the other inside the total
    assert sum(t[k] for k in parts) <= t["total_seconds"]
    assert t["setup_mode_seconds"] + t["setup_cache_seconds"] <= t["setup_seconds"]
    # the total stops at the last draw; the wall time also covers writing the outputs
    assert t["total_seconds"] <= record["wall_seconds"]
    # Newton took passes; the second-order row cache takes 1 (its rows): the gradient and
    # Hessian at the mode come from Newton's last passes
    assert t["setup_mode_passes"] >= 2 and t["setup_cache_passes"] == 1
    assert record["ess_per_total_second"] == record["ess_bulk_min"] / t["total_seconds"]
    assert record["ess_per_total_second"] < record["ess_per_second"]


def test_screen_report_shows_the_time_split_and_the_end_to_end_rate(tmp_path, rng, capsys):
    record, out = _timed_run(tmp_path, rng, capsys)
    t = record["timing"]
    line = re.search(r"^to the last draw (\S+) s: loading (\S+) s, set-up (\S+) s \(mode \S+ s, "
                     r"caches \S+ s, (\d+) data passes\), sampling (\S+) s$", out, re.M)
    assert line, out
    assert line[1] == f"{t['total_seconds']:.2f}" and line[2] == f"{t['load_seconds']:.2f}"
    assert int(line[4]) == t["setup_mode_passes"] + t["setup_cache_passes"]
    assert f"{record['ess_per_total_second']:.4g} end to end" in out
