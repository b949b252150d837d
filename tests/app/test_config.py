"""The TOML config: resolution of paths and defaults, and one named message per bad input."""

import textwrap

import numpy as np
import pytest

import tallchain as tc
from tallchain.app import _config as config
from tallchain.data import DataSource
from tallchain.exceptions import InputError

BASE = """\
[data]
x = "X.npy"
y = "y.npy"

[model]
family = "logistic"
"""


@pytest.fixture
def folder(tmp_path, rng):
    np.save(tmp_path / "X.npy", rng.standard_normal((30, 2)))
    np.save(tmp_path / "y.npy", rng.integers(0, 2, 30).astype(float))
    return tmp_path


def _load(folder, extra="", base=BASE, overrides=None, name="run.toml"):
    path = folder / name
    path.write_text(base + textwrap.dedent(extra))
    return config.load_config(path, overrides)


def test_resolves_paths_defaults_and_given_sampler_keys(folder):
    cfg = _load(folder, """
        [sampler]
        method = "penalty-rwm"
        step_size = 0.5
        batch_size = 16
        chains = 2
        """)
    assert cfg.data.x == DataSource(folder / "X.npy")
    assert cfg.data.y == DataSource(folder / "y.npy")
    assert cfg.data.add_intercept is True and cfg.data.standardize is False
    assert cfg.model.family == "logistic" and cfg.model.noise_sd is None
    assert cfg.sampler_given() == {"method": "penalty-rwm", "step_size": 0.5, "batch_size": 16,
                                   "chains": 2}
    assert cfg.sampler == tc.SamplerSettings(method="penalty-rwm", step_size=0.5, batch_size=16,
                                             chains=2)   # the rest at their defaults
    assert cfg.output_dir == folder / "runs" / "run"
    with pytest.raises(AttributeError, match="cannot assign"):
        cfg.output_dir = folder


def test_sampler_keys_are_the_fields_of_the_settings():
    where = {"scheduler", "workers", "connect_seconds"}   # [compute]: run options of sample()
    assert tuple(config.SCHEMA["sampler"]) == tc.SamplerSettings.names()
    assert set(config.SCHEMA["compute"]) == where and where <= set(tc.RunOptions.names())


def test_prior_settings_build_the_prior(folder):
    np.save(folder / "cov.npy", np.diag([4.0, 1.0, 1.0]))
    cfg = _load(folder, """
        prior_mean = [1.0, 0.0, 0.0]
        prior_cov = "cov.npy"
        [output]
        dir = "out/here"
        """)
    mean, _, cov = cfg.model.prior().resolve(3)
    np.testing.assert_array_equal(mean, [1.0, 0.0, 0.0])
    np.testing.assert_array_equal(cov, np.diag([4.0, 1.0, 1.0]))
    assert cfg.output_dir == folder / "out" / "here"


def test_npz_y_defaults_to_the_same_archive(folder):
    np.savez(folder / "d.npz", x=np.zeros((3, 1)), y=np.zeros(3), log_len=np.zeros(3))
    cfg = _load(folder, base='[data]\nx = "d.npz"\noffset = "d.npz:log_len"\n'
                             '[model]\nfamily = "poisson"\n')
    assert cfg.data.y == DataSource(folder / "d.npz")
    assert cfg.data.offset == DataSource(folder / "d.npz", "log_len")


def test_csv_y_and_offset_are_column_names(folder):
    (folder / "d.csv").write_text("a,n,len\n1,2,3\n")
    cfg = _load(folder, base='[data]\nx = "d.csv"\ny = "n"\noffset = "len"\ncolumns = ["a"]\n'
                             '[model]\nfamily = "poisson"\n')
    assert cfg.data.y == "n" and cfg.data.offset == "len" and cfg.data.columns == ("a",)


def test_overrides_replace_keys_and_are_named_as_such(folder, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    cfg = _load(folder, "[sampler]\ndraws = 50\n",
                overrides={"sampler.draws": 7, "output.dir": "elsewhere"})
    assert cfg.sampler.draws == 7 and cfg.sampler_keys == {"draws"}
    assert cfg.output_dir == tmp_path / "elsewhere"
    with pytest.raises(InputError, match=r"^sampler\.chains \(from the command line\): must be "
                                         r">= 1, got 0"):
        _load(folder, overrides={"sampler.chains": 0})
    with pytest.raises(InputError, match=r"^sampler\.draws \(from the command line\): must be an "
                                         r"integer >= 1, got 'many'"):
        _load(folder, overrides={"sampler.draws": "many"})


@pytest.mark.parametrize("extra, message", [
    # unknown sections and keys, with the closest known name
    ("[sampler]\nstepsize = 0.1\n",
     r'^sampler\.stepsize: unknown key; did you mean "step_size"\?$'),
    ("[sampler]\nchians = 2\n", r'^sampler\.chians: unknown key; did you mean "chains"\?$'),
    ("prior_sdd = 1.0\n", r'^model\.prior_sdd: unknown key; did you mean "prior_sd"\?'),
    ("[sampler]\nzzz = 1\n", r"^sampler\.zzz: unknown key; remove it; the keys of \[sampler\] are: "
                             r"method, step_size"),
    ("[samplr]\nchains = 2\n", r'^\[samplr\]: unknown section; did you mean "sampler"\?'),
    # wrong TOML types
    ("[sampler]\nchains = \"4\"\n",
     r"^sampler\.chains: must be an integer >= 1, got '4'; give an integer >= 1$"),
    ("[sampler]\ncontrol_variates = 1\n",
     r"^sampler\.control_variates: must be True, False or None, got 1"),
    ("[sampler]\nproxy_order = true\n", r"^sampler\.proxy_order: must be 1 or 2, got True"),
    ("[sampler]\nstep_size = [0.1]\n",
     r'^sampler\.step_size: must be a number > 0 or "auto", got \[0\.1\]'),
    ("[sampler]\nmass_matrix = [[1.0], [2.0]]\n",
     r"^sampler\.mass_matrix: must be laplace, laplace-lowrank, laplace-diagonal, identity or a "
     r"square matrix"),
    ("[output]\ndir = 3\n", r"^output\.dir: must be a string, got 3"),
    ("prior_sd = \"wide\"\n", r"^model\.prior_sd: must be a number or a list of numbers"),
    ("[sampler.extra]\na = 1\n", r"^sampler\.extra: unknown key"),
    # values out of range, checked by the code of sample()
    ("[sampler]\nstep_size = 0\n", r"^sampler\.step_size: must be > 0, got 0; give a positive"),
    ("[sampler]\nstep_size = -0.1\n", r"^sampler\.step_size: must be > 0, got -0\.1"),
    ("[sampler]\nstep_size = \"fast\"\n", r'^sampler\.step_size: must be a number > 0 or "auto", '
                                          r"got 'fast'"),
    ("[sampler]\nbatch_size = 1\n", r"^sampler\.batch_size: must be >= 2, got 1"),
    ("[sampler]\nbatch_size = \"big\"\n", r'^sampler\.batch_size: must be an integer or "auto"'),
    ("[sampler]\nchains = 0\n", r"^sampler\.chains: must be >= 1, got 0"),
    ("[sampler]\ndraws = 0\n", r"^sampler\.draws: must be >= 1, got 0"),
    ("[compute]\nworkers = 0\n", r"^compute\.workers: must be a whole number >= 1, got 0"),
    ("[compute]\nscheduler = \"gpu\"\n", r"^compute\.scheduler: unknown scheduler 'gpu'"),
    ("[sampler]\nwarmup = -1\n", r"^sampler\.warmup: must be >= 0, got -1"),
    ("[sampler]\nwarmup = 10\n", r'^sampler\.warmup: is 10, too short to tune step_size="auto"'),
    ("[sampler]\nseed = -3\n", r"^sampler\.seed: must be an integer from 0 to 2\*\*64 - 1, got -3"),
    ("[sampler]\nseed = 18446744073709551616\n",
     r"^sampler\.seed: must be an integer from 0 to 2\*\*64 - 1, got 18446744073709551616"),
    ("[sampler]\nproxy_order = 3\n", r"^sampler\.proxy_order: must be 1 or 2, got 3"),
    ("[sampler]\nlog_ratio_variance = \"fresh\"\n",
     r"^sampler\.log_ratio_variance: unknown value 'fresh'"),
    ("[sampler]\nmass_matrix = \"dense\"\n", r"^sampler\.mass_matrix: unknown value 'dense'"),
    ("[sampler]\ninit = \"random\"\n", r"^sampler\.init: unknown value 'random'"),
    ("[sampler]\ntarget_log_ratio_sd = 0\n", r"^sampler\.target_log_ratio_sd: must be a finite number > 0"),
    ("[sampler]\nbatch_floor = 1\n", r"^sampler\.batch_floor: must be >= 2, got 1"),
    ("[sampler]\nbatch_floor = 64\nbatch_ceiling = 40\n",
     r"^sampler\.batch_ceiling: is 40, below batch_floor 64"),
    ("[sampler]\nmethod = \"sgld\"\n", r'^sampler\.step_size: "auto" is not available for sgld'),
    # unknown method
    ("[sampler]\nmethod = \"penalty-mal\"\n",
     r"^sampler\.method: unknown method 'penalty-mal'; did you mean \"penalty-mala\"\? choose one"),
    # priors, checked by GaussianPrior
    ("prior_sd = -1.0\n", r"^model\.prior_sd: must be > 0, got -1\.0; give positive"),
    ("prior_sd = [1.0, 0.0, 2.0]\n", r"^model\.prior_sd: must be > 0, got 0\.0"),
    ("prior_mean = nan\n", r"^model\.prior_mean: contains NaN or inf"),
    # family-specific keys
    ("noise_sd = 2.0\n", r'^model\.noise_sd: is only used by family "linear", not "logistic"'),
    ("[data]\noffset = \"y.npy\"\n", r'^data\.offset: is only used by family "poisson"'),
])
def test_bad_values_name_the_key(folder, extra, message):
    # extra lines continue the [model] table unless they open a section of their own
    base = BASE
    if extra.startswith("[data]"):
        base = BASE.replace('y = "y.npy"\n', 'y = "y.npy"\n' + extra.split("\n", 1)[1])
        extra = ""
    with pytest.raises(InputError, match=message):
        _load(folder, extra, base=base)


def test_key_outside_a_section(folder):
    with pytest.raises(InputError, match=r"^family: is a key outside any \[section\]; put it "
                                         r"under \[model\]$"):
        _load(folder, base='family = "linear"\n' + BASE.replace('family = "logistic"\n', ""))


def test_unknown_family_suggests_the_closest(folder):
    with pytest.raises(InputError, match=r"^model\.family: unknown family 'logistc'; did you mean "
                                         r'"logistic"\? choose one of linear, logistic, poisson'):
        _load(folder, base=BASE.replace('"logistic"', '"logistc"'))


def test_noise_sd_must_be_positive_for_linear(folder):
    with pytest.raises(InputError, match=r"^model\.noise_sd: must be > 0, got -2\.0"):
        _load(folder, "noise_sd = -2.0\n", base=BASE.replace('"logistic"', '"linear"'))


def test_prior_covariance_checks(folder):
    np.save(folder / "bad.npy", np.array([[1.0, 2.0], [2.0, 1.0]]))
    with pytest.raises(InputError, match=r"^model\.prior_cov: is not positive definite; give a "
                                         r"symmetric positive definite matrix"):
        _load(folder, 'prior_cov = "bad.npy"\n')
    np.save(folder / "asym.npy", np.array([[1.0, 0.5], [0.0, 1.0]]))
    with pytest.raises(InputError, match=r"^model\.prior_cov: is not symmetric"):
        _load(folder, 'prior_cov = "asym.npy"\n')
    np.save(folder / "ok.npy", np.eye(2))
    with pytest.raises(InputError, match=r"^model\.prior_cov: is given together with prior_sd"):
        _load(folder, 'prior_cov = "ok.npy"\nprior_sd = 1.0\n')
    with pytest.raises(InputError,
                       match=r'^model\.prior_cov: file ".*missing\.npy" does not exist'):
        _load(folder, 'prior_cov = "missing.npy"\n')


def test_missing_files_and_keys(folder):
    with pytest.raises(InputError, match=r'^data\.x: file ".*nope\.npy" does not exist; check the '
                                         r"path \(relative paths are relative to the folder"):
        _load(folder, base=BASE.replace("X.npy", "nope.npy"))
    with pytest.raises(InputError, match=r'^data\.y: file ".*ny\.npy" does not exist'):
        _load(folder, base=BASE.replace("y.npy", "ny.npy"))
    with pytest.raises(InputError, match=r"^data\.y: is missing; give the response file"):
        _load(folder, base=BASE.replace('y = "y.npy"\n', ""))
    with pytest.raises(InputError, match=r"^model\.family: is missing; add family = \.\.\. under "
                                         r"\[model\]"):
        _load(folder, base=BASE.replace('family = "logistic"\n', ""))
    with pytest.raises(InputError, match=r"^data\.x: is missing"):
        _load(folder, base='[model]\nfamily = "linear"\n')
    with pytest.raises(InputError, match=r"^.*absent\.toml: config file does not exist"):
        config.load_config(folder / "absent.toml")
    (folder / "X.txt").write_text("1\n")
    with pytest.raises(InputError, match=r"^data\.x: X\.txt has an unsupported file type '\.txt'"):
        _load(folder, base=BASE.replace("X.npy", "X.txt"))
    with pytest.raises(InputError, match=r"^data\.columns: must be a list of strings, got 3"):
        _load(folder, base=BASE.replace('y = "y.npy"\n', 'y = "y.npy"\ncolumns = 3\n'))


def test_columns_name_the_columns_of_an_array_x(folder):
    from tallchain.app._service import build_model

    base = BASE.replace('y = "y.npy"\n', 'y = "y.npy"\ncolumns = ["wind_speed", "waves"]\n')
    model, _ = build_model(_load(folder, base=base))
    assert model.coef_names == ["intercept", "wind_speed", "waves"]
    # one line naming the key, for a wrong count and for names the model refuses
    for names, message in (('["wind_speed"]', r"names 1 column but X\.npy has 2; give one "
                                               r"name per column of X, in order$"),
                           ('["a", "a"]', r"has 'a' twice \(positions 0 and 1\)")):
        given = f'y = "y.npy"\ncolumns = {names}\n'
        cfg = _load(folder, base=BASE.replace('y = "y.npy"\n', given))
        with pytest.raises(InputError, match=rf"^data\.columns: {message}"):
            build_model(cfg)


def test_malformed_toml_reports_the_line(folder):
    with pytest.raises(InputError, match=r"^run\.toml: malformed TOML at line 4, column 9: Invalid "
                                         r"value; fix the syntax on line 4$"):
        _load(folder, base='[data]\nx = "X.npy"\ny = "y.npy"\nchains =\n')
    with pytest.raises(InputError, match=r"^run\.toml: malformed TOML: Cannot overwrite a value "
                                         r"\(tomllib gives no line for this\)"):
        _load(folder, base=BASE + 'family = "linear"')  # no newline: no line number
    (folder / "latin.toml").write_bytes(b'[data]\nx = "\xe9"\n')
    with pytest.raises(InputError, match=r"^latin\.toml: is not UTF-8 text"):
        config.load_config(folder / "latin.toml")


def test_named_fields_renames_lower_layer_messages():
    with pytest.raises(InputError, match=r"^sampler\.step_size: must be > 0"):
        with config.named_fields({"step_size": "sampler.step_size"}):
            tc.sample(tc.LinearRegression(np.zeros((3, 1)), np.zeros(3), noise_sd=1.0),
                      step_size=-1.0)
    with pytest.raises(InputError, match=r"^other: untouched; fix"):
        with config.named_fields({"step_size": "sampler.step_size"}):
            raise InputError("other: untouched; fix")
