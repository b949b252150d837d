"""Model arrays that travel to worker processes as files, not bytes (private)."""

import numpy as np


class MappedArray:
    """A read-only memory map to reopen: file, byte offset, dtype, shape (C order)."""

    def __init__(self, filename, offset, dtype, shape):
        self.filename, self.offset, self.dtype, self.shape = filename, offset, dtype, shape

    def open(self):
        return np.memmap(self.filename, mode="r", dtype=np.dtype(self.dtype), shape=self.shape,
                         offset=self.offset, order="C")


class MappedCSR:
    """A sparse design whose arrays travel as files where they are whole read-only maps, as
    their bytes otherwise."""

    def __init__(self, parts, shape):
        self.parts, self.shape = parts, shape

    @classmethod
    def of(cls, design):
        parts = []
        for a in (design.data, design.indices, design.indptr):
            source = mapped_source(a)
            parts.append(a if source is None else MappedArray(*source))
        return cls(parts, design.shape)

    def open(self):
        from ..data import CSRDesign
        return CSRDesign(*(p.open() if isinstance(p, MappedArray) else p for p in self.parts),
                         self.shape)


class ZeroOffset:
    """The all-zero offset of a model without exposure, sent as its length."""

    def __init__(self, n):
        self.n = n

    def open(self):
        return np.zeros(self.n)


def mapped_source(a):
    """(filename, offset, dtype, shape) when ``a`` is exactly a whole read-only file map."""
    base = a
    while base is not None and not isinstance(base, np.memmap):
        base = getattr(base, "base", None)
    if base is None or getattr(base, "filename", None) is None or base.mode != "r":
        return None
    same_start = a.__array_interface__["data"][0] == base.__array_interface__["data"][0]
    if not (same_start and a.shape == base.shape and a.dtype == base.dtype
            and a.flags.c_contiguous):
        return None
    return base.filename, base.offset, a.dtype.str, a.shape
