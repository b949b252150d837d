"""Each family's Response: what a run folder records and rebuilds, and what it refuses."""

import numpy as np
import pytest
from scipy import stats

import tallchain as tc
from tallchain.models import response_from_record


@pytest.mark.parametrize("family, options, ratio", [
    (tc.LinearRegression, {"noise_sd": 2.5}, None),
    (tc.LogisticRegression, {}, "odds ratio"),
    (tc.PoissonRegression, {}, "rate ratio"),
])
def test_the_record_rebuilds_the_response(family, options, ratio, rng):
    X = rng.standard_normal((20, 2))
    y = rng.integers(0, 2, 20).astype(float)
    model = family(X, y, coef_names=["a", "b"], **options)
    record = model.record()
    assert record["feature_names"] == ["a", "b"] and record["add_intercept"] is True
    rebuilt = response_from_record(record)
    assert rebuilt == model.response and rebuilt.ratio_name == ratio


def test_normal_draws_have_the_runs_noise_sd():
    """Draws of NormalResponse(2.5) around eta = 0: their sd within 4 standard errors of
    2.5 (the sample sd's standard error sigma / sqrt(2 (n - 1)), normal theory; from memory).
    Power: the default noise sd of 1 fails."""
    draws = tc.models.NormalResponse(2.5).draw(np.zeros(20_000), np.random.default_rng(1))
    se = 2.5 / np.sqrt(2 * (draws.size - 1))
    assert abs(draws.std(ddof=1) - 2.5) < 4 * se
    assert abs(tc.models.NormalResponse().draw(np.zeros(20_000), np.random.default_rng(1))
               .std(ddof=1) - 2.5) > 4 * se
    assert stats.kstest(draws / 2.5, "norm").pvalue > 1e-3


@pytest.mark.parametrize("record, message", [
    ({"family": "gamma"}, r"^run\.json: names no known model family \('gamma'\); use a run "
                          r"folder written by tallchain run \(families: linear, logistic, "
                          r"poisson, negative-binomial, binomial\)$"),
    ({"family": "logistic", "noise_sd": 1.0}, r"^run\.json: has options \['noise_sd'\] the "
                                              r"family 'logistic' does not take"),
    ({"family": "linear", "noise_sd": -1.0}, r"^noise_sd: "),
])
def test_a_bad_record_is_one_line(record, message):
    with pytest.raises(tc.InputError, match=message):
        response_from_record(record)
