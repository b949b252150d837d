"""Per-row columns of a table (offset, trials, weights): read beside y, through named columns
and through a formula, dropped with their row when missing, part of the cache key.

Against what: the values written to the file (each float's repr, which reads back to the same
float), compared bit for bit, and the rows left after dropping by hand.
"""

import warnings

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from tallchain import data as io
from tallchain.data import Encoding
from tallchain.exceptions import DataNote, DataWarning, InputError


def _load(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataNote)
        return io.load_table(*args, **kwargs)


@pytest.fixture
def table(tmp_path, rng):
    n = 40
    cols = {"a": rng.standard_normal(n), "n": rng.integers(1, 6, n).astype(float),
            "w": rng.uniform(0, 3, n), "w2": rng.uniform(0, 3, n)}
    cols["y"] = np.minimum(cols["n"], rng.integers(0, 4, n))
    text = {k: [repr(float(v)) for v in vals] for k, vals in cols.items()}
    text["n"][3] = ""     # a missing trials value: row 4 (from 1) is dropped
    text["w"][10] = "NA"  # a missing weight: row 11 is dropped
    path = tmp_path / "d.csv"
    path.write_text(",".join(text) + "\n" + "".join(
        ",".join(text[k][i] for k in text) + "\n" for i in range(n)))
    keep = np.setdiff1d(np.arange(n), [3, 10])
    return path, cols, keep


@pytest.mark.parametrize("route", ["columns", "formula"])
def test_trials_and_weights_are_read_beside_y_and_drop_their_missing_rows(table, route):
    path, cols, keep = table
    kwargs = {"response": "y", "columns": ["a"]} if route == "columns" else \
        {"formula": "y ~ a"}
    with pytest.warns(DataWarning, match=r"dropped 2 of 40 rows .*n 1, w 1"):
        td = _load(path, trials="n", weights="w", **kwargs)
    assert_array_equal(td.X[:, 0], cols["a"][keep])
    assert_array_equal(td.y, cols["y"][keep])
    assert_array_equal(td.trials, cols["n"][keep])
    assert_array_equal(td.weights, cols["w"][keep])
    assert td.offset is None
    assert td.report["missing"] == {"n": 1, "w": 1}
    assert (td.encoding.trials, td.encoding.weights) == ("n", "w")
    # the cached entry gives the same arrays
    with pytest.warns(DataWarning, match="dropped 2 of 40"):
        again = _load(path, trials="n", weights="w", **kwargs)
    assert_array_equal(again.weights, td.weights)
    assert_array_equal(again.trials, td.trials)


def test_the_cache_key_covers_the_weights_column(table):
    path, cols, _ = table
    with pytest.warns(DataWarning):
        first = _load(path, response="y", columns=["a"], weights="w")
    second = _load(path, response="y", columns=["a"], weights="w2")   # no missing w2
    assert first.report["cache"] != second.report["cache"]
    assert_array_equal(second.weights, cols["w2"])
    # power: the same column asked again is the same entry
    with pytest.warns(DataWarning):
        assert _load(path, response="y", columns=["a"], weights="w").report["cache"] == \
            first.report["cache"]


def test_a_role_column_that_is_the_response_or_a_covariate_is_refused(table):
    path, _, _ = table
    with pytest.raises(InputError, match=r'^weights: is the response column "y"; give a '
                                         r"separate weights column"):
        _load(path, response="y", columns=["a"], weights="y")
    with pytest.raises(InputError, match=r'^columns: lists "n", which is the trials column'):
        _load(path, response="y", columns=["a", "n"], trials="n")
    with pytest.raises(InputError, match=r'^trials: column "nn" is not in d\.csv; did you '
                                         r'mean "n"\?'):
        _load(path, response="y", columns=["a"], trials="nn")


def test_an_encoding_saved_before_trials_and_weights_reads_back():
    old = {"kind": "columns", "formula": None, "response": "y", "offset": None,
           "variables": ["a"], "levels": {}, "columns": ["a"], "intercept": True, "version": 1}
    enc = Encoding.from_dict(old)
    assert (enc.trials, enc.weights) == (None, None) and enc.row_columns == {}
    assert enc.needed == ["y", "a"]
