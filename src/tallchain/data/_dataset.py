"""Load X, y and the per-row values (offset, trials, weights) from their sources into a
checked `Dataset` (private)."""

from dataclasses import dataclass

import numpy as np

from .._validation import fail
from ._columns import Standardization, check_columns, standardize_columns
from ._load_table import load_table
from ._sources import DataSource, load_array


@dataclass
class Dataset:
    """Arrays ready for a model, with the column names and, if standardised, the way back.

    Attributes
    ----------
    X : ndarray of shape (n_rows, n_features)
        Possibly a read-only memory map.
    y : ndarray of shape (n_rows,)
    offset : ndarray of shape (n_rows,) or None
    trials : ndarray of shape (n_rows,) or None
        Trials per row (binomial regression).
    weights : ndarray of shape (n_rows,) or None
        Frequency weights.
    feature_names : list of str
        Column names (``x0, x1, ...`` for arrays without names; from the formula for a
        table read through one).
    standardization : Standardization or None
    add_intercept : bool
        Whether the model adds an intercept (a formula decides it).
    encoding : Encoding or None
        How a table's rows became X (saved with the run; `encode_new_rows` reuses it).
    table_report : dict or None
        Rows read and used, missing values per column, the cache entry (see `load_table`).
    """

    X: np.ndarray
    y: np.ndarray
    offset: np.ndarray | None
    feature_names: list
    standardization: Standardization | None = None
    add_intercept: bool = True
    encoding: object = None
    table_report: dict | None = None
    trials: np.ndarray | None = None
    weights: np.ndarray | None = None

    @property
    def n_rows(self):
        return self.X.shape[0]


def load_data(x=None, y=None, *, offset=None, trials=None, weights=None, columns=None,
              add_intercept=True, standardize=False, table=None, formula=None, missing="drop",
              cache_dir=None):
    """Load X, y and the optional per-row values, check the columns, and standardise if asked.

    Two routes: arrays (``x`` and ``y``: ``.npy``/``.npz`` files, or a CSV ``x`` with ``y``
    one of its columns), or a table (``table``: a ``.parquet``/``.csv`` file or a table in
    memory) with a ``formula`` or with ``y`` and ``columns`` naming its columns.

    Parameters
    ----------
    x : DataSource or path-like, optional
        ``.npy`` (memory-mapped), ``.npz`` (array ``x`` or the key given) or ``.csv``.
    y : DataSource, path-like or str, optional
        A ``.npy``/``.npz`` file; for a CSV ``x`` or a table, the name of the response column.
    offset : DataSource, path-like or str, optional
        As for y (Poisson and negative binomial models).
    trials : DataSource, path-like or str, optional
        As for y: the trials per row of binomial regression (whole numbers >= 1).
    weights : DataSource, path-like or str, optional
        As for y: frequency weights (>= 0), any family.
    columns : sequence of str, optional
        For a CSV or table, the feature columns to use, by name (a CSV ``x``: default all but
        the response, offset, trials and weights; a table needs them or a formula). For a ``.npy``/``.npz`` X,
        the names of its columns, one per column in order (default: x0, x1, ...).
    add_intercept : bool, default=True
        Ignored with a formula, which decides (``- 1`` removes the intercept).
    standardize : bool, default=False
        Fit on standardised columns (see `standardize_columns` and `Standardization.to_original`).
    table : path-like or table, optional
    formula : str, optional
        ``"response ~ terms"`` for a table (see `load_table`).
    missing : {"drop", "error"}, default="drop"
        Tables and CSV files: what to do with rows that miss a value in a column used.
    cache_dir : path-like, optional
        Where the encoded matrix of a table file is kept (default ``.tallchain-cache`` beside
        the file).

    Returns
    -------
    Dataset

    Warns
    -----
    DataWarning
        Constant or duplicate columns; rows dropped for missing values; a cache entry written.
    """
    table_data = None
    given = {role: source for role, source in
             (("offset", offset), ("trials", trials), ("weights", weights)) if source is not None}
    if table is not None:
        if x is not None:
            fail("x", "is given together with table", "give the data once: x and y, or table")
        if formula is None and columns is None:
            fail("table", "needs the columns to use", "give a formula, or y and columns naming "
                 "the covariates (a table's every column is not taken by default: an "
                 "identifier or a date would go in as a covariate)")
        table_data = load_table(table, formula=formula, response=_column_name(y, "y"),
                                columns=columns, missing=missing, cache_dir=cache_dir,
                                **_column_names(given))
    elif formula is not None:
        fail("formula", "needs a table", "give the data as table = ... (a Parquet or CSV file)")
    else:
        x = x if isinstance(x, DataSource) else DataSource.parse(x)
        if x.is_table:
            table_data = load_table(x.path, response=_column_name(y, "y"), columns=columns,
                                    missing=missing, cache_dir=cache_dir, field="X",
                                    **_column_names(given))
    if table_data is not None:
        X, y_arr = table_data.X, table_data.y
        per_row = {role: getattr(table_data, role) for role in given}
        names = table_data.feature_names
        if formula is not None:
            add_intercept = table_data.encoding.intercept
    else:
        X = load_array(x, field="X")
        y_arr = load_array(y, field="y")
        per_row = {role: load_array(source, field=role) for role, source in given.items()}
        n_cols = X.shape[1] if X.ndim == 2 else 1
        if isinstance(columns, (str, bytes)):
            fail("columns", f"is the single string {columns!r}, not a list of names",
                 "give a list of names, one per column of X")
        names = [f"x{j}" for j in range(n_cols)] if columns is None else list(columns)
        if len(names) != n_cols and X.ndim <= 2:
            fail("columns", f"names {len(names)} column{'s' * (len(names) != 1)} but "
                 f"{x.path.name} has {n_cols}", "give one name per column of X, in order")
    if X.ndim == 1:
        X = X.reshape(-1, 1)
    if X.ndim != 2:
        fail("X", f"must be two-dimensional, got shape {X.shape}",
             "give an (n_rows, n_features) array")
    if X.dtype == object or X.dtype.kind not in "fiub":
        fail("X", f"has dtype {X.dtype}, not numeric", "give a float or integer array")
    stats = check_columns(X, names, intercept=add_intercept)
    scaling = None
    if standardize:
        X, scaling = standardize_columns(X, intercept=add_intercept, stats=stats)
    return Dataset(X=X, y=y_arr, offset=per_row.get("offset"), trials=per_row.get("trials"),
                   weights=per_row.get("weights"), feature_names=names, standardization=scaling,
                   add_intercept=add_intercept,
                   encoding=None if table_data is None else table_data.encoding,
                   table_report=None if table_data is None else table_data.report)


def _column_names(given):
    return {role: _column_name(source, role) for role, source in given.items()}


def _column_name(source, field):
    if source is None or isinstance(source, str):
        return source
    if source.key is None:
        fail(field, f"is the file {source.path.name} while the data are a table",
             f'give the {field} as a column of the table ({field} = "<column name>")')
    return source.key
