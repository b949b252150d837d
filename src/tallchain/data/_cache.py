"""The design-matrix cache of table files: one folder, keyed by the file and the encoding (private).

A table file read through a formula or a column selection is encoded once into float64 ``.npy``
files that later runs memory-map. They live in one place: ``.tallchain-cache/`` beside the
table, or the folder given as ``cache_dir``. Each entry is a folder
``<table name>-<key>/`` holding ``X.npy``, ``y.npy``, ``offset.npy`` (when there is one) and
``meta.json``; the key hashes the table's absolute path, size and modification time with the
encoding asked for. An entry whose table has since changed or gone is stale and is removed
the next time any entry of that folder is written. Entries are written into a temporary
folder and renamed into place, so an interrupted write leaves no torn entry.
"""

import hashlib
import json
import os
import shutil
import warnings
from pathlib import Path

import numpy as np

from ..exceptions import DataWarning

CACHE_FOLDER = ".tallchain-cache"
CACHE_VERSION = 3   # 3: formulas with mostly-zero designs stored as CSR


def cache_folder(table_path, cache_dir=None):
    """The cache folder for a table file: ``cache_dir``, or ``.tallchain-cache`` beside it."""
    return Path(cache_dir) if cache_dir is not None else Path(table_path).parent / CACHE_FOLDER


def entry_key(identity, selection):
    """16 hex digits hashing the table's identity (path, size, mtime) and the selection."""
    text = json.dumps([CACHE_VERSION, identity, selection], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def entry_path(folder, table_path, key):
    return Path(folder) / f"{Path(table_path).name}-{key}"


def open_entry(path):
    """``(arrays, meta)`` of a complete cache entry, memory-mapped read-only; None if absent."""
    path = Path(path)
    meta_file = path / "meta.json"
    if not meta_file.is_file():
        return None
    try:
        meta = json.loads(meta_file.read_text())
        arrays = {name: np.load(path / f"{name}.npy", mmap_mode="r", allow_pickle=False)
                  for name in meta["arrays"]}
    except (OSError, ValueError, KeyError):
        return None   # unreadable: treated as absent and written again
    return arrays, meta


class EntryWriter:
    """Memory maps on a temporary folder that `commit` renames into the entry.

    When the folder cannot be written the arrays are held in memory instead (with a
    `DataWarning`), and `commit` does nothing.
    """

    def __init__(self, path, shapes, label):
        self.path = Path(path)
        self.tmp = self.path.with_name(f".tmp-{self.path.name}-{os.getpid()}")
        self.arrays = None
        try:
            self.tmp.mkdir(parents=True, exist_ok=True)
            self.arrays = {name: np.lib.format.open_memmap(
                self.tmp / f"{name}.npy", mode="w+", dtype=np.float64, shape=shape)
                for name, shape in shapes.items()}
        except OSError as exc:
            self.discard()
            warnings.warn(f"could not write the cache of {label} in {self.path.parent} "
                          f"({exc.strerror}); the data are held in memory and read again on "
                          "the next run; make that folder writable or set data.cache_dir",
                          DataWarning, stacklevel=4)
            self.arrays = {name: np.empty(shape) for name, shape in shapes.items()}
            self.tmp = None

    def commit(self, meta):
        """Flush, write ``meta.json`` and rename into place; return the arrays memory-mapped."""
        if self.tmp is None:
            return self.arrays
        for arr in self.arrays.values():
            arr.flush()
        self.arrays = None
        meta = {**meta, "arrays": sorted(p.stem for p in self.tmp.glob("*.npy"))}
        (self.tmp / "meta.json").write_text(json.dumps(meta, indent=1))
        try:
            os.replace(self.tmp, self.path)
        except OSError:   # another process wrote the same entry first: use theirs
            shutil.rmtree(self.tmp, ignore_errors=True)
        self.tmp = None
        return open_entry(self.path)[0]

    def discard(self):
        if self.tmp is not None and self.tmp.exists():
            shutil.rmtree(self.tmp, ignore_errors=True)


def remove_stale(folder, identity):
    """Remove entries of ``identity["path"]`` written for another size or mtime, and entries
    whose table no longer exists; return the names removed."""
    folder = Path(folder)
    removed = []
    if not folder.is_dir():
        return removed
    for entry in sorted(folder.iterdir()):
        meta_file = entry / "meta.json"
        if not meta_file.is_file():
            continue
        try:
            source = json.loads(meta_file.read_text())["source"]
        except (OSError, ValueError, KeyError):
            continue
        same_table = source.get("path") == identity["path"]
        changed = same_table and (source.get("size"), source.get("mtime_ns")) != \
            (identity["size"], identity["mtime_ns"])
        if changed or not Path(source.get("path", "")).exists():
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry.name)
    return removed
