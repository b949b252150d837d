"""The summary's central interval: its probability is a parameter and names the columns.

Reference: ArviZ 1.x ``arviz.eti`` (equal-tailed interval) and ``median`` of xarray on the same
draws, a code path other than the summary's own.
"""

import arviz as az
import numpy as np
import pytest
from ulps import assert_ulps_close

import tallchain as tc
from tallchain.mcmc import summarize


@pytest.fixture(scope="module")
def run():
    rng = np.random.default_rng(8)
    X = rng.standard_normal((500, 2))
    y = 0.5 + X @ [1.0, -1.0] + rng.standard_normal(500)
    model = tc.LinearRegression(X, y, noise_sd=1.0, coef_names=["dose", "age"])
    return tc.sample(model, method="mala", chains=4, draws=300, warmup=200, seed=2)


@pytest.mark.parametrize("interval, lower, upper", [(0.9, "lower_90", "upper_90"),
                                                    (0.5, "lower_50", "upper_50"),
                                                    (0.975, "lower_97.5", "upper_97.5")])
def test_interval_columns_follow_the_probability_and_equal_arviz(run, interval, lower, upper):
    s = summarize(run, warn=False, interval=interval)
    assert list(s.table) == ["coef", "mean", "sd", lower, "median", upper, "ess_bulk",
                             "ess_tail", "r_hat", "mcse_mean", "laplace_ks", "ks_floor",
                             "laplace_shift", "laplace_sd_ratio"]
    assert s.interval == interval and s.interval_columns == (lower, upper)
    tree = run.to_arviz()
    eti = az.eti(tree, prob=interval)["beta"]
    median = tree["posterior"]["beta"].median(dim=("chain", "draw")).values
    # Quantiles of the same sorted draws by linear interpolation: a few ulps at most.
    assert_ulps_close(s.table[lower], eti.sel(ci_bound="lower").values, ulps=4)
    assert_ulps_close(s.table[upper], eti.sel(ci_bound="upper").values, ulps=4)
    assert_ulps_close(s.table["median"], median, ulps=4)


def test_summary_csv_header_follows_the_interval(run, tmp_path):
    run.save(tmp_path, interval=0.8)
    header = (tmp_path / "summary.csv").read_text().splitlines()[0].split(",")
    assert header[3:6] == ["lower_80", "median", "upper_80"]


@pytest.mark.parametrize("bad", [0.0, 1.0, 90, -0.1, "0.9", None, float("nan")])
def test_interval_outside_zero_one_is_one_line_naming_it(run, bad, tmp_path):
    with pytest.raises(tc.InputError, match=r"^interval: must be a probability strictly "
                                            r"between 0 and 1, got .*; give the central "
                                            r"interval's probability, e.g\. interval=0\.9$"):
        run.summary(interval=bad)
    with pytest.raises(tc.InputError, match=r"^interval: "):
        run.save(tmp_path / "out", interval=bad)
    assert not (tmp_path / "out").exists()    # refused before any file is written
