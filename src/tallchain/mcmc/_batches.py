"""Simple random samples of row indices, drawn inside numba from a numpy Generator (private)."""

import numpy as np

from ..models._kernels import jit


@jit
def _uniform_index(rng, n_rows):
    # floor(U * N) with U in [0, 1): the bias is below N / 2**53, far under Monte Carlo error.
    i = np.int64(rng.random() * n_rows)
    return i if i < n_rows else n_rows - 1


@jit
def draw_batch(rng, n_rows, out):
    """Fill ``out`` with a sorted simple random sample (without replacement) of range(n_rows).

    Small batches: draw, sort, redraw the duplicates until none is left. The procedure commutes
    with any relabelling of the rows, so every n-subset is equally likely. Large batches
    (n > N/8): selection sampling (Knuth, TAOCP vol. 2, Algorithm 3.4.2 S), one pass, already
    sorted. Sorted indices make the row reads monotone; the estimate does not depend on order.
    """
    n = out.shape[0]
    if n >= n_rows:
        for k in range(n):
            out[k] = k
        return
    if 8 * n > n_rows:
        k = 0
        for i in range(n_rows):
            if (n_rows - i) * rng.random() < n - k:
                out[k] = i
                k += 1
                if k == n:
                    break
        return
    for k in range(n):
        out[k] = _uniform_index(rng, n_rows)
    out.sort()
    while True:
        dup = 0
        for k in range(1, n):
            if out[k] == out[k - 1]:
                out[k] = _uniform_index(rng, n_rows)
                dup += 1
        if dup == 0:
            return
        out.sort()
