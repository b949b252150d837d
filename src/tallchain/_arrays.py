"""Array helpers every layer shares: row blocks of tall arrays, SPD inverses (private)."""

import numpy as np

# Rows per block are chosen so that a block holds about this many bytes of float64.
BLOCK_BYTES = 2**24


def row_blocks(a, *, block_bytes=BLOCK_BYTES, dtype=np.float64):
    """Yield ``(start, block)`` over the rows of ``a``, each block about ``block_bytes`` large.

    A memory-mapped array is read one block at a time, never whole. ``block`` is converted to
    ``dtype`` (a copy only where the dtype differs); ``dtype=None`` keeps the stored one.

    Parameters
    ----------
    a : ndarray of shape (n_rows, ...) or (n_rows,), or a sparse design
        A sparse design (``dense_rows``) yields dense blocks of its rows.
    block_bytes : int, default=2**24
    dtype : numpy dtype or None, default=float64
    """
    row_bytes = 8 * max(1, int(np.prod(a.shape[1:], dtype=np.int64)))
    rows = max(1, block_bytes // row_bytes)
    if hasattr(a, "dense_rows"):   # a sparse design (tallchain.data CSRDesign): dense blocks
        for start in range(0, a.shape[0], rows):
            yield start, a.dense_rows(start, min(start + rows, a.shape[0]), dtype)
        return
    for start in range(0, a.shape[0], rows):
        block = a[start:start + rows]
        yield start, (np.asarray(block) if dtype is None else np.asarray(block, dtype=dtype))


def spd_inverse(m):
    """The inverse of a symmetric positive definite matrix through its Cholesky factor,
    symmetrised; `numpy.linalg.LinAlgError` when ``m`` is not positive definite.

    With m = L L^T, m^{-1} = L^{-T} L^{-1}: one triangular inverse instead of a general one,
    and the result is symmetric to the last bit after the symmetrisation.
    """
    inv_chol = np.linalg.inv(np.linalg.cholesky(m))
    inv = inv_chol.T @ inv_chol
    return 0.5 * (inv + inv.T)


def symmetrized(m):
    """(m + m^T) / 2 as a new float64 array."""
    m = np.asarray(m, dtype=np.float64)
    return 0.5 * (m + m.T)
