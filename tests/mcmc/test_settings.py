"""sample()'s up-front checks: every setting is refused with one line before any pass over the
data (find_mode is patched to fail if it is reached), numpy scalars are numbers, and
check_sample_settings runs the same checks for callers that sample later."""

import re

import numpy as np
import pytest

import tallchain as tc
from tallchain.mcmc import _sampling as sampling
from tallchain.mcmc import check_sample_settings


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(5)
    X = rng.standard_normal((500, 2))
    return tc.LogisticRegression(X, (rng.random(500) < 0.5).astype(float))


@pytest.fixture()
def no_data_pass(monkeypatch):
    def reached(*args, **kwargs):
        raise AssertionError("find_mode was reached before the bad setting was refused")
    monkeypatch.setattr(sampling, "find_mode", reached)


BAD = [
    (dict(control_variates="no"), r"control_variates: must be True, False or None, got 'no'"),
    (dict(parallel="no"), r"parallel: must be True or False, got 'no'"),
    (dict(progress="yes"), r"progress: must be True or False"),
    (dict(resume="yes", checkpoint="c.npz"), r"resume: must be True or False"),
    (dict(method=["mala"]), r"method: unknown method \['mala'\]"),
    (dict(init="centre"), r"init: unknown value 'centre'"),
    (dict(init=np.zeros(5)), r"init: has shape \(5,\); give \(3,\) or \(4, 3\)"),
    (dict(init=[0.0, np.nan, 0.0]), r"init: has shape \(4, 3\); give \(3,\) or \(4, 3\) finite"),
    (dict(mass_matrix="laplace-diag"), r"mass_matrix: unknown value 'laplace-diag'"),
    (dict(mass_matrix=None), r"mass_matrix: unknown value None"),
    (dict(mass_matrix=-np.eye(3)), r"^mass_matrix: is not positive definite; give a symmetric "
                                   r"positive definite matrix$"),
    (dict(resume=True), r"resume: needs a checkpoint path"),
    (dict(checkpoint_seconds=-1), r"checkpoint_seconds: must be a number > 0, got -1"),
    (dict(preparation="x"), r"preparation: must come from tallchain\.mcmc\.prepare"),
    (dict(seed="abc"), r"seed: must be a non-negative integer, got 'abc'"),
]


# The project's message shape: "field: problem; fix", on one line (_validation.fail).
SHAPE = r"^(?P<field>\w+): [^;\n]+; [^\n]+$"


@pytest.mark.parametrize("settings, pattern", BAD)
def test_a_bad_setting_is_refused_before_any_pass_over_the_data(model, no_data_pass, settings,
                                                                 pattern):
    with pytest.raises(tc.InputError, match=pattern) as refused:
        tc.sample(model, **settings)
    with pytest.raises(tc.InputError, match=pattern) as checked:
        check_sample_settings(model, **settings)
    # Both say the same, in the message shape, naming a setting that was given.
    assert str(checked.value) == str(refused.value)
    shape = re.match(SHAPE, str(refused.value))
    assert shape is not None, str(refused.value)
    assert shape["field"] in settings


@pytest.mark.parametrize("not_a_model", [np.zeros((5, 2)), None, "X.npy"])
def test_something_else_than_a_model_is_refused(not_a_model):
    with pytest.raises(tc.InputError, match=r"model: must be a LinearRegression, "
                                            r"LogisticRegression or PoissonRegression, got"):
        tc.sample(not_a_model)


def test_numpy_scalars_are_numbers(model):
    r = tc.sample(model, method="mala", step_size=np.int64(1), chains=1, draws=20, warmup=0,
                  seed=np.int64(2))
    assert r.draws.shape == (1, 20, 3)
    assert r.settings["step_size"] == [1.0] and r.settings["seed"] == 2
    r = tc.sample(model, target_log_ratio_sd=np.float32(1.0), chains=1, draws=20, warmup=50,
                  seed=1, control_variates=np.bool_(True))
    assert r.draws.shape == (1, 20, 3) and np.all(np.isfinite(r.draws))
    assert r.settings["control_variates"] is True
    assert r.settings["target_log_ratio_sd"] == 1.0


def test_check_sample_settings_names_an_unknown_keyword_and_spends_no_seed(model):
    with pytest.raises(tc.InputError, match=r'step: is not a setting of sample\(\); did you mean '
                                            r'"(step_size|seed)"\?'):
        check_sample_settings(model, step=0.1)
    rng = np.random.default_rng(9)
    check_sample_settings(model, method="mala", step_size=0.5, seed=rng, draws=30, warmup=0)
    after_check = tc.sample(model, method="mala", step_size=0.5, seed=rng, chains=1, draws=30, warmup=0)
    fresh = tc.sample(model, method="mala", step_size=0.5, seed=np.random.default_rng(9), chains=1, draws=30,
                      warmup=0)
    # the same code from the same generator state: bitwise equal
    assert np.array_equal(after_check.draws, fresh.draws)


def test_saving_somewhere_that_is_not_a_folder_is_one_line(model, tmp_path):
    r = tc.sample(model, method="mala", step_size=0.5, chains=2, draws=100, warmup=0, seed=1)
    with pytest.raises(tc.InputError, match=r"directory: must be a folder path, got NoneType"):
        r.save(None)
    (tmp_path / "afile").write_text("")
    with pytest.raises(tc.InputError, match=r'directory: ".*afile" is a file, not a folder'):
        r.save(tmp_path / "afile")
    r.save(tmp_path / "new" / "folder")
    assert (tmp_path / "new" / "folder" / "posterior.nc").exists()
