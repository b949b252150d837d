"""Argument checks of the model constructors (models/_glm.py).

Each bad input gives one `InputError` line "field: problem; fix" naming the argument, raised
before any pass over the data; the valid input types (float32, integer, bool, Fortran-ordered
and list-of-lists X, numpy scalars) keep working and give the same model.
"""

import functools
import numpy as np
import pytest
from numpy.testing import assert_array_equal
from numpy_glm import log_likelihood_size
from ulps import assert_ulps_close

import tallchain as tc
from tallchain import InputError

MODELS = {"linear": tc.LinearRegression, "logistic": tc.LogisticRegression,
          "poisson": tc.PoissonRegression}


@pytest.fixture
def data(rng):
    X = rng.normal(size=(8, 2))
    y = rng.integers(0, 2, 8).astype(np.float64)  # valid for all three families
    return X, y


def _one_line(exc_info):
    message = str(exc_info.value)
    assert "\n" not in message
    assert exc_info.type is InputError
    return message


# --- noise_sd (LinearRegression) ---------------------------------------------------------------


@pytest.mark.parametrize(("noise_sd", "match"), [
    ("1", r"^noise_sd: must be a finite number > 0, got '1'; give the known noise sd as a "
          r"number > 0, e\.g\. noise_sd=1\.0$"),
    ("", r"^noise_sd: must be a finite number > 0, got ''; give the known noise sd"),
    (np.array([1.0, 2.0]), r"^noise_sd: must be a finite number > 0, got an array of shape "
                           r"\(2,\); give"),
    ([1.0], r"^noise_sd: must be a finite number > 0, got \[1\.0\]"),
    (True, r"^noise_sd: must be a finite number > 0, got True"),
    (np.nan, r"^noise_sd: must be a finite number > 0, got nan"),
    (np.inf, r"^noise_sd: must be a finite number > 0, got inf"),
    (-2.0, r"^noise_sd: must be > 0, got -2\.0; give the known noise sd"),
    (0, r"^noise_sd: must be > 0, got 0\.0"),
], ids=["string", "empty", "array", "list", "bool", "nan", "inf", "negative", "zero"])
def test_noise_sd_must_be_a_finite_positive_number(data, noise_sd, match):
    X, y = data
    with pytest.raises(InputError, match=match) as info:
        tc.LinearRegression(X, y, noise_sd=noise_sd)
    _one_line(info)


@pytest.mark.parametrize("noise_sd", [2, np.float32(2.0), np.float64(2.0), np.int64(2),
                                      np.array(2.0)],
                         ids=["int", "float32", "float64", "int64", "0d-array"])
def test_noise_sd_numeric_types_work(data, noise_sd):
    X, y = data
    model = tc.LinearRegression(X, y, noise_sd=noise_sd)
    assert model.noise_sd == 2.0 and type(model.noise_sd) is float


# --- y and offset ------------------------------------------------------------------------------


@pytest.mark.parametrize("family", MODELS)
def test_non_numeric_y_names_the_row(data, family):
    X, y = data
    bad = y.astype(str)
    bad[3] = "yes"
    with pytest.raises(InputError, match=r"^y: has the non-numeric value 'yes' in row 3; give a "
                                         r"float or integer array$") as info:
        MODELS[family](X, bad)
    _one_line(info)
    with pytest.raises(InputError, match=r"^y: has the non-numeric value 'a' in row 0"):
        MODELS[family](X, ["a"] * 8)


def test_non_numeric_offset_names_the_row(data):
    X, y = data
    offset = [0.0] * 8
    offset[5] = "log(2)"
    with pytest.raises(InputError, match=r"^offset: has the non-numeric value 'log\(2\)' in row 5; "
                                         r"give a float or integer array$") as info:
        tc.PoissonRegression(X, y, offset=offset)
    _one_line(info)


def test_numeric_strings_and_bool_responses_still_work(data):
    X, y = data
    model = tc.LogisticRegression(X, y.astype(bool))
    assert_array_equal(model.y, y)
    model = tc.PoissonRegression(X, y.astype(str), offset=np.zeros(8).astype(str))
    assert_array_equal(model.y, y)
    assert model.y.dtype == np.float64 and model.offset.dtype == np.float64


def test_ragged_y_and_offset(data):
    X, y = data
    with pytest.raises(InputError, match=r"^y: is ragged: row 1 has 1 value but row 0 has 2 "
                                         r"values; give the same number of values in every row$"):
        tc.LinearRegression(X[:2], [[1.0, 2.0], [3.0]])
    with pytest.raises(InputError, match=r"^offset: is ragged: row 1 has 1 value but row 0 has 2"):
        tc.PoissonRegression(X[:2], y[:2], offset=[[1.0, 2.0], [3.0]])


# --- X -----------------------------------------------------------------------------------------


@pytest.mark.parametrize(("X", "match"), [
    ([[1.0, 2.0], [3.0], [4.0, 5.0]], r"^X: is ragged: row 1 has 1 value but row 0 has 2 values; "
                                      r"give the same number of values in every row$"),
    ([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0, 7.0]], r"^X: is ragged: row 2 has 3 values but row 0 "
                                                r"has 2 values"),
    ([[1.0, 2.0], 3.0, [4.0, 5.0]], r"^X: is ragged: row 1 has a single value but row 0 has 2"),
], ids=["short-row", "long-row", "scalar-row"])
def test_ragged_X_names_the_rows(X, match):
    with pytest.raises(InputError, match=match) as info:
        tc.LinearRegression(X, [1.0, 2.0, 3.0])
    _one_line(info)


def test_no_coefficients_is_refused(data):
    X, y = data
    with pytest.raises(InputError, match=r"^X: has 0 columns and add_intercept=False, so the model "
                                         r"has no coefficients; give at least one column of X, or "
                                         r"set add_intercept=True$"):
        tc.LogisticRegression(np.empty((8, 0)), y, add_intercept=False)
    # an intercept-only model is fine
    model = tc.LogisticRegression(np.empty((8, 0)), y)
    assert model.n_coef == 1 and model.coef_names == ["intercept"]


def test_row_counts_are_singular_for_one_row(data):
    X, y = data
    with pytest.raises(InputError, match=r"^X: has 1 row; give at least 2 rows$"):
        tc.LinearRegression(X[:1], y[:1])
    with pytest.raises(InputError, match=r"^X: has 0 rows; give at least 2 rows$"):
        tc.LinearRegression(X[:0], y[:0])
    with pytest.raises(InputError, match=r"^y: has 1 row but X has 8; give X and y with the same"):
        tc.LinearRegression(X, y[:1])
    with pytest.raises(InputError, match=r"^y: has 3 rows but X has 8"):
        tc.LinearRegression(X, y[:3])
    with pytest.raises(InputError, match=r"^offset: has 1 row but X has 8; give one offset per row"):
        tc.PoissonRegression(X, y, offset=[0.0])


# --- coef_names --------------------------------------------------------------------------------


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"coef_names": "ab"}, r"^coef_names: is the single string 'ab', not a list of names; give a "
                           r"list of distinct strings, one per column of X$"),
    ({"coef_names": ["a", "a"]}, r"^coef_names: has 'a' twice \(positions 0 and 1\); give "
                                 r"distinct names$"),
    ({"coef_names": ["a", "intercept"]},
     r"^coef_names: has 'intercept' at position 1, the name of the added intercept; rename that "
     r"column, or set add_intercept=False$"),
    ({"coef_names": ["a", 2]}, r"^coef_names: has 2 at position 1, not a string; give every name "
                               r"as a str$"),
    ({"coef_names": ["a", ""]}, r"^coef_names: has an empty name at position 1"),
    ({"coef_names": {"a", "b"}}, r"^coef_names: is a set, which has no order"),
    ({"coef_names": 5}, r"^coef_names: must be a sequence of strings, got 5"),
    ({"coef_names": ["a"]}, r"^coef_names: has 1 name for 2 columns; give one name per column"),
    ({"coef_names": ["a", "b", "c"]}, r"^coef_names: has 3 names for 2 columns"),
], ids=["string", "duplicate", "intercept", "not-str", "empty", "set", "int", "one-short",
        "one-long"])
def test_coef_names_must_be_distinct_strings(data, kwargs, match):
    X, y = data
    with pytest.raises(InputError, match=match) as info:
        tc.LogisticRegression(X, y, **kwargs)
    _one_line(info)


def test_coef_names_valid_forms(data):
    X, y = data
    for names in (["a", "b"], ("a", "b"), np.array(["a", "b"])):
        model = tc.PoissonRegression(X, y, coef_names=names)
        assert model.coef_names == ["intercept", "a", "b"]
        assert all(type(n) is str for n in model.coef_names)
    # without an added intercept, a column may be called "intercept"
    model = tc.PoissonRegression(X, y, coef_names=["intercept", "b"], add_intercept=False)
    assert model.coef_names == ["intercept", "b"]


# --- flags -------------------------------------------------------------------------------------


@pytest.mark.parametrize("family", MODELS)
@pytest.mark.parametrize(("flag", "value", "match"), [
    ("add_intercept", "no", r"^add_intercept: must be True or False, got 'no'; give "
                            r"add_intercept=True or False$"),
    ("add_intercept", 0, r"^add_intercept: must be True or False, got 0"),
    ("add_intercept", None, r"^add_intercept: must be True or False, got None"),
    ("check", "no", r"^check: must be True or False, got 'no'; give check=True or False$"),
    ("check", 1, r"^check: must be True or False, got 1"),
], ids=["intercept-str", "intercept-int", "intercept-none", "check-str", "check-int"])
def test_flags_must_be_bool(data, family, flag, value, match):
    X, y = data
    with pytest.raises(InputError, match=match) as info:
        MODELS[family](X, y, **{flag: value})
    _one_line(info)


def test_numpy_bool_flags_work(data):
    X, y = data
    model = tc.LinearRegression(X, y, noise_sd=1.0, add_intercept=np.bool_(False),
                                check=np.bool_(True))
    assert model.add_intercept is False and model.n_coef == 2


# --- checks come before the passes over the data -----------------------------------------------


def test_argument_errors_come_before_data_errors(data):
    # X holds NaN, but the bad argument is reported first (no scan of X was needed)
    X, y = data
    X = X.copy()
    X[2, 1] = np.nan
    with pytest.raises(InputError, match=r"^coef_names: "):
        tc.LinearRegression(X, y, coef_names="ab")
    with pytest.raises(InputError, match=r"^prior sd: has 2 entries, expected 1 or 3"):
        tc.LinearRegression(X, y, prior=tc.GaussianPrior(sd=[1.0, 2.0]))
    with pytest.raises(InputError, match=r"^X: contains nan in row 2, column 1"):
        tc.LinearRegression(X, y)


# --- valid input types keep working ------------------------------------------------------------


@pytest.mark.parametrize("family", MODELS)
def test_valid_design_types_give_the_same_model(data, family):
    X, y = data
    Xi = np.round(3 * X).astype(np.int64)
    # known noise sd for the linear family: the NumPy size below is for the coefficients only
    kw = {"noise_sd": 1.0} if family == "linear" else {}
    cls = functools.partial(MODELS[family], **kw)
    ref = cls(Xi.astype(np.float64), y)
    beta = np.array([0.1, -0.2, 0.3])
    want = ref.log_likelihood(beta)
    # The integer values are exact in every dtype, but the float32 and float64 kernels are
    # separate compilations, free to reassociate (fastmath): 8 rows and a 3-term dot product
    # each, within (8 - 1)/2 + 3 ulps of the sum of |terms| per path (Higham, Accuracy and
    # Stability of Numerical Algorithms, ch. 4; from memory): 16 ulps for two paths.
    size = log_likelihood_size(ref, beta)
    for variant in (Xi, Xi.astype(np.int32), Xi.astype(np.float32), np.asfortranarray(Xi),
                    np.asfortranarray(Xi.astype(np.float32)), Xi.tolist(),
                    [tuple(r) for r in Xi.astype(float)]):
        model = cls(variant, y.tolist())
        assert model.X.flags.c_contiguous and model.X.dtype in (np.float32, np.float64)
        assert_ulps_close(model.log_likelihood(beta), want, ulps=16, scale=size)
    Xb = Xi > 0
    model = cls(Xb, y)
    assert model.X.dtype == np.float64
    assert_array_equal(model.X, Xb.astype(np.float64))


def test_float32_design_is_kept_without_a_copy(data):
    X, y = data
    X32 = np.ascontiguousarray(X, dtype=np.float32)
    model = tc.LinearRegression(X32, y, noise_sd=np.float32(0.5))
    assert model.X is X32
    assert model.noise_sd == 0.5
