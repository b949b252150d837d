"""``tallchain predict RUN_DIR NEW_TABLE``: predictions from a run folder, end to end, and a
one-line error (exit 2) for every bad input."""


import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from scipy import stats
from app.test_cli import _assert_one_error, _run
from ulps import assert_ulps_close

from tallchain.app import _cli as cli

NOISE_SD = 1.5
CONFIG = """\
[data]
x = "d.csv"
y = "yield"
columns = ["rain", "dose"]
standardize = true

[model]
family = "linear"
noise_sd = 1.5

[sampler]
method = "penalty-mala"
chains = 4
draws = 1500
warmup = 400
seed = 3
"""


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    """A linear run on raw-scale columns (rain in mm, around 800; dose around 0.05),
    fitted on standardised columns."""
    folder = tmp_path_factory.mktemp("predict")
    rng = np.random.default_rng(20_261_203)
    n = 400
    rain = rng.normal(800.0, 120.0, n)
    dose = rng.normal(0.05, 0.01, n)
    y = 2.0 + 0.004 * rain - 30.0 * dose + NOISE_SD * rng.standard_normal(n)
    pacsv.write_csv(pa.table({"id": np.arange(n), "rain": rain, "dose": dose, "yield": y}),
                    folder / "d.csv")
    (folder / "run.toml").write_text(CONFIG)
    code = cli.main(["run", str(folder / "run.toml"), "--out", str(folder / "run"), "--quiet"])
    assert code == 0
    return folder, np.column_stack([rain, dose]), y


def _new_rows(rng, n=6):
    return {"dose": rng.normal(0.05, 0.012, n), "site": np.arange(n), "rain": rng.normal(800, 150, n)}


def test_predictions_on_the_original_scale_match_least_squares(run_dir, rng, capsys):
    """The run standardised its columns; new rows come on the original scale, by name, in
    another order, with an extra column. The posterior mean of the mean response must match
    the least-squares prediction (statsmodels OLS get_prediction, the flat-prior limit: the
    prior's pull, noise^2 / (N sd_x^2 prior_sd^2) ~ 6e-5 of an estimate, is far below the Monte
    Carlo error) within 4 Monte Carlo standard errors (interval width / (2 z) / sqrt(ESS)).
    Power: predicting as if the new rows had to be standardised by hand fails the same test."""
    import statsmodels.api as sm
    import json

    folder, X, y = run_dir
    new = _new_rows(rng)
    pq.write_table(pa.table(new), folder / "new.parquet")
    code, out, err = _run(capsys, "predict", folder / "run", folder / "new.parquet",
                          "--out", folder / "pred.csv")
    assert code == 0, err
    assert "wrote 6 predictions (90% intervals, 6,000 draws)" in out
    pred = pacsv.read_csv(folder / "pred.csv").to_pydict()
    assert list(pred) == ["row", "mean", "lower_90", "upper_90", "predictive_lower_90",
                          "predictive_upper_90"]
    X_new = np.column_stack([new["rain"], new["dose"]])
    ols = sm.OLS(y, sm.add_constant(X)).fit().get_prediction(sm.add_constant(X_new, has_constant="add"))
    ess = json.loads((folder / "run" / "run.json").read_text())["ess_bulk_min"]
    z = stats.norm.ppf(0.95)
    se = (np.array(pred["upper_90"]) - np.array(pred["lower_90"])) / (2 * z) / np.sqrt(ess)
    assert np.all(np.abs(np.array(pred["mean"]) - ols.predicted_mean) < 4 * se)
    # The predictive interval is about mean +- z sqrt(noise^2 + se_fit^2) (Bishop 2006 eq. 3.59).
    half = (np.array(pred["predictive_upper_90"]) - np.array(pred["predictive_lower_90"])) / 2
    expected = z * np.sqrt(NOISE_SD**2 + ols.se_mean**2)
    assert np.all(np.abs(half - expected) < 0.05 * expected)
    # Power: new rows standardised with the training columns' mean and sd, then multiplied by
    # the original-scale draws, are far off.
    wrong_X = (X_new - X.mean(axis=0)) / X.std(axis=0)
    wrong = sm.OLS(y, sm.add_constant(X)).fit().predict(sm.add_constant(wrong_X, has_constant="add"))
    assert not np.all(np.abs(np.array(pred["mean"]) - wrong) < 4 * se)


def test_csv_and_parquet_in_and_out_agree_and_blocks_do_not_matter(run_dir, rng, capsys):
    """The same rows as CSV or Parquet, written as CSV or Parquet, in blocks of 2 rows or
    all at once: the same code on the same numbers, so equal to the last bits (CSV keeps 17
    significant digits, which round-trips float64 exactly; a matrix product over another
    block shape may round differently, hence 4 ulps)."""
    folder, _, _ = run_dir
    new = _new_rows(rng, n=5)
    pacsv.write_csv(pa.table(new), folder / "new.csv")
    pq.write_table(pa.table(new), folder / "new2.parquet")
    assert _run(capsys, "predict", folder / "run", folder / "new.csv", "--out",
                folder / "a.parquet", "--chunk-rows", "2", "--quiet")[0] == 0
    assert _run(capsys, "predict", folder / "run", folder / "new2.parquet", "--out",
                folder / "b.csv", "--quiet")[0] == 0
    a = pq.read_table(folder / "a.parquet").to_pydict()
    b = pacsv.read_csv(folder / "b.csv").to_pydict()
    assert a["row"] == b["row"] == list(range(5))
    for key in a:
        assert_ulps_close(a[key], b[key], ulps=4, scale=np.max(np.abs(b[key])))


@pytest.mark.parametrize("table, extra, pattern", [
    ({"rain": [800.0]}, (), r"NEW_TABLE: new\.csv has no column 'dose'; give a table with the "
                            r"run's columns \(rain, dose\)"),
    ({"rain": [800.0, 1.0], "dose": ["0.05", "north"]}, (),
     r"NEW_TABLE: column 'dose' holds 'north' in row 1"),
    ({"rain": [800.0, 700.0], "dose": [0.05, None]}, (), r"NEW_TABLE: column 'dose' holds a missing value in row 1"),
    ({"rain": [800.0], "dose": [0.05]}, ("--interval", "1.5"), r"interval: must be a probability"),
    ({"rain": [800.0], "dose": [0.05]}, ("--out", "p.txt"), r"--out: p\.txt is neither \.csv nor "
                                                            r"\.parquet"),
    ({"rain": [800.0], "dose": [0.05]}, ("--chunk-rows", "0"), r"chunk_rows"),
])
def test_bad_input_is_one_line_and_exit_2(run_dir, table, extra, pattern, capsys, tmp_path):
    folder, _, _ = run_dir
    pacsv.write_csv(pa.table(table), tmp_path / "new.csv")
    extra = tuple(str(tmp_path / e) if e.endswith(".txt") else e for e in extra)
    code, out, err = _run(capsys, "predict", folder / "run", tmp_path / "new.csv", *extra)
    _assert_one_error(code, err, pattern)
    assert not (folder / "run" / "predictions.csv").exists()


def test_a_folder_without_a_run_is_refused(tmp_path, capsys):
    np.save(tmp_path / "new.npy", np.zeros((2, 2)))
    code, out, err = _run(capsys, "predict", tmp_path, tmp_path / "new.npy")
    _assert_one_error(code, err, r"RUN_DIR: .* holds no run\.json and posterior\.nc; give the "
                                 r"output folder of tallchain run")


def test_a_npy_table_must_have_the_runs_columns(run_dir, capsys, tmp_path):
    folder, _, _ = run_dir
    np.save(tmp_path / "new.npy", np.zeros((2, 3)))
    code, out, err = _run(capsys, "predict", folder / "run", tmp_path / "new.npy")
    _assert_one_error(code, err, r"NEW_TABLE: new\.npy has shape \(2, 3\), but the run has 2 "
                                 r"columns \(rain, dose\)")


def test_a_poisson_run_with_an_offset_takes_the_new_rows_offset(tmp_path, capsys):
    """The offset (log exposure) is a column of the run's CSV; new rows carry their own, by
    the same name or by --offset. The mean response is exp(x . beta + offset) averaged over
    the draws (the log link's inverse; from memory), computed here with numpy on the draws
    of posterior.nc: the mean of S terms in another order, within 8 ulps."""
    import arviz as az

    rng = np.random.default_rng(20_261_203)
    n = 300
    x = rng.standard_normal(n)
    exposure = np.log(rng.uniform(1, 10, n))
    count = rng.poisson(np.exp(0.1 + 0.5 * x + exposure))
    pacsv.write_csv(pa.table({"x": x, "log_exposure": exposure, "count": count}), tmp_path / "d.csv")
    (tmp_path / "run.toml").write_text('[data]\nx = "d.csv"\ny = "count"\noffset = "log_exposure"\n'
                                       '[model]\nfamily = "poisson"\n[sampler]\nchains = 2\n'
                                       'draws = 200\nwarmup = 200\nseed = 1\n')
    assert _run(capsys, "run", tmp_path / "run.toml", "--out", tmp_path / "run", "--quiet")[0] == 0
    new = {"x": [0.0, 1.0, -1.0], "log_exposure": [0.0, np.log(5.0), 1.0], "hours": [0.0, 1.6, 1.0]}
    pacsv.write_csv(pa.table(new), tmp_path / "new.csv")
    beta = az.from_netcdf(tmp_path / "run" / "posterior.nc")["posterior"]["beta"].values.reshape(-1, 2)
    for extra, offset in [((), new["log_exposure"]), (("--offset", "hours"), new["hours"])]:
        code, out, err = _run(capsys, "predict", tmp_path / "run", tmp_path / "new.csv", "--out",
                              tmp_path / "p.csv", *extra)
        assert code == 0, err
        mean = pacsv.read_csv(tmp_path / "p.csv").column("mean").to_numpy()
        expected = np.exp(beta[:, 0][None, :] + np.outer(new["x"], beta[:, 1])
                          + np.array(offset)[:, None]).mean(axis=1)
        assert_ulps_close(mean, expected, ulps=8)
    pacsv.write_csv(pa.table({"x": new["x"]}), tmp_path / "bare.csv")
    code, out, err = _run(capsys, "predict", tmp_path / "run", tmp_path / "bare.csv")
    _assert_one_error(code, err, r"--offset: the run had an offset \(log_exposure\) and bare\.csv "
                                 r"has no column of that name; name the new rows' offset column")


def test_a_standardised_runs_laplace_columns_are_on_the_original_scale(run_dir):
    """The linear posterior is normal, so its Laplace sd equals the posterior sd: the ratio
    is 1 within the sd estimate's relative error 1/sqrt(2 ESS) (normal theory; from memory),
    4 of them. Power: the Laplace covariance left on the standardised scale would make the
    slopes' ratio off by the column sd (120 for rain, 0.01 for dose)."""
    import csv
    import json

    folder, X, _ = run_dir
    with open(folder / "run" / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    ratio = np.array([float(r["laplace_sd_ratio"]) for r in rows])
    ess = np.array([float(r["ess_bulk"]) for r in rows])
    assert np.all(np.abs(ratio - 1) < 4 / np.sqrt(2 * ess)), ratio
    scale = json.loads((folder / "run" / "run.json").read_text())["data"]["standardization"]["scale"]
    unmapped = ratio[1:] * np.array(scale)
    assert not np.all(np.abs(unmapped - 1) < 4 / np.sqrt(2 * ess[1:]))
