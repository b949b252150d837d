"""Data that the set-up cannot compute with are data problems, said as such: a value whose
products overflow names its column and row (not mode finding or separation); logistic labels
without events or non-events are a warning; a float16 X is read, not refused with a message
that contradicts itself."""

import re

import numpy as np
import pytest

import tallchain as tc
from tallchain._validation import overflow_limit
from tallchain.app import _cli as cli
from tallchain.app import _service

CONFIG = """\
[data]
x = "X.npy"
y = "y.npy"
columns = ["wind_speed", "wave_height"]
[model]
family = "{family}"
[sampler]
method = "mala"
chains = 2
draws = 60
warmup = 40
seed = 2
"""


class Sampled(Exception):
    pass


@pytest.fixture
def write(tmp_path, rng):
    def _write(family="logistic", edit=None, dtype=np.float64):
        X = rng.standard_normal((500, 2))
        y = (rng.random(500) < 1 / (1 + np.exp(-X @ [1.0, -0.5]))).astype(float)
        if family == "linear":
            y = X @ [1.0, -0.5] + rng.standard_normal(500)
        if edit is not None:
            X, y = edit(X, y)
        np.save(tmp_path / "X.npy", X.astype(dtype))
        np.save(tmp_path / "y.npy", y)
        (tmp_path / "run.toml").write_text(CONFIG.format(family=family))
        return [str(tmp_path / "run.toml"), "--out", str(tmp_path / "o"), "--quiet",
                "--overwrite"]

    return _write


def _reach_sampling(monkeypatch):
    def sample(*args, **kwargs):
        raise Sampled

    monkeypatch.setattr(_service, "sample", sample)
    # the set-up store would find the mode before `sample`: "reaching sampling" is passing
    # the data checks, so the store is left out here
    monkeypatch.setattr(_service, "stored_setup", lambda config, model, resume=False: None)


def _set(row, col, value):
    def edit(X, y):
        X[row, col] = value
        return X, y

    return edit


def test_a_value_whose_products_overflow_names_its_column_and_row(write, capsys, monkeypatch):
    _reach_sampling(monkeypatch)
    code = cli.main(["run", *write(edit=_set(12, 1, 1e300))])
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err
    assert re.fullmatch(r"tallchain: error: data\.x: column wave_height holds 1e\+300 in row 12, "
                        r"too large: the products the set-up sums over 500 rows would overflow "
                        r"\(\|value\| must stay below 6(\.\d+)?e\+152\); rescale that column "
                        r"\(e\.g\. divide it by a power of ten\) or correct the value", lines[0])
    assert "separation" not in err and "mode finding" not in err
    # Power: a large value the sums can bear passes the data checks and reaches sampling.
    with pytest.raises(Sampled):
        cli.main(["run", *write(edit=_set(12, 1, 1e10))])


def test_a_response_whose_squares_overflow_is_named_too(write, capsys):
    def huge_y(X, y):
        y[5] = -1e200
        return X, y

    code = cli.main(["run", *write("linear", edit=huge_y)])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    assert re.match(r"tallchain: error: data\.y: holds -1e\+200 in row 5, too large", err), err


def test_a_run_refused_for_its_data_leaves_no_empty_output_folder(write, capsys, tmp_path):
    # check_writable creates the folder before the data are read; refused data remove it again.
    argv = write(edit=_set(12, 1, 1e300))
    assert cli.main(["run", *argv]) == 2 and not (tmp_path / "o").exists()
    # Power: a folder that existed before the run is the user's and stays, even empty.
    (tmp_path / "o").mkdir()
    assert cli.main(["run", *argv]) == 2 and (tmp_path / "o").is_dir()
    assert "Traceback" not in capsys.readouterr().err


def test_the_limit_is_where_sums_of_products_overflow():
    # numpy's finfo gives the largest float64; N products at the limit sum to a finite
    # number, at twice the limit to infinity (the power of the check).
    n = 1000
    limit = overflow_limit(n)
    with np.errstate(over="ignore"):
        assert np.isfinite(np.sum(np.full(n, limit) * np.full(n, limit)))
        assert np.isinf(np.sum(np.full(n, 2 * limit) * np.full(n, 2 * limit)))


def test_the_model_refuses_the_same_value_for_users_of_the_library(rng):
    X = rng.standard_normal((300, 2))
    X[7, 0] = 1e300
    with pytest.raises(tc.InputError, match=r"^X: column a holds 1e\+300 in row 7, too large"):
        tc.LinearRegression(X, rng.standard_normal(300), coef_names=["a", "b"])


@pytest.mark.parametrize("label,side", [(0, "no events"), (1, "no non-events")])
def test_logistic_labels_all_alike_are_a_warning(write, capsys, label, side):
    def alike(X, y):
        return X, np.full_like(y, label)

    code = cli.main(["run", *write(edit=alike)])
    err = capsys.readouterr().err
    assert code == 0, err
    assert f"tallchain: warning: y: has {side} (every label is {label}): the likelihood keeps " \
           "rising as the intercept goes to" in err
    # Power: one label of the other kind, and the warning is gone.
    def one_other(X, y):
        y = np.full_like(y, label)
        y[0] = 1 - label
        return X, y

    assert cli.main(["run", *write(edit=one_other)]) == 0
    assert "has no" not in capsys.readouterr().err


def test_a_float16_design_is_read(write, capsys):
    code = cli.main(["run", *write(dtype=np.float16)])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "float16" not in err


@pytest.mark.parametrize("dtype,message", [
    (np.complex128, r"^X: has dtype complex128, not real numbers; give a float or integer array$"),
    (np.longdouble, r"^X: has dtype float128, wider than the float64 the kernels compute in; "
                    r"give float64 or float32 values"),
])
def test_dtypes_the_kernels_cannot_read_say_which_to_give(rng, dtype, message):
    if np.dtype(dtype).itemsize <= 8:
        pass
    elif np.finfo(np.longdouble).bits <= 64:
        pytest.skip("long double is float64 on this platform")
    X = rng.standard_normal((50, 2)).astype(dtype)
    with pytest.raises(tc.InputError, match=message):
        tc.LinearRegression(X, rng.standard_normal(50))
