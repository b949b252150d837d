"""`[data] trials` and `[data] weights` through the command line.

Against what: the Python interface on the same arrays (`tc.BinomialRegression(X, y, trials=)`,
`weights=` on a model) run by `tc.sample` with the same settings and seed. The config path
only loads the columns and builds the model; the sampling is the same code, so the draws must
be equal bit for bit. The rows the config drops for a missing trials/weights value are left
out of the Python model by hand: if the config kept them (or dropped others), the two
posteriors differ and so do the draws (the power of the comparison; a second, explicit power
check runs the Python model with the weights dropped). Bad values, a family without trials
and a resume with changed weights are one-line refusals, exit 2.
"""

import json
import re

import arviz as az
import numpy as np
import pytest

import tallchain as tc
from interrupts import interrupt_after
from tallchain.app import _cli as cli

N = 300
SAMPLER = dict(chains=2, draws=200, warmup=150, seed=11)
SAMPLER_TOML = "[sampler]\n" + "".join(f"{k} = {v}\n" for k, v in SAMPLER.items())


def _write_csv(path, columns):
    """A CSV with the given {name: values}; None or NaN becomes an empty cell."""
    names = list(columns)
    with open(path, "w") as fh:
        fh.write(",".join(names) + "\n")
        for i in range(len(columns[names[0]])):
            cells = []
            for name in names:
                v = columns[name][i]
                cells.append("" if v is None or (isinstance(v, float) and np.isnan(v))
                             else v if isinstance(v, str) else f"{v:.17g}")
            fh.write(",".join(cells) + "\n")


def _config(folder, data, family, model_extra="", sampler=SAMPLER_TOML):
    path = folder / "run.toml"
    path.write_text(f"[data]\n{data}\n[model]\nfamily = \"{family}\"\n{model_extra}\n{sampler}")
    return path


def _run(path, out, capsys, *extra):
    code = cli.main(["run", str(path), "--out", str(out), "--quiet", *extra])
    return code, capsys.readouterr().err


def _beta(folder):
    return az.from_netcdf(folder / "posterior.nc")["posterior"]["beta"].values


def _binomial_data(rng):
    X = rng.standard_normal((N, 2))
    m = rng.integers(1, 9, N).astype(float)
    p = 1 / (1 + np.exp(-(0.3 + X @ [0.8, -0.5])))
    return X, m, rng.binomial(m.astype(np.int64), p).astype(float)


def _missing_at(values, rows):
    out = np.array(values, dtype=float)
    out[list(rows)] = np.nan
    return out


def test_binomial_table_with_trials_equals_the_python_model(tmp_path, rng, capsys):
    X, m, y = _binomial_data(rng)
    missing = (4, 150)
    _write_csv(tmp_path / "d.csv", {"a": X[:, 0], "b": X[:, 1], "n": _missing_at(m, missing),
                                   "y": y})
    path = _config(tmp_path, 'table = "d.csv"\ny = "y"\ncolumns = ["a", "b"]\ntrials = "n"',
                   "binomial")
    code, err = _run(path, tmp_path / "out", capsys)
    assert code == 0, err
    # the rows missing their trials are dropped and counted, in the warning and in run.json
    assert "dropped 2 of 300 rows of d.csv with a missing value (missing per column: n 2)" \
        in err, err
    record = json.loads((tmp_path / "out" / "run.json").read_text())["data"]
    assert record["trials"] == "n" and record["rows"]["missing"] == {"n": 2}
    assert record["rows"]["rows_used"] == N - 2
    keep = np.setdiff1d(np.arange(N), missing)
    model = tc.BinomialRegression(X[keep], y[keep], trials=m[keep])
    expected = tc.sample(model, **SAMPLER).draws
    assert np.array_equal(_beta(tmp_path / "out"), expected)


@pytest.fixture(scope="module")
def weighted_poisson(tmp_path_factory):
    """A Poisson problem with frequency weights (some missing) as .npy arrays and as a CSV."""
    rng = np.random.default_rng(20_261_203)
    X = rng.standard_normal((N, 2))
    y = rng.poisson(np.exp(0.2 + X @ [0.4, -0.3])).astype(float)
    w = rng.integers(0, 4, N).astype(float)
    return X, y, w


@pytest.mark.parametrize("route", ["npy", "csv"])
def test_poisson_with_weights_equals_the_python_model(weighted_poisson, tmp_path, capsys,
                                                       route):
    X, y, w = weighted_poisson
    if route == "npy":   # array files: no missing values to drop
        for name, arr in (("X", X), ("y", y), ("w", w)):
            np.save(tmp_path / f"{name}.npy", arr)
        data, keep = 'x = "X.npy"\ny = "y.npy"\nweights = "w.npy"', np.arange(N)
    else:               # x a CSV: weights a column of it, a missing weight drops the row
        _write_csv(tmp_path / "d.csv", {"a": X[:, 0], "b": X[:, 1],
                                       "w": _missing_at(w, [7]), "y": y})
        data, keep = 'x = "d.csv"\ny = "y"\nweights = "w"', np.setdiff1d(np.arange(N), [7])
    code, err = _run(_config(tmp_path, data, "poisson"), tmp_path / "out", capsys)
    assert code == 0, err
    if route == "csv":
        assert "(missing per column: w 1)" in err, err
    beta = _beta(tmp_path / "out")
    expected = tc.sample(tc.PoissonRegression(X[keep], y[keep], weights=w[keep]), **SAMPLER)
    assert np.array_equal(beta, expected.draws)
    # power: the same data without the weights give other draws
    unweighted = tc.sample(tc.PoissonRegression(X[keep], y[keep]), **SAMPLER)
    assert not np.array_equal(beta, unweighted.draws)


def test_linear_table_with_weights_equals_the_python_model(tmp_path, rng, capsys):
    X = rng.standard_normal((N, 2))
    y = 1.0 + X @ [0.5, 0.25] + rng.standard_normal(N)
    w = rng.uniform(0.5, 2.0, N)
    _write_csv(tmp_path / "d.csv", {"a": X[:, 0], "b": X[:, 1], "w": w, "y": y})
    path = _config(tmp_path, 'table = "d.csv"\ny = "y"\ncolumns = ["a", "b"]\nweights = "w"',
                   "linear", "noise_sd = 1.0")
    code, err = _run(path, tmp_path / "out", capsys)
    assert code == 0, err
    model = tc.LinearRegression(X, y, noise_sd=1.0, weights=w)
    assert np.array_equal(_beta(tmp_path / "out"), tc.sample(model, **SAMPLER).draws)


def _one_error_line(code, err):
    lines = [line for line in err.strip().splitlines()
             if not line.startswith("tallchain: warning:")]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


# (the bad cell, the role, what the message says); rows counted from 1 without the header
BAD_VALUES = {
    "zero trials": ("0", "trials", r"n: is 0 in row 6 of d\.csv, not usable as trials; give "
                                   r"whole numbers of trials >= 1"),
    "fractional trials": ("2.5", "trials", r"n: is 2\.5 in row 6 of d\.csv, not usable as "
                                           r"trials; give whole numbers of trials >= 1"),
    "text in trials": ("abc", "trials", r"n: has the value 'abc' in row 6 of d\.csv \(line 7\), "
                                        r"not a number"),
    "negative weight": ("-1", "weights", r"n: is -1 in row 6 of d\.csv, not usable as weights; "
                                         r"give frequency weights >= 0"),
}


@pytest.mark.parametrize("case", list(BAD_VALUES))
def test_a_bad_trials_or_weights_value_is_one_line_naming_column_and_row(tmp_path, rng, capsys,
                                                                          case):
    cell, role, pattern = BAD_VALUES[case]
    X, m, y = _binomial_data(rng)
    column = [f"{v:g}" for v in m]
    column[5] = cell
    _write_csv(tmp_path / "d.csv", {"a": X[:, 0], "n": column, "y": y})
    # the successes are counts, a Poisson response for the weights case
    path = _config(tmp_path, f'table = "d.csv"\ny = "y"\ncolumns = ["a"]\n{role} = "n"',
                   "binomial" if role == "trials" else "poisson")
    code, err = _run(path, tmp_path / "out", capsys)
    assert re.search(pattern, _one_error_line(code, err)), err
    assert not (tmp_path / "out" / "posterior.nc").exists()
    # power: the same table with a good value in that cell runs
    column[5] = f"{m[5]:g}"
    _write_csv(tmp_path / "d.csv", {"a": X[:, 0], "n": column, "y": y})
    code, err = _run(path, tmp_path / "good", capsys)
    assert code == 0, err


def test_trials_for_a_family_without_trials_is_refused_naming_the_fix(tmp_path, rng, capsys):
    X, m, y = _binomial_data(rng)
    _write_csv(tmp_path / "d.csv", {"a": X[:, 0], "n": m, "y": y})
    path = _config(tmp_path, 'table = "d.csv"\ny = "y"\ncolumns = ["a"]\ntrials = "n"',
                   "poisson")
    line = _one_error_line(*_run(path, tmp_path / "out", capsys))
    assert line == ('tallchain: error: data.trials: is only used by family "binomial", not '
                    '"poisson"; remove it'), line
    # power: the family that takes trials runs on the same config
    path = _config(tmp_path, 'table = "d.csv"\ny = "y"\ncolumns = ["a"]\ntrials = "n"',
                   "binomial")
    assert _run(path, tmp_path / "good", capsys)[0] == 0


def test_a_resume_with_changed_weights_is_refused_naming_them(tmp_path, capsys):
    rng = np.random.default_rng(20_261_203)
    X = rng.standard_normal((N, 2))
    y = rng.poisson(np.exp(0.2 + X @ [0.4, -0.3])).astype(float)
    w = rng.integers(1, 4, N).astype(float)
    for name, arr in (("X", X), ("y", y), ("w", w)):
        np.save(tmp_path / f"{name}.npy", arr)
    sampler = SAMPLER_TOML.replace("draws = 200", "draws = 1500")
    path = _config(tmp_path, 'x = "X.npy"\ny = "y.npy"\nweights = "w.npy"', "poisson",
                   sampler=sampler)
    with pytest.MonkeyPatch.context() as mp:
        interrupt_after(mp, 600)
        assert _run(path, tmp_path / "cut", capsys)[0] == 130
    before = (tmp_path / "cut" / "checkpoint.npz").read_bytes()
    changed = w.copy()
    changed[17] += 1
    np.save(tmp_path / "w.npy", changed)
    line = _one_error_line(*_run(path, tmp_path / "cut", capsys, "--resume"))
    assert re.search(r"^tallchain: error: resume: the checkpoint was made with other settings "
                     r"or data \(changed: data values \(weights\)\)", line), line
    assert (tmp_path / "cut" / "checkpoint.npz").read_bytes() == before
    # power: the unchanged weights resume
    np.save(tmp_path / "w.npy", w)
    code, err = _run(path, tmp_path / "cut", capsys, "--resume")
    assert code == 0, err
