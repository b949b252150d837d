"""Coupled pairs and the unbiased estimator: the coupling's law, met chains staying met, the
estimates against the exact conjugate posterior, interval coverage, and the bound on the
total variation.

Outside references: the exact linear-Gaussian posterior (Bishop 2006, eqs. 3.53-3.54, via
`conjugate_posterior`); the total variation distance between two normals with one covariance,
TV = 2 Phi(Delta / 2) - 1 with Delta their Mahalanobis distance (standard formula, e.g.
Devroye, Mehrabian & Reddad 2018, from memory), so the meeting probability of a maximal
coupling is 1 - TV = 2 Phi(-Delta / 2); the L-lag bound E[max(0, ceil((tau - L - t) / L))]
(Biswas, Jacob & Vanetti, NeurIPS 2019, from memory).
"""

import numpy as np
import pytest
from scipy import stats

import tallchain as tc
from tallchain import InputError
from tallchain.exceptions import ConvergenceWarning
from tallchain.mcmc import _coupled_loop as _pair
from tallchain.mcmc import _unbiased
from tallchain.mcmc._coupling import reflection_maximal
from tallchain.mcmc._estimate_result import tv_bound
from tallchain.posterior import conjugate_posterior
from tallchain.posterior._mass import MassMatrix

METHODS = ("mala", "rwm", "penalty-mala", "penalty-rwm")
# penalty-mala drifts along the control variates' proxy by default (gradient_batch="auto");
# its fresh-batch form is coupled too
VARIANTS = [(m, {}) for m in METHODS] + [("penalty-mala", {"gradient_batch": "fresh"})]


def _linear(rng, n, d):
    X = rng.standard_normal((n, d))
    y = 0.5 + X @ np.linspace(1.0, -0.5, d) + rng.standard_normal(n)
    return tc.LinearRegression(X, y, noise_sd=1.0, prior=tc.GaussianPrior(sd=10.0))


@pytest.fixture(scope="module")
def model():
    return _linear(np.random.default_rng(20_261_203), 500, 3)


# -- the coupling of two Gaussian proposals -----------------------------------------------

def _coupling_draws(n, seed):
    cov = np.array([[2.0, 0.6], [0.6, 1.0]])
    chol = np.linalg.cholesky(cov)
    mass = MassMatrix(np.linalg.inv(cov), cov, chol)
    h, mu_x, mu_y = 0.5, np.array([0.0, 0.0]), np.array([0.7, -0.3])
    rng = np.random.default_rng(seed)
    xi, z = np.empty(2), np.empty(2)
    px, py = np.empty((n, 2)), np.empty((n, 2))
    met = np.empty(n, dtype=bool)
    for i in range(n):
        met[i] = reflection_maximal(mass, h, mu_x, mu_y, rng, xi, z, px[i], py[i])
    white = np.linalg.solve(chol, (mu_x - mu_y)) / np.sqrt(h)
    # whitened proposals: unit normals under the right law
    wx = np.linalg.solve(chol, (px - mu_x).T).T / np.sqrt(h)
    wy = np.linalg.solve(chol, (py - mu_y).T).T / np.sqrt(h)
    return met, wx, wy, float(np.linalg.norm(white))


def _ks_ok(w, n):
    # four KS tests (2 coordinates x 2 chains) at family-wise level 0.001: Kolmogorov critical
    # value at 0.00025 (scipy.stats.kstwobign) over sqrt(n)
    crit = stats.kstwobign.isf(0.001 / 4) / np.sqrt(n)
    return all(stats.kstest(w[:, a], "norm").statistic < crit for a in range(w.shape[1]))


def test_reflection_maximal_coupling_has_normal_marginals_and_meets_at_the_maximal_rate():
    n = 20_000
    met, wx, wy, delta = _coupling_draws(n, 7)
    p_meet = 2.0 * stats.norm.cdf(-delta / 2.0)   # 1 - TV of the two proposals
    se = np.sqrt(p_meet * (1.0 - p_meet) / n)
    assert abs(met.mean() - p_meet) < 4 * se
    # power: a coupling that met at the rate of the wrong formula Phi(-Delta) would fail
    assert abs(met.mean() - stats.norm.cdf(-delta)) > 4 * se
    assert _ks_ok(wx, n) and _ks_ok(wy, n)
    # power: without the reflection (y' = mu_y + sqrt(h) L xi when not met) Y's law is wrong
    rng = np.random.default_rng(8)
    xi = rng.standard_normal((n, 2))
    z = np.array([delta, 0.0])   # the law is rotation invariant: put z on the first axis
    meets = np.log(rng.random(n)) <= -(xi @ z) - 0.5 * delta**2
    unreflected = np.where(meets[:, None], xi + z, xi)
    assert not _ks_ok(unreflected, n)


def test_equal_means_always_give_equal_proposals():
    cov = np.eye(2)
    mass = MassMatrix(cov, cov, cov)
    rng = np.random.default_rng(3)
    mu = np.array([0.3, -1.2])
    xi, z, px, py = (np.empty(2) for _ in range(4))
    for _ in range(200):
        assert reflection_maximal(mass, 0.7, mu, mu.copy(), rng, xi, z, px, py)
        assert np.array_equal(px, py)


# -- pairs --------------------------------------------------------------------------------

def _shared(model, method, lag=1, max_iterations=5_000, **extra):
    settings = tc.SamplerSettings(method=method, chains=1, warmup=300, draws=10, seed=2,
                                  **extra)
    job, plan, mode, chol = _unbiased.coupled_setup(model, settings)
    return job, plan._replace(lag=lag, max_iterations=max_iterations), mode, chol


@pytest.mark.parametrize(("method", "extra"), VARIANTS)
@pytest.mark.parametrize("lag", [1, 3])
def test_met_chains_stay_met_bitwise(model, method, extra, lag):
    shared = _shared(model, method, lag, **extra)
    n_trace = 300
    for seed in range(3):
        _, out, trace = _unbiased.run_one_pair(shared, np.random.SeedSequence([seed, lag]),
                                               (0, n_trace - 1), keep_met=True,
                                               n_trace=n_trace)
        tau = int(out[_pair.OUT_TAU])
        assert lag <= tau < n_trace - 50, tau            # finite, and leaves a stretch after
        assert out[_pair.OUT_DIVERGED] == 0
        # the same code on the same numbers: bitwise equal from tau on, different before
        assert np.array_equal(trace[0, tau:], trace[1, tau:])
        assert all(not np.array_equal(trace[0, t], trace[1, t]) for t in range(lag, tau))


def test_meeting_times_are_finite_and_at_least_the_lag(model):
    shared = _shared(model, "mala", lag=4)
    taus = [_unbiased.run_one_pair(shared, np.random.SeedSequence([s]), (0, 0))[1][_pair.OUT_TAU]
            for s in range(20)]
    assert all(4 <= t < 5_000 for t in taus)


# -- estimates against the exact posterior --------------------------------------------------

def _z_scores(res, post):
    return ((res.mean - post.mean) / res.se, (res.sd - post.sd) / res.sd_se)


@pytest.mark.parametrize(("method", "extra"), VARIANTS)
def test_conjugate_means_and_sds_within_4_standard_errors(model, method, extra):
    post = conjugate_posterior(model)
    res = tc.estimate(model, method=method, replicates=100, seed=11, scheduler="serial",
                      **extra)
    z_mean, z_sd = _z_scores(res, post)
    # R = 100 replicates: t_99 is close to normal; 4 se gives a false alarm per coefficient
    # with probability ~1e-4
    assert np.all(np.abs(z_mean) < 4), z_mean
    assert np.all(np.abs(z_sd) < 4), z_sd
    assert res.unmet == 0 and np.all(res.meeting_times >= res.lag)


@pytest.mark.parametrize("broken", ["_mala-without-proposal-term",
                                    "_penalty-mala-without-proposal-term"])
def test_the_same_check_catches_mala_without_its_proposal_term(model, broken):
    # the second: penalty-mala's proxy drift (its default here) with c dropped
    post = conjugate_posterior(model)
    res = tc.estimate(model, method=broken, replicates=100, seed=11, scheduler="serial")
    z_mean, z_sd = _z_scores(res, post)
    # the wrong kernel keeps a Gaussian target's mean (symmetry) but not its spread
    assert np.any(np.abs(z_sd) >= 4), z_sd


def _coverage(method, repetitions, replicates=10):
    """Share of repetitions whose intervals hold the exact mean and second moment, per
    coefficient: shape (2, n_coef). A small case (100 rows, intercept and one column); the
    tuning run and the pilot once, then ``repetitions`` x ``replicates`` pairs."""
    small = _linear(np.random.default_rng(5), 100, 1)
    post = conjugate_posterior(small)
    second = np.diag(post.cov) + post.mean**2
    prep = tc.mcmc.prepare(small, proxy_orders=(0,))
    settings = tc.SamplerSettings(method=method, chains=1, warmup=300, draws=10, seed=1)
    job, plan, mode, chol = _unbiased.coupled_setup(small, settings, prep)
    shared = (job, plan._replace(max_iterations=10_000), mode, chol)
    pilot = [_unbiased.run_one_pair(shared, np.random.SeedSequence([99, s]), (0, 0))[1][0]
             for s in range(20)]
    span = _unbiased._span_from_pilot(np.array(pilot), 10_000)
    t_crit = stats.t.ppf(0.975, replicates - 1)
    hits = np.zeros((2, small.n_coef))
    for rep in range(repetitions):
        h = np.array([_unbiased.run_one_pair(shared, np.random.SeedSequence([rep, r]), span)[0]
                      for r in range(replicates)])
        for j, exact in enumerate((post.mean, second)):
            est, se = h[:, j].mean(axis=0), h[:, j].std(axis=0, ddof=1) / np.sqrt(replicates)
            hits[j] += np.abs(est - exact) <= t_crit * se
    return hits / repetitions


@pytest.mark.slow
def test_95_percent_intervals_cover_at_95_percent():
    reps = 100
    band = 3 * np.sqrt(0.95 * 0.05 / reps)   # 3 binomial standard errors
    cover = _coverage("mala", reps)
    assert np.all(np.abs(cover - 0.95) <= band), cover
    # power: the wrong kernel's intervals miss the second moments (measured: 0.77 for the
    # intercept's, against the band 0.885-1)
    wrong = _coverage("_mala-without-proposal-term", reps)
    assert np.any(np.abs(wrong - 0.95) > band), wrong


# -- the bound on the total variation --------------------------------------------------------

def test_tv_bound_is_the_lag_formula():
    # tau = 3 and 7, L = 2: t = 0: (ceil(1/2) + ceil(5/2)) / 2 = 2; t = 1: (0 + 2) / 2; ...
    assert np.array_equal(tv_bound([3, 7], 2), [2.0, 1.0, 1.0, 0.5, 0.5, 0.0])
    # L = 1 (Jacob et al. 2020): E[max(0, tau - 1 - t)]: t = 0: (0 + 3) / 2; ...
    assert np.array_equal(tv_bound([1, 4], 1), [1.5, 1.0, 0.5, 0.0])


# -- inputs and the stop rule ----------------------------------------------------------------

@pytest.mark.parametrize("kwargs, field", [
    ({"replicates": 1}, "replicates"),
    ({"lag": 0}, "lag"),
    ({"span": (5, 3)}, "span"),
    ({"span": (0, 10), "max_iterations": 5}, "span"),
    ({"level": 1.5}, "level"),
    ({"method": "sgld", "step_size": 0.1}, "method"),
    ({"method": "penalty-mala", "gradient_batch": "carried"}, "gradient_batch"),
    ({"log_ratio_variance": "pooled"}, "log_ratio_variance"),
    ({"scheduler": "nowhere"}, "scheduler"),
    ({"chain": 3}, "chain"),
])
def test_bad_arguments_are_refused_before_the_mode(model, monkeypatch, kwargs, field):
    def boom(*a, **k):
        raise AssertionError("reached the mode")

    monkeypatch.setattr(_unbiased, "prepare", boom)
    with pytest.raises(InputError) as err:
        tc.estimate(model, **kwargs)
    assert str(err.value).startswith(f"{field}:")


def test_a_pair_that_never_meets_is_reported_not_hung(model):
    with pytest.warns(ConvergenceWarning, match="did not meet within max_iterations = 3"):
        res = tc.estimate(model, method="rwm", replicates=6, span=(0, 3), max_iterations=3,
                          seed=1, scheduler="serial")
    assert res.unmet > 0 and res.to_dict()["unmet"] == res.unmet
    with pytest.raises(InputError, match="^max_iterations: .* pilot pairs did not meet"):
        tc.estimate(model, method="rwm", replicates=2, max_iterations=2, seed=1,
                    scheduler="serial")


@pytest.mark.slow   # starts worker processes (about 30 s on the shared machine)
def test_results_are_bitwise_equal_on_one_and_two_workers(model, tmp_path):
    runs = [tc.estimate(model, method="penalty-mala", replicates=4, seed=3,
                        scheduler="processes", workers=w) for w in (1, 2)]
    assert np.array_equal(runs[0].replicates, runs[1].replicates)
    assert np.array_equal(runs[0].meeting_times, runs[1].meeting_times)
    record = runs[1].to_dict()
    assert record["replicates"] == 4 and set(record["coefficients"]) == set(model.coef_names)
    runs[1].plot(tmp_path / "tv_bound.png")
    assert (tmp_path / "tv_bound.png").stat().st_size > 0
    assert list(runs[1].table.columns) == ["mean", "se", "lower", "upper", "sd", "sd_se"]


def test_the_tuning_runs_noise_advice_reaches_the_user(model):
    # The pairs inherit the tuning run's step and batch size, so its advice on the log-ratio
    # noise concerns them; the advice's rule (median log-ratio sd > 2) is mcmc/_advice.py's.
    with pytest.warns(tc.NoisyLogRatioWarning, match=r"log-ratio sd is .* > 2"):
        tc.estimate(model, method="penalty-rwm", control_variates=False, batch_size=5,
                    step_size=1.0, replicates=2, span=(0, 5), seed=1, scheduler="serial")
    # power: at the default settings the tuning run has nothing to say and nothing is raised
    # (pytest turns any warning into an error here)
    tc.estimate(model, method="penalty-rwm", replicates=2, span=(0, 5), seed=1,
                scheduler="serial")
