"""Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018) of the
samplers: ranks of true coefficients among posterior draws are uniform when the sampler is
right. The verdict's test is the simultaneous ECDF test of uniformity (Saeilynoja, Buerkner &
Vehtari 2022; its level checked below against fresh uniform ranks, and beside it Pearson's
chi-square, scipy.stats.chisquare, the binned reference), Bonferroni over coefficients
within a run and over the six sound configurations below, so that the whole suite has
family-wise level 0.05 (a false alarm in 1 suite run of 20, not 1 in 4); the power check is
naive-mh (the plug-in rule), which must fail the same per-coefficient test."""

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import (calibrate, ecdf_bands, ecdf_uniformity_pvalues,
                              rank_uniformity_pvalues)

pytestmark = pytest.mark.slow

SOUND_CASES = 6
SMALL = dict(replications=60, thinned_draws=29, seed=1, workers=2, chains=2, warmup=300,
             level=0.05 / SOUND_CASES)


@pytest.fixture(scope="module")
def problems():
    rng = np.random.default_rng(3)
    X = rng.standard_normal((400, 2))
    return {"linear": tc.LinearRegression(X, X @ [1.0, -1.0] + rng.standard_normal(400),
                                              noise_sd=1.0),
            "logistic": tc.LogisticRegression(X, (rng.random(400) < 0.4).astype(float))}


@pytest.mark.parametrize("family", ["linear", "logistic"])
@pytest.mark.parametrize("method,extra", [
    ("mala", {}),
    ("penalty-mala", {}),                                            # control variates on
    ("penalty-mala", {"control_variates": False, "batch_size": 200}),
])
def test_sbc_passes_for_sound_samplers(problems, family, method, extra):
    res = calibrate(problems[family], method=method, **SMALL, **extra)
    assert res.verdict == "passed", (res.p_values, res.short_share)


def test_sbc_fails_for_naive_mh(problems):
    # The plug-in rule on batches of 20 rows, at its tuned step. It mixes slowly (the noisy
    # test rejects often): 1500 draws per chain give every replication more than L effective
    # draws, so the check reaches a verdict rather than "inconclusive".
    res = calibrate(problems["linear"], method="naive-mh", control_variates=False, batch_size=20,
                    **dict(SMALL, draws=1500))
    assert res.verdict == "failed" and res.short_share <= tc.checks.MAX_SHORT_SHARE
    assert np.all(res.p_values < res.level / len(res.p_values))  # every coefficient fails


def test_sbc_results_do_not_depend_on_worker_count(problems):
    kw = dict(SMALL, replications=6, method="mala")
    a = calibrate(problems["linear"], **dict(kw, workers=1))
    b = calibrate(problems["linear"], **kw)
    assert a.ranks.shape == (6, 3)
    assert np.array_equal(a.ranks, b.ranks)  # the same code from the same seeds: bitwise


def test_the_ecdf_test_holds_its_level_and_catches_shifts_and_wrong_spreads():
    # Level: 8000 columns of R = 100 uniform ranks in {0..99} (numpy's generator, the outside
    # reference for "uniform"): the share of p-values at or below 0.05 and 0.005 is within 4
    # binomial sds of the level (the null is itself simulated from 100,000 rank sets: its
    # Monte Carlo error, about 0.0007 at 0.05, is inside that margin).
    rng = np.random.default_rng(20261203)
    p = ecdf_uniformity_pvalues(rng.integers(0, 100, size=(100, 8000)), 99)
    for a in (0.05, 0.005):
        assert abs(np.mean(p <= a) - a) <= 4 * np.sqrt(a * (1 - a) / p.size), (a, np.mean(p <= a))
    # Power, at the per-coefficient level of a 10-coefficient check (0.005): ranks shifted by
    # an eighth of their range (a biased sampler) and ranks from Beta(0.6, 0.6) (too narrow a
    # posterior: a U) are rejected in most columns, at least as often as by the binned test.
    shifted = np.clip(rng.integers(0, 100, size=(100, 200)) + 12, 0, 99)
    u_shape = np.minimum((rng.beta(0.6, 0.6, size=(100, 200)) * 100).astype(int), 99)
    for bad, share in ((shifted, 0.99), (u_shape, 0.5)):
        ecdf = np.mean(ecdf_uniformity_pvalues(bad, 99) <= 0.005)
        assert ecdf >= share and ecdf >= np.mean(rank_uniformity_pvalues(bad, 99, 10) <= 0.005)


def test_uniformity_test_and_bands_on_known_ranks(rng):
    uniform = rng.integers(0, 30, size=(2000, 1))
    assert rank_uniformity_pvalues(uniform, 29, 10)[0] > 0.001
    # Power check: ranks piled up in the middle (an over-dispersed sampler) are rejected.
    peaked = np.clip(np.round(rng.normal(15, 4, size=(2000, 1))), 0, 29).astype(int)
    assert rank_uniformity_pvalues(peaked, 29, 10)[0] < 1e-10
    # Simultaneous bands: about 95% of uniform ECDFs stay inside everywhere. The band's level
    # is itself estimated from ecdf_bands' 2000 simulated ECDFs, so the coverage seen in 1000
    # fresh ones has binomial sd sqrt(0.95 * 0.05 * (1/1000 + 1/2000)) = 0.0084: 3 of them.
    z, lo, hi = ecdf_bands(50, 50, level=0.05, seed=1)

    def inside(u):
        ecdf = np.stack([np.searchsorted(s, z, side="right") for s in np.sort(u, axis=1)]) / 50
        # ecdf - z and the band are the same arithmetic on counts (k / 50 - z): no slack needed
        return np.all((ecdf - z >= lo) & (ecdf - z <= hi), axis=1).mean()

    allowed = 3 * np.sqrt(0.95 * 0.05 * (1 / 1000 + 1 / 2000))
    assert abs(inside(rng.random((1000, 50))) - 0.95) < allowed
    # Power check: ranks from Beta(2, 2) (again a sampler too wide) leave the band far more often.
    assert inside(rng.beta(2.0, 2.0, (1000, 50))) < 0.95 - allowed


def test_sbc_with_too_few_effective_draws_is_inconclusive(problems):
    # Random-walk chains of 40 draws rank each truth among 29 of them: far fewer than 29
    # effective draws, so the ranks are over-dispersed whatever the sampler's accuracy.
    res = calibrate(problems["linear"], method="rwm",
                    **dict(SMALL, replications=20, chains=1, draws=40, warmup=200))
    assert res.verdict == "inconclusive" and not res.passed
    assert res.short_share > tc.checks.MAX_SHORT_SHARE
    assert res.short_share == np.mean(res.ess < 29)
    # Power of the rule: the same replications with 20x the draws reach a verdict.
    long = calibrate(problems["linear"], method="rwm",
                     **dict(SMALL, replications=20, chains=2, draws=800, warmup=200))
    assert long.verdict in ("passed", "failed") and long.short_share <= tc.checks.MAX_SHORT_SHARE


def test_a_replication_whose_data_cannot_be_fitted_is_replaced(problems, monkeypatch):
    from tallchain.checks import _calibration

    real, calls = _calibration.sample, []

    def flaky(model, settings, **kw):
        calls.append(1)
        if len(calls) in (2, 5, 6):      # replication 1 once, replication 3 twice
            raise tc.ModeNotFoundError("mode finding: L-BFGS stopped")
        return real(model, settings, **kw)

    monkeypatch.setattr(_calibration, "sample", flaky)
    kw = dict(SMALL, replications=4, method="mala", scheduler="serial")
    res = calibrate(problems["linear"], **kw)
    assert res.refits.tolist() == [0, 1, 0, 2] and res.as_dict()["replaced_data_sets"] == 3
    assert len(calls) == 7 and res.ranks.shape == (4, 3)
    # every replication had ATTEMPTS tries: one that fails them all is a one-line error
    monkeypatch.setattr(_calibration, "sample", lambda *a, **k: (_ for _ in ()).throw(
        tc.ModeNotFoundError("mode finding: L-BFGS stopped")))
    with pytest.raises(tc.InputError, match=r"^calibrate: replication 0: none of its 5 "
                       r"simulated data sets could be fitted .*; use prior = \"laplace\""):
        calibrate(problems["linear"], **kw)
