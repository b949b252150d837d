"""The rules that check and standardise each setting's value (private).

Each rule takes (name, value), raises InputError naming ``name`` or returns the value
standardised. Rules are idempotent: a standardised value passes unchanged. `_settings`
declares which field uses which rule.
"""

import json
import math
import os

import numpy as np

from .._validation import (check_seed, fail, is_number, one_of, positive_int, positive_number,
                           show_value, spd_matrix_and_inverse)
from ..executors import check_scheduler, check_workers
from ..posterior import MASS_MATRIX_KINDS
from ._methods import BROKEN_METHODS, METHODS

INIT_KINDS = ("laplace", "mode", "prior-mean")


def _method(name, value):
    if isinstance(value, str) and value in BROKEN_METHODS:   # power checks of the tests only
        return value
    return one_of(name, value, tuple(METHODS), "method")


def _auto_or(rule, what, fix):
    """A rule that takes "auto" or what ``rule`` takes."""
    def check(name, value):
        if isinstance(value, str):
            if value != "auto":
                fail(name, f'must be {what} or "auto", got {show_value(value)}', fix)
            return value
        return rule(name, value)

    return check


def _positive_step(name, value):
    if not is_number(value):
        fail(name, f'must be a number > 0 or "auto", got {show_value(value)}',
             'give a positive number or "auto"')
    if not math.isfinite(value) or value <= 0:
        fail(name, f"must be > 0, got {show_value(value)}", 'give a positive number or "auto"')
    return float(value)


_step_size = _auto_or(_positive_step, "a number > 0", 'give a positive number or "auto"')
_batch_size = _auto_or(lambda name, value: positive_int(name, value, minimum=2), "an integer",
                       'give an integer in [2, N] or "auto"')


def _optional_flag(name, value):
    if value is not None and not isinstance(value, (bool, np.bool_)):
        fail(name, f"must be True, False or None, got {show_value(value)}",
             "give a bool (None: on for minibatch methods)")
    return None if value is None else bool(value)


def _proxy_order(name, value):
    if isinstance(value, (bool, np.bool_)) or value not in (1, 2):
        fail(name, f"must be 1 or 2, got {show_value(value)}",
             "use 2 (second-order Taylor proxies) or 1 (first-order)")
    return int(value)


def _integer_from(minimum):
    return lambda name, value: positive_int(name, value, minimum=minimum)


def _choice(choices, what="value"):
    return lambda name, value: one_of(name, value, choices, what)


def _read_only(a):
    a = np.array(a, dtype=float)
    a.flags.writeable = False
    return a


def _mass_matrix(name, value):
    if isinstance(value, str) or value is None:
        return one_of(name, value, MASS_MATRIX_KINDS)
    m = np.asarray(value, dtype=float) if _numeric(value) else None
    if m is None or m.ndim != 2 or m.shape[0] != m.shape[1]:
        fail(name, f"must be {', '.join(MASS_MATRIX_KINDS)} or a square matrix, got "
             f"{show_value(value)}", "give a name or an (n_coef, n_coef) SPD matrix")
    spd_matrix_and_inverse(name, m, m.shape[0], "give one row and column per coefficient")
    return _read_only(m)


def _init(name, value):
    if isinstance(value, str) or value is None:
        return one_of(name, value, INIT_KINDS)
    start = np.asarray(value, dtype=float) if _numeric(value) else None
    if start is None or start.ndim not in (1, 2):
        fail(name, f"must be {', '.join(INIT_KINDS)} or an array of starting points, got "
             f"{show_value(value)}", "give (n_coef,) or (chains, n_coef) finite values")
    bad = np.argwhere(~np.isfinite(start))
    if bad.size:
        where = ", ".join(str(int(i)) for i in bad[0])
        fail(name, f"contains {start[tuple(bad[0])]} at position ({where})",
             "give finite starting values")
    return _read_only(start)


def _numeric(value):
    try:
        return np.asarray(value).dtype.kind in "fiu"
    except (TypeError, ValueError):
        return False


def _seed(name, value):
    return check_seed(value, name)


def _positive_number(name, value):
    return positive_number(name, value, "give a positive number such as 1.0")


def _path_or_none(name, value):
    if value is not None and not isinstance(value, (str, os.PathLike)):
        fail(name, f"must be a file path, got {show_value(value)}", "give a path, or leave it out")
    return value


def _extra(name, value):
    if value is None:
        return {}
    if not isinstance(value, dict) or not all(isinstance(k, str) for k in value):
        fail(name, f"must be a dict with string keys, got {show_value(value)}",
             'give e.g. {"standardization": None}, or leave it out')
    try:
        return json.loads(json.dumps(value, allow_nan=False))   # as the checkpoint reads it
    except (TypeError, ValueError) as exc:
        fail(name, f"must hold JSON values ({exc})", "give numbers, strings, lists and dicts")


def _preparation(name, value):
    from ._setup import Preparation

    if value is not None and not isinstance(value, Preparation):
        fail(name, f"must come from tallchain.mcmc.prepare, got {type(value).__name__}",
             "pass prepare(model), or leave it out")
    return value


def _scheduler(value):
    check_scheduler(value, threads=True)
    return value


def _workers(value):
    check_workers(value)
    return None if value is None else int(value)
