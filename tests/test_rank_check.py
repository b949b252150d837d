"""rank.png's band check (tallchain/_ranks.py): its false-alarm rate on chains that sample the
same distribution, with and without autocorrelation, and its power on chains that do not.

Outside references: AR(1) chains x_t = rho x_{t-1} + sqrt(1 - rho^2) e_t simulated with numpy
(stationary law N(0, 1), lag-k autocorrelation rho^k: any textbook on time series, e.g.
Brockwell & Davis 1991, section 3.1), independent draws (rho = 0), and exact full-data MALA
runs on a linear-Gaussian model. The stated level is 0.05 for the whole figure; over R
replicates the share of runs with a false alarm must stay below 0.05 + 3 binomial standard
errors sqrt(0.05 * 0.95 / R).
"""

import warnings

import numpy as np
import pytest

import tallchain as tc
from tallchain._ranks import rank_checks

pytestmark = pytest.mark.slow

LEVEL = 0.05


def _ar1(gen, rho, chains=4, draws=1000, n_coef=3):
    x = np.empty((chains, draws, n_coef))
    x[:, 0] = gen.standard_normal((chains, n_coef))
    noise = gen.standard_normal((chains, draws, n_coef)) * np.sqrt(1.0 - rho**2)
    for t in range(1, draws):
        x[:, t] = rho * x[:, t - 1] + noise[:, t]
    return x


def _alarm_share(gen, rho, replicates, thin=True, shift=0.0):
    alarms = 0
    for _ in range(replicates):
        x = _ar1(gen, rho)
        x[0] += shift
        alarms += any(c.flagged for c in rank_checks(x, level=LEVEL, thin=thin))
    return alarms / replicates


def _bound(replicates):
    return LEVEL + 3.0 * np.sqrt(LEVEL * (1 - LEVEL) / replicates)


@pytest.mark.parametrize("rho", [0.0, 0.5, 0.9])
def test_false_alarms_stay_at_the_stated_level(rho):
    gen = np.random.default_rng(100 + int(10 * rho))
    share = _alarm_share(gen, rho, 200)
    assert share <= _bound(200), share


def test_bands_for_independent_draws_raise_false_alarms_on_autocorrelated_chains():
    """Power of the false-alarm test: ranking every draw (the bands of independent draws)
    flags nearly every AR(1) run with rho = 0.9, so the test above can fail."""
    share = _alarm_share(np.random.default_rng(7), 0.9, 50, thin=False)
    assert share > _bound(50), share


@pytest.mark.parametrize("rho, shift", [(0.5, 0.75), (0.9, 1.0)])
def test_a_chain_with_another_mean_is_flagged(rho, shift):
    """One chain of four centred `shift` stationary sds away: flagged in at least 80% of runs
    (measured with these seeds: 50 of 50 for both; a shift of 0.5 sd at rho = 0.5 is flagged
    in 78%, 0.75 sd at rho = 0.9 in 86%)."""
    share = _alarm_share(np.random.default_rng(11), rho, 50, shift=shift)
    assert share >= 0.8, share


def test_exact_mala_runs_raise_no_more_false_alarms_than_stated():
    """20 exact full-data MALA runs on a linear-Gaussian model: at level 0.05 the number of
    runs with a flag is Binomial(20, <= 0.05); P(>= 5) = 0.0026, so at most 4."""
    gen = np.random.default_rng(3)
    X = gen.standard_normal((400, 2))
    y = 0.3 + X @ [1.0, -0.5] + gen.standard_normal(400)
    model = tc.LinearRegression(X, y, noise_sd=1.0)
    flagged = 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for seed in range(20):
            r = tc.sample(model, method="mala", chains=4, draws=1000, warmup=300, seed=seed)
            flagged += any(c.flagged for c in rank_checks(r.draws, level=LEVEL))
    assert flagged <= 4, flagged
