"""Column statistics, constant and duplicate columns, standardisation and the way back (private).

Every pass over the columns goes block by block: a memory-mapped X is never read whole.
"""

import itertools
import warnings
from dataclasses import dataclass

import numpy as np

from .._arrays import row_blocks
from .._validation import check_finite_matrix, fail, overflow_limit, too_large
from ..exceptions import DataWarning
from ._sparse import design_blocks, is_csr_design

_BLOCK_BYTES = 2**24


@dataclass(frozen=True)
class Standardization:
    """Column centres and scales used to standardise X, and the way back.

    The model is fitted on z_j = (x_j - center_j) / scale_j. Its linear predictor
    a + sum_j b_j z_j equals (a - sum_j b_j center_j / scale_j) + sum_j (b_j / scale_j) x_j,
    which gives the coefficients on the original scale (`to_original`).

    Attributes
    ----------
    center : ndarray of shape (n_features,)
        Column means when the model has an intercept; zeros otherwise (without an intercept a
        shift of the columns would change the model).
    scale : ndarray of shape (n_features,)
        Column standard deviations (population, ddof=0); 1 for constant columns.
    intercept : bool
        Whether coefficient 0 is an intercept.
    """

    center: np.ndarray
    scale: np.ndarray
    intercept: bool

    def to_original(self, coef):
        """Map coefficients on the standardised scale to the original scale of X.

        Parameters
        ----------
        coef : array-like of shape (..., n_coef)
            Draws or point estimates, the intercept first when the model has one.

        Returns
        -------
        ndarray of shape (..., n_coef)
        """
        coef = np.asarray(coef, dtype=float)
        k = int(self.intercept)
        out = np.array(coef, dtype=float, copy=True)
        out[..., k:] = coef[..., k:] / self.scale
        if self.intercept:
            out[..., 0] = coef[..., 0] - out[..., 1:] @ self.center
        return out

    def as_dict(self):
        return {"center": self.center.tolist(), "scale": self.scale.tolist(),
                "intercept": self.intercept}


def column_stats(X):
    """Per-column mean, standard deviation (ddof=0), minimum and maximum, block by block.

    Blocks are merged with the pairwise update of Chan, Golub & LeVeque (1983), The American
    Statistician 37, 242: M2 = M2_a + M2_b + delta^2 n_a n_b / n. A NaN or inf anywhere is
    reported with its row and column (`tallchain.InputError`).

    Returns
    -------
    dict with keys ``mean``, ``sd``, ``min``, ``max`` (each an ndarray of shape (n_features,))
    """
    n_rows, p = X.shape
    mean, m2 = np.zeros(p), np.zeros(p)
    lo, hi = np.full(p, np.inf), np.full(p, -np.inf)
    seen = 0
    with np.errstate(invalid="ignore", over="ignore"):  # NaN/inf are located below
        blocks = ((b, _sparse_moments(b)) for _, b in design_blocks(X, _BLOCK_BYTES)) \
            if is_csr_design(X) else ((b, _dense_moments(b)) for b in _blocks(X))
        for block, (bmean, bm2, bmin, bmax) in blocks:
            nb = block.shape[0]
            total = seen + nb
            delta = bmean - mean
            mean = mean + delta * nb / total
            m2 = m2 + bm2 + delta**2 * seen * nb / total
            seen = total
            np.minimum(lo, bmin, out=lo)
            np.maximum(hi, bmax, out=hi)
    # NaN or inf in X shows in the minimum or maximum (an inf M2 with finite extremes is an
    # overflow of the squares, which check_columns reports by column name).
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        check_finite_matrix("X", X)
    return {"mean": mean, "sd": np.sqrt(m2 / max(n_rows, 1)), "min": lo, "max": hi}


def _dense_moments(block):
    bmean = block.mean(axis=0)
    return bmean, ((block - bmean) ** 2).sum(axis=0), block.min(axis=0), block.max(axis=0)


def _sparse_moments(block):
    """`_dense_moments` of a scipy CSR block from its non-zeros: a column with k non-zeros
    of n rows adds (n - k) mean^2 to M2 for its zeros, and 0 to its extremes when k < n."""
    n, p = block.shape
    cols, vals = block.indices, block.data
    count = np.bincount(cols, minlength=p)
    bmean = np.bincount(cols, weights=vals, minlength=p) / n
    bm2 = (np.bincount(cols, weights=(vals - bmean[cols]) ** 2, minlength=p)
           + (n - count) * bmean**2)
    has_zero = np.where(count < n, 0.0, np.inf)
    bmin = np.minimum(has_zero, _column_extreme(np.minimum, cols, vals, p, np.inf))
    bmax = np.maximum(-has_zero, _column_extreme(np.maximum, cols, vals, p, -np.inf))
    return bmean, bm2, bmin, bmax


def _column_extreme(ufunc, cols, vals, p, start):
    out = np.full(p, start)
    ufunc.at(out, cols, vals)
    return out


def check_columns(X, names, *, intercept, stats=None):
    """Refuse a column with values too large for the set-up's sums (`InputError` naming the
    column and row); warn (`DataWarning`) about constant columns and columns that repeat
    another one.

    Neither is an error: a Gaussian prior keeps the posterior proper, but such a coefficient is
    identified by the prior alone and the sampler spends effort on it.

    Returns
    -------
    dict
        The `column_stats` of X.
    """
    stats = column_stats(X) if stats is None else stats
    big = np.maximum(np.abs(stats["min"]), np.abs(stats["max"])) > overflow_limit(X.shape[0])
    if big.any():
        too_large("X", X, int(np.argmax(big)), names)
    constant = [names[j] for j in np.flatnonzero(stats["min"] == stats["max"])]
    if constant:
        also = " and duplicate the intercept" if intercept else ""
        warnings.warn(f"constant column(s) {', '.join(constant)}: their coefficients are "
                      f"informed by the prior alone{also}; drop them from data.columns",
                      DataWarning, stacklevel=2)
    groups = {}
    for j in range(X.shape[1]):
        if stats["min"][j] != stats["max"][j]:
            key = (stats["mean"][j], stats["sd"][j], stats["min"][j], stats["max"][j])
            groups.setdefault(key, []).append(j)
    pairs = [(a, b) for g in groups.values() if len(g) > 1
             for a, b in itertools.combinations(g, 2) if _columns_equal(X, a, b)]
    if pairs:
        listed = ", ".join(f"{names[b]} = {names[a]}" for a, b in pairs)
        warnings.warn(f"duplicate column(s) {listed}: only their sum is informed by the data; "
                      "drop the copies from data.columns", DataWarning, stacklevel=2)
    return stats


def _columns_equal(X, a, b):
    return all(np.array_equal(block[:, a], block[:, b]) for block in _blocks(X))


def standardize_columns(X, *, intercept, stats=None, memory_fraction=0.5):
    """Return a standardised float64 copy of X and the `Standardization` to map back.

    A sparse X (`CSRDesign`) is scaled, not centred: each column divided by its sd, so that
    its zeros stay zeros; only its values are copied (``center`` is 0).

    The copy is made only when it fits in ``memory_fraction`` of the memory available now
    (``MemAvailable`` of /proc/meminfo; no limit where that is unknown). A larger X must be
    standardised on disk beforehand; the error says so.

    Parameters
    ----------
    X : ndarray of shape (n_rows, n_features)
    intercept : bool
        Centre the columns only when the model has an intercept to absorb the shift.
    stats : dict, optional
        `column_stats` of X, when already computed.
    memory_fraction : float, default=0.5

    Returns
    -------
    Z : ndarray of shape (n_rows, n_features)
    standardization : Standardization
    """
    stats = column_stats(X) if stats is None else stats
    scale = np.where(stats["sd"] > 0, stats["sd"], 1.0)
    if is_csr_design(X):   # scaled only: a centred column would have no zeros left
        return X.scaled_columns(scale), Standardization(center=np.zeros(X.shape[1]),
                                                        scale=scale, intercept=bool(intercept))
    need = X.shape[0] * X.shape[1] * 8
    avail = _available_memory()
    if avail is not None and need > memory_fraction * avail:
        fail("standardize", f"needs a {need / 2**30:.1f} GiB copy of X but only "
             f"{avail / 2**30:.1f} GiB of memory is free",
             "standardise the columns in the file beforehand, or set standardize = false")
    center = stats["mean"] if intercept else np.zeros(X.shape[1])
    Z = np.empty(X.shape, dtype=np.float64)
    row = 0
    for block in _blocks(X):
        Z[row:row + block.shape[0]] = (block - center) / scale
        row += block.shape[0]
    return Z, Standardization(center=center, scale=scale, intercept=bool(intercept))


def _blocks(X):
    return (block for _, block in row_blocks(X, block_bytes=_BLOCK_BYTES))


def _available_memory():
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None
