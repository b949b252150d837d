"""Comparison of floating-point results of different code paths in units of machine epsilon.

Import in a test as ``from ulps import assert_ulps_close`` (``tests`` is on pytest's path).
"""

import numpy as np

EPS = np.finfo(np.float64).eps


def assert_ulps_close(actual, desired, *, ulps, scale=None, err_msg=""):
    """Assert |actual - desired| <= ulps * eps * max(|desired|, scale), elementwise.

    Parameters
    ----------
    actual, desired : array-like
    ulps : float
        Allowed difference in units of float64 machine epsilon (2.2e-16) relative to the size
        of the quantity; state in the test why that many (e.g. "a sum of N terms in another
        order: N ulps at most, in practice sqrt(N)").
    scale : float or array-like, optional
        The size of the quantity when it is a difference or a sum of terms larger than the
        result (cancellation): the tolerance is then relative to ``scale``. Default: |desired|.
    """
    actual = np.asarray(actual, dtype=np.float64)
    desired = np.asarray(desired, dtype=np.float64)
    size = np.abs(desired) if scale is None else np.maximum(np.abs(desired), np.abs(scale))
    # Where desired is exactly 0 and no scale is given, allow ulps of the smallest normal.
    size = np.where(size > 0, size, np.finfo(np.float64).tiny)
    both_nan = np.isnan(actual) & np.isnan(desired)
    same_inf = np.isinf(actual) & (actual == desired)
    err = np.where(both_nan | same_inf, 0.0, np.abs(actual - desired) / (EPS * size))
    worst = float(np.max(err)) if err.size else 0.0
    assert np.all(np.isfinite(err)) and worst <= ulps, (
        f"differ by {worst:.3g} ulps (allowed {ulps}); {err_msg}")
