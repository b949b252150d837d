"""A model's fingerprint: everything that defines its posterior, cheap to compare (private).

A checkpoint records it and a resume compares it, so that draws of two posteriors are never
mixed in one run. Arrays are summarised by their shape, dtype and a CRC-32 of their bytes, read
block by block (a memory-mapped X is never read whole): one pass at memory speed, about the
cost of a column sum.
"""

import hashlib
import zlib

import numpy as np

from .._arrays import row_blocks


def array_digest(a):
    """``"<shape> <dtype> crc32:<hex>"`` of an array's values, read in row blocks."""
    a = np.asarray(a)
    crc = 0
    for _, block in row_blocks(a, dtype=None):
        crc = zlib.crc32(np.ascontiguousarray(block).view(np.uint8).reshape(-1), crc)
    return f"{'x'.join(map(str, a.shape))} {a.dtype} crc32:{crc:08x}"


def design_digest(X):
    """`array_digest` of a dense X; of a sparse one, ``"<shape> csr <dtype> crc32:<hex>"`` with
    the CRC-32 running over its data, indices and indptr arrays in turn."""
    if not hasattr(X, "indptr"):
        return array_digest(X)
    crc = 0
    for part in (X.data, X.indices, X.indptr):
        for _, block in row_blocks(part, dtype=None):
            crc = zlib.crc32(np.ascontiguousarray(block).view(np.uint8).reshape(-1), crc)
    return f"{'x'.join(map(str, X.shape))} csr {X.dtype} crc32:{crc:08x}"


def small_digest(a):
    """A short exact hash of a small float array (prior mean, covariance)."""
    b = np.ascontiguousarray(a, dtype=np.float64)
    return f"{'x'.join(map(str, b.shape))} sha1:{hashlib.sha1(b.tobytes()).hexdigest()[:16]}"


_PER_ROW = ("offset", "trials", "weights")


def fingerprint(model):
    """The items that define ``model``'s posterior, each named as a refusal names it.

    Returns
    -------
    dict of str to JSON-ready value
    """
    options = {name.replace("_", " "): _option(getattr(model, name))
               for name in model.family_options if name not in _PER_ROW}
    # Per-row arrays some models have; absent ones are left out, so that the fingerprint of
    # a model without them is what it was before they existed.
    per_row = {f"data values ({name})": array_digest(getattr(model, name))
               for name in _PER_ROW[1:] if getattr(model, name) is not None}
    return {
        "family": model.family_name,
        **options,
        "intercept": model.add_intercept,
        "coefficient names": list(model.coef_names),
        "prior mean": small_digest(model.prior_mean),
        "prior covariance": small_digest(model.prior_cov),
        "data values (X)": design_digest(model.X),
        "data values (y)": array_digest(model.y),
        "data values (offset)": array_digest(model.offset),
        **per_row,
    }


def _option(value):
    return float(value) if isinstance(value, (float, np.floating, int)) else small_digest(value)
