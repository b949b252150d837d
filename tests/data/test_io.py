"""Data files: .npy memory maps, .npz keys, column checks, scaling (tables: test_tables.py).

Reference values are computed with plain NumPy on the same arrays (np.mean, np.std, and the
linear predictor on both scales for the back-transform). Files are compared bit for bit (a
value read back is the value written); sums computed in another order are compared in ulps.
"""

import pickle
import warnings
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from ulps import assert_ulps_close

from tallchain import data as io
from tallchain.data import DataSource, _columns
from tallchain.exceptions import DataNote, DataWarning, InputError


def summation_ulps(n_rows, n_blocks=1):
    """Allowed ulps between a column sum done by NumPy (row after row) and by the package (block
    sums merged by Chan, Golub & LeVeque's update): summing n terms in any order errs by at
    most (n - 1)/2 ulps of the sum of |terms| (Higham, Accuracy and Stability of Numerical
    Algorithms, ch. 4; from memory), so two orders by n - 1; each block merge adds about 3
    roundings."""
    return n_rows + 3 * n_blocks


def variance_size(X):
    """The size against which a column's sd is rounded: the root mean square of the column.

    Centring loses eps |mean| per value, so the variance is accurate to about n eps times its
    condition number sqrt(1 + mean^2 / sd^2) (Chan, Golub & LeVeque, The American Statistician
    37, 242, 1983; from memory), i.e. in ulps of sd * sqrt(1 + mean^2/sd^2) = rms."""
    return np.sqrt(np.mean(np.square(X), axis=0))


def assert_standardized(Z, X, centred, ulps):
    """Z has sd 1 (and mean 0 when centred) up to the rounding of two summation orders."""
    # Z.std = NumPy's sd of x / the package's: the sd's rounding (ulps of rms) in sd units
    assert_ulps_close(Z.std(axis=0), 1.0, ulps=ulps, scale=variance_size(X) / X.std(axis=0))
    if centred:
        # Z's mean is (NumPy's mean of x - the package's centre) / sd: the centre's rounding
        # (ulps of mean|x|) measured in sd units, plus the rounding of Z's own mean.
        size = np.abs(X).mean(axis=0) / X.std(axis=0) + np.abs(Z).mean(axis=0)
        assert_ulps_close(Z.mean(axis=0), 0.0, ulps=ulps, scale=size)


def _write_csv(path, header, rows):
    path.write_text(",".join(header) + "\n" + "".join(",".join(map(str, r)) + "\n" for r in rows))
    return path


# ---------------------------------------------------------------- .npy / .npz


def test_npy_is_memory_mapped_not_loaded(tmp_path, rng):
    X = rng.standard_normal((50, 3))
    np.save(tmp_path / "X.npy", X)
    arr = io.load_array(tmp_path / "X.npy")
    assert isinstance(arr, np.memmap)
    assert not arr.flags.writeable
    assert_array_equal(arr, X)


def test_object_npy_is_refused_as_a_pickle(tmp_path):
    np.save(tmp_path / "X.npy", np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    with pytest.raises(InputError,
                       match=r"^X: X\.npy holds Python objects .*pickles are never read"):
        io.load_array(tmp_path / "X.npy")


def test_pickle_file_named_npy_is_refused(tmp_path):
    (tmp_path / "y.npy").write_bytes(pickle.dumps([1.0, 2.0]))
    with pytest.raises(InputError,
                       match=r"^y: y\.npy holds Python objects .*pickles are never read"):
        io.load_array(tmp_path / "y.npy", field="y")


def test_object_array_inside_npz_is_refused(tmp_path):
    np.savez(tmp_path / "d.npz", x=np.array([[1], "a"], dtype=object))
    with pytest.raises(InputError, match=r"d\.npz holds Python objects .*pickles are never read"):
        io.load_array(tmp_path / "d.npz")


def test_npz_default_and_named_keys(tmp_path, rng):
    X, y, other = rng.standard_normal((10, 2)), rng.standard_normal(10), np.arange(10.0)
    np.savez(tmp_path / "d.npz", x=X, y=y, other=other)
    assert_array_equal(io.load_array(tmp_path / "d.npz", field="X"), X)
    assert_array_equal(io.load_array(tmp_path / "d.npz", field="y"), y)
    assert_array_equal(io.load_array(DataSource.parse(f"{tmp_path}/d.npz:other"), field="y"), other)
    with pytest.raises(InputError, match=r'^y: d\.npz has no array "othr" \(it holds: x, y, other\); '
                                         r'did you mean "d\.npz:other"\?'):
        io.load_array(DataSource.parse(f"{tmp_path}/d.npz:othr"), field="y")


def test_missing_file_and_unsupported_type(tmp_path):
    with pytest.raises(InputError, match=r'^X: file ".*nope\.npy" does not exist; check the path'):
        io.load_array(tmp_path / "nope.npy")
    (tmp_path / "X.txt").write_text("1 2\n")
    with pytest.raises(InputError, match=r"X\.txt has an unsupported file type '\.txt'"):
        io.load_array(tmp_path / "X.txt")


def test_datasource_parse_relative_to_base(tmp_path):
    s = DataSource.parse("sub/d.npz:feat", tmp_path)
    assert s.path == tmp_path / "sub" / "d.npz" and s.key == "feat"
    assert DataSource.parse("/abs/X.npy", tmp_path) == DataSource(Path("/abs/X.npy"))


# ---------------------------------------------------------------- column checks and scaling


def test_column_stats_merge_blocks_like_numpy(tmp_path, rng, monkeypatch):
    X = rng.standard_normal((1001, 3)) * [1.0, 10.0, 0.1] + [5.0, -2.0, 1e3]
    np.save(tmp_path / "X.npy", X)
    monkeypatch.setattr(_columns, "_BLOCK_BYTES", 8 * 3 * 97)  # many uneven blocks
    stats = io.column_stats(io.load_array(tmp_path / "X.npy"))
    ulps = summation_ulps(1001, n_blocks=11)  # 97 rows a block
    # The mean cancels where |mean| < sd: its rounding is relative to the mean of |x|.
    assert_ulps_close(stats["mean"], X.mean(axis=0), ulps=ulps, scale=np.abs(X).mean(axis=0))
    # The sd's rounding grows with |mean| / sd (1e4 in the last column, on purpose).
    assert_ulps_close(stats["sd"], X.std(axis=0), ulps=ulps, scale=variance_size(X))
    # min and max select one of the stored values: exact
    assert_array_equal(stats["min"], X.min(axis=0))
    assert_array_equal(stats["max"], X.max(axis=0))


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_nonfinite_x_is_reported_with_row_and_column(rng, bad):
    X = rng.standard_normal((20, 3))
    X[13, 2] = bad
    with pytest.raises(InputError, match=rf"^X: contains {bad} in row 13, column 2"):
        io.column_stats(X)


def test_constant_and_duplicate_columns_warn(tmp_path, rng):
    X = rng.standard_normal((40, 4))
    X[:, 1] = 3.0
    X[:, 3] = X[:, 0]
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", rng.integers(0, 2, 40).astype(float))
    # Each warning has its own match (pytest re-emits the one the inner block does not match).
    with pytest.warns(DataWarning, match=r"^duplicate column\(s\) x3 = x0: only their sum is "
                                         r"informed by the data; drop the copies"):
        with pytest.warns(DataWarning, match=r"^constant column\(s\) x1: their coefficients are "
                                             r"informed by the prior alone and duplicate the "
                                             r"intercept; drop them from data\.columns$"):
            io.load_data(tmp_path / "X.npy", tmp_path / "y.npy")


def test_columns_that_only_share_summaries_are_not_duplicates():
    X = np.array([[0.0, 1.0], [1.0, 0.0], [0.0, 1.0], [1.0, 0.0]])  # same mean, sd, min, max
    stats = io.column_stats(X)
    assert all(stats[k][0] == stats[k][1] for k in stats)  # the summaries do coincide
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        io.check_columns(X, ["a", "b"], intercept=True)
    assert [str(w.message) for w in record] == []
    # Power check: a true copy of column a is flagged by the same call.
    with pytest.warns(DataWarning, match=r"^duplicate column\(s\) c = a: only their sum is "
                                         r"informed by the data; drop the copies"):
        io.check_columns(np.column_stack([X, X[:, 0]]), ["a", "b", "c"], intercept=True)


def test_standardize_back_transform_keeps_the_linear_predictor(rng):
    X = rng.standard_normal((200, 3)) * [2.0, 0.5, 7.0] + [1.0, -4.0, 30.0]
    ulps = summation_ulps(200)
    for intercept in (True, False):
        Z, st = io.standardize_columns(X, intercept=intercept)
        assert_standardized(Z, X, intercept, ulps)
        if not intercept:
            assert_array_equal(st.center, 0.0)
        draws = rng.standard_normal((2, 5, 3 + intercept))
        orig = st.to_original(draws)
        k = int(intercept)
        eta_z = np.einsum("cdj,nj->cdn", draws[..., k:], Z) + (draws[..., :1] if k else 0)
        eta_x = np.einsum("cdj,nj->cdn", orig[..., k:], X) + (orig[..., :1] if k else 0)
        # eta on the original scale is a sum of terms (b_j / s_j) x_j and a - sum b_j c_j / s_j
        # much larger than eta when |c_j| >> s_j: relative to their sum of |terms|, each path
        # rounds a few times per coefficient (d + 1 = 4 terms, the map back 3 roundings each).
        size = (np.einsum("cdj,nj->cdn", np.abs(orig[..., k:]), np.abs(X))
                + (np.abs(orig[..., :1]) + np.abs(draws[..., :1]) if k else 0))
        assert_ulps_close(eta_x, eta_z, ulps=32, scale=size)


def test_standardize_refuses_a_copy_that_does_not_fit(rng, monkeypatch):
    monkeypatch.setattr(_columns, "_available_memory", lambda: 1000)
    with pytest.raises(InputError, match=r"^standardize: needs a .* GiB copy of X but only .* "
                                         r"free; standardise the columns in the file beforehand"):
        io.standardize_columns(rng.standard_normal((100, 2)), intercept=True)


def test_load_data_csv_with_standardize(tmp_path, rng):
    values = np.column_stack([rng.normal(10, 3, 50), rng.normal(0, 1, 50), rng.integers(0, 2, 50)])
    path = _write_csv(tmp_path / "d.csv", ["u", "v", "y"], values.tolist())
    with pytest.warns(DataNote, match="wrote the encoded table"):
        ds = io.load_data(DataSource(path), "y", standardize=True)
    assert ds.feature_names == ["u", "v"] and ds.n_rows == 50
    # The CSV holds each value's repr, which reads back to the same float.
    assert_standardized(ds.X, values[:, :2], True, summation_ulps(50))
    assert_ulps_close(ds.standardization.scale, values[:, :2].std(axis=0),
                      ulps=summation_ulps(50), scale=variance_size(values[:, :2]))


def test_columns_name_the_columns_of_an_array_file(tmp_path, rng):
    np.save(tmp_path / "X.npy", rng.standard_normal((5, 2)))
    np.save(tmp_path / "y.npy", np.zeros(5))
    np.savez(tmp_path / "d.npz", x=rng.standard_normal((5, 2)), y=np.zeros(5))
    ds = io.load_data(tmp_path / "X.npy", tmp_path / "y.npy", columns=["wind", "waves"])
    assert ds.feature_names == ["wind", "waves"]
    ds = io.load_data(tmp_path / "d.npz", tmp_path / "d.npz", columns=["wind", "waves"])
    assert ds.feature_names == ["wind", "waves"]
    for names, got in ((["a"], "1 column"), (["a", "b", "c"], "3 columns")):
        with pytest.raises(InputError, match=rf"^columns: names {got} but X\.npy has 2; give "
                                             r"one name per column of X, in order$"):
            io.load_data(tmp_path / "X.npy", tmp_path / "y.npy", columns=names)
    with pytest.raises(InputError, match=r"^columns: is the single string 'ab', not a list"):
        io.load_data(tmp_path / "X.npy", tmp_path / "y.npy", columns="ab")


def test_load_data_rejects_a_three_dimensional_x(tmp_path, rng):
    np.save(tmp_path / "y.npy", np.zeros(5))
    np.save(tmp_path / "X3.npy", np.zeros((2, 2, 2)))
    with pytest.raises(InputError, match=r"^X: must be two-dimensional, got shape \(2, 2, 2\)"):
        io.load_data(tmp_path / "X3.npy", tmp_path / "y.npy")


def test_models_on_memory_mapped_files_pickle_as_paths(tmp_path, rng):
    # Workers of a sweep get the file's path, not a copy of its bytes, and map it again.
    import tallchain as tc

    np.save(tmp_path / "X.npy", rng.standard_normal((50_000, 4)))
    np.save(tmp_path / "y.npy", (rng.random(50_000) < 0.5).astype(float))
    X = np.load(tmp_path / "X.npy", mmap_mode="r")
    y = np.load(tmp_path / "y.npy", mmap_mode="r")
    model = tc.LogisticRegression(X, y)
    blob = pickle.dumps(model)
    assert len(blob) < 20_000  # X alone is 1.6 MB
    back = pickle.loads(blob)
    assert np.array_equal(back.X, X) and np.array_equal(back.y, y)
    assert isinstance(back.X, np.memmap)
    # the same kernel on the same bytes: bitwise equal
    assert back.log_likelihood(np.full(5, 0.1)) == model.log_likelihood(np.full(5, 0.1))
    # Power check: an in-memory X is pickled with its bytes.
    assert len(pickle.dumps(tc.LogisticRegression(np.array(X), np.array(y)))) > 1_600_000
