"""Diagnostics: the summary equals ArviZ on the same draws; KS floors and verdicts.

References: arviz.ess / arviz.rhat / arviz.mcse (ArviZ 1.x); the KS 95% point 1.358 of the
Kolmogorov distribution (standard tables, METHODS.md section 5); scipy.stats.kstest.
"""

import csv
import json

import arviz as az
import numpy as np
import pytest
from scipy import stats
from ulps import assert_ulps_close

import tallchain as tc
from tallchain.checks import ks_check
from tallchain.exceptions import ConvergenceWarning
from tallchain.mcmc import summarize


@pytest.fixture(scope="module")
def small_run():
    rng = np.random.default_rng(3)
    X = rng.standard_normal((2000, 2))
    y = 1.0 + X @ [0.5, -0.25] + rng.standard_normal(2000)
    model = tc.LinearRegression(X, y, noise_sd=1.0, coef_names=["dose", "age"])
    return model, tc.sample(model, method="mala", chains=4, draws=1000, warmup=300, seed=4)


def test_summary_csv_equals_arviz_on_the_same_draws(small_run, tmp_path):
    _, r = small_run
    r.save(tmp_path)
    with open(tmp_path / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    tree = az.from_netcdf(tmp_path / "posterior.nc")
    # reference: ArviZ's own functions on the draws read back from posterior.nc
    ess_b = az.ess(tree, method="bulk")["beta"].values
    ess_t = az.ess(tree, method="tail")["beta"].values
    rhat = az.rhat(tree)["beta"].values
    mcse = az.mcse(tree, method="mean")["beta"].values
    assert [row["coef"] for row in rows] == ["intercept", "dose", "age"]
    # The summary is ArviZ's own functions on the same float64 draws (the same code), and the
    # CSV and JSON keep each float's repr, which reads back to the same float: equal to the bit.
    for j, row in enumerate(rows):
        assert float(row["ess_bulk"]) == ess_b[j]
        assert float(row["ess_tail"]) == ess_t[j]
        assert float(row["r_hat"]) == rhat[j]
        assert float(row["mcse_mean"]) == mcse[j]
    assert tree["posterior"]["beta"].dims == ("chain", "draw", "coef")
    for name in ("accepted", "log_ratio_sd", "step_size", "batch_size"):
        assert name in tree["sample_stats"]
    record = json.loads((tmp_path / "run.json").read_text())
    for key in ("setup_seconds", "sampling_seconds", "wall_seconds", "data_evaluations",
                "acceptance_rate", "log_ratio_sd_mean", "ess_bulk_min", "ess_per_second",
                "ess_per_data_pass"):
        assert key in record
    assert record["ess_bulk_min"] == min(ess_b)


def test_summary_warns_on_short_unmixed_chains(small_run):
    model, _ = small_run
    # 40 draws per chain from a far-off start with a tiny fixed step: R-hat and ESS must flag it.
    r = tc.sample(model, method="rwm", step_size=1e-4, chains=4, draws=40, warmup=0, seed=1,
                  init=np.array([[5.0, 5, 5], [-5, -5, -5], [5, -5, 5], [-5, 5, -5]]))
    with pytest.warns(ConvergenceWarning, match=r"R-hat is .* > 1.01"):
        s = summarize(r)
    assert any("ESS" in m for m in s.warnings)


def test_ks_floor_and_verdict_follow_ess(rng):
    draws = rng.standard_normal((4, 2500, 1))
    good = ks_check(draws, [stats.norm()])
    # the ESS of the empirical CDF: ArviZ's quantile ESS, smallest over q from 5% to 95%.
    # ArviZ's ESS and scipy's kstest on the same draws, the floor by the same formula: the
    # same code, so equal to the bit.
    ess = min(float(az.ess(draws[:, :, 0], method="quantile", prob=q))
              for q in (0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 0.8, 0.9, 0.95))
    assert good.floor[0] == 1.358 / np.sqrt(ess)
    assert good.ks[0] == stats.kstest(draws.ravel(), stats.norm.cdf).statistic
    assert good.passed
    # Power check: a reference shifted by 0.1 sd is flagged.
    assert not ks_check(draws, [stats.norm(loc=0.1)]).passed
    # Weighted reference draws: equal weights give the unweighted two-sample statistic. The
    # weighted ECDF is a running sum of 5000 weights 1/5000, within (n - 1)/2 ulps of their
    # total 1 (Higham, Accuracy and Stability of Numerical Algorithms, ch. 4; from memory);
    # scipy's ECDF is k/n, correctly rounded: 5000 ulps of 1 (a CDF difference is at most 1).
    ref = rng.standard_normal((5000, 1))
    a = ks_check(draws, ref)
    b = ks_check(draws, ref, reference_weights=np.ones(5000))
    assert_ulps_close(b.ks[0], a.ks[0], ulps=5000, scale=1.0)
    assert_ulps_close(b.floor[0], a.floor[0], ulps=4)  # effective size 5000^2/5000, 2 roundings


def test_starting_and_stopping_the_workers_is_set_up_not_sampling(small_run, monkeypatch):
    # A cluster takes seconds to start: counted in sampling_seconds it deflated ESS per second.
    import contextlib
    import time

    from tallchain.mcmc import _runners

    model, _ = small_run
    opened = _runners.Runner.open_pool

    @contextlib.contextmanager
    def slow_pool(self, n_chains):
        time.sleep(0.5)
        with opened(self, n_chains) as pool:
            yield pool
        time.sleep(0.5)

    monkeypatch.setattr(_runners.Runner, "open_pool", slow_pool)
    t0 = time.perf_counter()
    r = tc.sample(model, method="mala", chains=2, draws=200, warmup=100, seed=4)
    wall = time.perf_counter() - t0
    assert r.setup_seconds >= 1.0
    assert r.sampling_seconds < wall - 1.0


def test_one_short_chain_summarises_without_numpy_warnings(small_run, tmp_path):
    # R-hat is NaN for one chain of 20 draws; the summary says so through its ESS advice,
    # not through numpy's all-NaN RuntimeWarning (which the test configuration makes an error).
    model, _ = small_run
    r = tc.sample(model, method="mala", step_size=0.5, chains=1, draws=20, warmup=0, seed=1)
    with pytest.warns(ConvergenceWarning, match="smallest ESS"):
        s = r.summary()
    assert all(np.isnan(s.table["r_hat"]))
    assert r.save(tmp_path).warnings == s.warnings
