"""A table and a formula (or columns) in, a float64 design matrix out, in two passes (private).

The first pass (`_scan`) reads the needed columns batch by batch: it counts the missing values
of each column and the complete rows, collects the levels of the categorical variables and
stops at a value that cannot be used (inf, or text in a numeric CSV column). The second pass
encodes the complete rows of each batch (`encode_block`) into a memory-mapped ``.npy`` entry
of the cache (`_cache`), or into memory for a table that is itself in memory. Neither pass
holds more than one batch of the table.
"""

import os
import re
import warnings
from pathlib import Path
from dataclasses import dataclass, field

import numpy as np

from .._validation import fail, first_bad_row_value, one_of, show_value
from ..exceptions import DataNote, DataWarning
from . import _cache
from ._csr_store import CSRSink, design_of
from ._encoding import MAX_LEVELS, Encoding, check_row_roles, encode_block, formula_encoding
from ._sparse import prefer_sparse
from ._tables import Table, is_text

MISSING_CHOICES = ("drop", "error")
_ID_NAME = re.compile(r"(^|_)(id|key|index|row|uuid)$|^(id|row)_|number$", re.IGNORECASE)


@dataclass
class TableData:
    """Arrays encoded from a table, with what was done to get them.

    Attributes
    ----------
    X : ndarray of shape (n_used, n_features)
        A read-only memory map of the cache entry (files), or an array (tables in memory).
    y : ndarray of shape (n_used,)
    offset : ndarray of shape (n_used,) or None
    trials : ndarray of shape (n_used,) or None
    weights : ndarray of shape (n_used,) or None
    encoding : Encoding
    report : dict
        ``rows_read``, ``rows_used``, ``missing`` (per column: rows with that value missing),
        ``missing_policy`` and ``cache`` (the entry's folder, or None): for run.json.
    """

    X: np.ndarray
    y: np.ndarray
    offset: np.ndarray | None
    encoding: Encoding
    report: dict = field(default_factory=dict)
    trials: np.ndarray | None = None
    weights: np.ndarray | None = None

    @property
    def feature_names(self):
        return list(self.encoding.columns)


def load_table(table, *, formula=None, response=None, columns=None, offset=None,
               trials=None, weights=None, missing="drop", cache_dir=None, cache=True,
               field="table"):
    """Encode a table into a design matrix, by a formula or by named numeric columns.

    Parameters
    ----------
    table : path-like or table
        A ``.parquet`` or ``.csv`` file, or a pandas/polars DataFrame or pyarrow Table.
    formula : str, optional
        ``"response ~ terms"`` (Wilkinson & Rogers 1973, as ``formulaic`` reads it).
    response : str, optional
        Without a formula: the response column.
    columns : sequence of str, optional
        Without a formula: the feature columns (numbers or true/false). Default: all others,
        with a `DataWarning` for any that looks like a row identifier.
    offset, trials, weights : str, optional
        The columns of the offset, of the trials per row (whole numbers >= 1) and of the
        frequency weights (>= 0). Each is read as numbers into an array of its own; a
        missing value drops the row as for any column used; a value its rule refuses stops,
        naming the column and the row.
    missing : {"drop", "error"}, default="drop"
        Drop the rows with a missing value in a column used (counted per column, with a
        `DataWarning`), or stop at the first.
    cache_dir : path-like, optional
        Where the encoded matrix of a file is kept (default ``.tallchain-cache`` beside it).
    cache : bool, default=True
        Keep and reuse the encoded matrix of a file.

    Returns
    -------
    TableData
    """
    missing = one_of("missing", missing, MISSING_CHOICES, "missing-value policy")
    source = Table(table, field=field)
    rows = {role: name for role, name in
            (("offset", offset), ("trials", trials), ("weights", weights)) if name is not None}
    for role, name in rows.items():
        source.column(name, role)
    if formula is not None:
        if response is not None or columns is not None:
            fail("formula", "is given together with " + ("y" if response is not None else
                 "columns"), "give the response and the terms in the formula alone")
        encoding, categorical = formula_encoding(formula, source.names, row_columns=rows)
    else:
        encoding, categorical = _columns_encoding(source, response, columns, rows), set()
    types = _column_types(source, encoding, categorical)
    selection = {"encoding": encoding.to_dict(), "missing": missing}
    use_cache = cache and source.path is not None
    entry = None
    if use_cache:
        identity = source.identity()
        folder = _cache.cache_folder(source.path, cache_dir)
        entry = _cache.entry_path(folder, source.path, _cache.entry_key(identity, selection))
        found = _cache.open_entry(entry)
        if found is not None:
            arrays, meta = found
            _warn_missing(meta["report"], source.label)
            return _table_data(arrays, Encoding.from_dict(meta["encoding"]), meta["report"])
    scan = _scan(source, encoding, types, missing, id_check=columns is None and
                 formula is None)
    n_features, sparse = _n_features(source, encoding, types)
    shapes = {"y": (scan["kept"],)} if sparse else {"X": (scan["kept"], n_features),
                                                     "y": (scan["kept"],)}
    shapes.update({role: (scan["kept"],) for role in rows})
    report = {"rows_read": scan["rows"], "rows_used": scan["kept"], "missing": scan["missing"],
              "missing_policy": missing, "cache": None if entry is None else str(entry)}
    _warn_missing(report, source.label)
    if use_cache:
        removed = _cache.remove_stale(folder, identity)
        writer = _cache.EntryWriter(entry, shapes, source.label)
    else:
        removed, writer = [], None
    arrays = writer.arrays if writer is not None else {n: np.empty(s) for n, s in shapes.items()}
    sink = None
    if sparse:
        sink = CSRSink(None if writer is None else writer.tmp, scan["kept"], n_features)
        arrays = {**arrays, "X": sink}
    try:
        _fill(source, encoding, types, arrays)
        if sink is not None:
            arrays.update(sink.finish())
            del arrays["X"]
    except BaseException:
        if sink is not None:
            sink.discard()
        if writer is not None:
            writer.discard()
        raise
    if writer is not None:
        if writer.tmp is None:
            report["cache"] = None
        committed = writer.commit({"source": identity, "encoding": encoding.to_dict(),
                                   "report": report})
        # in memory (folder not writable): the writer's arrays and a sparse X's; else the
        # entry's files, mapped
        arrays = {**arrays, **committed} if report["cache"] is None else committed
        if report["cache"] is not None:
            _warn_cache_written(entry, shapes, removed)
    return _table_data(arrays, encoding, report)


def _table_data(arrays, encoding, report):
    return TableData(X=design_of(arrays, len(encoding.columns)), y=arrays["y"], offset=arrays.get("offset"),
                     trials=arrays.get("trials"), weights=arrays.get("weights"),
                     encoding=encoding, report=report)


def _columns_encoding(source, response, columns, rows):
    if response is None:
        fail("y", f"is missing for the table {source.label}",
             'name the response column (y = "<column>"), or give a formula')
    source.column(response, "y")
    roles = check_row_roles([response], rows)
    if columns is None:
        names = [n for n in source.names if n not in roles]
    else:
        if isinstance(columns, (str, bytes)):
            fail("columns", f"is the single string {columns!r}, not a list of names",
                 "give a list of column names")
        names = list(columns)
        for name in names:
            if name in roles:
                fail("columns", f'lists "{name}", which is the {roles[name]} column',
                     "leave it out of the feature columns")
            source.column(name, "columns")
        if len(set(names)) != len(names):
            dup = next(n for n in names if names.count(n) > 1)
            fail("columns", f'lists "{dup}" twice', "give each feature column once")
    if not names:
        fail("columns", f"no feature columns left in {source.label}", "give at least one column")
    return Encoding(kind="columns", formula=None, response=response,
                    offset=rows.get("offset"), trials=rows.get("trials"),
                    weights=rows.get("weights"), variables=names, columns=names)


def _column_types(source, encoding, categorical):
    """The pyarrow type of each needed column (for CSV, the type it is converted to), and the
    categorical variables, after refusing text where numbers are needed."""
    import pyarrow as pa

    needed = encoding.needed
    inferred = source.types(needed)
    types = {}
    numeric_only = set(encoding.variables) if encoding.kind == "columns" else set()
    numeric_only |= set(encoding.row_columns.values())
    if encoding.kind == "columns":
        numeric_only.add(encoding.response)
    for name in needed:
        t = inferred[name]
        if pa.types.is_dictionary(t):
            t = t.value_type
        text = is_text(t)
        numeric = pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)
        if not (text or numeric):
            fail(name, f"has the type {t}, which is neither numbers nor text",
                 "give numbers, true/false or text (for a category)")
        if text and name in numeric_only:
            fail(name, f"holds text in {source.label}", f"give a formula with C({name}) to use "
                 "it as a category, or leave it out of the columns")
        if text and encoding.kind == "formula" and name in encoding.variables:
            categorical.add(name)
        if source.is_csv:
            t = pa.string() if text else (
                pa.int64() if pa.types.is_integer(t) and name in categorical
                else pa.bool_() if pa.types.is_boolean(t) else pa.float64())
        types[name] = t
    encoding.levels = {name: [] for name in sorted(categorical)}
    return types


def _scan(source, encoding, types, missing, *, id_check):
    """First pass: rows, complete rows, missing values per column, levels, unusable values."""
    needed = encoding.needed
    levels = {name: {} for name in encoding.levels}
    counts = dict.fromkeys(needed, 0)
    rows = kept = 0
    increasing = {n: -np.inf for n in encoding.variables} if id_check else {}
    for start, batch in source.batches(needed, types=types):
        nulls = [_null_mask(arr) for arr in batch.columns]
        complete = ~np.any(nulls, axis=0) if nulls else np.ones(batch.num_rows, dtype=bool)
        if missing == "error" and not complete.all():
            i = int(np.argmin(complete))
            name = next(n for n, null in zip(needed, nulls) if null[i])
            fail(name, f"is missing in row {start + i + 1} of {source.label}",
                 'fill it in, or set missing = "drop" to drop incomplete rows')
        for name, arr, null in zip(needed, batch.columns, nulls):
            counts[name] += int(null.sum())
            if _is_float(arr):
                _refuse_infinite(name, arr, start, source.label)
            if name in levels:
                _collect_levels(levels[name], arr, name)
            if name in increasing:
                increasing[name] = _still_increasing(arr, increasing[name])
        rows += batch.num_rows
        kept += int(complete.sum())
    if rows == 0 or kept == 0:
        fail(source.field, f"{source.label} has no " + ("rows" if rows == 0 else
             "complete rows (every row misses a value in a column used)"),
             "give at least 2 rows with a value in every column used")
    encoding.levels = {name: _ordered(found) for name, found in levels.items()}
    for name, cats in encoding.levels.items():
        if len(cats) < 2 and name in encoding.variables:
            warnings.warn(f"categorical column {name} has a single level ({_show(cats)}) in "
                          "the rows used: it adds no coefficient", DataWarning, stacklevel=3)
    if id_check:
        _warn_identifiers(encoding, increasing)
    return {"rows": rows, "kept": kept, "missing": {n: c for n, c in counts.items() if c}}


def _null_mask(arr):
    import pyarrow.compute as pc

    null = pc.is_null(arr, nan_is_null=True)
    return np.asarray(null.to_numpy(zero_copy_only=False), dtype=bool)


def _is_float(arr):
    import pyarrow as pa

    return pa.types.is_floating(arr.type)


def _refuse_infinite(name, arr, start, label):
    values = arr.to_numpy(zero_copy_only=False)
    bad = np.isinf(values)
    if bad.any():
        i = int(np.argmax(bad))
        fail(name, f"is {values[i]} in row {start + i + 1} of {label}",
             "give a finite number, or leave the cell empty to mark it missing")


def _collect_levels(found, arr, name):
    """Add the values of ``arr`` to ``found`` (and a pandas categorical's category order)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if pa.types.is_dictionary(arr.type):
        order = found.setdefault("order", {})
        for v in arr.dictionary.to_pylist():
            order.setdefault(v, len(order))
        arr = arr.dictionary_decode()
    seen = found.setdefault("seen", set())
    seen.update(pc.unique(arr.drop_null()).to_pylist())
    if len(seen) > MAX_LEVELS:
        fail(name, f"has more than {MAX_LEVELS:,} distinct values, too many levels for a "
             "category", "leave it out of the formula, or group its values into fewer levels")


def _ordered(found):
    """The levels seen: in a pandas categorical's category order when there is one, else
    sorted; the first is the reference level of treatment coding."""
    seen, order = found.get("seen", set()), found.get("order")
    return sorted(seen, key=order.get) if order else sorted(seen)


def _still_increasing(arr, last):
    """The last value when ``arr`` continues a strictly increasing run of whole numbers."""
    import pyarrow as pa

    if last is None or arr.null_count or not (pa.types.is_integer(arr.type)
                                              or pa.types.is_floating(arr.type)):
        return None
    values = arr.to_numpy()
    if not values.size:
        return last
    if values[0] <= last or np.any(np.diff(values) <= 0) or np.any(values != np.round(values)):
        return None
    return values[-1]


def _warn_identifiers(encoding, increasing):
    suspects = [n for n in encoding.variables
                if _ID_NAME.search(n) or increasing.get(n) is not None]
    if suspects:
        warnings.warn(f"column(s) {', '.join(suspects)} look like row identifiers (a name such "
                      "as id, or strictly increasing whole numbers) and are used as covariates "
                      "because no columns were named; name the covariates (columns = [...]) "
                      "or give a formula", DataWarning, stacklevel=3)


def _n_features(source, encoding, types):
    """The number of X's columns and whether X is stored sparse: from a formula, the columns
    of its first batch of complete rows (up to 256), and its share of non-zeros there
    (`prefer_sparse`); named columns are stored dense."""
    if encoding.kind == "columns":
        return len(encoding.variables), False
    for start, batch in source.batches(encoding.needed, batch_rows=256, types=types):
        frame = _complete_frame(batch, encoding.needed, start)
        if len(frame):
            xb, _ = encode_block(encoding, frame, {})
            return len(encoding.columns), prefer_sparse(np.count_nonzero(xb), xb.size)
    return 0, False   # pragma: no cover - _scan has refused a table without complete rows


def _complete_frame(batch, needed, start):
    """The complete rows of a batch as a pandas frame indexed by row number (from 1)."""
    import pyarrow as pa

    complete = np.ones(batch.num_rows, dtype=bool)
    for arr in batch.columns:
        complete &= ~_null_mask(arr)
    rows = np.flatnonzero(complete)
    frame = batch.filter(pa.array(complete)).to_pandas() if not complete.all() else \
        batch.to_pandas()
    frame.index = rows + start + 1
    return frame


def _fill(source, encoding, types, arrays):
    """Second pass: encode the complete rows of each batch into ``arrays``."""
    state = {}
    at = 0
    X, y = arrays["X"], arrays["y"]
    for start, batch in source.batches(encoding.needed, types=types):
        frame = _complete_frame(batch, encoding.needed, start)
        if not len(frame):
            continue
        xb, yb = encode_block(encoding, frame, state, sparse=isinstance(X, CSRSink))
        stop = at + len(frame)
        _check_finite(xb, encoding.columns, frame.index, source.label)
        _check_finite(yb[:, None], [encoding.response], frame.index, source.label)
        if isinstance(X, CSRSink):
            X.append(xb)
        else:
            X[at:stop] = xb
        y[at:stop] = yb
        for role, name in encoding.row_columns.items():
            values = frame[name].to_numpy(dtype=np.float64)
            _check_row_values(role, name, values, frame.index, source.label)
            arrays[role][at:stop] = values
        at = stop


def _check_row_values(role, name, values, rows, label):
    bad = first_bad_row_value(role, values)
    if bad is not None:
        fail(name, f"is {values[bad[0]]:g} in row {rows[bad[0]]} of {label}, not usable as "
             f"{role}", f"{bad[1]}, or leave the cell empty to drop the row")


def _check_finite(block, names, rows, label):
    if hasattr(block, "indptr"):   # a CSR block: its values, located through indptr
        bad = np.flatnonzero(~np.isfinite(block.data))
        if bad.size:
            k = bad[0]
            i, j = np.searchsorted(block.indptr, k, side="right") - 1, block.indices[k]
            fail(names[j], f"is {block.data[k]} in row {rows[i]} of {label}",
                 "a transform such as log() needs values in its domain: correct or drop "
                 "that row")
        return
    bad = ~np.isfinite(block)
    if bad.any():
        i, j = np.argwhere(bad)[0]
        fail(names[j], f"is {block[i, j]} in row {rows[i]} of {label}",
             "a transform such as log() needs values in its domain: correct or drop that row")


def _warn_missing(report, label):
    """The rows dropped for missing values, per column (on every load, cached or not)."""
    dropped = report["rows_read"] - report["rows_used"]
    if dropped:
        per = ", ".join(f"{n} {c:,}" for n, c in report["missing"].items())
        warnings.warn(f"dropped {dropped:,} of {report['rows_read']:,} rows of {label} with a "
                      f"missing value (missing per column: {per}); set missing = \"error\" to "
                      "refuse incomplete rows instead", DataWarning, stacklevel=3)


def _warn_cache_written(entry, shapes, removed):
    size = sum(f.stat().st_size for f in Path(entry).glob("*.npy"))
    gone = f"; removed {len(removed)} stale entr{'y' if len(removed) == 1 else 'ies'}" \
        if removed else ""
    # normpath: "configs/../examples/data/..." reads as "examples/data/..." in the note
    warnings.warn(f"wrote the encoded table ({size / 2**20:,.1f} MiB) to the cache "
                  f"{os.path.normpath(entry)}; "
                  f"later runs reuse it while the table is unchanged{gone} (safe to delete)",
                  DataNote, stacklevel=3)


def _show(values):
    return ", ".join(map(show_value, values)) or "none"
