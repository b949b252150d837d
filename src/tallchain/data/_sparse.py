"""Sparse designs: compressed sparse row (CSR) storage that every kernel reads (private).

A `CSRDesign` keeps the three CSR arrays as given (possibly read-only memory maps: nothing is
copied whole): ``data`` (float32/float64, the non-zero values row by row), ``indices`` (int32
or int64, their columns, sorted and distinct within a row) and ``indptr`` (int64, row i's
entries are ``data[indptr[i]:indptr[i + 1]]``). Python code that walks the rows of a design in
blocks (`tallchain._arrays.row_blocks`) receives dense blocks of a bounded size
(`dense_rows`), so column statistics and checks need no sparse branch; the kernels take the
CSR arrays themselves (`kernel_form`) and touch only the non-zeros.

Formulas decide their storage by `SPARSE_MAX_DENSITY` (see `prefer_sparse`).
"""

from collections import namedtuple

import numpy as np

from .._arrays import row_blocks
from .._validation import fail

#: A formula's design is stored sparse when at most this share of its entries is non-zero
#: (counted on the first batch of rows). Reading a non-zero of CSR costs its value and its
#: column index (12 bytes) against 8 bytes a dense entry, and a dense row is read in order
#: while a CSR row gathers coefficients: below a third non-zero the CSR row is the cheaper.
SPARSE_MAX_DENSITY = 1.0 / 3.0

CSRArrays = namedtuple("CSRArrays", ["data", "indices", "indptr", "shape"])
CSRArrays.__doc__ = """A CSR design as the kernels take it (numba reads it as a typed struct).

Attributes
----------
data : ndarray of shape (nnz,), float32 or float64
indices : ndarray of shape (nnz,), int32 or int64
indptr : ndarray of shape (n_rows + 1,), int64
shape : (int, int)
    (n_rows, n_cols): ``X.shape[0]`` and ``X.shape[1]`` read the same as for a dense array.
"""


class CSRDesign:
    """A design matrix in compressed sparse row form.

    Parameters
    ----------
    data, indices, indptr : ndarray
        The CSR arrays (canonical: column indices sorted and distinct within each row).
    shape : (int, int)

    Notes
    -----
    Build one from a scipy.sparse matrix with `from_scipy`; `to_scipy` gives a view back.
    """

    ndim = 2

    def __init__(self, data, indices, indptr, shape):
        self.data, self.indices, self.indptr = data, indices, indptr
        self.shape = (int(shape[0]), int(shape[1]))

    @classmethod
    def from_scipy(cls, matrix, field="X"):
        """A canonical CSR copy of a scipy.sparse matrix or array (no copy when it is already
        canonical CSR with float32/float64 values and int64 row pointers)."""
        csr = matrix.tocsr()
        if not csr.has_canonical_format:
            csr = csr.copy()
            csr.sum_duplicates()   # also sorts the column indices
        data = csr.data
        if data.dtype not in (np.float32, np.float64):
            if data.dtype.kind not in "fiub":
                fail(field, f"has dtype {data.dtype}, not real numbers",
                     "give a sparse matrix of floats or integers")
            data = data.astype(np.float64)
        return cls(data, csr.indices, csr.indptr.astype(np.int64, copy=False), csr.shape)

    @property
    def dtype(self):
        return self.data.dtype

    @property
    def nnz(self):
        return int(self.indptr[-1])

    @property
    def nbytes(self):
        """Bytes of the three arrays (what the design costs in memory or on disk)."""
        return int(self.data.nbytes + self.indices.nbytes + self.indptr.nbytes)

    def kernel_form(self):
        """The `CSRArrays` the numba kernels take (no copy)."""
        return CSRArrays(self.data, self.indices, self.indptr, self.shape)

    def row_slice(self, lo, hi):
        """Rows [lo, hi) as a scipy CSR matrix sharing ``data`` and ``indices``."""
        import scipy.sparse as sp
        a, b = int(self.indptr[lo]), int(self.indptr[hi])
        return sp.csr_matrix((self.data[a:b], self.indices[a:b], self.indptr[lo:hi + 1] - a),
                             shape=(hi - lo, self.shape[1]))

    def dense_rows(self, lo, hi, dtype=np.float64):
        """Rows [lo, hi) as a dense array (``dtype=None``: the stored value type)."""
        out = np.zeros((hi - lo, self.shape[1]), dtype=self.dtype if dtype is None else dtype)
        a = int(self.indptr[lo])
        counts = np.diff(self.indptr[lo:hi + 1])
        rows = np.repeat(np.arange(hi - lo), counts)
        out[rows, self.indices[a:a + counts.sum()]] = self.data[a:a + counts.sum()]
        return out

    def take_rows(self, rows):
        """A CSRDesign of the given rows (an integer array), in that order: a copy."""
        return CSRDesign.from_scipy(self.to_scipy()[np.asarray(rows)])

    def to_scipy(self):
        """The whole design as a scipy CSR matrix sharing the arrays."""
        return self.row_slice(0, self.shape[0])

    def scaled_columns(self, scale):
        """A CSRDesign with column j divided by scale[j]: a new ``data`` array (float64), the
        same ``indices`` and ``indptr`` (zeros stay zeros)."""
        data = np.empty(self.data.shape[0])
        step = 1 << 22
        for a in range(0, data.shape[0], step):
            data[a:a + step] = self.data[a:a + step] / scale[self.indices[a:a + step]]
        return CSRDesign(data, self.indices, self.indptr, self.shape)

    def __getitem__(self, key):
        """Rows by an index or a slice (``X[i]``, ``X[a:b]``, ``X[a:b, j]``) as a dense array,
        for inspection and error messages."""
        rows, rest = (key[0], key[1:]) if isinstance(key, tuple) else (key, ())
        if isinstance(rows, (int, np.integer)):   # one row
            i = int(rows) % self.shape[0]
            return self[(slice(i, i + 1), *rest)][0]
        if not isinstance(rows, slice):
            fail("X", "is sparse: only slices of rows can be read as dense arrays",
                 "index it as X[a:b] or convert it with X.to_scipy()")
        lo, hi, step = rows.indices(self.shape[0])
        if len(rest) == 1 and isinstance(rest[0], (int, np.integer)):   # one column, sparsely
            column = self.row_slice(lo, max(lo, hi))[::step, int(rest[0])]
            return column.toarray().reshape(-1).astype(self.dtype, copy=False)
        block = self.dense_rows(lo, max(lo, hi), dtype=None)[::step]
        return block[(slice(None), *rest)] if rest else block

    def __array__(self, dtype=None, copy=None):
        """The dense matrix (the whole of it: for small designs and tests)."""
        return self.dense_rows(0, self.shape[0], dtype)

    def __repr__(self):
        return f"CSRDesign(shape={self.shape}, nnz={self.nnz}, dtype={self.dtype})"


def design_blocks(X, block_bytes=2**24):
    """``(start, block)`` over the rows of a design for products ``block @ v``: dense blocks
    of a dense X (`row_blocks`), scipy CSR slices of a `CSRDesign` (no densifying)."""
    if not is_csr_design(X):
        yield from row_blocks(X, block_bytes=block_bytes)
        return
    rows = max(1, block_bytes // (8 * max(1, X.shape[1])))
    for start in range(0, X.shape[0], rows):
        yield start, X.row_slice(start, min(start + rows, X.shape[0]))


def is_sparse_matrix(x):
    """Whether ``x`` is a scipy.sparse matrix or array (without importing scipy.sparse)."""
    return type(x).__module__.startswith("scipy.sparse") and hasattr(x, "tocsr")


def is_csr_design(x):
    return isinstance(x, CSRDesign)


def prefer_sparse(n_nonzero, n_entries):
    """The storage rule of a formula's design: sparse when at most `SPARSE_MAX_DENSITY` of
    the entries (counted on a sample of rows) are non-zero."""
    return n_entries > 0 and n_nonzero <= SPARSE_MAX_DENSITY * n_entries


def read_sparse_npz(path, archive, field):
    """A `CSRDesign` from an open ``.npz`` archive written by ``scipy.sparse.save_npz`` (any
    of its formats), or None when the archive is not one. Nothing is unpickled: the arrays
    are read with ``allow_pickle=False`` by the caller, and ``format`` must be a plain string
    array."""
    if not {"format", "shape", "data"} <= set(archive.files):
        return None
    import scipy.sparse as sp
    fmt = archive["format"]
    fmt = fmt.item().decode() if fmt.dtype.kind == "S" else str(fmt.item())
    shape = tuple(int(v) for v in archive["shape"])
    fix = "save the matrix with scipy.sparse.save_npz(path, matrix)"
    if len(shape) != 2:
        fail(field, f"{path.name} holds a sparse array of shape {shape}",
             "give a two-dimensional matrix")
    try:
        if fmt in ("csr", "csc", "bsr"):
            arrays = (archive["data"], archive["indices"], archive["indptr"])
            if fmt == "csr":
                check_csr(field, *arrays, shape)
            matrix = {"csr": sp.csr_matrix, "csc": sp.csc_matrix, "bsr": sp.bsr_matrix}[fmt](
                arrays, shape=shape)
        elif fmt == "coo":
            matrix = sp.coo_matrix((archive["data"], (archive["row"], archive["col"])),
                                   shape=shape)
        elif fmt == "dia":
            matrix = sp.dia_matrix((archive["data"], archive["offsets"]), shape=shape)
        else:
            fail(field, f"{path.name} holds a sparse matrix in format {fmt!r}",
                 "save it as CSR: scipy.sparse.save_npz(path, matrix.tocsr())")
    except (KeyError, ValueError) as exc:
        fail(field, f"{path.name} is not a readable sparse matrix ({str(exc).splitlines()[0]})",
             fix)
    return CSRDesign.from_scipy(matrix, field)


def check_csr(field, data, indices, indptr, shape):
    """Refuse CSR arrays that do not describe a matrix of ``shape`` (a one-line InputError);
    a read of every index, block by block."""
    n_rows, n_cols = shape
    fix = "save the matrix with scipy.sparse.save_npz(path, matrix.tocsr())"
    if indptr.ndim != 1 or indptr.shape[0] != n_rows + 1:
        fail(field, f"has {indptr.shape[0] - 1} row pointers for {n_rows} rows", fix)
    if int(indptr[0]) != 0 or int(indptr[-1]) != data.shape[0] or indices.shape != data.shape:
        fail(field, "has row pointers that do not match its values", fix)
    if np.any(np.diff(indptr) < 0):
        fail(field, "has decreasing row pointers", fix)
    step = 1 << 22
    for a in range(0, indices.shape[0], step):
        block = indices[a:a + step]
        if block.size and (block.min() < 0 or block.max() >= n_cols):
            fail(field, f"has a column index outside 0..{n_cols - 1}", fix)
