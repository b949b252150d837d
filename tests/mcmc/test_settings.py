"""The sampler settings: one home for every name, default and constraint.

Every bad value is refused by `SamplerSettings` (or `RunOptions`) in one line that names the
field, what was got and the fix; `sample` refuses it before any pass over the data (the mode
search is patched to fail if it is reached); every value comes back standardised; and the
names of `sample`, the config's [sampler] section and the settings object are the same list.
"""

import dataclasses
import json

import numpy as np
import pytest

import tallchain as tc
from tallchain.app import _config
from tallchain.mcmc import RunOptions, SamplerSettings, _setup
from tallchain.mcmc._tables import run_header


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(5)
    X = rng.standard_normal((500, 2))
    return tc.LogisticRegression(X, (rng.random(500) < 0.5).astype(float))


@pytest.fixture()
def no_data_pass(monkeypatch):
    def reached(*args, **kwargs):
        raise AssertionError("find_mode was reached before the bad setting was refused")
    monkeypatch.setattr(_setup, "find_mode", reached)


# (settings, the whole message: field, problem and fix)
BAD_SETTINGS = [
    (dict(control_variates="no"),
     r"^control_variates: must be True, False or None, got 'no'; give a bool \(None: on for "
     r"minibatch methods\)$"),
    (dict(method=["mala"]),
     r'^method: unknown method \[\'mala\'\]; did you mean "mala"\? choose one of rwm, mala, .*sgld$'),
    (dict(method="penalty_mala"),
     r'^method: unknown method \'penalty_mala\'; did you mean "penalty-mala"\? choose one of '),
    (dict(step_size=0), r'^step_size: must be > 0, got 0; give a positive number or "auto"$'),
    (dict(step_size="tuned"),
     r'^step_size: must be a number > 0 or "auto", got \'tuned\'; give a positive number or '
     r'"auto"$'),
    (dict(batch_size=1), r"^batch_size: must be >= 2, got 1; give an integer >= 2$"),
    (dict(chains=0), r"^chains: must be >= 1, got 0; give an integer >= 1$"),
    (dict(draws=2.5), r"^draws: must be an integer >= 1, got 2.5; give an integer >= 1$"),
    (dict(proxy_order=3), r"^proxy_order: must be 1 or 2, got 3; use 2 \(second-order Taylor "
                          r"proxies\) or 1 \(first-order\)$"),
    (dict(init="centre"), r"^init: unknown value 'centre'; choose one of laplace, mode, "
                          r"prior-mean$"),
    (dict(init=[0.0, np.nan, 0.0]),
     r"^init: contains nan at position \(1\); give finite starting values$"),
    (dict(mass_matrix="laplace-diag"),
     r'^mass_matrix: unknown value \'laplace-diag\'; did you mean "laplace-diagonal"\? choose '
     r"one of laplace, laplace-lowrank, laplace-diagonal, identity$"),
    (dict(mass_matrix=None), r"^mass_matrix: unknown value None; choose one of laplace, "),
    (dict(mass_matrix=-np.eye(3)), r"^mass_matrix: is not positive definite; give a symmetric "
                                   r"positive definite matrix$"),
    (dict(log_ratio_variance="same_batch"),
     r"^log_ratio_variance: unknown value 'same_batch'; did you mean \"same-batch\"\? choose one of "),
    (dict(seed="abc"), r"^seed: must be an integer from 0 to 2\*\*64 - 1, got 'abc'; give an "
                       r"integer such as 1, or a numpy Generator$"),
    (dict(seed=2**64), r"^seed: must be an integer from 0 to 2\*\*64 - 1, got 18446744073709551616"),
    (dict(seed=-1), r"^seed: must be an integer from 0 to 2\*\*64 - 1, got -1"),
    (dict(batch_floor=64, batch_ceiling=40),
     r"^batch_ceiling: is 40, below batch_floor 64; give batch_ceiling >= batch_floor$"),
    (dict(method="sgld", step_size="auto"),
     r'^step_size: "auto" is not available for sgld \(it has no accept step to tune against\); '
     r"give a number"),
    (dict(warmup=10), r'^warmup: is 10, too short to tune step_size="auto"; give warmup >= 20'),
    (dict(warmup=30), r'^warmup: is 30, too short to choose batch_size="auto"; give warmup >= 40'),
    (dict(method="mala", gradient_batch="carried"),
     r'^gradient_batch: "carried" applies to penalty-mala, not mala; use gradient_batch="fresh"'),
    (dict(method="sgld", step_size=0.1, gradient_batch="proxy"),
     r'^gradient_batch: "proxy" applies to penalty-mala, not sgld; use gradient_batch="fresh"'),
    (dict(gradient_batch="proxy", mass_matrix="laplace-lowrank"),
     r'^gradient_batch: "proxy" needs second-order control variates and mass_matrix="laplace"; '
     r'use gradient_batch="fresh", or control_variates=True, proxy_order=2'),
    (dict(gradient_batch="proxy", proxy_order=1),
     r'^gradient_batch: "proxy" needs second-order control variates'),
    (dict(gradient_batch="proxy", control_variates=False),
     r'^gradient_batch: "proxy" needs second-order control variates'),
]

BAD_RUN_OPTIONS = [
    (dict(parallel="no"), r"^parallel: must be True or False, got 'no'; give parallel=True or "
                          r"False$"),
    (dict(progress="yes"), r"^progress: must be True or False, got 'yes'"),
    (dict(resume="yes", checkpoint="c.npz"), r"^resume: must be True or False, got 'yes'"),
    (dict(resume=True), r"^resume: needs a checkpoint path; pass checkpoint=<file> "),
    (dict(checkpoint_seconds=-1), r"^checkpoint_seconds: must be a finite number > 0, got -1; "
                                  r"give the seconds between checkpoint writes, e.g. 30$"),
    (dict(preparation="x"), r"^preparation: must come from tallchain\.mcmc\.prepare, got str; "
                            r"pass prepare\(model\), or leave it out$"),
    (dict(checkpoint=3), r"^checkpoint: must be a file path, got 3; give a path, or leave it out$"),
    (dict(scheduler="gpu"), r"^scheduler: unknown scheduler 'gpu'; use \"threads\", "),
    (dict(workers=0), r"^workers: must be a whole number >= 1, got 0; "),
]


@pytest.mark.parametrize("settings, pattern", BAD_SETTINGS)
def test_a_bad_setting_is_refused_by_the_settings_and_before_any_data_pass(
        model, no_data_pass, settings, pattern):
    with pytest.raises(tc.InputError, match=pattern):
        SamplerSettings(**settings)
    with pytest.raises(tc.InputError, match=pattern):
        tc.sample(model, **settings)


@pytest.mark.parametrize("options, pattern", BAD_RUN_OPTIONS)
def test_a_bad_run_option_is_refused_before_any_data_pass(model, no_data_pass, options, pattern):
    with pytest.raises(tc.InputError, match=pattern):
        RunOptions(**options)
    with pytest.raises(tc.InputError, match=pattern):
        tc.sample(model, **options)


@pytest.mark.parametrize("settings, pattern", [
    (dict(init=np.zeros(5)), r"^init: has shape \(5,\), expected \(3,\) or \(4, 3\); give one "
                             r"starting point, or one per chain$"),
    (dict(mass_matrix=np.eye(2)), r"^mass_matrix: has shape \(2, 2\), expected \(3, 3\); "),
    (dict(batch_size=501), r"^batch_size: must be in \[2, 500\] \(N\), got 501; "),
])
def test_settings_that_do_not_fit_the_model_are_refused_before_any_data_pass(
        model, no_data_pass, settings, pattern):
    checked = SamplerSettings(**settings)      # fine without a model ...
    with pytest.raises(tc.InputError, match=pattern):
        checked.check_against(model)           # ... and refused against this one
    with pytest.raises(tc.InputError, match=pattern):
        tc.sample(model, **settings)


def test_replace_checks_again():
    s = SamplerSettings(method="mala", step_size=0.5)
    with pytest.raises(tc.InputError, match=r"^chains: must be >= 1, got 0"):
        dataclasses.replace(s, chains=0)


def test_values_come_back_standardised():
    s = SamplerSettings(step_size=np.int64(1), chains=np.int32(2), draws=np.uint16(30),
                        warmup=np.int64(50), seed=np.int64(2), control_variates=np.bool_(True),
                        target_log_ratio_sd=np.float32(1.0), init=[[0.0, 1.0, 2.0]] * 2)
    assert type(s.step_size) is float and s.step_size == 1.0
    assert type(s.chains) is int and type(s.draws) is int and type(s.seed) is int
    assert s.control_variates is True and type(s.target_log_ratio_sd) is float
    assert s.init.dtype == np.float64 and not s.init.flags.writeable
    assert dataclasses.replace(s) == s             # standardised values pass their rules again
    json.dumps(s.record())                         # every setting can be written to run.json
    assert s.record()["init"].startswith("array 2x3 sha1:")


def test_numpy_scalars_run(model):
    r = tc.sample(model, method="mala", step_size=np.int64(1), chains=1, draws=20, warmup=0,
                  seed=np.int64(2))
    assert r.draws.shape == (1, 20, 3)
    assert r.settings == SamplerSettings(method="mala", step_size=1.0, chains=1, draws=20,
                                         warmup=0, seed=2)


def test_an_unknown_keyword_is_named_with_a_suggestion(model, no_data_pass):
    with pytest.raises(tc.InputError, match=r'^step: is not a setting of sample\(\); did you mean '
                                            r'"(step_size|seed)"\? see help\(tallchain.SamplerSettings\)$'):
        tc.sample(model, step=0.1)


def test_options_replace_the_fields_of_given_settings(model):
    base = SamplerSettings(method="mala", step_size=0.5, chains=1, draws=30, warmup=0, seed=3)
    a = tc.sample(model, base, seed=4)
    b = tc.sample(model, dataclasses.replace(base, seed=4))
    assert a.settings.seed == 4 and np.array_equal(a.draws, b.draws)   # same code twice


def test_one_list_of_names_for_sample_the_config_and_the_settings():
    import inspect

    params = list(inspect.signature(tc.sample).parameters)
    assert params == ["model", "settings", *SamplerSettings.names(), *RunOptions.names()]
    assert tuple(_config.SCHEMA["sampler"]) == SamplerSettings.names()
    for name in SamplerSettings.names() + RunOptions.names():   # documented in sample()
        assert f"\n        {name} : " in tc.sample.__doc__


def test_something_else_than_a_model_is_refused():
    for not_a_model in (np.zeros((5, 2)), None, "X.npy"):
        with pytest.raises(tc.InputError, match=r"^model: must be a LinearRegression, "
                                                r"LogisticRegression, PoissonRegression or "
                                                r"NegativeBinomialRegression, got"):
            tc.sample(not_a_model)


def test_saving_somewhere_that_is_not_a_folder_is_one_line(model, tmp_path):
    r = tc.sample(model, method="mala", step_size=0.5, chains=2, draws=100, warmup=0, seed=1)
    with pytest.raises(tc.InputError, match=r"directory: must be a folder path, got NoneType"):
        r.save(None)
    (tmp_path / "afile").write_text("")
    with pytest.raises(tc.InputError, match=r'directory: ".*afile" is a file, not a folder'):
        r.save(tmp_path / "afile")
    r.save(tmp_path / "new" / "folder")
    assert (tmp_path / "new" / "folder" / "posterior.nc").exists()


# Without second-order control variates a 32-row batch is noisy here; not what this is about.
@pytest.mark.filterwarnings("ignore::tallchain.exceptions.NoisyLogRatioWarning")
@pytest.mark.parametrize(("settings", "resolved"), [
    ({}, "proxy"),
    ({"mass_matrix": "laplace-diagonal"}, "fresh"),
    ({"control_variates": False}, "fresh"),
    ({"proxy_order": 1}, "fresh"),
    ({"gradient_batch": "carried"}, "carried"),
])
def test_auto_gradient_batch_is_the_proxy_drift_where_it_applies(model, settings, resolved):
    r = tc.sample(model, method="penalty-mala", chains=1, draws=20, warmup=40, seed=1,
                  batch_size=32, **settings)
    assert r.tuned["gradient_batch"] == resolved
    # one batch per step with the proxy's drift, three with fresh gradient batches
    reads = {"proxy": 32, "fresh": 96, "carried": 64}[resolved]
    assert np.all(r.stats["rows_read"] == reads)
    # and the run's header line says when the proxy's drift ran
    assert ("drift along the control variates' proxy" in run_header(r)) == (resolved == "proxy")
