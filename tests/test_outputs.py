"""posterior.nc read back: the groups `SampleResult.to_arviz` documents, warmup included."""

import arviz as az
import numpy as np
import pytest

import tallchain as tc


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(4)
    X = rng.standard_normal((300, 2))
    return tc.LinearRegression(X, 0.2 + X @ [1.0, -1.0] + rng.standard_normal(300),
                               noise_sd=1.0)


def test_posterior_nc_keeps_the_warmup_statistics(model, tmp_path):
    r = tc.sample(model, method="penalty-mala", chains=2, draws=50, warmup=40, seed=1)
    r.save(tmp_path)
    tree = az.from_netcdf(tmp_path / "posterior.nc")
    assert {"posterior", "sample_stats", "warmup_sample_stats"} <= set(tree.children)
    warm = tree["warmup_sample_stats"]
    assert set(warm.data_vars) == set(r.warmup_stats)
    for name, values in r.warmup_stats.items():
        assert warm[name].dims == ("chain", "draw") and warm[name].shape == (2, 40)
        # the same numbers written and read back: bitwise
        np.testing.assert_array_equal(warm[name].values, values)


def test_no_warmup_no_warmup_group(model, tmp_path):
    r = tc.sample(model, method="mala", step_size=0.5, chains=2, draws=50, warmup=0, seed=1)
    r.save(tmp_path)
    assert "warmup_sample_stats" not in az.from_netcdf(tmp_path / "posterior.nc").children
