"""Load X, y and an offset from their sources into a checked `Dataset` (private)."""

from dataclasses import dataclass

import numpy as np

from .._validation import fail
from ._columns import Standardization, check_columns, standardize_columns
from ._csv import read_csv
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
    feature_names : list of str
        Column names (``x0, x1, ...`` for arrays without names).
    standardization : Standardization or None
    """

    X: np.ndarray
    y: np.ndarray
    offset: np.ndarray | None
    feature_names: list
    standardization: Standardization | None = None

    @property
    def n_rows(self):
        return self.X.shape[0]


def load_data(x, y, *, offset=None, columns=None, add_intercept=True, standardize=False):
    """Load X, y and an optional offset, check the columns, and standardise if asked.

    Parameters
    ----------
    x : DataSource or path-like
        ``.npy`` (memory-mapped), ``.npz`` (array ``x`` or the key given) or ``.csv``.
    y : DataSource, path-like or str
        A ``.npy``/``.npz`` file; when x is a CSV, the name of its response column (a str, or
        a `DataSource` whose key is the column).
    offset : DataSource, path-like or str, optional
        As for y (Poisson models).
    columns : sequence of str, optional
        For a CSV, the feature columns to use, by name (default: all but the response and
        offset). For a ``.npy``/``.npz`` X, the names of its columns, one per column in order
        (default: x0, x1, ...).
    add_intercept : bool, default=True
    standardize : bool, default=False
        Fit on standardised columns (see `standardize_columns` and `Standardization.to_original`).

    Returns
    -------
    Dataset

    Warns
    -----
    DataWarning
        Constant or duplicate columns.
    """
    x = x if isinstance(x, DataSource) else DataSource.parse(x)
    if x.is_table:
        X, y_arr, off_arr, names = read_csv(x.path, response=_column_name(y, "y"),
                                            columns=columns,
                                            offset=_column_name(offset, "offset"))
    else:
        X = load_array(x, field="X")
        y_arr = load_array(y, field="y")
        off_arr = None if offset is None else load_array(offset, field="offset")
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
    return Dataset(X=X, y=y_arr, offset=off_arr, feature_names=names, standardization=scaling)


def _column_name(source, field):
    if source is None or isinstance(source, str):
        return source
    if source.key is None:
        fail(field, f"is the file {source.path.name} while X is a CSV",
             f'give the {field} as a column of the CSV ({field} = "<column name>")')
    return source.key
