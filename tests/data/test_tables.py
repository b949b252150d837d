"""Tables in: Parquet, CSV and in-memory tables, missing values, the cache, unusable values.

The values a file holds are the values written (CSV: each float's repr, which reads back to
the same float; Parquet: the binary value), so the matrices read are compared bit for bit
with the arrays written. Formulas: tests/data/test_formulas.py.
"""

import json
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

import tallchain as tc
from tallchain import data as io
from tallchain.data import _load_table
from tallchain.exceptions import DataNote, DataWarning, InputError


def _write_csv(path, header, rows):
    path.write_text(",".join(header) + "\n" + "".join(",".join(map(str, r)) + "\n" for r in rows))
    return path


def _load(*args, **kwargs):
    """load_table with the cache note expected when a file is encoded for the first time."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataNote)
        return io.load_table(*args, **kwargs)


def _entries(folder):
    return sorted(p.name for p in (folder / ".tallchain-cache").iterdir()) \
        if (folder / ".tallchain-cache").exists() else []


# ---------------------------------------------------------------- files and tables in memory


@pytest.mark.parametrize("kind", ["csv", "parquet", "pandas", "arrow", "polars"])
def test_every_source_gives_the_values_written(tmp_path, rng, kind):
    values = np.round(rng.standard_normal((300, 3)), 6)
    frame = pd.DataFrame({"id": np.arange(300), "a": values[:, 0], "b": values[:, 1],
                          "label": (values[:, 2] > 0).astype(float)})
    source = {"csv": tmp_path / "d.csv", "parquet": tmp_path / "d.parquet"}.get(kind)
    if kind == "csv":
        frame.to_csv(source, index=False)
    elif kind == "parquet":
        frame.to_parquet(source, row_group_size=64)   # several row groups
    else:
        import polars as pl
        import pyarrow as pa

        source = {"pandas": frame, "arrow": pa.Table.from_pandas(frame),
                  "polars": pl.from_pandas(frame)}[kind]
    td = _load(source, response="label", columns=["b", "a"])
    assert td.feature_names == ["b", "a"]
    assert_array_equal(td.X, values[:, [1, 0]])
    assert_array_equal(td.y, frame["label"])
    assert td.offset is None
    assert td.report["rows_read"] == td.report["rows_used"] == 300
    if kind in ("csv", "parquet"):
        assert isinstance(td.X, np.memmap) and td.X.flags.c_contiguous
        assert Path(td.X.filename).parent.parent == tmp_path / ".tallchain-cache"


def test_read_in_batches_never_the_whole_table(tmp_path, rng, monkeypatch):
    frame = pd.DataFrame({"a": rng.standard_normal(1000), "y": rng.standard_normal(1000)})
    frame.to_parquet(tmp_path / "d.parquet", row_group_size=100)
    frame.to_csv(tmp_path / "d.csv", index=False)
    monkeypatch.setattr(io._tables, "_CSV_BLOCK_BYTES", 2048)
    seen = []
    original = io._tables.Table.batches

    def counting(self, columns, batch_rows=io._tables.BATCH_ROWS, types=None):
        for start, batch in original(self, columns, 128, types):
            seen.append(batch.num_rows)
            yield start, batch

    monkeypatch.setattr(io._tables.Table, "batches", counting)
    for name in ("d.parquet", "d.csv"):
        seen.clear()
        td = _load(tmp_path / name, response="y", columns=["a"])
        assert_array_equal(td.X[:, 0], frame["a"])
        assert max(seen) <= 128 and sum(seen) == 2 * 1000   # two passes of small batches


def test_offset_column_quotes_and_blank_lines(tmp_path):
    path = tmp_path / "d.csv"
    path.write_text('"a","n","log_len"\n1,"3",0.5\n\n2,0,-0.5\r\n')
    td = _load(path, response="n", columns=["a"], offset="log_len")
    assert td.feature_names == ["a"]
    assert_array_equal(td.X, [[1], [2]])
    assert_array_equal(td.y, [3, 0])
    assert_array_equal(td.offset, [0.5, -0.5])


def test_a_dataframe_keeps_its_column_names_in_a_model(rng):
    import polars as pl

    frame = pd.DataFrame({"wind": rng.standard_normal(50), "waves": rng.standard_normal(50)})
    y = rng.standard_normal(50)
    for table in (frame, pl.from_pandas(frame)):
        model = tc.LinearRegression(table, y, noise_sd=1.0)
        assert model.coef_names == ["intercept", "wind", "waves"]
        assert_array_equal(model.X, frame.to_numpy())
    frame["port"] = "north"
    with pytest.raises(InputError, match=r'^X: column "port" holds text, not numbers; '
                                         r"leave it out, or fit through a formula"):
        tc.LinearRegression(frame, rng.standard_normal(50))


# ---------------------------------------------------------------- missing and unusable values


def test_incomplete_rows_are_dropped_and_counted_per_column(tmp_path, rng):
    frame = pd.DataFrame({"a": rng.standard_normal(20), "b": rng.standard_normal(20),
                          "y": rng.standard_normal(20)})
    frame.loc[[2, 5], "a"] = np.nan
    frame.loc[[5, 7, 9], "b"] = np.nan
    frame.loc[11, "y"] = np.nan
    frame.to_csv(tmp_path / "d.csv", index=False)   # NaN is written as an empty cell
    with pytest.warns(DataWarning, match=r"^dropped 5 of 20 rows of d\.csv with a missing value "
                                         r"\(missing per column: y 1, a 2, b 3\); set missing = "
                                         r'"error" to refuse'):
        td = _load(tmp_path / "d.csv", response="y", columns=["a", "b"])
    keep = frame.dropna()
    assert_array_equal(td.X, keep[["a", "b"]].to_numpy())
    assert_array_equal(td.y, keep["y"].to_numpy())
    assert td.report["missing"] == {"y": 1, "a": 2, "b": 3}
    assert (td.report["rows_read"], td.report["rows_used"]) == (20, 15)
    # a cached start says so again: every run's output mentions the rows it dropped
    with pytest.warns(DataWarning, match=r"^dropped 5 of 20 rows of d\.csv"):
        again = io.load_table(tmp_path / "d.csv", response="y", columns=["a", "b"])
    assert isinstance(again.X, np.memmap) and again.report == td.report
    # the refusal names the first missing cell, rows counted from 1 (header not counted)
    with pytest.raises(InputError, match=r"^a: is missing in row 3 of d\.csv; fill it in, or "
                                         r'set missing = "drop"'):
        io.load_table(tmp_path / "d.csv", response="y", columns=["a", "b"], missing="error")


@pytest.mark.parametrize("kind", ["csv", "pandas"])
def test_text_in_a_numeric_column_names_the_column_and_row(tmp_path, kind):
    rows = [[float(i), i % 2] for i in range(5000)]
    rows[4321][0] = "north"   # beyond the block pyarrow infers the column's type from
    if kind == "csv":
        source = _write_csv(tmp_path / "d.csv", ["a", "y"], rows)
        match = r"^a: has the value 'north' in row 4322 of d\.csv \(line 4323\), not a number"
    else:
        source = pd.DataFrame(rows, columns=["a", "y"])
        match = r"^a: mixes numbers and text \(e\.g\. 'north' in row 4321\)"
    with pytest.raises(InputError, match=match):
        io.load_table(source, response="y", columns=["a"])
    assert not list(tmp_path.glob(".tallchain-cache/*"))   # nothing torn left behind


def test_infinite_value_names_the_column_and_row(tmp_path):
    pd.DataFrame({"a": [1.0, 2.0, np.inf], "y": [0.0, 1, 1]}).to_parquet(tmp_path / "d.parquet")
    with pytest.raises(InputError, match=r"^a: is inf in row 3 of d\.parquet; give a finite"):
        io.load_table(tmp_path / "d.parquet", response="y", columns=["a"])


def test_a_text_column_among_the_columns_points_to_a_formula(tmp_path):
    _write_csv(tmp_path / "d.csv", ["port", "y"], [["north", 1], ["south", 0]])
    with pytest.raises(InputError, match=r"^port: holds text in d\.csv; give a formula with "
                                         r"C\(port\)"):
        io.load_table(tmp_path / "d.csv", response="y", columns=["port"])


@pytest.mark.parametrize("kwargs, message", [
    ({"response": "labl"}, r'^y: column "labl" is not in d\.csv; did you mean "label"\?'),
    ({"response": "label", "columns": ["a", "zz"]},
     r'^columns: column "zz" is not in d\.csv; the columns are: a, b, label'),
    ({"response": "label", "columns": ["a", "label"]},
     r'^columns: lists "label", which is the response'),
    ({"response": "label", "columns": ["a", "a"]}, r'^columns: lists "a" twice'),
    ({"response": "label", "offset": "label"}, r'^offset: is the response column "label"'),
    ({"response": "label", "missing": "keep"},
     r"^missing: unknown missing-value policy 'keep'; choose one of drop, error"),
])
def test_column_errors(tmp_path, kwargs, message):
    path = _write_csv(tmp_path / "d.csv", ["a", "b", "label"], [[1, 2, 0], [3, 4, 1]])
    with pytest.raises(InputError, match=message):
        io.load_table(path, **kwargs)


@pytest.mark.parametrize("kwargs, message", [
    ({"formula": "label ~ a + b", "offset": "label"}, r'^offset: is the response column "label"'),
    ({"formula": "label ~ a + np.log(b)", "weights": "b"},
     r'^formula: uses "b", which is the weights column; leave it out of the terms, or give the '
     r"weights a column of its own"),
    ({"formula": "label ~ a", "offset": "b", "weights": "b"},
     r'^weights: is the offset column "b"; give a separate weights column'),
])
def test_a_formula_column_has_one_role(tmp_path, kwargs, message):
    path = _write_csv(tmp_path / "d.csv", ["a", "b", "label"], [[1, 2, 0], [3, 4, 1]])
    with pytest.raises(InputError, match=message):
        io.load_table(path, cache=False, **kwargs)
    # power: the same per-row column outside the terms is read
    data = io.load_table(path, formula="label ~ a", weights="b", cache=False)
    assert data.weights.tolist() == [2.0, 4.0]


def test_header_problems(tmp_path):
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(InputError, match=r"empty\.csv has no header row"):
        io.load_table(tmp_path / "empty.csv", response="y")
    _write_csv(tmp_path / "dup.csv", ["a", "a", "y"], [[1, 2, 3]])
    with pytest.raises(InputError, match=r'dup\.csv names the column "a" twice'):
        io.load_table(tmp_path / "dup.csv", response="y")
    _write_csv(tmp_path / "nodata.csv", ["a", "y"], [])
    with pytest.raises(InputError, match=r"nodata\.csv has no rows"):
        io.load_table(tmp_path / "nodata.csv", response="y")


def test_an_identifier_column_is_not_taken_silently(tmp_path, rng):
    frame = pd.DataFrame({"customer": np.arange(100, 200), "a": rng.standard_normal(100),
                          "y": rng.standard_normal(100)})
    frame.to_csv(tmp_path / "d.csv", index=False)
    # all columns by default (the x = "file.csv" route): a warning names the suspect
    with pytest.warns(DataWarning, match=r"^column\(s\) customer look like row identifiers"):
        _load(tmp_path / "d.csv", response="y")
    # power: a covariate of whole numbers that repeat is not suspected
    frame["customer"] = rng.integers(0, 5, 100)
    frame.to_csv(tmp_path / "e.csv", index=False)
    _load(tmp_path / "e.csv", response="y")
    # a table must name its columns, or give a formula
    with pytest.raises(InputError, match=r"^table: needs the columns to use; give a formula"):
        io.load_data(table=tmp_path / "d.csv", y="y")


# ---------------------------------------------------------------- the cache


def test_the_cache_is_mentioned_reused_and_cleaned_when_stale(tmp_path, monkeypatch):
    path = _write_csv(tmp_path / "d.csv", ["a", "b", "y"], [[1, 2, 0], [3, 4, 1]])
    with pytest.warns(DataNote, match=r"^wrote the encoded table \(0\.0 MiB\) to the cache "
                                      r".*\.tallchain-cache/d\.csv-[0-9a-f]{16}; later runs reuse"):
        io.load_table(path, response="y", columns=["a", "b"])
    _load(path, response="y", columns=["a"])
    assert len(_entries(tmp_path)) == 2          # one entry per selection

    def no_parse(*args, **kwargs):
        raise AssertionError("the table was read again")

    with monkeypatch.context() as m, warnings.catch_warnings():
        warnings.simplefilter("error")           # a reused entry is not mentioned again
        m.setattr(_load_table, "_fill", no_parse)
        td = io.load_table(path, response="y", columns=["a"])
    assert_array_equal(td.X, [[1], [3]])
    # the table changes: its entries are stale and removed when the next one is written
    _write_csv(path, ["a", "b", "y"], [[1, 2, 0], [3, 5, 1], [6, 7, 1]])
    os.utime(path, ns=(1, 1))
    with pytest.warns(DataNote, match=r"removed 2 stale entries"):
        td = io.load_table(path, response="y", columns=["a", "b"])
    assert_array_equal(td.X, [[1, 2], [3, 5], [6, 7]])
    assert len(_entries(tmp_path)) == 1
    meta = json.loads(next((tmp_path / ".tallchain-cache").glob("*/meta.json")).read_text())
    assert meta["source"]["path"] == str(path.resolve())
    assert meta["source"]["mtime_ns"] == 1


def test_cache_dir_setting_and_an_unwritable_folder(tmp_path, monkeypatch):
    path = _write_csv(tmp_path / "d.csv", ["a", "y"], [[1, 0], [2, 1]])
    td = _load(path, response="y", columns=["a"], cache_dir=tmp_path / "elsewhere")
    assert Path(td.report["cache"]).parent == tmp_path / "elsewhere"
    assert not (tmp_path / ".tallchain-cache").exists()

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(np.lib.format, "open_memmap", refuse)
    with pytest.warns(DataWarning, match=r"^could not write the cache of d\.csv in .*held in "
                                         r"memory"):
        td = io.load_table(path, response="y", columns=["a"])
    assert not isinstance(td.X, np.memmap) and td.report["cache"] is None
    assert_array_equal(td.X, [[1], [2]])
    assert not list((tmp_path / ".tallchain-cache").glob("*"))


def test_an_interrupted_write_leaves_no_entry(tmp_path, monkeypatch):
    path = _write_csv(tmp_path / "d.csv", ["a", "y"], [[1, 0], [2, 1]])

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(_load_table, "_fill", interrupted)
    with pytest.raises(KeyboardInterrupt):
        io.load_table(path, response="y", columns=["a"])
    assert _entries(tmp_path) == []
