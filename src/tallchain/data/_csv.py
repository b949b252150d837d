"""CSV files: parsed once, in chunks, into a memory-mapped .npy cache beside them (private)."""

import csv
import hashlib
import itertools
import json
import os
import re
import warnings
from pathlib import Path

import numpy as np

from .._validation import did_you_mean, fail
from ..exceptions import DataWarning
from ._sources import existing_file

_CSV_CHUNK_ROWS = 50_000
_CACHE_VERSION = 1


def csv_header(path, *, field="X"):
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


def read_csv(path, *, response, columns=None, offset=None, cache=True):
    """Read feature columns, the response and an optional offset column from a CSV file.

    The file is parsed in chunks of rows straight into ``.npy`` files written beside it
    (``.<name>.<tag>.x.npy`` for X, ``.<name>.<tag>.y.npy`` for the response and offset, where
    the tag hashes the chosen columns with the file's size and modification time). The next
    call with the same columns memory-maps those files instead of parsing again. Old cache files
    of a changed CSV are left in place; they are safe to delete.

    Parameters
    ----------
    path : path-like
        A CSV file with a header row; numbers in every selected column (missing values are not
        supported).
    response : str
        Name of the response column.
    columns : sequence of str, optional
        Feature columns, in this order (default: every column except the response and offset).
    offset : str, optional
        Name of an offset column.
    cache : bool, default=True
        Write and reuse the cache. When the folder is not writable the data are parsed into
        memory instead (with a `DataWarning`).

    Returns
    -------
    X : ndarray of shape (n_rows, n_features)
        A read-only memory map of the cache (or an in-memory array).
    y : ndarray of shape (n_rows,)
    offset : ndarray of shape (n_rows,) or None
    names : list of str
        The feature column names.
    """
    path = existing_file(Path(path), "X")
    header = csv_header(path)
    y_col = _column_index(header, response, "y", path)
    off_col = None if offset is None else _column_index(header, offset, "offset", path)
    if off_col is not None and off_col == y_col:
        fail("offset", f'is the response column "{response}"', "give a separate offset column")
    if columns is None:
        names = [h for h in header if h not in (response, offset)]
    else:
        names = list(columns)
        for name in names:
            if name in (response, offset):
                fail("columns", f'lists "{name}", which is the '
                     f'{"response" if name == response else "offset"} column',
                     "leave it out of the feature columns")
        if len(set(names)) != len(names):
            dup = next(n for n in names if names.count(n) > 1)
            fail("columns", f'lists "{dup}" twice', "give each feature column once")
    if not names:
        fail("columns", f"no feature columns left in {path.name}", "give at least one column")
    x_cols = [_column_index(header, n, "columns", path) for n in names]
    r_cols = [y_col] + ([] if off_col is None else [off_col])

    stat = path.stat()
    tag = hashlib.sha256(json.dumps(
        [_CACHE_VERSION, names, response, offset, stat.st_size, stat.st_mtime_ns]).encode()
    ).hexdigest()[:16]
    x_file = path.with_name(f".{path.name}.{tag}.x.npy")
    r_file = path.with_name(f".{path.name}.{tag}.y.npy")
    if cache and x_file.exists() and r_file.exists():
        X = np.load(x_file, mmap_mode="r", allow_pickle=False)
        resp = np.load(r_file, mmap_mode="r", allow_pickle=False)
    else:
        X, resp = _parse_csv(path, x_cols, r_cols, (x_file, r_file) if cache else None)
    return X, resp[0], (resp[1] if off_col is not None else None), names


def _column_index(header, name, field, path):
    if name in header:
        return header.index(name)
    fail(field, f'column "{name}" is not in the header of {path.name}',
         f"{did_you_mean(name, header)}the columns are: {', '.join(header)}")


def _parse_csv(path, x_cols, r_cols, files):
    n_rows = _count_rows(path)
    if n_rows == 0:
        fail("X", f"{path.name} has a header but no data rows", "give at least 2 rows")
    shapes = ((n_rows, len(x_cols)), (len(r_cols), n_rows))
    arrays, tmps = _allocate(path, shapes, files)
    try:
        _fill_from_csv(path, x_cols, r_cols, *arrays)
        if not tmps:
            return arrays
        for arr in arrays:
            arr.flush()
        del arrays
        for tmp, final in zip(tmps, files):
            os.replace(tmp, final)
    finally:
        for tmp in tmps:
            if tmp.exists():
                tmp.unlink()
    return tuple(np.load(f, mmap_mode="r", allow_pickle=False) for f in files)


def _allocate(path, shapes, files):
    """Memory maps on temporary files beside the final cache files, or in-memory arrays."""
    if files is None:
        return tuple(np.empty(s) for s in shapes), []
    tmps = [f.with_name(f"{f.name}.tmp-{os.getpid()}") for f in files]
    try:
        arrays = tuple(np.lib.format.open_memmap(t, mode="w+", dtype=np.float64, shape=s)
                       for t, s in zip(tmps, shapes))
        return arrays, tmps
    except OSError as exc:
        for t in tmps:
            if t.exists():
                t.unlink()
        warnings.warn(f"could not write the cache beside {path.name} ({exc.strerror}); the data "
                      "are held in memory and the file is parsed again on the next run; make "
                      "the folder writable to avoid that", DataWarning, stacklevel=4)
        return tuple(np.empty(s) for s in shapes), []


def _count_rows(path):
    # Blank lines are skipped by the parser too, so they are not counted.
    with open(path, "rb") as fh:
        next(fh, None)
        return sum(1 for line in fh if line not in (b"\n", b"\r\n"))


def _fill_from_csv(path, x_cols, r_cols, X, resp):
    cols = list(x_cols) + list(r_cols)
    p = len(x_cols)
    row = 0
    with open(path, newline="") as fh:
        next(fh)
        line_no = 1
        while True:
            lines = list(itertools.islice(fh, _CSV_CHUNK_ROWS))
            if not lines:
                break
            try:
                block = np.loadtxt(lines, delimiter=",", usecols=cols, dtype=np.float64,
                                   comments=None, quotechar='"', ndmin=2)
            except ValueError:
                _report_bad_line(path, lines, cols, line_no)
                raise
            X[row:row + block.shape[0]] = block[:, :p]
            resp[:, row:row + block.shape[0]] = block[:, p:].T
            row += block.shape[0]
            line_no += len(lines)
    if row != X.shape[0]:  # pragma: no cover - the counter and the parser disagree
        fail("X", f"{path.name}: read {row} rows but counted {X.shape[0]}",
             "check the file for stray line breaks")


def _report_bad_line(path, lines, cols, line_no):
    for i, line in enumerate(lines):
        try:
            np.loadtxt([line], delimiter=",", usecols=cols, dtype=np.float64, comments=None,
                       quotechar='"', ndmin=2)
        except ValueError as exc:
            why = re.sub(r"\s*at row \d+(, column \d+)?\.?", "", str(exc)).split(";")[0]
            fail("X", f"{path.name} line {line_no + i + 1} cannot be read ({why})",
                 "give a number in every selected column (missing values are not supported)")
