"""Configs with a table and a formula: resolution, one named message per bad input, a CLI run.

The run's posterior means are checked against statsmodels' `Logit` fit on the same design
(the maximum-likelihood estimate and its standard errors; with a weak prior and N = 3000 the
posterior mean lies within a few standard errors of it). The full flights case is
tests/app/test_flights.py (slow).
"""

import csv
import json
import textwrap

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from tallchain import data as io
from ulps import assert_ulps_close
from tallchain.app import _cli as cli
from tallchain.app import _config as config
from tallchain.exceptions import InputError

TABLE = """\
[data]
table = "f.parquet"

[model]
family = "logistic"
formula = "late ~ np.log(distance) + C(origin)"
"""


@pytest.fixture
def folder(tmp_path, rng):
    n = 3000
    frame = pd.DataFrame({"distance": rng.uniform(80, 2500, n),
                          "origin": rng.choice(["JFK", "LGA", "EWR"], n),
                          "id": np.arange(n)})
    eta = -2.0 + 0.3 * np.log(frame["distance"]) + 0.4 * (frame["origin"] == "LGA")
    frame["late"] = rng.random(n) < 1 / (1 + np.exp(-eta))
    frame.loc[[10, 20], "origin"] = None
    frame.to_parquet(tmp_path / "f.parquet")
    return tmp_path


def _load(folder, text):
    path = folder / "run.toml"
    path.write_text(textwrap.dedent(text))
    return config.load_config(path)


def test_table_and_formula_resolve(folder):
    cfg = _load(folder, TABLE)
    assert cfg.data.table.path == folder / "f.parquet" and cfg.data.x is None
    assert cfg.model.formula == "late ~ np.log(distance) + C(origin)"
    assert cfg.data.missing == "drop" and cfg.data.cache_dir is None
    cfg = _load(folder, TABLE.replace('table = "f.parquet"', 'table = "f.parquet"\nmissing = '
                                      '"error"\ncache_dir = "cache"'))
    assert cfg.data.missing == "error" and cfg.data.cache_dir == folder / "cache"


@pytest.mark.parametrize("edit, message", [
    (('table = "f.parquet"', 'table = "f.parquet"\ny = "late"'),
     r"^data\.y: is given together with model\.formula; remove it"),
    (('table = "f.parquet"', 'table = "f.parquet"\nadd_intercept = false'),
     r"^data\.add_intercept: is given together with model\.formula; remove it: .*- 1 in the "
     r"formula removes it"),
    (('formula = "late ~ np.log(distance) + C(origin)"\n', ""),
     r"^data\.table: needs a formula, or y and columns"),
    (('table = "f.parquet"', 'table = "f.parquet"\nx = "X.npy"'),
     r"^data\.table: is given together with data\.x"),
    (('table = "f.parquet"', 'x = "X.npy"\ny = "y.npy"'),
     r"^model\.formula: needs \[data\] table"),
    (('table = "f.parquet"', 'table = "f.parquet"\nmissing = "keep"'),
     r"^data\.missing: unknown missing-value policy 'keep'"),
    (('table = "f.parquet"', 'table = "f.txt"'),
     r'^data\.table: file ".*f\.txt" does not exist'),
    (("late ~ np.log", "late np.log"), r"^model\.formula: has no ~"),
])
def test_table_config_errors(folder, rng, edit, message):
    np.save(folder / "X.npy", rng.standard_normal((5, 2)))
    np.save(folder / "y.npy", np.zeros(5))
    with pytest.raises(InputError, match=message):
        _load(folder, TABLE.replace(*edit))


def test_run_a_table_through_a_formula(folder, capsys):
    (folder / "run.toml").write_text(TABLE + "[sampler]\nchains = 2\ndraws = 400\n"
                                     "warmup = 200\nseed = 4\n")
    code = cli.main(["run", str(folder / "run.toml"), "--out", str(folder / "out")])
    out, err = capsys.readouterr()
    assert code == 0, err
    # the data notes are warning lines: rows dropped, the cache written
    assert "tallchain: warning: dropped 2 of 3,000 rows of f.parquet" in err
    assert "tallchain: warning: wrote the encoded table" in err
    with open(folder / "out" / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    names = ["intercept", "np.log(distance)", "C(origin)[T.JFK]", "C(origin)[T.LGA]"]
    assert [r["coef"] for r in rows] == names
    record = json.loads((folder / "out" / "run.json").read_text())
    data = record["data"]
    assert data["formula"] == "late ~ np.log(distance) + C(origin)"
    assert data["rows"]["missing"] == {"origin": 2} and data["rows"]["rows_used"] == 2998
    assert data["encoding"]["levels"] == {"origin": ["EWR", "JFK", "LGA"]}
    # the saved encoding encodes new rows as the run's X (statsmodels below uses it too)
    frame = pd.read_parquet(folder / "f.parquet").dropna()
    X = io.encode_new_rows(folder / "out", frame)
    fit = sm.Logit(frame["late"].to_numpy(float), sm.add_constant(X)).fit(disp=0)
    mean = np.array([float(r["mean"]) for r in rows])
    # posterior mean vs the MLE: within 4 standard errors (prior sd 10 is weak at N = 3000;
    # a loose check here, the tolerance argued from MCSE is in the flights test)
    assert np.all(np.abs(mean - fit.params) < 4 * fit.bse), (mean, fit.params, fit.bse)
    # power: the coefficients with LGA as reference level (EWR: -b_LGA, JFK: b_JFK - b_LGA),
    # a design the formula did not ask for, are not
    other = np.array([-fit.params[3], fit.params[2] - fit.params[3]])
    assert not np.all(np.abs(mean[2:] - other) < 4 * fit.bse[2:])


def test_an_unusable_value_is_one_line_and_exit_2(folder, capsys):
    frame = pd.read_parquet(folder / "f.parquet")
    frame.loc[41, "distance"] = 0.0            # np.log(0) = -inf
    frame.to_parquet(folder / "f.parquet")
    (folder / "run.toml").write_text(TABLE)
    code = cli.main(["run", str(folder / "run.toml"), "--out", str(folder / "out")])
    _, err = capsys.readouterr()
    lines = [line for line in err.strip().splitlines() if "warning" not in line]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err
    assert lines[0].startswith("tallchain: error: np.log(distance): is -inf in row 42 of "
                               "f.parquet; a transform such as log() needs values in its domain")
    assert not list((folder / ".tallchain-cache").glob("*"))   # no torn entry


def test_predict_encodes_new_rows_with_the_runs_formula(folder, capsys):
    """New rows for a formula run come as raw columns (distance, origin as text); predict
    encodes them with the saved formula and levels. Reference: the mean over the run's draws
    of the logistic function of intercept + encode_new_rows(X) @ beta, in NumPy. Power: the
    same rows with LGA and JFK swapped predict other means."""
    import arviz as az
    from scipy.special import expit

    (folder / "run.toml").write_text(TABLE + "[sampler]\nchains = 2\ndraws = 300\n"
                                     "warmup = 200\nseed = 4\n")
    assert cli.main(["run", str(folder / "run.toml"), "--out", str(folder / "out"),
                     "--quiet"]) == 0
    new = pd.DataFrame({"origin": ["LGA", "JFK", "EWR", "LGA"],
                        "distance": [200.0, 1000.0, 2400.0, 90.0], "late": [0, 1, 0, 1]})
    new.to_parquet(folder / "new.parquet")
    capsys.readouterr()
    code = cli.main(["predict", str(folder / "out"), str(folder / "new.parquet"),
                     "--out", str(folder / "pred.csv")])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert "wrote 4 predictions" in out
    got = pd.read_csv(folder / "pred.csv")["mean"].to_numpy()
    beta = az.from_netcdf(folder / "out" / "posterior.nc")["posterior"]["beta"].values
    beta = beta.reshape(-1, beta.shape[2])
    X = io.encode_new_rows(folder / "out", new)
    want = expit(beta[:, 0][None, :] + X @ beta[:, 1:].T).mean(axis=1)
    # A mean of 600 terms in [0, 1] summed in another order (at most 600 ulps), each from an
    # eta of 4 terms in another order (a few ulps of |eta| < 5, which expit passes on scaled
    # by at most |eta|): 700 ulps; the power check's differences are 1e13 ulps and more.
    assert_ulps_close(got, want, ulps=700)
    swapped = new.assign(origin=new["origin"].replace({"LGA": "JFK", "JFK": "LGA"}))
    X_swapped = io.encode_new_rows(folder / "out", swapped)
    wrong = expit(beta[:, 0][None, :] + X_swapped @ beta[:, 1:].T).mean(axis=1)
    assert not np.allclose(got, wrong, rtol=1e-3, atol=0)
    # a level the fit never saw is one line naming the column, exit 2
    new.assign(origin=["SFO", "JFK", "EWR", "LGA"]).to_parquet(folder / "bad.parquet")
    code = cli.main(["predict", str(folder / "out"), str(folder / "bad.parquet"),
                     "--out", str(folder / "bad.csv")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
    assert "origin" in err and "SFO" in err, err
