"""The per-iteration statistics that the run's counts are derived from (exact identities).

* ``rows_read``: the rows each method reads per iteration, from the transition loop's steps
  (``_transition``): a fresh-batch penalty-mala reads three batches (gradient at beta and at
  beta' on one batch S, the log ratio on an independent S2), a carried gradient batch two, the
  proxy's drift (the default here: second-order control variates) one, an independent-batch
  variance one more; random-walk minibatch methods and SGLD one; full-data methods all N
  rows. ``SampleResult.data_evaluations`` is their sum over warmup and draws.
* ``penalty_beyond_bound``: set exactly on the iterations where the penalty's series for
  e^{-u_B} is not positive (``ceperley_dewing_penalty`` is NaN) and the plug-in sigma^2/2 is
  used instead; every such chi^2 lies beyond the validity bound (``validity_bound``, from the
  first zero of a Bessel function, scipy.special) and none below it is flagged. The counts of
  `SampleResult` are its sums after and during warmup.
"""

import numpy as np
import pytest

import tallchain as tc
from tallchain.mcmc import ceperley_dewing_penalty, validity_bound

N = 600
BATCH = 20


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(12)
    X = rng.standard_normal((N, 2))
    y = (rng.random(N) < 1 / (1 + np.exp(-(0.2 + X @ [0.8, -0.4])))).astype(float)
    return tc.LogisticRegression(X, y, prior=tc.GaussianPrior(sd=5.0))


# The noise advice of small batches is not what these tests are about.
@pytest.mark.filterwarnings("ignore::tallchain.exceptions.NoisyLogRatioWarning")
@pytest.mark.parametrize(("method", "extra", "per_iteration"), [
    ("penalty-mala", {}, BATCH),
    ("penalty-mala", {"gradient_batch": "fresh"}, 3 * BATCH),
    ("penalty-mala", {"gradient_batch": "carried"}, 2 * BATCH),
    ("penalty-mala", {"log_ratio_variance": "independent-batch"}, 2 * BATCH),
    ("penalty-mala", {"gradient_batch": "fresh", "log_ratio_variance": "independent-batch"},
     4 * BATCH),
    ("penalty-rwm", {}, BATCH),
    ("naive-mh", {}, BATCH),
    ("sgld", {"step_size": 0.01}, BATCH),
    ("mala", {}, N),
    ("rwm", {}, N),
])
def test_rows_read_per_iteration_and_their_sum(model, method, extra, per_iteration):
    settings = {"batch_size": BATCH, **extra} if method not in ("mala", "rwm") else extra
    r = tc.sample(model, method=method, chains=2, warmup=30, draws=40, seed=3, **settings)
    assert r.stats["rows_read"].dtype == np.int64
    assert np.all(r.stats["rows_read"] == per_iteration)
    assert np.all(r.warmup_stats["rows_read"] == per_iteration)
    assert r.data_evaluations == per_iteration * 2 * (30 + 40)


def test_penalty_beyond_bound_marks_the_iterations_beyond_the_validity_bound(model):
    # A random walk with a 10-row batch and no control variates: the log-ratio noise is large,
    # so many iterations fall beyond the bound (about 5.43 for n = 10) and many do not.
    n = 10
    with pytest.warns(tc.NoisyLogRatioWarning, match="beyond the validity bound of the "
                                                     "Ceperley-Dewing penalty"):
        r = tc.sample(model, method="penalty-rwm", control_variates=False, batch_size=n,
                      step_size=0.5, chains=2, warmup=50, draws=200, seed=4)
    bound = validity_bound(n)
    for stats in (r.stats, r.warmup_stats):
        flagged = stats["penalty_beyond_bound"]
        assert flagged.dtype == bool
        chi2 = stats["log_ratio_sd"] ** 2
        assert np.array_equal(flagged, np.isnan(ceperley_dewing_penalty(chi2, n)))
        assert np.all(chi2[flagged] > bound) and not np.any(flagged[chi2 < bound])
    assert 0 < r.penalty_beyond_bound_count < r.stats["accepted"].size
    assert r.penalty_beyond_bound_count == int(r.stats["penalty_beyond_bound"].sum())
    assert r.warmup_counts == {"nonfinite": int(r.warmup_stats["nonfinite"].sum()),
                               "penalty_beyond_bound":
                                   int(r.warmup_stats["penalty_beyond_bound"].sum())}
    assert r.warmup_counts["penalty_beyond_bound"] > 0
    # Power check: the pooled variance is treated as known (plain sigma^2/2), never flagged.
    with pytest.warns(tc.NoisyLogRatioWarning, match="log-ratio sd is"):
        pooled = tc.sample(model, method="penalty-rwm", control_variates=False, batch_size=n,
                           step_size=0.5, chains=2, warmup=50, draws=200, seed=4,
                           log_ratio_variance="pooled")
    assert pooled.penalty_beyond_bound_count == 0
    assert not any("validity bound" in text for text in pooled.warnings)
    assert not pooled.warmup_stats["penalty_beyond_bound"].any()
