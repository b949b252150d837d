"""The batch prefetch compiles for both storages and changes nothing (it is a hint)."""

import numpy as np
import scipy.sparse as sp

from tallchain.data import CSRDesign
from tallchain.models._prefetch import prefetch_batch


def test_prefetch_reads_nothing_into_the_arrays_dense_and_csr(rng):
    dense = rng.standard_normal((50, 12))
    m = sp.random(50, 12, density=0.3, format="csr", random_state=1)
    csr = CSRDesign(m.data, m.indices.astype(np.int32), m.indptr.astype(np.int64), m.shape)
    aux = rng.standard_normal((50, 4))
    idx = np.array([0, 7, 31, 49], dtype=np.int64)
    for X in (dense, csr.kernel_form()):
        before = [np.array(a, copy=True) for a in (aux, idx)]
        prefetch_batch(X, aux, idx)
        assert all(np.array_equal(a, b) for a, b in zip((aux, idx), before))
