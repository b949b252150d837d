"""The false-alarm rate of a sweep's verdicts, stated and measured.

References: the Kolmogorov distribution (scipy.stats.kstwobign: the limit of sqrt(n) D_n);
ArviZ 1.x quantile ESS (arviz.ess(..., method="quantile")); an exact sampler written here in
NumPy (MALA on N(0, 1)), and the exact posterior of the linear model (Bishop PRML eqs.
3.53-3.54) for tables of `sweep`.
"""

import json

import arviz as az
import numpy as np
import pytest
from scipy import stats
from ulps import assert_ulps_close

import tallchain as tc
from tallchain.checks import KS_CRITICAL, ecdf_ess, family_threshold, sweep, write_sweep


def test_family_threshold_is_bonferroni_on_the_kolmogorov_distribution():
    for level, n_tests in ((0.05, 1), (0.05, 84), (0.2, 24), (0.01, 300)):
        threshold, per_test = family_threshold(level, n_tests)
        assert per_test == level / n_tests
        # the per-test level is the Kolmogorov tail beyond threshold x 1.358 (ppf and sf are
        # two scipy code paths: a few thousand ulps of a small tail probability)
        assert_ulps_close(stats.kstwobign.sf(threshold * KS_CRITICAL), per_test, ulps=5e4)
    # one test at 5% is the floor itself (1.358 is the Kolmogorov 95% point to 4 digits)
    assert family_threshold(0.05, 1)[0] == pytest.approx(1.0, abs=1e-4)
    # more tests, a higher threshold
    assert family_threshold(0.05, 42)[0] < family_threshold(0.05, 84)[0]


def test_ecdf_ess_is_arvizs_smallest_quantile_ess():
    rng = np.random.default_rng(3)
    draws = np.cumsum(rng.standard_normal((4, 500, 2)), axis=1) * 0.1 \
        + rng.standard_normal((4, 500, 2))
    qs = (0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 0.8, 0.9, 0.95)
    expected = [min(float(az.ess(draws[:, :, j], method="quantile", prob=q)) for q in qs)
                for j in range(2)]
    assert_ulps_close(ecdf_ess(draws), expected, ulps=0)


def _numpy_mala(h, replications, rng, chains=4, draws=2000, warmup=500):
    """Exact MALA on N(0, 1), all replications at once; draws (replications, chains, draws)."""
    x = 2.0 * rng.standard_normal((replications, chains))
    out = np.empty((replications, chains, draws))

    def log_q(to, frm):
        return -0.5 * (to - (1.0 - 0.5 * h) * frm) ** 2 / h

    for it in range(warmup + draws):
        y = (1.0 - 0.5 * h) * x + np.sqrt(h) * rng.standard_normal(x.shape)
        move = np.log(rng.random(x.shape)) < -0.5 * y**2 + 0.5 * x**2 + log_q(x, y) - log_q(y, x)
        x = np.where(move, y, x)
        if it >= warmup:
            out[:, :, it - warmup] = x
    return out


@pytest.mark.slow
def test_ecdf_ess_gives_the_kolmogorov_tail_where_bulk_ess_does_not():
    # MALA at a step above the usual tuning (acceptance 0.66) is antithetic in the position:
    # its bulk ESS exceeds the effective size of the empirical CDF. With the ECDF ESS as n,
    # sqrt(n) KS exceeds the Kolmogorov 95% point at the nominal 5% (15 of these 400 runs);
    # with the bulk ESS, 68 of 400 (the power check of this test).
    rng = np.random.default_rng(2024)
    runs = _numpy_mala(2.8, 400, rng)
    ks = np.array([stats.kstest(r.ravel(), stats.norm.cdf).statistic for r in runs])
    ecdf = np.array([ecdf_ess(r[:, :, None])[0] for r in runs])
    bulk = np.array([float(az.ess(r, method="bulk")) for r in runs])
    over_ecdf = int(np.sum(ks * np.sqrt(ecdf) > KS_CRITICAL))
    over_bulk = int(np.sum(ks * np.sqrt(bulk) > KS_CRITICAL))
    # binomial 99.9% bounds around 5% of 400 runs
    lo, hi = stats.binom.ppf([0.0005, 0.9995], 400, 0.05)
    assert lo <= over_ecdf <= hi, over_ecdf
    assert over_bulk > hi, over_bulk


@pytest.fixture(scope="module")
def linear():
    rng = np.random.default_rng(17)
    X = rng.standard_normal((200, 2))
    return tc.LinearRegression(X, 0.3 + X @ [1.0, -1.0] + rng.standard_normal(200),
                               noise_sd=1.0)


@pytest.mark.slow
def test_tables_of_an_exact_setting_raise_a_false_alarm_at_most_at_the_stated_rate(linear):
    # Tables of full-data MALA (exact) beside sgld (biased by construction) at the tuned step
    # x 1, 1.5, 2, where MALA is antithetic and its bulk ESS overstates the ESS of the
    # empirical CDF. A "biased" MALA row is a false alarm; the share of tables with one must
    # stay within binomial error of the stated level (measured: 10 of these 100 tables).
    # With the bulk ESS as n instead, 45 of the 100 had one and the test fails. Power: sgld
    # at the tuned step is flagged (100 of 100).
    level, n_tables = 0.2, 100
    h = sweep(linear, methods=["mala"], step_sizes=[1.0], draws=200, warmup=200, seed=0,
              scheduler="serial").tuned_step_size
    steps = [h, 1.5 * h, 2 * h]
    false_alarms = sgld_flagged = 0
    for seed in range(n_tables):
        res = sweep(linear, methods=["mala", "sgld"], step_sizes=steps, draws=600, warmup=300,
                    seed=seed, level=level, scheduler="serial")
        assert res.n_tests == 6 * 3
        verdicts = {(r["method"], r["step_size"]): r["verdict"] for r in res.rows}
        false_alarms += any(verdicts[("mala", s)] == "biased" for s in steps)
        sgld_flagged += verdicts[("sgld", h)] == "biased"
    # at most the level, up to binomial error (one-sided, 99.5%)
    assert false_alarms <= stats.binom.ppf(0.995, n_tables, level), false_alarms
    assert sgld_flagged >= 0.9 * n_tables, sgld_flagged


def test_sweep_json_states_the_rule(linear, tmp_path):
    res = sweep(linear, methods=["mala"], step_sizes=[0.5, 1.0], draws=300, warmup=100, seed=1,
                level=0.1, scheduler="serial")
    write_sweep(res, tmp_path)
    rule = json.loads((tmp_path / "sweep.json").read_text())["false_alarms"]
    threshold, per_test = family_threshold(0.1, 2 * 3)
    assert rule["level"] == 0.1 and rule["tests"] == 6 and rule["per_test_level"] == per_test
    assert rule["threshold_in_floors"] == threshold == res.tolerance
    assert "with probability at most 0.1" in rule["rule"]


@pytest.mark.parametrize("bad", [0, 1, 1.5, -0.1, "0.05", None])
def test_a_bad_level_is_one_line_naming_it(linear, bad, monkeypatch):
    from tallchain.checks import _sweep

    monkeypatch.setattr(_sweep, "prepare", lambda *a, **k: pytest.fail("reached the mode"))
    with pytest.raises(tc.InputError, match=r"^level: must be a probability strictly between "
                                            r"0 and 1, got .*; give the false-alarm rate of the "
                                            r"whole check, e\.g\. 0\.05$"):
        sweep(linear, level=bad, scheduler="serial")
