"""Software prefetch of a batch's rows (numba; private).

On tall data a batch row is a cache miss (and usually a TLB miss) in X and in the row cache.
A transition that knows its batch before it computes its proposal can ask for those rows
first and compute while they arrive: `prefetch_rows` issues the loads of X's row (dense) or of
its CSR row pointer, and of the row cache's record; `prefetch_row_values` then issues those of
a CSR row's values and column indices, once the row pointers are in (nothing for dense X). A
prefetch is a hint: it changes no value, only when the memory arrives (LLVM's
``llvm.prefetch``: read, high locality, data cache).
"""

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic, overload

from ._family_params import OPTIONS, jit

_INLINE = {k: v for k, v in OPTIONS.items() if k != "cache"}


@intrinsic
def _prefetch(typingctx, arr, index):
    """Prefetch the cache line of ``arr[index]`` (a 1-D array) or ``arr[index, 0]`` (2-D)."""
    if not isinstance(arr, types.Array) or not isinstance(index, types.Integer):
        return None
    sig = types.void(arr, index)

    def codegen(context, builder, signature, args):
        aryty = signature.args[0]
        ary = context.make_array(aryty)(context, builder, args[0])
        zero = context.get_constant(signature.args[1], 0)
        indices = [args[1]] + [zero] * (aryty.ndim - 1)
        ptr = cgutils.get_item_pointer(context, builder, aryty, ary, indices)
        byte_ptr = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [byte_ptr, i32, i32, i32])
        fn = builder.module.declare_intrinsic("llvm.prefetch", [byte_ptr], fnty)
        # (address, 0: read, 3: keep in all cache levels, 1: data cache)
        builder.call(fn, [builder.bitcast(ptr, byte_ptr), ir.Constant(i32, 0),
                          ir.Constant(i32, 3), ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen


def prefetch_rows(X, aux, idx):
    """Prefetch row idx[k] of X and of the row cache ``aux`` (n, 4), for every k."""
    last = X.shape[1] - 1
    for k in range(idx.shape[0]):
        i = idx[k]
        _prefetch(X[i], 0)
        _prefetch(X[i], last)       # a row of over 8 doubles spans two cache lines
        _prefetch(aux, i)


def prefetch_row_values(X, idx):
    """Nothing for dense X: `prefetch_rows` asked for the whole row."""


def _csr_prefetch_rows(X, aux, idx):
    for k in range(idx.shape[0]):
        i = idx[k]
        _prefetch(X.indptr, i)
        _prefetch(aux, i)


def _csr_prefetch_row_values(X, idx):
    for k in range(idx.shape[0]):
        start = X.indptr[idx[k]]
        _prefetch(X.data, start)
        _prefetch(X.indices, start)


@overload(prefetch_rows, jit_options=_INLINE, inline="always")
def _prefetch_rows(X, aux, idx):
    return prefetch_rows if isinstance(X, types.Array) else _csr_prefetch_rows


@overload(prefetch_row_values, jit_options=_INLINE, inline="always")
def _prefetch_row_values(X, idx):
    return prefetch_row_values if isinstance(X, types.Array) else _csr_prefetch_row_values


@jit
def prefetch_batch(X, aux, idx):
    """`prefetch_rows` as a kernel of its own (for callers outside numba, and tests)."""
    prefetch_rows(X, aux, idx)
    prefetch_row_values(X, idx)
