"""Reading and checking a model's arguments: design matrix, vectors, names, noise sd (private)."""

import numpy as np

from .._validation import fail, is_number, show_value
from ..data import CSRDesign, is_csr_design, is_sparse_matrix


def as_design(X):
    """X as a two-dimensional numeric array with its shape checked; not yet copied (see
    `design_storage`). A scipy.sparse matrix becomes a `CSRDesign` (canonical CSR)."""
    if is_sparse_matrix(X):
        if len(X.shape) != 2:
            fail("X", f"must be two-dimensional, got shape {X.shape}",
                 "give an (n_rows, n_features) matrix")
        return CSRDesign.from_scipy(X)
    if is_csr_design(X):
        return X
    if isinstance(X, np.ndarray) and X.dtype == object:
        fail("X", "is an object array", "give a numeric array (pickled arrays are not read)")
    X = read_array("X", X)
    if X.ndim == 1:
        X = X.reshape(-1, 1)
    if X.ndim != 2:
        fail("X", f"must be two-dimensional, got shape {X.shape}", "give an (n_rows, n_features) array")
    if X.dtype.kind == "f" and X.dtype.itemsize > 8:
        fail("X", f"has dtype {X.dtype}, wider than the float64 the kernels compute in",
             "give float64 or float32 values (e.g. X.astype(np.float64))")
    if X.dtype.kind not in "fiub":
        fail("X", f"has dtype {X.dtype}, not real numbers", "give a float or integer array")
    return X


def design_storage(X):
    """float32/float64 C-contiguous X as it is (a memory map stays one); anything else
    (float16, integers, bool, another order) copied to float64, which holds it exactly. A
    `CSRDesign` is kept as it is (its values are float32/float64 already)."""
    if is_csr_design(X):
        return X
    if X.dtype not in (np.float32, np.float64):
        X = X.astype(np.float64)
    if not X.flags.c_contiguous:
        X = np.ascontiguousarray(X)
    return X


def read_array(field, value):
    """``np.asarray(value)``, with ragged nested lists reported by row."""
    try:
        return np.asarray(value)
    except (ValueError, TypeError) as exc:
        rows = ragged_rows(value)
        if rows is not None:
            (i, n_i), (j, n_j) = rows
            fail(field, f"is ragged: row {j} has {n_j} but row {i} has {n_i}",
                 "give the same number of values in every row")
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        fail(field, f"cannot be read as an array ({detail})", "give a numeric array")


def ragged_rows(value):
    """The first row whose length differs from row 0's, as ((0, "n values"), (j, "m values"))."""
    try:
        lengths = [len(row) if isinstance(row, (list, tuple, np.ndarray)) else None
                   for row in value]
    except TypeError:
        return None
    for j, n in enumerate(lengths[1:], 1):
        if n != lengths[0]:
            return (0, values_text(lengths[0])), (j, values_text(n))
    return None


def values_text(n):
    return "a single value" if n is None else ("1 value" if n == 1 else f"{n} values")


def float_vector(field, a):
    """A one-dimensional array as C-contiguous float64; a non-numeric entry named by row."""
    if a.dtype.kind in "fiub":
        return np.ascontiguousarray(a, dtype=np.float64)
    if a.dtype.kind in "OUS":
        for i, v in enumerate(a):
            try:
                float(v)
            except (TypeError, ValueError):
                fail(field, f"has the non-numeric value {show_value(v)} in row {i}",
                     "give a float or integer array")
        try:
            return np.ascontiguousarray(a, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            fail(field, f"cannot be read as numbers ({str(exc).splitlines()[0]})",
                 "give a float or integer array")
    fail(field, f"has dtype {a.dtype}, not numeric", "give a float or integer array")


def check_noise_sd(value):
    fix = "give the known noise sd as a number > 0, e.g. noise_sd=1.0"
    numeric = is_number(value) or (isinstance(value, np.ndarray) and value.ndim == 0
                                   and value.dtype.kind in "fiu")
    if not numeric:
        fail("noise_sd", f"must be a finite number > 0, got {show_value(value)}", fix)
    try:
        value = float(value)
    except OverflowError:
        fail("noise_sd", f"must be a finite number > 0, got {show_value(value)}", fix)
    if not np.isfinite(value):
        fail("noise_sd", f"must be a finite number > 0, got {value}", fix)
    if value <= 0:
        fail("noise_sd", f"must be > 0, got {value}", fix)
    return value


def check_median_prior(field, value):
    """None, or a (median > 0, log_sd > 0) pair of finite numbers as floats: the log-normal
    prior of a family parameter (``noise_sd_prior``, ``dispersion_prior``)."""
    if value is None:
        return None
    fix = f"give (median, log_sd), e.g. {field}=(2.0, 1.0): log of it ~ N(log 2, 1)"
    try:
        pair = [float(v) for v in value]
    except (TypeError, ValueError):
        fail(field, f"must be two numbers, got {show_value(value)}", fix)
    if len(pair) != 2 or not all(np.isfinite(pair)) or min(pair) <= 0:
        fail(field, f"must be two finite numbers > 0, got {show_value(value)}", fix)
    return tuple(pair)


def check_coef_names(coef_names, n_cols, add_intercept):
    """The model's coefficient names: "intercept" first when added, then one per column."""
    fix = "give a list of distinct strings, one per column of X"
    if coef_names is None:
        names = [f"x{j}" for j in range(n_cols)]
    else:
        if isinstance(coef_names, (str, bytes)):
            fail("coef_names", f"is the single string {show_value(coef_names)}, not a list of names",
                 fix)
        if isinstance(coef_names, (set, frozenset, dict)):
            fail("coef_names", f"is a {type(coef_names).__name__}, which has no order", fix)
        try:
            names = list(coef_names)
        except TypeError:
            fail("coef_names", f"must be a sequence of strings, got {show_value(coef_names)}", fix)
        if len(names) != n_cols:
            fail("coef_names", f"has {len(names)} {'name' if len(names) == 1 else 'names'} "
                 f"for {n_cols} columns",
                 "give one name per column of X")
        seen = {}
        for i, name in enumerate(names):
            if not isinstance(name, str):
                fail("coef_names", f"has {show_value(name)} at position {i}, not a string",
                     "give every name as a str")
            if not name:
                fail("coef_names", f"has an empty name at position {i}", fix)
            if name in seen:
                fail("coef_names", f"has {name!r} twice (positions {seen[name]} and {i})",
                     "give distinct names")
            seen[name] = i
        names = [str(n) for n in names]
    if add_intercept and "intercept" in names:
        fail("coef_names", f"has 'intercept' at position {names.index('intercept')}, the name "
             "of the added intercept", "rename that column, or set add_intercept=False")
    return (["intercept"] if add_intercept else []) + names


def rows_text(n):
    return f"{n} row" if n == 1 else f"{n} rows"


def coef_vector(beta, n):
    b = np.ascontiguousarray(beta, dtype=np.float64)
    if b.shape != (n,):
        fail("beta", f"has shape {b.shape}, expected ({n},)", "give one value per coefficient")
    return b
