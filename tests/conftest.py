"""Shared fixtures and comparison helpers of the test suite.

Two rules about comparing floating-point results:

* Two *different* code paths (a numba kernel and its NumPy reference, a serial and a parallel
  pass, a closed form and a series) are compared in units of machine epsilon with
  ``ulps.assert_ulps_close``, never with an absolute 1e-15: the last bits differ between CPUs, compilers
  and summation orders.
* Bitwise equality is asserted only where the *same* code runs twice (a resumed run, a run cut
  into other chunks, the same tasks on another scheduler).
"""

import numpy as np
import pytest


@pytest.fixture
def rng():
    """A fresh generator with the suite's fixed seed, for test data."""
    return np.random.default_rng(20_261_203)
