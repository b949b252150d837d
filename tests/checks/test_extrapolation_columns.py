"""The extrapolation estimators' algebra and what a sweep writes about them.

Outside references: Richardson extrapolation with ratio 2, 2 A(h/2) - A(h) (Richardson 1911;
Durmus, Simsekli, Moulines, Badeau & Richard, NeurIPS 2016, eq. for the SG-RR estimator);
the jackknife in 1/n, (n2 A(n2) - n1 A(n1)) / (n2 - n1) (Quenouille 1956), which is exact
for A(n) = A + C/n; variances of independent estimates add.
"""

import json
import warnings

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import sweep, write_sweep
from tallchain.checks._extrapolation import batch_jackknife, moments, richardson_romberg
from ulps import assert_ulps_close


def test_paired_series_average_is_the_richardson_estimate(rng):
    coarse = rng.standard_normal((3, 50, 2))
    fine = rng.standard_normal((3, 100, 2)) + 0.1
    rr = richardson_romberg(coarse, fine)
    want = 2 * fine.reshape(-1, 2).mean(axis=0) - coarse.reshape(-1, 2).mean(axis=0)
    # means of 300 and 150 terms, maybe summed in another order: at most n ulps of the terms
    assert_ulps_close(rr["mean"], want, ulps=300, scale=1.0)
    sd = lambda x: x.reshape(-1, 2).std(axis=0, ddof=1)      # noqa: E731
    assert_ulps_close(rr["sd"], 2 * sd(fine) - sd(coarse), ulps=8, scale=1.0)
    with pytest.raises(ValueError, match="fine draws have shape"):
        richardson_romberg(coarse, fine[:, :99])


def test_jackknife_is_exact_for_a_bias_in_one_over_n():
    """A(n) = A + C/n with A = 1.5, C = 40: the jackknife returns A, and the residual bias at n2
    is C/n2, whatever the two batch sizes; MC errors combine as for independent runs."""
    truth, c = np.array([1.5, -0.2]), np.array([40.0, -7.0])
    for n1, n2 in ((100, 200), (64, 256)):
        small = {"mean": truth + c / n1, "mean_mcse": [0.01, 0.02], "sd": [1.0, 1.0],
                 "sd_mcse": [0.0, 0.0]}
        large = {"mean": truth + c / n2, "mean_mcse": [0.03, 0.04], "sd": [1.0, 1.0],
                 "sd_mcse": [0.0, 0.0]}
        jk = batch_jackknife(small, large, n1, n2)
        assert_ulps_close(jk["mean"], truth, ulps=64, scale=c / n1)
        assert_ulps_close(jk["bias_mean"], c / n2, ulps=64, scale=c / n1)
        a = n1 / (n2 - n1)
        want = np.hypot((1 + a) * np.array([0.03, 0.04]), a * np.array([0.01, 0.02]))
        assert_ulps_close(jk["mean_mcse"], want, ulps=4)


def test_moments_match_numpy_and_the_iid_standard_error(rng):
    """For independent draws the MCSE of the mean is sd / sqrt(n) (ArviZ's ESS ~ n): within
    20% (the ESS estimate's own noise at n = 4000 is a few percent)."""
    x = rng.standard_normal((4, 1000, 2)) * [1.0, 3.0]
    m = moments(x)
    # the same NumPy mean of the same 4000 terms: equal up to summation order, 4 ulps
    assert_ulps_close(m["mean"], x.reshape(-1, 2).mean(axis=0), ulps=4, scale=3.0)
    ratio = np.array(m["mean_mcse"]) / (np.array(m["sd"]) / np.sqrt(4000))
    assert np.all(np.abs(ratio - 1) < 0.2), ratio
    # the sd's error for Gaussian draws: sd / sqrt(2 n)
    ratio = np.array(m["sd_mcse"]) / (np.array(m["sd"]) / np.sqrt(8000))
    assert np.all(np.abs(ratio - 1) < 0.2), ratio


def _linear():
    gen = np.random.default_rng(4)
    X = gen.standard_normal((600, 2))
    y = 0.3 + X @ [1.0, -0.5] + gen.standard_normal(600)
    return tc.LinearRegression(X, y, noise_sd=1.0)


def test_sweep_writes_the_extrapolation_columns(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = sweep(_linear(), methods=["penalty-mala", "sgld"], step_sizes=[0.5],
                    batch_sizes=[30, 60], chains=2, draws=300, warmup=100, seed=2,
                    scheduler="serial")
    by = {(r["method"], r["batch_size"]): r for r in res.rows}
    for n in (30, 60):
        ext = by[("sgld", n)]["extrapolation"]
        assert ext["kind"].startswith("step") and ext["from"] == [0.5, 0.25]
        assert np.isfinite(by[("sgld", n)]["bias_estimate_sd"])
    assert by[("penalty-mala", 30)]["extrapolation"] is None      # no smaller batch
    jk = by[("penalty-mala", 60)]["extrapolation"]
    assert jk["kind"].startswith("batch") and jk["from"] == [30, 60]
    write_sweep(res, tmp_path)
    header, *lines = (tmp_path / "sweep.csv").read_text().splitlines()
    cols = header.split(",")
    assert cols[-3:] == ["bias_estimate_sd", "bias_estimate_mcse_sd", "extrapolated_error_mcse"]
    assert len(lines) == 4 and all(len(line.split(",")) == len(cols) for line in lines)
    rows = json.loads((tmp_path / "sweep.json").read_text())["rows"]
    assert all("moments" in r and "extrapolation" in r for r in rows)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        off = sweep(_linear(), methods=["sgld"], step_sizes=[0.5], batch_sizes=[30], chains=2,
                    draws=100, warmup=50, seed=2, scheduler="serial", extrapolate=False)
    assert off.rows[0]["extrapolation"] is None and np.isnan(off.rows[0]["bias_estimate_sd"])
