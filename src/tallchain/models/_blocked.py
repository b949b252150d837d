"""The full-data Hessian by dense matrix products over blocks of rows (private).

sum_i f''(eta_i) x_i x_i^T = sum over blocks B of X_B^T (w_B * X_B), w_i = f''(eta_i) (the row's
frequency weight included): one matrix product per block (BLAS level 3) in place of the row
loop of `_kernels.full_hessian`, whose d^2/2 multiply-adds per row run at scalar speed. The
weights come from one pass of the row-cache kernel. `_passes.hessian` chooses it for wide
designs without a family parameter (DEVELOPERS.md, "Set-up passes for wide designs").
"""

import numpy as np

from .._arrays import row_blocks

# About 16 MiB of X per block: large enough for BLAS to run at its level-3 speed, small
# enough that the scaled copy w_B * X_B stays in memory beside it.
BLOCK_BYTES = 2**24


def blocked_hessian(data, beta, f2):
    """The log-likelihood Hessian (n_beta, n_beta) of ``data`` (a GLMData without family
    parameters) given f2[i] = f''(eta_i) at beta for every row (`_passes.eta_derivatives`)."""
    X, intercept = data.X, data.intercept
    nb = X.shape[1] + intercept
    hess = np.zeros((nb, nb))
    for lo, block in row_blocks(X, block_bytes=BLOCK_BYTES, dtype=None):
        w = f2[lo:lo + block.shape[0]]
        if np.all(w <= 0.0):
            # -Z^T Z with Z = sqrt(-w) X: numpy hands a product with its own transpose to
            # the symmetric rank-k update (syrk), half the work of a general product
            root = block * np.sqrt(-w)[:, None]
            hess[intercept:, intercept:] -= root.T @ root
        else:
            hess[intercept:, intercept:] += block.T @ (block * w[:, None])
        if intercept:
            col = w @ block
            hess[0, 1:] += col
            hess[1:, 0] += col
            hess[0, 0] += w.sum()
    return 0.5 * (hess + hess.T)
