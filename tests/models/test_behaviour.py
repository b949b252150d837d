"""What a model decides for itself: its linear predictor, simulated responses, the same design
with another response, and whether a mode is a proper posterior mode."""

import numpy as np
import pytest
from scipy import special, stats
from ulps import assert_ulps_close

import tallchain as tc

N = 4000


@pytest.fixture
def design(rng):
    X = rng.standard_normal((N, 3))
    offset = rng.uniform(-0.5, 0.5, N)
    beta = np.array([-0.4, 0.7, -0.3, 0.2])
    return X, offset, beta


def _models(X, offset, beta, rng):
    eta = beta[0] + X @ beta[1:]
    return {
        "linear": tc.LinearRegression(X, eta + 0.5 * rng.standard_normal(N), noise_sd=0.5),
        "logistic": tc.LogisticRegression(X, (rng.random(N) < special.expit(eta)).astype(float)),
        "poisson": tc.PoissonRegression(X, rng.poisson(np.exp(eta + offset)).astype(float),
                                        offset=offset),
    }


@pytest.mark.parametrize("family", ["linear", "logistic", "poisson"])
def test_linear_predictor_is_x_beta_plus_intercept_and_offset(design, rng, family):
    X, offset, beta = design
    model = _models(X, offset, beta, rng)[family]
    want = beta[0] + X @ beta[1:] + model.offset
    # Row blocks against one matrix product: the same 3-term dot product per row, summed in
    # another order at most: a few ulps of the largest term.
    scale = np.abs(X) @ np.abs(beta[1:]) + abs(beta[0]) + np.abs(model.offset)
    assert_ulps_close(model.linear_predictor(beta), want, ulps=8, scale=scale)
    assert_ulps_close(model.linear_predictor(beta, with_offset=False), want - model.offset,
                      ulps=8, scale=scale)


def test_linear_predictor_reads_a_memory_map_in_blocks(design, rng, tmp_path):
    X, _, beta = design
    np.save(tmp_path / "X.npy", X)
    model = tc.LogisticRegression(np.load(tmp_path / "X.npy", mmap_mode="r"),
                                  (rng.random(N) < 0.5).astype(float))
    dense = tc.LogisticRegression(X, model.y)
    # Same rows, same blocks, same arithmetic: the same code on equal inputs.
    assert np.array_equal(model.linear_predictor(beta), dense.linear_predictor(beta))


def test_simulated_responses_follow_the_model(design, rng):
    # Each check: the simulated total against its expectation, within 4 standard errors
    # (probability of a false alarm about 6e-5 per check, normal approximation).
    X, offset, beta = design
    models = _models(X, offset, beta, rng)
    eta = models["poisson"].linear_predictor(beta)

    y = models["logistic"].simulate(beta, rng)
    p = special.expit(eta - offset)
    assert set(np.unique(y)) <= {0.0, 1.0}
    assert abs(y.sum() - p.sum()) < 4 * np.sqrt(np.sum(p * (1 - p)))

    y = models["poisson"].simulate(beta, rng)
    mu = np.exp(eta)
    assert np.all(y == np.floor(y)) and abs(y.sum() - mu.sum()) < 4 * np.sqrt(mu.sum())

    y = models["linear"].simulate(beta, rng)
    resid = y - (eta - offset)
    # sum of squares / s^2 ~ chi2(N): inside its 0.00005 and 0.99995 quantiles (scipy.stats)
    q = np.sum(resid**2) / 0.5**2
    assert stats.chi2.ppf(5e-5, N) < q < stats.chi2.ppf(1 - 5e-5, N)


def test_simulation_at_other_coefficients_is_detected(design, rng):
    # Power of the check above: a response simulated at shifted coefficients fails it.
    X, offset, beta = design
    model = _models(X, offset, beta, rng)["logistic"]
    y = model.simulate(beta + np.array([0.3, 0, 0, 0]), rng)
    p = special.expit(model.linear_predictor(beta))
    assert abs(y.sum() - p.sum()) > 4 * np.sqrt(np.sum(p * (1 - p)))


def test_simulate_is_reproducible_from_a_seed(design, rng):
    X, offset, beta = design
    model = _models(X, offset, beta, rng)["poisson"]
    assert np.array_equal(model.simulate(beta, 3), model.simulate(beta, 3))


@pytest.mark.parametrize("family", ["linear", "logistic", "poisson"])
def test_with_response_keeps_the_design_and_the_family_options(design, rng, family):
    X, offset, beta = design
    model = _models(X, offset, beta, rng)[family]
    y = model.simulate(beta, rng)
    prior = tc.GaussianPrior(sd=2.0)
    new = model.with_response(y, prior=prior)
    assert type(new) is type(model) and new.X is model.X        # X is neither copied nor read
    assert np.array_equal(new.y, y) and new.coef_names == model.coef_names
    assert new.add_intercept == model.add_intercept and new.noise_sd == model.noise_sd
    assert np.array_equal(new.offset, model.offset)
    assert new.prior is prior and np.array_equal(new.prior_cov, np.diag(np.full(4, 4.0)))
    assert model.with_response(y).prior is model.prior


def test_with_response_as_another_family_takes_only_that_familys_options(design, rng):
    X, offset, beta = design
    counts = _models(X, offset, beta, rng)["poisson"]
    twin = counts.with_response(counts.linear_predictor(beta), family=tc.LinearRegression,
                                noise_sd=2.0)
    assert isinstance(twin, tc.LinearRegression) and twin.noise_sd == 2.0
    assert not np.any(twin.offset)                 # the Poisson offset stays with counts
    assert twin.coef_names == counts.coef_names and twin.X is counts.X


@pytest.mark.parametrize("family, bad, message", [
    ("logistic", 2.0, r"^y: has label 2 in row 7 \(1 row outside \{0, 1\}\); logistic "
                      r"regression needs labels 0 or 1$"),
    ("poisson", 1.5, r"^y: has count 1.5 in row 7 \(1 row not a count\); Poisson regression "
                     r"needs non-negative integer counts$"),
    ("linear", np.nan, r"^y: contains nan in row 7; remove or impute that value$"),
])
def test_with_response_checks_the_new_response(design, rng, family, bad, message):
    X, offset, beta = design
    model = _models(X, offset, beta, rng)[family]
    y = model.y.copy()
    y[7] = bad
    with pytest.raises(tc.InputError, match=message):
        model.with_response(y)


def test_a_separated_logistic_mode_is_refused_and_a_proper_one_kept(rng):
    x = np.linspace(-1.0, 1.0, 500)[:, None]
    separated = tc.LogisticRegression(x, (x[:, 0] > 0).astype(float),
                                      prior=tc.GaussianPrior(sd=1e8))
    with pytest.raises(tc.ModeNotFoundError, match="separation"):
        tc.find_mode(separated)
    proper = separated.with_response((rng.random(500) < special.expit(2 * x[:, 0])).astype(float))
    lap = tc.find_mode(proper)
    proper.check_mode(lap.mode, -proper.log_likelihood_hessian(lap.mode))   # no error


def test_only_the_linear_model_with_known_noise_sd_has_a_closed_form_posterior(rng):
    X, y = rng.normal(size=(20, 2)), rng.normal(size=20)
    assert tc.LinearRegression(X, y, noise_sd=1.0).closed_form_posterior
    assert not tc.LinearRegression(X, y).closed_form_posterior   # noise sd sampled
    assert not tc.LogisticRegression.closed_form_posterior
    assert not tc.PoissonRegression.closed_form_posterior
