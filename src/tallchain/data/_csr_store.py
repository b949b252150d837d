"""Writing a CSR design block by block into ``.npy`` files of a cache entry (private).

The number of non-zeros is known only once every block is encoded, so ``X_data.npy`` and
``X_indices.npy`` are written as appendable files: a version 1.0 header for a placeholder
length (padded, as every ``.npy`` header, to 64 bytes), the values appended, and the header
rewritten with the true length at the end (the same padded size: the length's digits fit the
padding). ``X_indptr.npy`` (n_rows + 1 int64) is a memory map from the start. Later runs map the
three files read-only (`tallchain.data._cache.open_entry`).
"""

from pathlib import Path

import numpy as np

from ._sparse import CSRDesign

# The placeholder length: as many digits as any real length (1e15 values = 8 PB).
_PLACEHOLDER = 10**15
#: The names of the CSR arrays in a cache entry.
CSR_NAMES = ("X_data", "X_indices", "X_indptr")


def index_dtype(n_cols):
    return np.int32 if n_cols < 2**31 else np.int64


class _Appender:
    """A one-dimensional ``.npy`` file written by appending blocks; in memory when ``path`` is
    None."""

    def __init__(self, path, dtype):
        self.dtype, self.path, self.n = np.dtype(dtype), path, 0
        self.blocks = [] if path is None else None
        if path is not None:
            self.fh = open(path, "wb")
            self.header_bytes = self._header(_PLACEHOLDER)

    def _header(self, n):
        self.fh.seek(0)
        np.lib.format.write_array_header_1_0(self.fh, {
            "descr": np.lib.format.dtype_to_descr(self.dtype), "fortran_order": False,
            "shape": (n,)})
        return self.fh.tell()

    def append(self, values):
        values = np.ascontiguousarray(values, dtype=self.dtype)
        if self.blocks is not None:
            self.blocks.append(values)
        else:
            self.fh.seek(0, 2)
            self.fh.write(values.tobytes())
        self.n += values.shape[0]

    def finish(self):
        if self.blocks is not None:
            return np.concatenate(self.blocks) if self.blocks else np.empty(0, self.dtype)
        if self._header(self.n) != self.header_bytes:   # pragma: no cover - see _PLACEHOLDER
            raise RuntimeError("npy header length changed")
        self.fh.close()
        return None

    def discard(self):
        if self.blocks is None and not self.fh.closed:
            self.fh.close()


class CSRSink:
    """Receives the encoded rows of a table as CSR blocks, in row order.

    Parameters
    ----------
    folder : path-like or None
        The cache entry's temporary folder, or None to keep the arrays in memory.
    n_rows, n_cols : int
    """

    def __init__(self, folder, n_rows, n_cols):
        self.shape = (n_rows, n_cols)
        folder = None if folder is None else Path(folder)
        path = (lambda name: None) if folder is None else (lambda name: folder / f"{name}.npy")
        self.data = _Appender(path("X_data"), np.float64)
        self.indices = _Appender(path("X_indices"), index_dtype(n_cols))
        self.indptr = (np.empty(n_rows + 1, dtype=np.int64) if folder is None else
                       np.lib.format.open_memmap(path("X_indptr"), mode="w+", dtype=np.int64,
                                                 shape=(n_rows + 1,)))
        self.indptr[0] = 0
        self.row = 0

    def append(self, block):
        """Append a scipy.sparse block of rows (made canonical CSR here)."""
        block = block.tocsr()
        block.sum_duplicates()
        n = block.shape[0]
        self.indptr[self.row + 1:self.row + n + 1] = self.data.n + block.indptr[1:]
        self.data.append(block.data)
        self.indices.append(block.indices)
        self.row += n

    def finish(self):
        """Close the files; the arrays when held in memory ({name: array}), else {}."""
        data, indices = self.data.finish(), self.indices.finish()
        if isinstance(self.indptr, np.memmap):
            self.indptr.flush()
            self.indptr = None
            return {}
        return {"X_data": data, "X_indices": indices, "X_indptr": self.indptr}

    def discard(self):
        self.data.discard()
        self.indices.discard()


def design_of(arrays, n_cols):
    """X of a table's arrays: the `CSRDesign` of the CSR arrays when they are there, else
    ``arrays["X"]``."""
    if "X_data" not in arrays:
        return arrays["X"]
    indptr = arrays["X_indptr"]
    return CSRDesign(arrays["X_data"], arrays["X_indices"], indptr,
                     (indptr.shape[0] - 1, n_cols))
