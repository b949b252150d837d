"""Where arrays come from: DataSource paths and .npy/.npz files, never unpickled (private)."""

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .._validation import did_you_mean, fail
from ..exceptions import InputError
from ._sparse import read_sparse_npz

#: File types accepted for a design matrix as an array (tables: `TABLE_SUFFIXES`).
ARRAY_SUFFIXES = (".npy", ".npz")
TABLE_SUFFIXES = (".parquet", ".pq", ".csv")
_DEFAULT_NPZ_KEY = {"X": "x", "y": "y", "offset": "offset"}
_NPZ_KEY = re.compile(r"^(?P<path>.*\.npz):(?P<key>[^/\\:]+)$", re.IGNORECASE)
_PICKLE_FIX = ("pickles are never read; save a numeric array, e.g. "
               "np.save(path, np.asarray(a, dtype=float), allow_pickle=False)")


@dataclass(frozen=True)
class DataSource:
    """Where one array comes from.

    Attributes
    ----------
    path : pathlib.Path
        A ``.npy``, ``.npz``, ``.csv`` or ``.parquet`` file.
    key : str, optional
        The array name inside a ``.npz`` file (default: ``x``, ``y`` or ``offset``).
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
        return self.path.suffix.lower() in TABLE_SUFFIXES

    def __str__(self):
        return f"{self.path}:{self.key}" if self.key is not None else str(self.path)


def load_array(source, *, field="X"):
    """Open one array from a ``.npy`` or ``.npz`` file without unpickling anything.

    Parameters
    ----------
    source : DataSource or path-like
    field : str, default="X"
        Name used in error messages (and for the default ``.npz`` key).

    Returns
    -------
    ndarray or CSRDesign
        A read-only memory map for ``.npy`` files; an in-memory array for ``.npz`` files; for
        X, a `CSRDesign` from a ``.npz`` file written by ``scipy.sparse.save_npz``.
    """
    if not isinstance(source, DataSource):
        source = DataSource.parse(source)
    path = existing_file(source.path, field)
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
                if field == "X" and source.key is None:
                    sparse = read_sparse_npz(path, archive, field)
                    if sparse is not None:
                        return sparse
                key = source.key or _DEFAULT_NPZ_KEY.get(field, field)
                if key not in archive.files:
                    hint = did_you_mean(key, archive.files).replace('"', f'"{path.name}:', 1)
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


def existing_file(path, field):
    path = Path(path)
    if not path.exists():
        fail(field, f'file "{path}" does not exist', "check the path (paths in a config file "
             "are relative to the folder of the config file)")
    if not path.is_file():
        fail(field, f'"{path}" is not a file', "give the path of a file")
    return path
