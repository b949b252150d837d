"""New rows encoded exactly as a fitted model's rows were (for predictions; private)."""

import json
from pathlib import Path

import numpy as np

from .._validation import fail
from ._encoding import Encoding, encode_block
from ._load_table import _check_finite, _complete_frame, _null_mask
from ._tables import BATCH_ROWS, Table, is_text


def read_encoding(saved):
    """The `Encoding` of a run: a run folder, its run.json, the dict saved there, or an Encoding.

    Parameters
    ----------
    saved : Encoding, dict, or path-like
        ``run.json["data"]["encoding"]``, or the path of a run folder or of its run.json.

    Returns
    -------
    Encoding
    """
    if isinstance(saved, Encoding):
        return saved
    if isinstance(saved, (str, Path)):
        path = Path(saved)
        path = path / "run.json" if path.is_dir() else path
        if not path.is_file():
            fail("encoding", f'"{path}" does not exist', "give a run folder or its run.json")
        record = json.loads(path.read_text())
        saved = (record.get("data") or {}).get("encoding")
        if saved is None:
            fail("encoding", f"{path} records no table encoding (the run read arrays, not a "
                 "table)", "encode the new rows as that run's X was built")
    return Encoding.from_dict(saved)


def iter_new_rows(saved, table, *, batch_rows=BATCH_ROWS):
    """Yield ``(first_row, X_block)`` for new rows, encoded as the fitted model's rows were.

    The response and offset columns are not needed. The intercept is not a column of X (see
    ``Encoding.intercept``), as in the model. Every row must be usable: a missing value, a
    level the model did not see, or a transform out of its domain stops with an error naming
    the column and the row (counted from 1).

    Parameters
    ----------
    saved : Encoding, dict or path-like
        See `read_encoding`.
    table : path-like or table
        A ``.parquet``/``.csv`` file or a pandas/polars/pyarrow table with the columns in
        ``Encoding.variables``.
    batch_rows : int, default=65536

    Yields
    ------
    first_row : int
        Index (from 0) of the block's first row in the table.
    X_block : ndarray of shape (n_block, n_features)
    """
    import pyarrow as pa

    encoding = read_encoding(saved)
    source = Table(table, field="table")
    for name in encoding.variables:
        source.column(name, "table")
    types = None
    if source.is_csv:
        inferred = source.types(encoding.variables)
        types = {n: pa.string() if is_text(t) else
                 pa.int64() if n in encoding.levels and pa.types.is_integer(t) else
                 pa.bool_() if pa.types.is_boolean(t) else pa.float64()
                 for n, t in inferred.items()}
    # the specs built from the saved formula and levels encode every batch the same way
    new = Encoding(**{**encoding.to_dict(), "offset": None})
    state = {}
    for start, batch in source.batches(encoding.variables, batch_rows=batch_rows, types=types):
        for name, arr in zip(encoding.variables, batch.columns):
            null = _null_mask(arr)
            if null.any():
                fail(name, f"is missing in row {start + int(np.argmax(null)) + 1} of "
                     f"{source.label}", "fill it in, or leave that row out")
        frame = _complete_frame(batch, encoding.variables, start)
        X, _ = encode_block(_without_response(new), frame, state)
        if list(new.columns) != list(encoding.columns):
            fail("table", f"encodes to the columns {new.columns}, not the fitted model's "
                 f"{encoding.columns}", "give the columns with the same types as in the fit")
        _check_finite(X, encoding.columns, frame.index, source.label)
        yield start, X


def encode_new_rows(saved, table):
    """New rows encoded as the fitted model's rows were, as one array (see `iter_new_rows`).

    Returns
    -------
    ndarray of shape (n_rows, n_features)
        Without an intercept column; add ``coef[0]`` when ``Encoding.intercept``.
    """
    encoding = read_encoding(saved)
    blocks = [X for _, X in iter_new_rows(encoding, table)]
    return np.concatenate(blocks) if blocks else np.empty((0, len(encoding.columns)))


def _without_response(encoding):
    if encoding.kind == "columns":
        encoding.response = None
    return encoding
