"""Sparse designs from files: a scipy.sparse ``.npz`` as ``x`` (through the CLI), its
standardisation (scaled, never centred), refusals of bad or pickled files, and formulas with
categorical terms stored as CSR in the cache.

Sources outside the project: scipy.sparse.save_npz writes the files; the posterior of the same
data given dense (``.npy``) is the reference: the same seed gives draws that agree to the
ulps of the two storages' linear predictors (compared in floors of the two-sample KS, 1.358
sqrt(2 / n_draws), as in tests/models/test_sparse_design.py); the standardised columns are
checked against numpy's standard deviations (ddof=0).
"""

import re
from pathlib import Path

import arviz as az
import numpy as np
import pytest
import scipy.sparse as sp
from scipy import stats

from tallchain.app import _cli as cli
from tallchain.data import CSRDesign, load_array, load_data
from tallchain.exceptions import InputError
from ulps import assert_ulps_close

FAST = """\
[sampler]
method = "penalty-mala"
chains = 2
draws = 300
warmup = 150
seed = 3
"""


def one_hot(rng, n, levels=(4, 5)):
    """Treatment-coded one-hot columns of independent categorical variables (first level
    dropped), and a numeric column."""
    blocks = [sp.csr_matrix(np.eye(k)[rng.integers(0, k, n)][:, 1:]) for k in levels]
    return sp.hstack(blocks + [sp.csr_matrix(rng.standard_normal((n, 1)))], format="csr")


def _config(folder, x_name, extra=""):
    path = folder / f"{x_name}.toml"
    path.write_text(f'[data]\nx = "{x_name}"\ny = "y.npy"\n{extra}\n[model]\nfamily = '
                    f'"logistic"\n{FAST}')
    return path


def test_npz_sparse_x_through_the_cli_matches_the_dense_run(tmp_path, rng, capsys):
    Xs = one_hot(rng, 3000)
    beta = np.array([0.5, -0.5, 1.0, 0.3, -0.2, 0.4, 0.1, 0.8])
    y = (rng.random(3000) < 1 / (1 + np.exp(-(Xs @ beta - 0.3)))).astype(float)
    sp.save_npz(tmp_path / "X.npz", Xs)
    np.save(tmp_path / "X.npy", Xs.toarray())
    np.save(tmp_path / "y.npy", y)
    draws = {}
    for name in ("X.npz", "X.npy"):
        code = cli.main(["run", str(_config(tmp_path, name)), "--out",
                         str(tmp_path / f"out-{name}"), "--quiet"])
        capsys.readouterr()
        assert code == 0
        post = az.from_netcdf(tmp_path / f"out-{name}" / "posterior.nc")["posterior"]["beta"]
        draws[name] = post.values.reshape(-1, post.shape[-1])
    floor = 1.358 * np.sqrt(2.0 / draws["X.npy"].shape[0])   # bound: ESS <= draws
    for j in range(draws["X.npy"].shape[1]):
        ks = stats.ks_2samp(draws["X.npz"][:, j], draws["X.npy"][:, j]).statistic
        assert ks <= 1.5 * floor, (j, ks, floor)


def test_npz_sparse_loads_as_csr_in_any_scipy_format(tmp_path, rng):
    Xs = one_hot(rng, 200)
    for fmt in ("csr", "csc", "coo"):
        sp.save_npz(tmp_path / f"{fmt}.npz", Xs.asformat(fmt))
        X = load_array(tmp_path / f"{fmt}.npz", field="X")
        assert isinstance(X, CSRDesign) and X.shape == Xs.shape
        np.testing.assert_array_equal(np.asarray(X), Xs.toarray())


def test_npz_bad_sparse_files_are_one_line_errors(tmp_path, rng, capsys):
    Xs = one_hot(rng, 100)
    np.savez(tmp_path / "badcol.npz", data=Xs.data, indices=Xs.indices + 50, indptr=Xs.indptr,
             format=np.array("csr"), shape=np.array(Xs.shape))
    with pytest.raises(InputError, match=r"^X: .*column index outside 0\.\.7"):
        load_array(tmp_path / "badcol.npz", field="X")
    np.savez(tmp_path / "pickled.npz", data=np.array([{"a": 1}], dtype=object),
             format=np.array("csr"), shape=np.array(Xs.shape))
    np.save(tmp_path / "y.npy", np.zeros(100))
    code = cli.main(["run", str(_config(tmp_path, "pickled.npz")), "--out",
                     str(tmp_path / "o")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "Traceback" not in err[0]
    assert re.search(r"pickle", err[0]), err[0]


def test_standardize_scales_sparse_columns_without_centring(tmp_path, rng):
    Xs = one_hot(rng, 500)
    sp.save_npz(tmp_path / "X.npz", Xs)
    np.save(tmp_path / "y.npy", (rng.random(500) < 0.5).astype(float))
    ds = load_data(tmp_path / "X.npz", tmp_path / "y.npy", standardize=True)
    assert isinstance(ds.X, CSRDesign) and ds.X.nnz == Xs.nnz   # zeros stay zeros
    sd = Xs.toarray().std(axis=0)   # numpy, ddof=0
    np.testing.assert_array_equal(ds.standardization.center, 0.0)
    # one division per value: 1 ulp; the sd by Chan et al.'s merge against numpy's two-pass
    assert_ulps_close(ds.standardization.scale, sd, ulps=64)
    assert_ulps_close(np.asarray(ds.X), Xs.toarray() / ds.standardization.scale, ulps=1)
    # the way back: coefficients on the standardised scale map to x-scale ones
    coef = np.r_[0.1, rng.standard_normal(Xs.shape[1])]
    back = ds.standardization.to_original(coef)
    assert_ulps_close(back[1:], coef[1:] / sd, ulps=66)
    assert back[0] == coef[0]


def _flights_like(rng, n):
    import pandas as pd
    return pd.DataFrame({"late": (rng.random(n) < 0.3).astype(float),
                         "carrier": rng.choice(list("ABCDEFGHIJ"), n),
                         "month": rng.integers(1, 13, n), "hour": rng.integers(5, 23, n)})


def test_formula_with_categorical_terms_is_stored_sparse_in_the_cache(tmp_path, rng):
    import warnings

    from tallchain.data import encode_new_rows
    from tallchain.data._sparse import SPARSE_MAX_DENSITY

    frame = _flights_like(rng, 3000)
    frame.to_parquet(tmp_path / "f.parquet")
    formula = "late ~ hour + C(carrier) + C(month)"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = load_data(table=tmp_path / "f.parquet", formula=formula)
        again = load_data(table=tmp_path / "f.parquet", formula=formula)   # from the cache
        dense = load_data(table=tmp_path / "f.parquet", formula="late ~ hour + month")
    # 3 of 21 columns non-zero per row (hour, a carrier and a month level at most):
    # below the rule's share, so CSR; two numeric columns are not
    assert isinstance(ds.X, CSRDesign) and ds.X.shape == (3000, 1 + 9 + 11)
    assert ds.X.nnz <= 3 * 3000 and ds.X.nnz / (3000 * 21) <= SPARSE_MAX_DENSITY
    assert isinstance(dense.X, np.ndarray)
    entry = Path(ds.table_report["cache"])
    assert sorted(p.name for p in entry.glob("X*.npy")) == ["X_data.npy", "X_indices.npy",
                                                          "X_indptr.npy"]
    for part in (again.X.data, again.X.indices, again.X.indptr):
        assert isinstance(part, np.memmap) and part.mode == "r"
    # the same values as formulaic's dense encoding of the same rows (the new-rows path)
    expected = encode_new_rows(ds.encoding, frame.drop(columns=["late"]))
    np.testing.assert_array_equal(np.asarray(ds.X), expected)
    np.testing.assert_array_equal(np.asarray(again.X), expected)


def test_column_stats_of_a_csr_design_match_numpy_on_the_dense_form(rng):
    from tallchain.data import column_stats
    Xs = one_hot(rng, 20_000)
    Xs.data[Xs.indices == 3] *= -2.5    # a column with negative values and zeros
    full = sp.csr_matrix(np.where(rng.random((20_000, 2)) < 0.5, 1.0, 2.0))   # no zeros
    Xs = sp.hstack([Xs, full], format="csr")
    stats_ = column_stats(CSRDesign.from_scipy(Xs))
    D = Xs.toarray()
    # numpy's two-pass mean and sd against block sums merged pairwise (Chan et al. 1983):
    # sums of 20,000 terms in another order, within 20,000 ulps of the sum of |terms|
    assert_ulps_close(stats_["mean"], D.mean(axis=0), ulps=2e4, scale=np.abs(D).mean(axis=0))
    assert_ulps_close(stats_["sd"], D.std(axis=0), ulps=2e4, scale=np.abs(D).max(axis=0))
    np.testing.assert_array_equal(stats_["min"], D.min(axis=0))
    np.testing.assert_array_equal(stats_["max"], D.max(axis=0))
