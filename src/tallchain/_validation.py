"""One message shape for every input check (private)."""

import math

import numpy as np

from .exceptions import InputError


def fail(field, problem, fix):
    """Raise InputError with the project's one-line message shape."""
    raise InputError(f"{field}: {problem}; {fix}")


def check_finite_matrix(name, a):
    """Raise InputError naming the first row and column holding NaN or inf."""
    if a.dtype.kind not in "fiu":
        fail(name, f"has dtype {a.dtype}, not numeric", "give a float or integer array")
    if a.dtype.kind == "f":
        # Chunked so a memory-mapped X is never pulled into memory whole.
        rows = a.shape[0]
        step = max(1, 2**22 // max(1, a.size // max(rows, 1)))
        for start in range(0, rows, step):
            block = np.asarray(a[start:start + step])
            bad = ~np.isfinite(block)
            if bad.any():
                r, *c = np.argwhere(bad)[0]
                where = f"row {start + r}" + (f", column {c[0]}" if c else "")
                fail(name, f"contains {block[(r, *c)]} in {where}", "remove or impute that value")


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


def positive_int(name, value, minimum=1):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        fail(name, f"must be an integer >= {minimum}, got {value!r}", f"give an integer >= {minimum}")
    if value < minimum:
        fail(name, f"must be >= {minimum}, got {value}", f"give an integer >= {minimum}")
    return int(value)


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
        chol = np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        fail(field, "is not positive definite", "give a symmetric positive definite matrix")
    inv_chol = np.linalg.inv(chol)
    inv = inv_chol.T @ inv_chol
    return 0.5 * (m + m.T), 0.5 * (inv + inv.T)


def check_seed(seed):
    """The seeds `tallchain.sample` takes: an integer >= 0, None, a Generator or SeedSequence."""
    if seed is None or isinstance(seed, (np.random.Generator, np.random.SeedSequence)):
        return
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) or seed < 0:
        fail("seed", f"must be a non-negative integer, got {seed!r}",
             "give an integer such as 1, or a numpy Generator")


def show_value(value):
    """A short one-line description of a value, for messages."""
    if isinstance(value, np.ndarray) and value.ndim > 0:
        return f"an array of shape {value.shape}"
    if isinstance(value, np.generic):
        value = value.item()
    text = repr(value).replace("\n", " ")
    return text if len(text) <= 60 else text[:57] + "..."
