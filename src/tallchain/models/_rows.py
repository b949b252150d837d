"""Row access of a design matrix, written once per storage (numba; private).

Every kernel reads the rows of X through these helpers only, so each kernel compiles for both
storages from one source: a dense 2-D array (float32/float64, C order) and a CSR design
(`tallchain.data.CSRArrays`: data, indices, indptr, shape). The storage is chosen by numba's
type dispatch (``numba.extending.overload``) when a kernel is compiled, not per row. A CSR row
costs its non-zeros only: the products with zeros that a dense row spends are skipped.

``X.shape[0]`` and ``X.shape[1]`` read the same for both storages.

The plain Python functions ``row_*`` are the dense forms and ``_csr_*`` the CSR forms; numba
compiles the one that fits X's type (the overloads at the end).
"""

from numba import types
from numba.extending import overload

from ..data import CSRArrays
from ._family_params import OPTIONS

_INLINE = {k: v for k, v in OPTIONS.items() if k != "cache"}


def _is_dense(X):
    return isinstance(X, types.Array)


def row_dot(X, i, w):
    """sum_j X[i, j] w[j] over the columns of X (w may be longer: family parameters follow)."""
    acc = 0.0
    for j in range(X.shape[1]):
        acc += X[i, j] * w[j]
    return acc


def row_dot2(X, i, w1, w0):
    """(x_i . w1, x_i . w0) in one pass over row i."""
    s1 = 0.0
    s0 = 0.0
    for j in range(X.shape[1]):
        x = X[i, j]
        s1 += x * w1[j]
        s0 += x * w0[j]
    return s1, s0


def row_axpy(X, i, r, g):
    """g[j] += r X[i, j] for every column j (the non-zeros only for CSR)."""
    for j in range(X.shape[1]):
        g[j] += r * X[i, j]


def row_outer(X, i, w, hess, intercept, xi):
    """hess[a, b] += w phi_a phi_b for b <= a (the lower triangle), phi = (1 if intercept,
    x_i); ``xi`` is a work buffer of length p + intercept (used by the dense storage)."""
    p = X.shape[1]
    if intercept:
        xi[0] = 1.0
    for j in range(p):
        xi[j + intercept] = X[i, j]
    for a in range(p + intercept):
        wa = w * xi[a]
        for b in range(a + 1):
            hess[a, b] += wa * xi[b]


def _csr_row_dot(X, i, w):
    data, indices = X.data, X.indices
    acc = 0.0
    for k in range(X.indptr[i], X.indptr[i + 1]):
        acc += data[k] * w[indices[k]]
    return acc


def _csr_row_dot2(X, i, w1, w0):
    data, indices = X.data, X.indices
    s1 = s0 = 0.0
    for k in range(X.indptr[i], X.indptr[i + 1]):
        x, j = data[k], indices[k]
        s1 += x * w1[j]
        s0 += x * w0[j]
    return s1, s0


def _csr_row_axpy(X, i, r, g):
    data, indices = X.data, X.indices
    for k in range(X.indptr[i], X.indptr[i + 1]):
        g[indices[k]] += r * data[k]


def _csr_row_outer(X, i, w, hess, intercept, xi):
    # The outer product of the row's non-zeros only: O(nnz_i^2) instead of O(p^2).
    data, indices = X.data, X.indices
    lo, hi = X.indptr[i], X.indptr[i + 1]
    if intercept:
        hess[0, 0] += w
    for k in range(lo, hi):
        a = indices[k] + intercept
        wa = w * data[k]
        if intercept:
            hess[a, 0] += wa
        for m in range(lo, k + 1):
            b = indices[m] + intercept
            if b <= a:
                hess[a, b] += wa * data[m]
            else:   # not reached for sorted column indices (canonical CSR)
                hess[b, a] += wa * data[m]


@overload(row_dot, jit_options=_INLINE, inline="always")
def _row_dot(X, i, w):
    return row_dot if _is_dense(X) else _csr_row_dot


@overload(row_dot2, jit_options=_INLINE, inline="always")
def _row_dot2(X, i, w1, w0):
    return row_dot2 if _is_dense(X) else _csr_row_dot2


@overload(row_axpy, jit_options=_INLINE, inline="always")
def _row_axpy(X, i, r, g):
    return row_axpy if _is_dense(X) else _csr_row_axpy


@overload(row_outer, jit_options=_INLINE, inline="always")
def _row_outer(X, i, w, hess, intercept, xi):
    return row_outer if _is_dense(X) else _csr_row_outer


# A parallel loop (numba prange) passes the variables it uses to its threads one tuple level
# deep: a CSR design nested in the kernels' GLMData is one level too deep. Parallel kernels
# take the design apart before the loop (`design_parts`) and put it together inside
# (`design_join`); for a dense X both are the identity.


def design_parts(X):
    """(arrays, shape): a tuple of X's arrays and its shape."""
    return (X,), X.shape


def design_join(parts, shape):
    """The design of `design_parts`."""
    return parts[0]


def _csr_design_parts(X):
    return (X.data, X.indices, X.indptr), X.shape


@overload(design_parts, jit_options=_INLINE, inline="always")
def _design_parts(X):
    return design_parts if _is_dense(X) else _csr_design_parts


@overload(design_join, jit_options=_INLINE, inline="always")
def _design_join(parts, shape):
    if isinstance(parts[0], types.Array) and len(parts) == 1:
        return design_join

    def csr(parts, shape):
        return CSRArrays(parts[0], parts[1], parts[2], shape)
    return csr
