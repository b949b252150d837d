"""The data and the row cache reach the kernels read-only, whatever the caller's arrays are.

numba compiles a kernel once per argument type, and it types a read-only array apart from a
writable one: without one convention, a model on a user's (writable) arrays and one on a
memory-mapped file or with the read-only placeholders would compile every kernel again.
"""

import numba
import numpy as np

import tallchain as tc
from tallchain.posterior import control_variate_cache, find_mode


def _frozen(a):
    a = np.array(a)
    a.flags.writeable = False
    return a


def test_writable_and_read_only_inputs_give_one_kernel_type(rng):
    X = rng.standard_normal((400, 3))
    y = rng.poisson(1.0, 400).astype(float)
    w = rng.integers(1, 4, 400).astype(float)
    off = rng.normal(0.0, 0.1, 400)
    writable = tc.PoissonRegression(X, y, offset=off, weights=w)
    frozen = tc.PoissonRegression(_frozen(X), _frozen(y), offset=_frozen(off), weights=_frozen(w))
    assert numba.typeof(writable.glm_data) == numba.typeof(frozen.glm_data)
    # power: the same arrays as they are do differ in type
    assert numba.typeof(X) != numba.typeof(_frozen(X))
    data = writable.glm_data
    assert not any(a.flags.writeable for a in (data.X, data.y, data.offset, data.weights))
    # the views leave the model's own arrays (and so the user's) as they were
    assert writable.X.flags.writeable or not X.flags.writeable


def test_the_row_cache_reaches_the_kernels_read_only(rng):
    X = rng.standard_normal((300, 2))
    y = (rng.random(300) < 0.4).astype(float)
    model = tc.LogisticRegression(X, y)
    cache = control_variate_cache(model, find_mode(model).mode, 2)
    rows = cache.rows
    assert not any(a.flags.writeable for a in (rows.beta_star, rows.aux, rows.g_star,
                                                rows.H_star))
    assert cache.aux.flags.writeable   # the cache's own array is untouched
