"""Tables in: Parquet and CSV files and in-memory tables, read in batches of rows (private).

Every reader yields `pyarrow.RecordBatch` objects of the columns asked for, so nothing here
holds a whole table: Parquet files are read row group by row group, CSV files block by block
(pyarrow's streaming reader), and pandas, polars or pyarrow tables in memory are sliced.
"""

import csv
import math
from pathlib import Path

import numpy as np

from .._validation import did_you_mean, fail, show_value
from ._sources import TABLE_SUFFIXES, existing_file

BATCH_ROWS = 1 << 16
_CSV_BLOCK_BYTES = 1 << 22


def _pyarrow():
    import pyarrow as pa

    return pa


def is_table_path(path):
    """Whether ``path`` names a Parquet or CSV file (by its suffix)."""
    return Path(path).suffix.lower() in TABLE_SUFFIXES


def is_table_object(obj):
    """Whether ``obj`` is a pandas or polars DataFrame or a pyarrow Table/RecordBatch (judged
    by its type's module and name, so that no library is imported to ask)."""
    kind = type(obj)
    library = kind.__module__.split(".")[0]
    return (library in ("pandas", "polars") and kind.__name__ == "DataFrame") or \
        (library == "pyarrow" and kind.__name__ in ("Table", "RecordBatch"))


def table_column_names(obj):
    """The column names of an in-memory table, or None for anything else (arrays, lists)."""
    if not is_table_object(obj):
        return None
    names = obj.schema.names if type(obj).__module__.startswith("pyarrow") else obj.columns
    return [str(c) for c in names]


class Table:
    """One table, file or in memory, read in batches of the columns asked for.

    Parameters
    ----------
    source : path-like, pandas.DataFrame, polars.DataFrame, pyarrow.Table or RecordBatch
        A ``.parquet``/``.pq`` or ``.csv`` file (with a header row), or a table in memory.
    field : str
        The name errors give the source (``"data.table"`` in a config).

    Attributes
    ----------
    path : pathlib.Path or None
        The file, or None for a table in memory.
    names : list of str
        The column names, in the table's order.
    """

    def __init__(self, source, *, field="table"):
        self.field = field
        self.path = None
        self._memory = None
        self._csv_types = None
        if isinstance(source, (str, Path)):
            self.path = existing_file(Path(source), field)
            suffix = self.path.suffix.lower()
            if suffix not in TABLE_SUFFIXES:
                fail(field, f"{self.path.name} has the unsupported file type {suffix!r}",
                     "give a .parquet or .csv file")
            self.names = self._parquet_schema().names if self.is_parquet else csv_header(
                self.path, field=field)
        elif is_table_object(source):
            self._memory = _as_arrow(source, field)
            self.names = list(self._memory.schema.names)
        else:
            fail(field, f"must be a file path or a table (pandas, polars or pyarrow), got "
                 f"{type(source).__name__}", "give a .parquet/.csv path or a DataFrame")

    @property
    def is_parquet(self):
        return self.path is not None and self.path.suffix.lower() in (".parquet", ".pq")

    @property
    def is_csv(self):
        return self.path is not None and not self.is_parquet

    def types(self, columns):
        """The pyarrow type of each of ``columns``: the schema's, or for a CSV file the type
        inferred from its first block (see `csv_inferred_types`)."""
        if self.is_csv:
            return self.csv_inferred_types(columns)
        schema = self._memory.schema if self.path is None else self._parquet_schema()
        return {name: schema.field(name).type for name in columns}

    @property
    def label(self):
        return self.path.name if self.path is not None else "the table"

    def identity(self):
        """What the cache key hashes: the absolute path, size and modification time."""
        stat = self.path.stat()
        return {"path": str(self.path.resolve()), "size": stat.st_size,
                "mtime_ns": stat.st_mtime_ns}

    def column(self, name, field):
        """``name`` when it is a column; else an error naming the columns there are."""
        if name not in self.names:
            fail(field, f'column "{name}" is not in {self.label}',
                 f"{did_you_mean(name, self.names)}the columns are: {', '.join(self.names)}")
        return name

    def batches(self, columns, batch_rows=BATCH_ROWS, types=None):
        """Yield ``(first_row, pyarrow.RecordBatch)`` of ``columns`` (in that order).

        ``types`` (CSV only) maps column names to the pyarrow type to convert them to.
        """
        columns = list(columns)
        if self._memory is not None:
            yield from _enumerate(self._memory.select(columns).to_batches(
                max_chunksize=batch_rows), columns)
            return
        if self.is_parquet:
            yield from _enumerate(self._parquet_file().iter_batches(
                batch_size=batch_rows, columns=columns), columns)
            return
        yield from _enumerate(self._csv_batches(columns, types or {}), columns)

    # -- Parquet ------------------------------------------------------------------------------

    def _parquet_file(self):
        import pyarrow.parquet as pq

        try:
            return pq.ParquetFile(self.path)
        except Exception as exc:  # pyarrow raises ArrowInvalid, OSError, ...
            fail(self.field, f"{self.path.name} is not a readable Parquet file "
                 f"({str(exc).splitlines()[0]})", "write it with pandas.DataFrame.to_parquet "
                 "or pyarrow.parquet.write_table")

    def _parquet_schema(self):
        return self._parquet_file().schema_arrow

    # -- CSV ----------------------------------------------------------------------------------

    def csv_inferred_types(self, columns):
        """The types pyarrow infers for ``columns`` from the first block of the CSV file.

        A column inferred as text whose values mostly read as numbers (at least 90% of the
        first block's) is taken as numbers with a few bad values: it is reported float64, so
        that reading it stops at the first bad value, naming the row.
        """
        pa = _pyarrow()
        schema = self._first_block(columns, {}).schema
        types = {name: schema.field(name).type if schema.field(name).type != pa.null()
                 else pa.float64() for name in columns}
        texts = [name for name, t in types.items() if is_text(t)]
        if texts:
            block = self._first_block(texts, dict.fromkeys(texts, pa.string()))
            for name, arr in zip(texts, block.columns):
                values = [v for v in arr.to_pylist()[:10_000] if v is not None]
                numbers = sum(_parses_as(v, pa.float64()) for v in values)
                if values and numbers >= 0.9 * len(values):
                    types[name] = pa.float64()
        return types

    def _first_block(self, columns, types):
        import pyarrow.csv as pcsv

        reader = pcsv.open_csv(self.path, read_options=pcsv.ReadOptions(
            block_size=_CSV_BLOCK_BYTES), convert_options=pcsv.ConvertOptions(
            include_columns=list(columns), column_types=types, strings_can_be_null=True))
        try:
            return reader.read_next_batch()
        except StopIteration:
            return _pyarrow().RecordBatch.from_pylist([], schema=reader.schema)
        finally:
            reader.close()

    def _csv_batches(self, columns, types):
        import pyarrow.csv as pcsv

        pa = _pyarrow()
        opts = pcsv.ConvertOptions(include_columns=columns, column_types=types,
                                   strings_can_be_null=True)
        try:
            reader = pcsv.open_csv(self.path, read_options=pcsv.ReadOptions(
                block_size=_CSV_BLOCK_BYTES), convert_options=opts)
            for batch in reader:
                yield batch
        except pa.ArrowInvalid as exc:
            self._report_csv_error(exc, columns, types)
            raise

    def _report_csv_error(self, exc, columns, types):
        """Find the row behind a pyarrow CSV conversion error and fail naming it."""
        pa = _pyarrow()
        numeric = [c for c in columns if c in types and (pa.types.is_floating(types[c])
                                                         or pa.types.is_integer(types[c]))]
        nulls = set(_null_values())
        with open(self.path, newline="") as fh:
            reader = csv.reader(fh)
            header = [h.strip() for h in next(reader)]
            where = {c: header.index(c) for c in numeric}
            for row, values in enumerate(reader, 1):
                for col, j in where.items():
                    text = values[j] if j < len(values) else ""
                    if text in nulls:
                        continue
                    if not _parses_as(text, types[col]):
                        whole = " (a whole number)" if pa.types.is_integer(types[col]) else ""
                        fail(col, f"has the value {show_value(text)} in row {row} of "
                             f"{self.path.name} (line {row + 1}), not a number{whole}",
                             "correct the value, or leave the cell empty to mark it missing")
        fail(self.field, f"{self.path.name} cannot be read ({str(exc).splitlines()[0]})",
             "check the file is comma-separated with a header row")


def csv_header(path, *, field="table"):
    """Column names from the first row of a comma-separated file."""
    path = existing_file(path, field)
    with open(path, newline="") as fh:
        try:
            header = next(csv.reader(fh))
        except StopIteration:
            header = []
    names = [h.strip() for h in header]
    if not names or any(not n for n in names):
        fail(field, f"{path.name} has no header row of column names (got {header!r})",
             "give a first row naming every column")
    seen = set()
    for n in names:
        if n in seen:
            fail(field, f'{path.name} names the column "{n}" twice in its header',
                 "give every column a distinct name")
        seen.add(n)
    return names


def is_text(arrow_type):
    """Whether a pyarrow type holds text (string, large string or string view)."""
    pa = _pyarrow()
    return pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type) or \
        getattr(pa.types, "is_string_view", lambda t: False)(arrow_type)


def _null_values():
    import pyarrow.csv as pcsv

    return pcsv.ConvertOptions().null_values


def _parses_as(text, arrow_type):
    pa = _pyarrow()
    try:
        value = float(text)
    except ValueError:
        return False
    return not pa.types.is_integer(arrow_type) or (math.isfinite(value) and value == int(value)
                                                   and "." not in text)


def _enumerate(batches, columns):
    start = 0
    for batch in batches:
        if batch.num_rows:
            yield start, batch.select(columns) if batch.schema.names != columns else batch
            start += batch.num_rows


def _as_arrow(obj, field):
    pa = _pyarrow()
    if isinstance(obj, pa.RecordBatch):
        return pa.Table.from_batches([obj])
    if isinstance(obj, pa.Table):
        return obj
    if hasattr(obj, "iloc"):   # pandas
        obj = obj.rename(columns=str)
        try:
            return pa.Table.from_pandas(obj, preserve_index=False)
        except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError):
            _report_pandas_column(obj, field)
            raise
    return obj.to_arrow()      # polars


def _report_pandas_column(df, field):
    """Name the column and row of a mixed-type pandas column that pyarrow cannot convert."""
    for name in df.columns:
        values = df[name].to_numpy()
        if values.dtype != object:
            continue
        kinds = {}
        for i, v in enumerate(values):
            if v is None or (isinstance(v, float) and np.isnan(v)):
                continue
            kinds.setdefault(isinstance(v, str), i)
        if len(kinds) > 1:
            row = kinds[True]
            fail(name, f"mixes numbers and text (e.g. {show_value(values[row])} in row {row})",
                 "give numbers only, or text only for a category")


def table_matrix(obj, field="X"):
    """A numeric in-memory table as ``(float64 array, column names)``; text named by column.

    Missing values become NaN (and are then refused by the model's finiteness check, which
    names the row and column); to drop incomplete rows or encode categories, read the table
    through `load_table` (a formula or named columns).
    """
    import pyarrow as pa

    table = _as_arrow(obj, field)
    for name, col in zip(table.schema.names, table.columns):
        t = col.type.value_type if pa.types.is_dictionary(col.type) else col.type
        if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)):
            what = "text" if is_text(t) else f"{t} values"
            fail(field, f'column "{name}" holds {what}, not numbers',
                 f"leave it out, or fit through a formula (from_formula) with C({name}) to "
                 "use it as a category")
    X = np.empty((table.num_rows, table.num_columns))
    for j, col in enumerate(table.columns):
        X[:, j] = col.to_numpy(zero_copy_only=False).astype(np.float64, copy=False) \
            if col.null_count == 0 else np.asarray(
                col.cast(pa.float64()).to_pandas(), dtype=np.float64)
    return X, [str(n) for n in table.schema.names]
