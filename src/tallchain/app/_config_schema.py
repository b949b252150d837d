"""The config's schema: its sections and keys, each key's TOML type, the required keys, and
the checks of a raw config against them (names and types only; values are checked by the
objects each section builds)."""

from .._validation import did_you_mean, fail
from ..mcmc import SamplerSettings


def _is_number(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _is_int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number_list(v):
    return isinstance(v, list) and bool(v) and all(_is_number(e) for e in v)


# (description for messages, predicate) per kind of TOML value.
_STR = ("a string", lambda v: isinstance(v, str))
_BOOL = ("true or false", lambda v: isinstance(v, bool))
_INT = ("an integer", _is_int)
_NUMBER = ("a number", _is_number)
_NUMBERS = ("a number or a list of numbers", lambda v: _is_number(v) or _is_number_list(v))
_STR_LIST = ("a list of strings",
             lambda v: isinstance(v, list) and all(isinstance(e, str) for e in v))

SCHEMA = {
    "data": {"x": _STR, "y": _STR, "table": _STR, "add_intercept": _BOOL, "standardize": _BOOL,
             "columns": _STR_LIST, "offset": _STR, "trials": _STR, "weights": _STR,
             "missing": _STR, "cache_dir": _STR,
             "reuse_setup": _BOOL},
    "model": {"family": _STR, "formula": _STR, "noise_sd": _NUMBER, "noise_sd_prior": _NUMBERS,
              "dispersion_prior": _NUMBERS, "prior_mean": _NUMBERS, "prior_sd": _NUMBERS,
              "prior_cov": _STR},
    # The fields of tallchain.SamplerSettings, which checks their values and holds the
    # defaults.
    "sampler": {name: None for name in SamplerSettings.names()},
    "output": {"dir": _STR, "interval": _NUMBER},
    # Where the chains of a run, and the runs of sweeps and calibrations, execute
    # (tallchain.executors); --scheduler/--workers override.
    "compute": {"scheduler": _STR, "workers": _INT, "connect_seconds": _NUMBER},
}
REQUIRED = (("model", "family"),)

def check_shape(raw):
    """Known sections and keys, each value of the right TOML type."""
    for section, table in raw.items():
        if not isinstance(table, dict):
            home = [sec for sec, keys in SCHEMA.items() if section in keys]
            fail(section, "is a key outside any [section]",
                 f"put it under [{home[0]}]" if home else
                 f"put it under one of {', '.join(f'[{sec}]' for sec in SCHEMA)}")
        if section not in SCHEMA:
            _unknown(section, SCHEMA, "section", f"[{section}]")
        for key, value in table.items():
            if key not in SCHEMA[section]:
                _unknown(key, SCHEMA[section], "key", f"{section}.{key}", section)
            check_value(section, key, value, f"{section}.{key}")


def check_value(section, key, value, label):
    if SCHEMA[section][key] is None:   # checked by the object the section builds
        return
    what, ok = SCHEMA[section][key]
    if not ok(value):
        fail(label, f"must be {what}, got {_show(value)}", f"give {what}")


def check_required(raw):
    for section, key in REQUIRED:
        if key not in raw.get(section, {}):
            fail(f"{section}.{key}", "is missing", f"add {key} = ... under [{section}]")


def _unknown(name, known, kind, label, section=None):
    where = f" of [{section}]" if section else ""
    fix = did_you_mean(name, known).strip() or \
        f"remove it; the {kind}s{where} are: {', '.join(known)}"
    fail(label, f"unknown {kind}", fix)


def _show(value):
    text = repr(value) if not isinstance(value, dict) else "a table"
    return text if len(text) <= 40 else text[:37] + "..."
