"""Data files: .npy (memory-mapped), .npz and .csv (cached as .npy), column checks, standardising.

Nothing here reads a large design matrix into memory whole: ``.npy`` files are memory-mapped,
``.csv`` files are parsed in chunks straight into a memory-mapped cache beside them, and every
pass over the columns goes block by block.
"""

import csv
import difflib
import hashlib
import itertools
import json
import os
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._validation import InputError, check_finite_matrix, fail

#: File types accepted for a design matrix; ``.csv`` is not accepted for y or offset files.
ARRAY_SUFFIXES = (".npy", ".npz")
TABLE_SUFFIX = ".csv"

_DEFAULT_NPZ_KEY = {"X": "x", "y": "y", "offset": "offset"}
_BLOCK_BYTES = 2**24
_CSV_CHUNK_ROWS = 50_000
_CACHE_VERSION = 1
_NPZ_KEY = re.compile(r"^(?P<path>.*\.npz):(?P<key>[^/\\:]+)$", re.IGNORECASE)
_PICKLE_FIX = ("pickles are never read; save a numeric array, e.g. "
               "np.save(path, np.asarray(a, dtype=float), allow_pickle=False)")


class DataWarning(UserWarning):
    """The data load, but something about them deserves a look (the text says what to do)."""


@dataclass(frozen=True)
class DataSource:
    """Where one array comes from.

    Attributes
    ----------
    path : pathlib.Path
        A ``.npy``, ``.npz`` or ``.csv`` file.
    key : str, optional
        The array name inside a ``.npz`` file (default: ``x``, ``y`` or ``offset``), or the
        column name when ``path`` is a ``.csv`` file.
    """

    path: Path
    key: str | None = None

    @classmethod
    def parse(cls, text, base_dir=None):
        """Read ``"file.npz:key"`` or a plain path, relative to ``base_dir`` when given."""
        m = _NPZ_KEY.match(str(text))
        path, key = (m["path"], m["key"]) if m else (str(text), None)
        path = Path(path).expanduser()
        if base_dir is not None and not path.is_absolute():
            path = Path(base_dir) / path
        return cls(path, key)

    @property
    def is_table(self):
        return self.path.suffix.lower() == TABLE_SUFFIX

    def __str__(self):
        return f"{self.path}:{self.key}" if self.key is not None else str(self.path)


@dataclass(frozen=True)
class Standardization:
    """Column centres and scales used to standardise X, and the way back.

    The model is fitted on z_j = (x_j - center_j) / scale_j. Its linear predictor
    a + sum_j b_j z_j equals (a - sum_j b_j center_j / scale_j) + sum_j (b_j / scale_j) x_j,
    which gives the coefficients on the original scale (`to_original`).

    Attributes
    ----------
    center : ndarray of shape (n_features,)
        Column means when the model has an intercept; zeros otherwise (without an intercept a
        shift of the columns would change the model).
    scale : ndarray of shape (n_features,)
        Column standard deviations (population, ddof=0); 1 for constant columns.
    intercept : bool
        Whether coefficient 0 is an intercept.
    """

    center: np.ndarray
    scale: np.ndarray
    intercept: bool

    def to_original(self, coef):
        """Map coefficients on the standardised scale to the original scale of X.

        Parameters
        ----------
        coef : array-like of shape (..., n_coef)
            Draws or point estimates, the intercept first when the model has one.

        Returns
        -------
        ndarray of shape (..., n_coef)
        """
        coef = np.asarray(coef, dtype=float)
        k = int(self.intercept)
        out = np.array(coef, dtype=float, copy=True)
        out[..., k:] = coef[..., k:] / self.scale
        if self.intercept:
            out[..., 0] = coef[..., 0] - out[..., 1:] @ self.center
        return out

    def as_dict(self):
        return {"center": self.center.tolist(), "scale": self.scale.tolist(),
                "intercept": self.intercept}


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


def load_array(source, *, field="X"):
    """Open one array from a ``.npy`` or ``.npz`` file without unpickling anything.

    Parameters
    ----------
    source : DataSource or path-like
    field : str, default="X"
        Name used in error messages (and for the default ``.npz`` key).

    Returns
    -------
    ndarray
        A read-only memory map for ``.npy`` files; an in-memory array for ``.npz`` files.
    """
    if not isinstance(source, DataSource):
        source = DataSource.parse(source)
    path = _existing(source.path, field)
    suffix = path.suffix.lower()
    if suffix == ".npy":
        try:
            arr = np.load(path, mmap_mode="r", allow_pickle=False)
        except ValueError as exc:
            if "object" in str(exc).lower() or "pickle" in str(exc).lower():
                fail(field, f"{path.name} holds Python objects (a pickle)", _PICKLE_FIX)
            fail(field, f"{path.name} is not a readable .npy file ({exc})",
                 "write it with numpy.save")
        return arr
    if suffix == ".npz":
        try:
            with np.load(path, allow_pickle=False) as archive:
                key = source.key or _DEFAULT_NPZ_KEY.get(field, field)
                if key not in archive.files:
                    near = difflib.get_close_matches(key, archive.files, n=1)
                    hint = f'did you mean "{path.name}:{near[0]}"? ' if near else ""
                    fail(field, f'{path.name} has no array "{key}" (it holds: '
                         f"{', '.join(archive.files) or 'nothing'})",
                         f'{hint}name the array as "{path.name}:<key>"')
                return archive[key]
        except InputError:
            raise
        except ValueError as exc:
            if "object" in str(exc).lower() or "pickle" in str(exc).lower():
                fail(field, f"{path.name} holds Python objects (a pickle)", _PICKLE_FIX)
            fail(field, f"{path.name} is not a readable .npz file ({exc})",
                 "write it with numpy.savez")
    fail(field, f"{path.name} has an unsupported file type {path.suffix!r}",
         "give a .npy or .npz file (a .csv only for data.x, with y as one of its columns)")


def csv_header(path, *, field="X"):
    """Column names from the first row of a comma-separated file."""
    path = _existing(path, field)
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
    path = _existing(Path(path), "X")
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
    near = difflib.get_close_matches(name, header, n=1)
    hint = f'did you mean "{near[0]}"? ' if near else ""
    fail(field, f'column "{name}" is not in the header of {path.name}',
         f"{hint}the columns are: {', '.join(header)}")


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


def column_stats(X):
    """Per-column mean, standard deviation (ddof=0), minimum and maximum, block by block.

    Blocks are merged with the pairwise update of Chan, Golub & LeVeque (1983), The American
    Statistician 37, 242: M2 = M2_a + M2_b + delta^2 n_a n_b / n. A NaN or inf anywhere is
    reported with its row and column (`tallchain.InputError`).

    Returns
    -------
    dict with keys ``mean``, ``sd``, ``min``, ``max`` (each an ndarray of shape (n_features,))
    """
    n_rows, p = X.shape
    mean, m2 = np.zeros(p), np.zeros(p)
    lo, hi = np.full(p, np.inf), np.full(p, -np.inf)
    seen = 0
    with np.errstate(invalid="ignore", over="ignore"):  # NaN/inf are located below
        for block in _blocks(X):
            nb = block.shape[0]
            bmean = block.mean(axis=0)
            bm2 = ((block - bmean) ** 2).sum(axis=0)
            total = seen + nb
            delta = bmean - mean
            mean = mean + delta * nb / total
            m2 = m2 + bm2 + delta**2 * seen * nb / total
            seen = total
            np.minimum(lo, block.min(axis=0), out=lo)
            np.maximum(hi, block.max(axis=0), out=hi)
    if not (np.all(np.isfinite(m2)) and np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        check_finite_matrix("X", X)
    return {"mean": mean, "sd": np.sqrt(m2 / max(n_rows, 1)), "min": lo, "max": hi}


def check_columns(X, names, *, intercept, stats=None):
    """Warn (`DataWarning`) about constant columns and columns that repeat another one.

    Neither is an error: a Gaussian prior keeps the posterior proper, but such a coefficient is
    identified by the prior alone and the sampler spends effort on it.

    Returns
    -------
    dict
        The `column_stats` of X.
    """
    stats = column_stats(X) if stats is None else stats
    constant = [names[j] for j in np.flatnonzero(stats["min"] == stats["max"])]
    if constant:
        also = " and duplicate the intercept" if intercept else ""
        warnings.warn(f"constant column(s) {', '.join(constant)}: their coefficients are "
                      f"informed by the prior alone{also}; drop them from data.columns",
                      DataWarning, stacklevel=2)
    groups = {}
    for j in range(X.shape[1]):
        if stats["min"][j] != stats["max"][j]:
            key = (stats["mean"][j], stats["sd"][j], stats["min"][j], stats["max"][j])
            groups.setdefault(key, []).append(j)
    pairs = [(a, b) for g in groups.values() if len(g) > 1
             for a, b in itertools.combinations(g, 2) if _columns_equal(X, a, b)]
    if pairs:
        listed = ", ".join(f"{names[b]} = {names[a]}" for a, b in pairs)
        warnings.warn(f"duplicate column(s) {listed}: only their sum is informed by the data; "
                      "drop the copies from data.columns", DataWarning, stacklevel=2)
    return stats


def _columns_equal(X, a, b):
    return all(np.array_equal(block[:, a], block[:, b]) for block in _blocks(X))


def standardize_columns(X, *, intercept, stats=None, memory_fraction=0.5):
    """Return a standardised float64 copy of X and the `Standardization` to map back.

    The copy is made only when it fits in ``memory_fraction`` of the memory available now
    (``MemAvailable`` of /proc/meminfo; no limit where that is unknown). A larger X must be
    standardised on disk beforehand; the error says so.

    Parameters
    ----------
    X : ndarray of shape (n_rows, n_features)
    intercept : bool
        Centre the columns only when the model has an intercept to absorb the shift.
    stats : dict, optional
        `column_stats` of X, when already computed.
    memory_fraction : float, default=0.5

    Returns
    -------
    Z : ndarray of shape (n_rows, n_features)
    standardization : Standardization
    """
    need = X.shape[0] * X.shape[1] * 8
    avail = _available_memory()
    if avail is not None and need > memory_fraction * avail:
        fail("standardize", f"needs a {need / 2**30:.1f} GiB copy of X but only "
             f"{avail / 2**30:.1f} GiB of memory is free",
             "standardise the columns in the file beforehand, or set standardize = false")
    stats = column_stats(X) if stats is None else stats
    center = stats["mean"] if intercept else np.zeros(X.shape[1])
    scale = np.where(stats["sd"] > 0, stats["sd"], 1.0)
    Z = np.empty(X.shape, dtype=np.float64)
    row = 0
    for block in _blocks(X):
        Z[row:row + block.shape[0]] = (block - center) / scale
        row += block.shape[0]
    return Z, Standardization(center=center, scale=scale, intercept=bool(intercept))


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
        Feature columns of a CSV (default: all but the response and offset).
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
        if columns is not None:
            fail("columns", f"only applies to a .csv file, not {x.path.name}",
                 "remove it, or select the columns when writing the array")
        X = load_array(x, field="X")
        y_arr = load_array(y, field="y")
        off_arr = None if offset is None else load_array(offset, field="offset")
        names = [f"x{j}" for j in range(X.shape[1] if X.ndim == 2 else 1)]
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


def _blocks(X):
    rows = max(1, _BLOCK_BYTES // max(1, 8 * X.shape[1]))
    for start in range(0, X.shape[0], rows):
        yield np.asarray(X[start:start + rows], dtype=np.float64)


def _available_memory():
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def _existing(path, field):
    path = Path(path)
    if not path.exists():
        fail(field, f'file "{path}" does not exist', "check the path (paths in a config file "
             "are relative to the folder of the config file)")
    if not path.is_file():
        fail(field, f'"{path}" is not a file', "give the path of a file")
    return path
