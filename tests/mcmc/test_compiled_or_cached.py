"""The same run gives the same draws whether numba compiles the kernels or loads them from its
cache: a run interrupted in one process and resumed in another must not depend on which of the
two happened first.

Each case runs in a fresh interpreter with its own empty numba cache folder: the first process
compiles every kernel and writes the cache, the second loads them. The same code runs twice, so
the draws must be equal to the bit. Power: with the "arcp" fast-math flag (reciprocal
approximations, which LLVM applies differently when it compiles afresh) penalty-mala without
control variates differed between the two in the last bits and then drifted apart.
"""

import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

pytestmark = pytest.mark.slow

RUN = textwrap.dedent("""
    import sys, warnings
    import numpy as np
    import tallchain as tc
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(3)
    X = rng.standard_normal((5000, 4))
    eta = 0.3 + X @ [-0.5, 0.2, 0.0, 0.8]
    models = {"poisson": tc.PoissonRegression(X, rng.poisson(np.exp(0.3 * eta)).astype(float)),
              "linear": tc.LinearRegression(X, eta + rng.standard_normal(5000), noise_sd=1.0)}
    out = {}
    for name, model in models.items():
        r = tc.sample(model, method="penalty-mala", control_variates=False, batch_size=500,
                      seed=7, chains=2, draws=300, warmup=200)
        out[name] = r.draws
    np.savez(sys.argv[1], **out)
""")


def test_draws_do_not_depend_on_whether_kernels_were_compiled_or_cached(tmp_path):
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path / "numba-cache"))
    script = tmp_path / "run.py"
    script.write_text(RUN)
    for name in ("compiled", "cached"):
        subprocess.run([sys.executable, str(script), str(tmp_path / f"{name}.npz")], env=env,
                       check=True, timeout=900)
    assert any((tmp_path / "numba-cache").rglob("*.nbi")), "the first process wrote no cache"
    compiled, cached = np.load(tmp_path / "compiled.npz"), np.load(tmp_path / "cached.npz")
    for name in compiled.files:
        assert compiled[name].tobytes() == cached[name].tobytes(), name
