"""Input checks of calibrate(), sweep(), check_on_twin() and find_mode(): one-line InputErrors
naming the argument, raised before any mode finding, cache, reference run or worker pool."""

import functools

import numpy as np
import pytest
from numpy_glm import mode_sd_tolerance

import tallchain as tc
from tallchain import executors
from tallchain.checks import (SweepJournal, _calibration, _sweep, _twin, calibrate, check_on_twin,
                             conjugate_twin, sweep)
from tallchain.mcmc import _setup


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(7)
    X = rng.standard_normal((300, 2))
    return X, X @ [1.0, -0.5] + rng.standard_normal(300), (rng.random(300) < 0.4).astype(float)


@pytest.fixture(scope="module")
def linear(data):
    X, y, _ = data
    return tc.LinearRegression(X, y, noise_sd=1.0)


@pytest.fixture(scope="module")
def logistic(data):
    X, _, b = data
    return tc.LogisticRegression(X, b)


@pytest.fixture
def no_expensive_work(monkeypatch):
    """Every costly step raises AssertionError: an InputError must come first."""
    def make_boom(real):
        @functools.wraps(real)  # keeps the signature, which check_sample_settings reads
        def boom(*args, **kwargs):
            raise AssertionError(f"{real.__name__} started before the input check")

        return boom

    for target, name in [(_setup, "find_mode"), (_sweep, "prepare"), (_sweep, "sample"),
                         (_sweep, "reference_draws"), (_sweep, "conjugate_posterior"),
                         (_sweep, "run_tasks"), (_twin, "find_mode"), (_twin, "sample"),
                         (_twin, "conjugate_posterior"), (_calibration, "find_mode"),
                         (_calibration, "sample"), (_calibration, "run_tasks"),
                         (executors, "run_tasks"), (executors, "TaskPool")]:
        monkeypatch.setattr(target, name, make_boom(getattr(target, name)))


def _one_line(exc_info):
    assert "\n" not in str(exc_info.value)


# ---------------------------------------------------------------- calibrate

CALIBRATE_CASES = [
    # (a) more thinned draws than a replication has
    (dict(thinned_draws=1001), r"thinned_draws: is 1001, more than the 1000 draws of a "
     r"replication \(2 chains x 500 draws after warmup\).*raise draws"),
    (dict(thinned_draws=50, chains=1, draws=40), r"thinned_draws: is 50, more than the 40 draws"),
    # (b) n_bins
    (dict(n_bins=0), r"n_bins: must be an integer from 2 to thinned_draws \+ 1 = 100, got 0"),
    (dict(n_bins=1), r"n_bins: must be an integer from 2 to"),
    (dict(n_bins=-3), r"n_bins: .* got -3"),
    (dict(n_bins=31, thinned_draws=29), r"n_bins: .*thinned_draws \+ 1 = 30, got 31"),
    (dict(n_bins=2.5), r"n_bins: .* got 2.5"),
    (dict(n_bins=True), r"n_bins: .* got True"),
    # (c) seed
    (dict(seed="abc"), r"seed: must be an integer from 0 to 2\*\*64 - 1, got 'abc'"),
    (dict(seed=-1), r"seed: must be an integer from 0 to 2\*\*64 - 1, got -1"),
    (dict(seed=1.5), r"seed: must be an integer from 0 to 2\*\*64 - 1, got 1.5"),
    # (d) scheduler, workers and sampler settings
    (dict(scheduler="nope"), r"scheduler: unknown scheduler 'nope'"),
    (dict(scheduler="threads"), r"scheduler: unknown scheduler 'threads'"),
    (dict(workers=0), r"workers: must be a whole number >= 1, got 0"),
    (dict(workers=1.5), r"workers: must be a whole number >= 1"),
    (dict(method="malla"), r'method: unknown method \'malla\'; did you mean "mala"\?'),
    (dict(chains=0), r"chains: must be >= 1, got 0"),
    (dict(draws="many"), r"draws: must be an integer >= 1, got 'many'"),
    (dict(warmup=-1), r"warmup: must be >= 0, got -1"),
    (dict(step_size=-0.1), r"step_size: must be > 0, got -0.1"),
    (dict(batch_size=1), r"batch_size: must be >= 2, got 1; give an integer >= 2"),
    (dict(batch_size=301), r"batch_size: must be in \[2, 300\] \(N\), got 301"),
    (dict(stepsize=0.1), r'stepsize: is not a setting of calibrate\(\); did you mean "step_size"'),
    (dict(preparation=object()), r"preparation: is a run option of sample\(\), not a setting "
     r"calibrate\(\) takes"),
    (dict(parallel=False), r"parallel: is a run option of sample\(\), not a setting calibrate"),
    (dict(checkpoint="x.ckpt"), r"checkpoint: is a run option of sample\(\), not a setting "
     r"calibrate"),
    (dict(progress="yes"), r"progress: must be True or False"),
    (dict(prior="flat"), r"prior: unknown calibration prior 'flat'"),
    (dict(level=1.5), r"level: must be a probability strictly between 0 and 1"),
]


@pytest.mark.parametrize("kwargs,match", CALIBRATE_CASES)
def test_calibrate_refuses_bad_input_before_mode_and_workers(logistic, no_expensive_work,
                                                             kwargs, match):
    with pytest.raises(tc.InputError, match=match) as exc:
        calibrate(logistic, **kwargs)
    _one_line(exc)


def test_calibrate_refuses_frequency_weights_before_mode_and_workers(data, no_expensive_work):
    X, _, b = data
    weighted = tc.LogisticRegression(X, b, weights=np.full(len(b), 2.0))
    with pytest.raises(tc.InputError, match=r"^model: has frequency weights, which "
                       r"simulation-based calibration cannot honour") as exc:
        calibrate(weighted)
    _one_line(exc)
    # power: the same model without weights passes the check and reaches the mode finding
    with pytest.raises(AssertionError, match="find_mode started before the input check"):
        calibrate(tc.LogisticRegression(X, b))


def test_calibrate_accepts_numpy_scalars_and_all_distinct_thinned_draws(linear, monkeypatch):
    # thinned_draws equal to chains x draws is allowed: every draw is picked exactly once.
    calibration = _calibration
    picked = []
    real = calibration._replicate

    def spy(model, n_draws, seed, settings, parallel):
        picked.append(n_draws)
        return real(model, n_draws, seed, settings, parallel)

    monkeypatch.setattr(calibration, "_replicate", spy)
    res = calibrate(linear, replications=np.int64(3), thinned_draws=np.int64(40),
                    n_bins=np.int64(41), level=np.float32(0.05), seed=np.int64(4),
                    scheduler="serial", method="mala", chains=2, draws=20, warmup=50)
    assert res.n_bins == 41 and res.n_draws == 40 and picked == [40, 40, 40]
    assert res.ranks.shape == (3, linear.n_coef) and res.ranks.max() <= 40
    assert res.settings.chains == 2 and res.settings.warmup == 50


def test_calibrate_takes_generator_and_seedsequence_seeds(linear):
    kw = dict(replications=2, thinned_draws=9, n_bins=5, scheduler="serial", method="mala",
              chains=1, draws=20, warmup=50)
    a = calibrate(linear, seed=np.random.SeedSequence(5), **kw)
    b = calibrate(linear, seed=np.random.SeedSequence(5), **kw)
    assert a.ranks.shape == (2, linear.n_coef)
    assert np.array_equal(a.ranks, b.ranks)  # the same code and seed: bitwise
    c = calibrate(linear, seed=np.random.default_rng(5), **kw)
    assert c.ranks.shape == a.ranks.shape


# ---------------------------------------------------------------- sweep

SWEEP_CASES = [
    # (e) empty, scalar or string grids, bad values
    (dict(step_sizes=[]), r"step_sizes: is empty, so the grid has no points"),
    (dict(batch_sizes=[]), r"batch_sizes: is empty, so the grid has no points"),
    (dict(methods=[]), r"methods: is empty, so the grid has no points"),
    (dict(methods=()), r"methods: is empty"),
    (dict(step_sizes=0.05), r"step_sizes: must be a list of numbers > 0, got 0.05"),
    (dict(step_sizes=np.float64(0.05)), r"step_sizes: must be a list of numbers > 0"),
    (dict(batch_sizes=100), r"batch_sizes: must be a list of integers >= 2, got 100"),
    (dict(methods="mala"), r"methods: must be a list of method names, got the str 'mala'"),
    (dict(step_sizes="fast"), r"step_sizes: must be a list of numbers > 0, got the str 'fast'"),
    (dict(methods=["penalty-mala", "malla"]), r'methods: unknown method \'malla\'; did you '
     r'mean "mala"\?'),
    (dict(methods=[None]), r"methods: unknown method None"),
    (dict(step_sizes=[0.1, 0.0]), r"step_sizes: must be finite numbers > 0, got 0.0"),
    (dict(step_sizes=[0.1, -1]), r"step_sizes: must be finite numbers > 0, got -1"),
    (dict(step_sizes=[np.inf]), r"step_sizes: must be finite numbers > 0, got inf"),
    (dict(step_sizes=[np.nan]), r"step_sizes: must be finite numbers > 0, got nan"),
    (dict(step_sizes=["0.1"]), r"step_sizes: must be finite numbers > 0, got '0.1'"),
    (dict(batch_sizes=[1]), r"batch_sizes: must be integers from 2 to 300 \(N\), got 1"),
    (dict(batch_sizes=[100, 2.5]), r"batch_sizes: must be integers .* got 2.5"),
    (dict(batch_sizes=[301]), r"batch_sizes: must be integers from 2 to 300 \(N\), got 301"),
    # (f) the table's false-alarm level
    (dict(level=0), r"level: must be a probability strictly between 0 and 1, got 0; give"),
    (dict(level=1.0), r"level: must be a probability strictly between 0 and 1, got 1.0"),
    (dict(level="x"), r"level: must be a probability strictly between 0 and 1, got 'x'"),
    (dict(level=np.nan), r"level: must be a probability strictly between 0 and 1, got nan"),
    (dict(tolerance=1.5), r"tolerance: is not a setting of sweep\(\)"),
    # (g) settings sweep sets itself
    (dict(step_size=0.1), r"step_size: is set by sweep\(\) itself; use "
     r"step_sizes="),
    (dict(method="mala"), r"method: is set by sweep\(\) itself; use methods="),
    (dict(batch_size=100), r"batch_size: is set by sweep\(\) .*use batch_sizes="),
    (dict(preparation=object()), r"preparation: is a run option of sample\(\), not a setting "
     r"sweep\(\) takes"),
    (dict(parallel=True), r"parallel: is a run option of sample\(\), not a setting sweep"),
    # (h) everything else before prepare(), the tuning run and the reference run
    (dict(seed="abc"), r"seed: must be an integer from 0 to 2\*\*64 - 1, got 'abc'"),
    (dict(seed=-1), r"seed: must be an integer from 0 to 2\*\*64 - 1, got -1"),
    (dict(chains=0), r"chains: must be >= 1, got 0"),
    (dict(draws=0), r"draws: must be >= 1, got 0"),
    (dict(draws=2.5), r"draws: must be an integer >= 1, got 2.5"),
    (dict(warmup=-1), r"warmup: must be >= 0, got -1"),
    (dict(warmup="x"), r"warmup: must be an integer >= 0, got 'x'"),
    (dict(scheduler="nope"), r"scheduler: unknown scheduler 'nope'"),
    (dict(workers=0), r"workers: must be a whole number >= 1, got 0"),
    (dict(workers="2"), r"workers: must be a whole number >= 1"),
    (dict(control_variates="yes"), r"control_variates: must be True, False or None"),
    (dict(gradient_batch="carried"), r'gradient_batch: "carried" applies to penalty-mala, '
     r"not sgld"),
    (dict(mass_matrix="unit"), r"mass_matrix: unknown value 'unit'"),
    (dict(stepsize=0.1), r"stepsize: is not a setting of sweep\(\)"),
    (dict(progress=None), r"progress: must be True or False"),
    (dict(journal=SweepJournal(on_row=3)), r"on_row: must be callable, got int"),
    (dict(extrapolate="yes"), r"extrapolate: must be True or False"),
]


def test_sweep_accepts_numpy_arrays_and_scalars(linear):
    res = sweep(linear, methods=np.array(["penalty-mala", "sgld"]),
                step_sizes=np.array([0.5, 1.0]), batch_sizes=[np.int64(64)],
                chains=np.int64(2), draws=np.int64(150), warmup=np.int64(100),
                seed=np.int64(2), level=np.float32(0.05), workers=np.int64(1),
                scheduler="serial")
    assert len(res.rows) == 4
    assert {(r["method"], r["step_size"], r["batch_size"]) for r in res.rows} == {
        ("penalty-mala", 0.5, 64), ("penalty-mala", 1.0, 64), ("sgld", 0.5, 64),
        ("sgld", 1.0, 64)}
    assert isinstance(res.tolerance, float) and isinstance(res.level, float)


def test_sweep_takes_a_seedsequence(linear):
    kw = dict(methods=["mala"], step_sizes=[0.5], chains=2, draws=100, warmup=50,
              scheduler="serial")
    a = sweep(linear, seed=np.random.SeedSequence(9), **kw)
    b = sweep(linear, seed=np.random.SeedSequence(9), **kw)
    assert len(a.rows) == len(b.rows) == 1
    assert a.rows[0]["ks_max"] == b.rows[0]["ks_max"]  # the same code and seed: bitwise


# ---------------------------------------------------------------- check_on_twin

TWIN_CASES = [
    (dict(level=0), r"level: must be a probability strictly between 0 and 1, got 0; give"),
    (dict(level=1.5), r"level: must be a probability strictly between 0 and 1, got 1.5"),
    (dict(level="x"), r"level: must be a probability strictly between 0 and 1, got 'x'"),
    (dict(level=np.nan), r"level: must be a probability strictly between 0 and 1, got nan"),
    (dict(tolerance=1.5), r"tolerance: is not a setting of check_on_twin\(\)"),
    (dict(seed="abc"), r"seed: must be an integer from 0 to 2\*\*64 - 1, got 'abc'"),
    (dict(seed=-1), r"seed: must be an integer from 0 to 2\*\*64 - 1, got -1"),
    (dict(method="malla"), r"method: unknown method 'malla'"),
    (dict(chains=0), r"chains: must be >= 1, got 0"),
    (dict(stepsize=0.1), r"stepsize: is not a setting of check_on_twin\(\)"),
]


@pytest.mark.parametrize("family", ["linear", "logistic"])
@pytest.mark.parametrize("run,kwargs,match", [(sweep, k, m) for k, m in SWEEP_CASES]
                         + [(check_on_twin, k, m) for k, m in TWIN_CASES])
def test_sweep_and_twin_refuse_bad_input_before_mode_tuning_reference_and_sampling(
        linear, logistic, no_expensive_work, family, run, kwargs, match):
    model = linear if family == "linear" else logistic
    with pytest.raises(tc.InputError, match=match) as exc:
        run(model, **kwargs)
    _one_line(exc)


@pytest.mark.parametrize("seed", ["abc", -1, 2.5])
def test_conjugate_twin_checks_its_seed_before_the_mode(logistic, no_expensive_work, seed):
    with pytest.raises(tc.InputError, match=r"seed: must be an integer from 0 to 2\*\*64 - 1"):
        conjugate_twin(logistic, seed=seed)


def test_check_on_twin_accepts_numpy_scalars(logistic):
    res = check_on_twin(logistic, level=np.float32(0.05), seed=np.int64(1), method="mala",
                        chains=2, draws=np.int64(200), warmup=100)
    assert res.ks.ks.shape == (logistic.n_coef,) and isinstance(res.level, float)


# ---------------------------------------------------------------- find_mode

def _no_data_pass(model, monkeypatch):
    def boom(*args, **kwargs):
        raise AssertionError("a pass over the data started before the input check")

    monkeypatch.setattr(type(model), "log_likelihood_grad", boom)


MODE_CASES = [
    (dict(tol=0), r"tol: must be a finite number > 0, got 0"),
    (dict(tol=-1e-9), r"tol: must be a finite number > 0, got -1e-09"),
    (dict(tol="x"), r"tol: must be a finite number > 0, got 'x'"),
    (dict(tol=np.nan), r"tol: must be a finite number > 0, got nan"),
    (dict(tol=None), r"tol: must be a finite number > 0, got None"),
    (dict(max_iter=0), r"max_iter: must be >= 1, got 0"),
    (dict(max_iter=-5), r"max_iter: must be >= 1, got -5"),
    (dict(max_iter=2.5), r"max_iter: must be an integer >= 1, got 2.5"),
    (dict(start=[np.nan, 0.0, 0.0]), r"start: contains NaN or inf at position 0"),
    (dict(start=[0.0, np.inf, 0.0]), r"start: contains NaN or inf at position 1"),
    (dict(start=[0.0, 0.0]), r"start: has shape \(2,\), expected \(3,\)"),
    (dict(start=np.zeros((3, 1))), r"start: has shape \(3, 1\), expected \(3,\)"),
    (dict(start="abc"), r"start: must be an array of 3 numbers"),
]


@pytest.mark.parametrize("kwargs,match", MODE_CASES)
def test_find_mode_refuses_bad_arguments_by_name(logistic, monkeypatch, kwargs, match):
    _no_data_pass(logistic, monkeypatch)
    with pytest.raises(tc.InputError, match=match) as exc:
        tc.find_mode(logistic, **kwargs)
    _one_line(exc)
    assert "beta" not in str(exc.value) and "separation" not in str(exc.value)


def test_find_mode_accepts_numpy_scalars_and_a_start(logistic):
    ref = tc.find_mode(logistic)
    lap = tc.find_mode(logistic, tol=np.float32(1e-9), max_iter=np.int64(500),
                       start=ref.mode + 0.1)
    # Two Newton runs from different starts each place the mode within its tolerance
    # (numpy_glm.mode_sd_tolerance, in posterior sds): together within twice that.
    sd = np.sqrt(np.diag(ref.cov))
    np.testing.assert_allclose((lap.mode - ref.mode) / sd, 0.0, rtol=0,
                               atol=2 * mode_sd_tolerance(logistic, ref.mode))


# ---------------------------------------------------------------- not a model

@pytest.mark.parametrize("run", [calibrate, sweep, check_on_twin, tc.find_mode])
@pytest.mark.parametrize("bad,name", [(np.zeros((3, 2)), "ndarray"), (None, "NoneType")])
def test_something_else_than_a_model_is_refused_first(no_expensive_work, run, bad, name):
    with pytest.raises(tc.InputError, match=rf"model: must be a LinearRegression, "
                       rf"LogisticRegression, PoissonRegression or NegativeBinomialRegression, "
                       rf"got {name}"):
        run(bad)
