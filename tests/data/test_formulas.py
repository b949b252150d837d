"""Wilkinson formulas (Wilkinson & Rogers 1973) read by formulaic, streamed in batches.

The reference design matrix is patsy's (`patsy.dmatrices`, the formula engine statsmodels
ships), computed on the whole table in memory; patsy and formulaic name treatment-coded
columns alike (``C(carrier)[T.DL]``). Every entry is a column value, a 0/1 indicator,
``numpy.log`` of the same float or a product with an indicator, all exact or the same ufunc on
the same input, so the matrices agree bit for bit.
"""

import json
import warnings

import numpy as np
import pandas as pd
import patsy
import pytest
from numpy.testing import assert_array_equal

import tallchain as tc
from tallchain import data as io
from tallchain.exceptions import DataNote, DataWarning, InputError

FORMULA = "late ~ hour + np.log(distance) + C(carrier) + C(month) + C(origin):hour"


def _flights_like(rng, n=3000):
    """A small flights-shaped table: text, integer and float columns, a boolean response."""
    return pd.DataFrame({
        "hour": rng.integers(5, 23, n), "distance": rng.uniform(80, 2500, n),
        "carrier": rng.choice(["UA", "AA", "DL", "B6"], n), "month": rng.integers(1, 13, n),
        "origin": rng.choice(["JFK", "LGA", "EWR"], n), "late": rng.random(n) < 0.3,
        "flight": np.arange(n)})


def _quiet_load(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataNote)
        return io.load_table(*args, **kwargs)


def _patsy(formula, frame):
    y, X = patsy.dmatrices(formula, frame, return_type="dataframe")
    names = [c for c in X.columns if c != "Intercept"]
    return X[names].to_numpy(), y.to_numpy()[:, -1], names


@pytest.mark.parametrize("kind", ["pandas", "polars", "parquet", "csv"])
def test_formula_matches_patsy_streamed_in_small_batches(tmp_path, rng, monkeypatch, kind):
    frame = _flights_like(rng)
    # a level absent from the first batches must still get its column in every batch
    frame.loc[:2500, "carrier"] = frame.loc[:2500, "carrier"].replace("B6", "AA")
    monkeypatch.setattr(io._tables, "BATCH_ROWS", 256)
    monkeypatch.setattr(io._load_table, "Table", _small_batches(io._tables.Table, 256))
    source = frame
    if kind == "parquet":
        frame.to_parquet(source := tmp_path / "f.parquet", row_group_size=500)
    elif kind == "csv":
        frame.to_csv(source := tmp_path / "f.csv", index=False)
    elif kind == "polars":
        import polars as pl

        source = pl.from_pandas(frame)
    td = _quiet_load(source, formula=FORMULA)
    X, y, names = _patsy(FORMULA.replace("late ~", "I(late * 1.0) ~"), frame)
    # the same columns (patsy puts terms without numeric factors first), the same values
    assert sorted(td.feature_names) == sorted(names)
    assert td.encoding.intercept
    assert_array_equal(td.X, X[:, [names.index(n) for n in td.feature_names]])
    assert_array_equal(td.y, y)
    # power: patsy on the first batch alone misses the B6 column
    assert "C(carrier)[T.B6]" not in _patsy(FORMULA, frame.iloc[:256])[2]


def _small_batches(cls, rows):
    class Small(cls):
        def batches(self, columns, batch_rows=rows, types=None):
            return super().batches(columns, min(batch_rows, rows), types)

    return Small


def test_reference_level_order_and_no_intercept(rng):
    frame = _flights_like(rng, 400)
    td = _quiet_load(frame, formula='late ~ C(carrier, contr.treatment("UA"))')
    # formulaic writes the string's quotes as single quotes
    assert td.feature_names == [f"C(carrier, contr.treatment('UA'))[T.{c}]"
                                for c in ("AA", "B6", "DL")]
    # a pandas categorical's category order sets the reference level (its first category)
    frame["carrier"] = pd.Categorical(frame["carrier"], categories=["DL", "UA", "AA", "B6"])
    td = _quiet_load(frame, formula="late ~ carrier")
    assert td.feature_names == ["carrier[T.UA]", "carrier[T.AA]", "carrier[T.B6]"]
    # without an intercept every level gets a column (the full dummy coding, as patsy)
    td = _quiet_load(frame, formula="late ~ 0 + C(origin) + hour")
    X, _, names = _patsy("late ~ 0 + C(origin) + hour", frame)
    assert not td.encoding.intercept and sorted(td.feature_names) == sorted(names)
    assert_array_equal(td.X, X[:, [names.index(n) for n in td.feature_names]])


def test_formula_route_through_load_data_and_a_model(tmp_path, rng):
    frame = _flights_like(rng, 500)
    frame.loc[7, "distance"] = np.nan
    frame.to_parquet(tmp_path / "f.parquet")
    with pytest.warns(DataWarning, match=r"dropped 1 of 500 rows .*distance 1"), \
            pytest.warns(DataNote, match="wrote the encoded table"):
        model = tc.LogisticRegression.from_formula("late ~ np.log(distance) + C(origin)",
                                                   tmp_path / "f.parquet")
    assert model.coef_names == ["intercept", "np.log(distance)", "C(origin)[T.JFK]",
                                "C(origin)[T.LGA]"]
    assert model.n_rows == 499 and model.add_intercept
    assert model.table_report["missing"] == {"distance": 1}
    with pytest.warns(DataNote, match="wrote the encoded table"):
        ds = io.load_data(table=tmp_path / "f.parquet", formula="late ~ 0 + hour")
    assert not ds.add_intercept and ds.feature_names == ["hour"]


def test_new_rows_are_encoded_as_the_fit(tmp_path, rng):
    frame = _flights_like(rng, 600)
    td = _quiet_load(frame, formula=FORMULA)
    saved = json.loads(json.dumps(td.encoding.to_dict()))   # as run.json keeps it
    new = frame.drop(columns=["late"]).iloc[::7]
    X = io.encode_new_rows(saved, new)
    assert_array_equal(X, td.X[::7])
    # a single new row, whose levels are a subset, still gets every column
    one = io.encode_new_rows(saved, new.iloc[:1])
    assert_array_equal(one, td.X[:1])
    (tmp_path / "run").mkdir()
    (tmp_path / "run" / "run.json").write_text(json.dumps({"data": {"encoding": saved}}))
    blocks = list(io.iter_new_rows(tmp_path / "run", new, batch_rows=30))
    assert [s for s, _ in blocks] == list(range(0, len(new), 30))
    assert_array_equal(np.concatenate([b for _, b in blocks]), X)
    bad = new.iloc[:5].copy()
    bad.iloc[3, bad.columns.get_loc("carrier")] = "ZZ"
    with pytest.raises(InputError, match=r"^carrier: has the level 'ZZ' in row 4, which the "
                                         r"fitted model did not see \(its levels: AA, B6, DL, UA"):
        io.encode_new_rows(saved, bad)
    bad = new.iloc[:5].copy()
    bad.iloc[1, bad.columns.get_loc("distance")] = np.nan
    with pytest.raises(InputError, match=r"^distance: is missing in row 2 of the table"):
        io.encode_new_rows(saved, bad)


@pytest.mark.parametrize("formula, message", [
    ("late ~ hour + carier", r'^formula: uses "carier", which is not a column of the table; '
                             r'did you mean "carrier"\?'),
    ("late ~ hour +", r"^formula: cannot be read \(Operator `\+` has insuffient"),
    ("hour + carrier", r"^formula: must be a formula with a response"),
    ("late ~ scale(hour)", r"^formula: uses scale\(\), which learns from the data and would "
                           r"learn from one batch"),
    ("carrier ~ hour", r"^formula: makes 4 response columns"),
    ("late ~ np.log(hour - 5)", r"^np\.log\(hour - 5\): is -inf in row \d+ of the table; a "
                                r"transform such as log\(\) needs values in its domain"),
])
def test_formula_errors(rng, formula, message):
    frame = _flights_like(rng, 300)
    with pytest.raises(InputError, match=message):
        io.load_table(frame, formula=formula)
