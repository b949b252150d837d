"""One message shape for every input check, and the checks every layer shares (private).

Every check raises `InputError` with the message ``"<field>: <problem>; <fix>"`` and, when it
passes, returns the value standardised (a Python int for any integer, a float for any number).
"""

import difflib
import math

import numpy as np

from ._arrays import row_blocks, spd_inverse, symmetrized
from .exceptions import InputError


def fail(field, problem, fix):
    """Raise InputError with the project's one-line message shape."""
    raise InputError(f"{field}: {problem}; {fix}")


def check_finite_matrix(name, a, columns=None):
    """Raise InputError naming the first row and column holding NaN or inf, or a value too
    large for the products of the full-data passes (`overflow_limit`); ``columns`` names the
    columns of a matrix in the message."""
    if a.dtype.kind not in "fiu":
        fail(name, f"has dtype {a.dtype}, not numeric", "give a float or integer array")
    if a.dtype.kind == "f" and hasattr(a, "indptr"):
        _check_sparse_values(name, a, columns)
    elif a.dtype.kind == "f":
        limit = overflow_limit(a.shape[0])
        # float32 (or narrower) values cannot reach the limit below 10^230 rows
        wide = float(np.finfo(a.dtype).max) > limit
        for start, block in row_blocks(a, dtype=None):
            bad = ~np.isfinite(block)
            if bad.any():
                r, *c = np.argwhere(bad)[0]
                where = f"row {start + r}" + (f", column {c[0]}" if c else "")
                fail(name, f"contains {block[(r, *c)]} in {where}", "remove or impute that value")
            big = np.abs(block).max(axis=0) > limit if wide and block.size else False
            if np.any(big):
                too_large(name, a, int(np.argmax(big)) if a.ndim == 2 else None, columns)


def _check_sparse_values(name, a, columns):
    """`check_finite_matrix` for a sparse design (data, indices, indptr): its stored values
    only, located by row through indptr."""
    limit = overflow_limit(a.shape[0])
    for start, block in row_blocks(a.data, dtype=None):
        bad = ~np.isfinite(block)
        if bad.any():
            k = start + int(np.argmax(bad))
            row = int(np.searchsorted(a.indptr, k, side="right")) - 1
            fail(name, f"contains {a.data[k]} in row {row}, column {a.indices[k]}",
                 "remove or impute that value")
        if block.size and np.abs(block).max() > limit:
            too_large(name, a, int(a.indices[start + int(np.argmax(np.abs(block)))]), columns)


def overflow_limit(n_rows):
    """The largest |value| whose products the full-data passes can sum over ``n_rows`` rows.

    The set-up sums f''(eta_i) x_ij x_ik over the rows (the Hessian at the prior mean and at
    the mode; the linear model sums squared residuals likewise). With |x| below
    sqrt(max float64 / N), no product x_ij x_ik and no sum of N of them overflows. The
    weight f'' (at most 1/4 for logistic, 1/noise_sd^2 for linear, the rate for Poisson)
    can still push an extreme sum over; mode finding reports that case.
    """
    return math.sqrt(np.finfo(np.float64).max / max(int(n_rows), 1))


def too_large(name, a, column=None, columns=None):
    """Raise InputError naming the row (and column) of the largest |value| of ``a`` (or of
    its ``column``), which exceeds `overflow_limit`."""
    best, where = -1.0, 0
    for start, block in row_blocks(a if column is None else a[:, column], dtype=None):
        i = int(np.argmax(np.abs(block)))
        if abs(float(block[i])) > best:
            best, where = abs(float(block[i])), start + i
    value = a[where] if column is None else a[where, column]
    label = "" if column is None else \
        f"column {columns[column] if columns is not None else column} "
    fail(name, f"{label}holds {float(value):.3g} in row {where}, too large: the products the "
         f"set-up sums over {a.shape[0]} rows would overflow (|value| must stay below "
         f"{overflow_limit(a.shape[0]):.3g})",
         "rescale that column (e.g. divide it by a power of ten) or correct the value")


def is_number(value):
    """A real number of Python or numpy (not a bool)."""
    return (isinstance(value, (int, float, np.integer, np.floating))
            and not isinstance(value, (bool, np.bool_)))


def positive_number(name, value, fix):
    """``value`` as a float when it is a finite number > 0; else InputError naming ``name``."""
    if not is_number(value) or not math.isfinite(value) or value <= 0:
        fail(name, f"must be a finite number > 0, got {value!r}", fix)
    return float(value)


def check_flag(name, value):
    """``value`` as a bool when it is one (numpy's too); else InputError naming ``name``."""
    if not isinstance(value, (bool, np.bool_)):
        fail(name, f"must be True or False, got {show_value(value)}", f"give {name}=True or False")
    return bool(value)


def check_folder(name, path):
    """Refuse an output folder that already exists as a file (a missing one is created)."""
    if path.exists() and not path.is_dir():
        fail(name, f'"{path}" is a file, not a folder', "give a folder (it is created when missing)")


def is_integer(value):
    """An integer of Python or numpy (not a bool)."""
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def positive_int(name, value, minimum=1):
    """``value`` as an int when it is an integer >= ``minimum``; else InputError naming ``name``."""
    if not is_integer(value):
        fail(name, f"must be an integer >= {minimum}, got {show_value(value)}",
             f"give an integer >= {minimum}")
    if value < minimum:
        fail(name, f"must be >= {minimum}, got {value}", f"give an integer >= {minimum}")
    return int(value)


def one_of(name, value, choices, what="value"):
    """``value`` when it is one of ``choices`` (strings); else InputError with a suggestion."""
    if not isinstance(value, str) or value not in choices:
        fail(name, f"unknown {what} {show_value(value)}",
             f"{did_you_mean(value, choices)}choose one of {', '.join(choices)}")
    return value


def did_you_mean(word, choices):
    """``'did you mean "x"? '`` for the closest of ``choices`` to ``word``, or ``""``."""
    near = difflib.get_close_matches(str(word), list(choices), n=1, cutoff=0.6)
    return f'did you mean "{near[0]}"? ' if near else ""


def spd_matrix_and_inverse(field, value, n, fix_shape):
    """Check that ``value`` is a finite symmetric positive definite (n, n) matrix; return it
    (symmetrised) with its inverse, computed through the Cholesky factor."""
    m = np.array(value, dtype=float)
    if m.shape != (n, n):
        fail(field, f"has shape {m.shape}, expected ({n}, {n})", fix_shape)
    if not np.all(np.isfinite(m)):
        fail(field, "contains NaN or inf", "give finite values")
    if not np.allclose(m, m.T, rtol=1e-10, atol=1e-12):
        fail(field, "is not symmetric", "give a symmetric positive definite matrix")
    try:
        inv = spd_inverse(m)
    except np.linalg.LinAlgError:
        fail(field, "is not positive definite", "give a symmetric positive definite matrix")
    return symmetrized(m), inv


SEED_LIMIT = 2**64


def check_seed(seed, name="seed"):
    """The seeds `tallchain.sample` takes: an integer in [0, 2**64), None, a numpy Generator or
    SeedSequence; returned with a numpy integer as a Python int.

    Larger integers would seed numpy, but no output file can store them (NetCDF attributes
    hold 64-bit integers at most), so they are refused before any work.
    """
    if seed is None or isinstance(seed, (np.random.Generator, np.random.SeedSequence)):
        return seed
    if not is_integer(seed) or not 0 <= seed < SEED_LIMIT:
        fail(name, f"must be an integer from 0 to 2**64 - 1, got {show_value(seed)}",
             "give an integer such as 1, or a numpy Generator")
    return int(seed)


def show_value(value):
    """A short one-line description of a value, for messages."""
    if isinstance(value, np.ndarray) and value.ndim > 0:
        return f"an array of shape {value.shape}"
    if isinstance(value, np.generic):
        value = value.item()
    text = repr(value).replace("\n", " ")
    return text if len(text) <= 60 else text[:57] + "..."


# Per-row values with a rule beyond being finite: (the values refused, the fix). Shared by the
# models (arrays, rows counted from 0) and the table reader (columns, rows counted from 1).
_ROW_VALUE_RULES = {
    "trials": (lambda v: (v < 1) | (v != np.floor(v)), "give whole numbers of trials >= 1"),
    "weights": (lambda v: v < 0, "give frequency weights >= 0 (how many times each row counts)"),
}


def first_bad_row_value(role, values):
    """``(index, fix)`` of the first of ``values`` that the rule of ``role`` ("trials",
    "weights") refuses, or None when all pass (or the role has no rule, as an offset)."""
    if role not in _ROW_VALUE_RULES:
        return None
    refused, fix = _ROW_VALUE_RULES[role]
    bad = np.flatnonzero(refused(np.asarray(values)))
    return None if not bad.size else (int(bad[0]), fix)
