"""Rare events: batch_size="auto" keeps the tails right when a few rows dominate the noise.

The case (ours; the smaller sibling of benchmarks/bench_rare_events.py): logistic regression,
10^5 rows, about 300 events, a binary feature in 2% of the rows with 2 events among them, so
that with second-order control variates the minibatch log-ratio terms are dominated by the
rows that carry it: small noise, far from Gaussian.

Reference: self-normalised importance sampling (the importance-sampling identity
E_pi[h] = E_q[w h] / E_q[w], w = pi/q) from a Student-t at the Laplace approximation
(`ks_runs.importance_reference`), the exact log posterior summed in NumPy over the distinct
rows of X. Check: for every coefficient and p in {0.01, 0.99}, the reference CDF at the
sampled p-quantile is within 4 Monte Carlo sds of p, sd = sqrt(p (1 - p) (1/ESS_q + 1/ESS_IS))
(binomial error of an indicator mean; ESS_q the chain's quantile ESS by ArviZ, ESS_IS
(sum w)^2 / sum w^2). With 10 such checks the chance of a false failure is about 10 x 6e-5.
Power: a fixed batch of 32 rows fails the same check (by more than 10 sds when measured).
"""

import arviz as az
import numpy as np
import pytest
from scipy import special

import tallchain as tc
from ks_runs import importance_reference

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def rare_case():
    rng = np.random.default_rng(5)
    n_rows = 100_000
    X = np.column_stack([rng.random(n_rows) < 0.02, rng.random(n_rows) < 0.3,
                         rng.random(n_rows) < 0.5, rng.integers(-2, 3, n_rows)]).astype(float)
    eta = X @ np.array([-0.7, 0.5, -0.3, 0.2])
    eta += np.log(300 / n_rows) - np.log(np.mean(np.exp(eta)))
    y = (rng.random(n_rows) < special.expit(eta)).astype(float)
    assert y[X[:, 0] == 1].sum() < 15                       # the rare feature's events
    keys, row_key, count = np.unique(X, axis=0, return_inverse=True, return_counts=True)
    ones = np.bincount(row_key.ravel(), weights=y)
    rows = np.hstack([np.ones((len(keys), 1)), keys])

    def log_posterior(thetas):                               # prior N(0, 10^2 I)
        lin = thetas @ rows.T
        return (ones * lin - count * np.logaddexp(0.0, lin)).sum(1) - (thetas**2).sum(1) / 200
    model = tc.LogisticRegression(X, y)
    ref, w = importance_reference(model, log_posterior, n=60_000, seed=3)
    return model, ref, w / w.sum()


def _worst_tail_z(result, ref, w):
    """max over coefficients and p in {0.01, 0.99} of |F_ref(q_p) - p| / MC sd."""
    ref_ess = 1.0 / np.sum(w**2)
    flat = result.draws.reshape(-1, result.draws.shape[-1])
    worst = 0.0
    for j in range(flat.shape[1]):
        for p in (0.01, 0.99):
            ess = float(az.ess(result.draws[:, :, j], method="quantile", prob=p))
            cdf = w[ref[:, j] <= np.quantile(flat[:, j], p)].sum()
            worst = max(worst, abs(cdf - p) / np.sqrt(p * (1 - p) * (1 / ess + 1 / ref_ess)))
    return worst


def test_auto_batch_keeps_rare_event_tails_within_monte_carlo_error(rare_case):
    model, ref, w = rare_case
    # Seed 3. Measured with the default drift (the proxy's) at seeds 2-8: worst z 4.12 at
    # seed 2 (batch 1690, error bound 0.0002), 1.19-2.28 at the others; fresh gradient batches
    # at seeds 2-4: 1.51-2.27. Seed 2's 4.12 is noted as unsettled in the issue notes.
    r = tc.sample(model, seed=3)
    assert _worst_tail_z(r, ref, w) < 4.0
    assert 0.0 < r.penalty_error_bound < 0.01
    # Power: a fixed small batch, whose noise is as non-Gaussian as the rare rows make it,
    # fails the same check and is warned about with its error bound.
    with pytest.warns(tc.NoisyLogRatioWarning, match=r"not Gaussian.* is 0\.0\d\d"):
        bad = tc.sample(model, seed=3, batch_size=32)
    assert bad.penalty_error_bound > 0.01
    assert _worst_tail_z(bad, ref, w) > 4.0
