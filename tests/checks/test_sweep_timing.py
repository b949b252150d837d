"""A sweep's timings exclude numba's compilation: the first points are not outliers.

Each grid point here does about the same work (penalty-mala, a fixed batch size, nearby
steps), so their times should agree up to timing noise. Fresh worker processes load every
kernel from numba's cache (or compile it) at its first call. Measured on an idle 2-core
machine in a 14-point sweep (logistic, 20,000 rows, 4 x 1000 draws), the first point of each
worker took 0.26-0.46 s against 0.036 s for the others before the kernels were warmed
untimed, and 0.055-0.063 s after.
"""

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import _sweep, sweep

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(31)
    X = rng.standard_normal((20_000, 4))
    y = (rng.random(20_000) < 1 / (1 + np.exp(-(X @ [0.5, -0.5, 0.25, 0.0])))).astype(float)
    return tc.LogisticRegression(X, y)


def test_first_points_of_each_worker_are_not_slower(model):
    steps = [0.9, 0.95, 1.0, 1.05, 1.1, 1.15, 1.2, 1.25]
    res = sweep(model, methods=["penalty-mala"], step_sizes=steps, batch_sizes=[100],
                draws=300, warmup=100, seed=2, workers=2)
    seconds = [r["wall_seconds"] for r in res.rows]
    # Tasks 0 and 1 are the first on the two workers. Loading the kernels takes 0.25 s or
    # more (see above), many times a point's run here; 3 times the median plus 0.1 s leaves
    # room for a busy machine.
    first, rest = max(seconds[:2]), float(np.median(seconds[2:]))
    assert first <= 3.0 * rest + 0.1, seconds


def test_kernels_are_warmed_once_per_process_and_kind_of_run(model, monkeypatch):
    calls = []
    real = _sweep.sample
    monkeypatch.setattr(_sweep, "sample",
                        lambda m, s=None, **kw: calls.append(s) or real(m, s, **kw))
    monkeypatch.setattr(_sweep, "_WARMED", set())
    sweep(model, methods=["penalty-mala", "sgld"], step_sizes=[0.5, 1.0], batch_sizes=[300],
          draws=200, warmup=100, seed=2, scheduler="serial")
    tiny = [s for s in calls if s is not None and s.chains == 1 and s.draws == 2]
    # one warm-up run per method (the other settings are the same), then none
    assert sorted(s.method for s in tiny) == ["penalty-mala", "sgld"]
    assert all(s.warmup == 2 and s.batch_size == 300 for s in tiny)
