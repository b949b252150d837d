"""New rows for predictions: a .npy, .csv or .parquet table read block by block, its columns
chosen by name; the predictions written block by block to .csv or .parquet."""

from pathlib import Path

import numpy as np

from .._validation import fail
from ..outputs import atomic_write

TABLE_SUFFIXES = (".npy", ".csv", ".parquet")
FIELD = "NEW_TABLE"


def table_columns(path):
    """The column names of a .csv or .parquet table (None for .npy, which has none)."""
    suffix = _suffix(path)
    if suffix == ".csv":
        from pyarrow import csv

        with csv.open_csv(path) as reader:
            return list(reader.schema.names)
    if suffix == ".parquet":
        from pyarrow import parquet

        return list(parquet.ParquetFile(path).schema_arrow.names)
    return None


def read_blocks(path, names, offset_column, rows):
    """Yield ``(X, offset)`` blocks of at most ``rows`` rows from the table at ``path``.

    Parameters
    ----------
    path : pathlib.Path
    names : list of str
        The run's feature columns, in the run's order (a .npy table must hold exactly these,
        in this order).
    offset_column : str or None
        The column holding the new rows' offset (not for .npy).
    rows : int

    Raises
    ------
    InputError
        A missing column, or a value that is not a finite number (naming column and row).
    """
    suffix = _suffix(path)
    if suffix == ".npy":
        yield from _npy_blocks(path, names, offset_column, rows)
        return
    columns = table_columns(path)
    wanted = list(names) + ([offset_column] if offset_column is not None else [])
    missing = [c for c in wanted if c not in columns]
    if missing:
        fail(FIELD, f"{path.name} has no column {missing[0]!r}",
             f"give a table with the run's columns ({', '.join(wanted)})")
    start = 0
    for batch in _arrow_batches(path, suffix, wanted, rows):
        X = np.empty((batch.num_rows, len(names)))
        for j, name in enumerate(names):
            X[:, j] = _column(batch, name, start)
        offset = None if offset_column is None else _column(batch, offset_column, start)
        yield X, offset
        start += batch.num_rows


def _npy_blocks(path, names, offset_column, rows):
    if offset_column is not None:
        fail("--offset", "a .npy table has no named columns",
             "give the new rows as .csv or .parquet with an offset column")
    try:
        table = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:
        fail(FIELD, f"{path.name} cannot be read as a numeric array ({exc})",
             "save it with numpy.save from a float array")
    if table.ndim == 1 and len(names) == 1:
        table = table.reshape(-1, 1)
    if table.ndim != 2 or table.shape[1] != len(names):
        fail(FIELD, f"{path.name} has shape {table.shape}, but the run has {len(names)} columns "
             f"({', '.join(names)})", "give one column per feature, in that order")
    if table.dtype.kind not in "fiub":
        fail(FIELD, f"{path.name} has dtype {table.dtype}", "give a float or integer array")
    for start in range(0, table.shape[0], rows):
        X = np.array(table[start:start + rows], dtype=float)
        bad = np.argwhere(~np.isfinite(X))
        if bad.size:
            r, c = bad[0]
            fail(FIELD, f"column {names[c]!r} holds {X[r, c]} in row {start + r}",
                 "remove or fill that row")
        yield X, None


def _arrow_batches(path, suffix, columns, rows):
    import pyarrow as pa

    try:
        if suffix == ".parquet":
            from pyarrow import parquet

            yield from parquet.ParquetFile(path).iter_batches(batch_size=rows, columns=columns)
            return
        from pyarrow import csv

        options = csv.ConvertOptions(include_columns=columns)
        with csv.open_csv(path, convert_options=options) as reader:
            for batch in reader:
                for lo in range(0, batch.num_rows, rows):
                    yield batch.slice(lo, rows)
    except pa.ArrowInvalid as exc:    # e.g. text further down a column that began with numbers
        fail(FIELD, f"{path.name}: {' '.join(str(exc).split())}",
             "give finite numbers in the run's columns (remove or fill that row)")


def _column(batch, name, start):
    """One column of a record batch as float64, with the first unusable value reported by
    column and row (``start`` is the batch's first row in the table)."""
    col = batch.column(batch.schema.get_field_index(name))
    values = col.to_numpy(zero_copy_only=False)
    try:
        out = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        out = None
    if out is None or not np.isfinite(out).all():
        r = _first_unusable(values, out)
        fail(FIELD, f"column {name!r} holds {_show(values[r])} in row {start + r}",
             "give finite numbers in the run's columns (remove or fill that row)")
    return out


def _show(value):
    if value is None or (isinstance(value, float) and value != value):
        return "a missing value"
    return repr(value) if isinstance(value, str) else f"{float(value):g}"


def _first_unusable(values, out):
    if out is not None:
        return int(np.flatnonzero(~np.isfinite(out))[0])
    for r, v in enumerate(values):
        try:
            if not np.isfinite(float(v)):
                return r
        except (TypeError, ValueError):
            return r
    return 0


def write_table(path, columns, blocks):
    """Write the blocks (dicts of column -> ndarray) to ``path`` (.csv or .parquet), block by
    block, atomically; return the number of rows written."""
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        fail("--out", f"{path.name} is neither .csv nor .parquet",
             "give a file name ending in .csv or .parquet")
    written = [0]

    def write_csv(tmp):
        with open(tmp, "w") as fh:
            fh.write(",".join(columns) + "\n")
            for block in blocks:
                np.savetxt(fh, np.column_stack([block[c] for c in columns]), delimiter=",",
                           fmt=["%d"] + ["%.17g"] * (len(columns) - 1))
                written[0] += len(block[columns[0]])

    def write_parquet(tmp):
        import pyarrow as pa
        from pyarrow import parquet

        schema = pa.schema([(c, pa.int64() if c == "row" else pa.float64()) for c in columns])
        with parquet.ParquetWriter(tmp, schema) as writer:
            for block in blocks:
                writer.write_table(pa.table({c: block[c] for c in columns}, schema=schema))
                written[0] += len(block[columns[0]])

    atomic_write(path, write_csv if suffix == ".csv" else write_parquet)
    return written[0]


def _suffix(path):
    suffix = Path(path).suffix.lower()
    if suffix not in TABLE_SUFFIXES:
        fail(FIELD, f"{Path(path).name} is not a .npy, .csv or .parquet file",
             "give the new rows as one of those")
    if not Path(path).is_file():
        fail(FIELD, f"{path} does not exist", "give the path of the table of new rows")
    return suffix
