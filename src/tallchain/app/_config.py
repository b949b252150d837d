"""The TOML run configuration: schema, checks and the resolved settings.

The config layer checks what only it knows (sections, key names, TOML types, which keys belong
to which family, that files exist). The values themselves are checked by the objects that hold
them, so every rule lives in one place: the ``[sampler]`` section builds a
`tallchain.SamplerSettings` (its keys are that object's fields), the prior items a
`tallchain.GaussianPrior`. Their messages name the argument (``step_size: ...``);
`named_fields` renames it to the config key (``sampler.step_size: ...``).
"""

import os
import re
import tomllib
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import numpy as np

from .._validation import check_folder, fail, one_of, positive_number
from ..data import ARRAY_SUFFIXES, MISSING_CHOICES, TABLE_SUFFIXES, DataSource, load_array
from ..exceptions import InputError
from ..mcmc import SamplerSettings, check_interval
from ..models import FAMILIES, GaussianPrior, check_median_prior, check_noise_sd
from ._config_schema import SCHEMA, check_required, check_shape, check_value


#: The default of ``[output] interval``: the summary's central 90% intervals.
DEFAULT_INTERVAL = 0.9

# Argument names used in the messages of the lower layers, and the config key each one is.
_ARGUMENT_KEYS = {
    **{k: f"sampler.{k}" for k in SCHEMA["sampler"]},
    "prior mean": "model.prior_mean", "prior sd": "model.prior_sd",
    "prior cov": "model.prior_cov", "noise_sd": "model.noise_sd",
    "noise_sd_prior": "model.noise_sd_prior", "dispersion_prior": "model.dispersion_prior",
    "X": "data.x", "y": "data.y", "offset": "data.offset", "columns": "data.columns",
    "trials": "data.trials", "weights": "data.weights",
    "coef_names": "data.columns", "standardize": "data.standardize",
    "table": "data.table", "missing": "data.missing", "formula": "model.formula",
}


@contextmanager
def named_fields(names):
    """Re-raise `InputError` with its leading field renamed through ``names``.

    Parameters
    ----------
    names : mapping of str to str
        Argument name (as the message starts, ``"step_size"``) to the name the user knows
        (``"sampler.step_size"``).
    """
    try:
        yield
    except InputError as exc:
        head, sep, rest = str(exc).partition(": ")
        if not sep or head not in names:
            raise
        raise InputError(f"{names[head]}: {rest}") from exc


@dataclass(frozen=True)
class DataSettings:
    """The resolved ``[data]`` section (see `tallchain.data.load_data` for the meaning).

    Either ``x`` (arrays, or a CSV/Parquet file with ``y`` a column) or ``table`` is set.
    ``offset``, ``trials`` and ``weights`` (`ROW_KEYS`) are array sources beside array files,
    column names of a table.
    """

    x: DataSource | None
    y: DataSource | str | None
    offset: DataSource | str | None = None
    columns: tuple | None = None
    add_intercept: bool = True
    standardize: bool = False
    table: DataSource | None = None
    missing: str = "drop"
    cache_dir: Path | None = None
    trials: DataSource | str | None = None
    weights: DataSource | str | None = None
    reuse_setup: bool = True


#: ``[data]`` keys of per-row values: array sources beside x and y, or column names of a table.
ROW_KEYS = ("offset", "trials", "weights")


@dataclass(frozen=True)
class ModelSettings:
    """The resolved ``[model]`` section.

    Attributes
    ----------
    family : {"linear", "logistic", "poisson", "negative-binomial", "binomial"}
    formula : str or None
        ``"response ~ terms"`` for a ``[data] table``.
    noise_sd : float or None
        Linear models only: the known noise sd (None: sampled).
    noise_sd_prior : tuple of float or None
        Linear models with a sampled noise sd: (median, log_sd) of its log-normal prior (None:
        the model's default, the sd of y and 2).
    dispersion_prior : tuple of float or None
        Negative binomial: (median, log_sd) of the dispersion's log-normal prior (None: 1 and
        2.5).
    prior_mean, prior_sd : float or tuple of float, or None
        None: the prior's default.
    prior_cov : ndarray of shape (n_coef, n_coef) or None
        Read from the ``prior_cov`` file (read-only).
    """

    family: str
    formula: str | None = None
    noise_sd: float | None = None
    noise_sd_prior: tuple | None = None
    dispersion_prior: tuple | None = None
    prior_mean: float | tuple | None = None
    prior_sd: float | tuple | None = None
    prior_cov: np.ndarray | None = field(default=None, compare=False, repr=False)

    def prior(self):
        """The `tallchain.GaussianPrior` these settings describe."""
        kw = {k: getattr(self, f"prior_{k}") for k in ("mean", "sd", "cov")}
        return GaussianPrior(**{k: v for k, v in kw.items() if v is not None})


@dataclass(frozen=True)
class RunConfig:
    """A checked run configuration.

    Attributes
    ----------
    path : pathlib.Path or None
        The config file (None when built from a dict).
    data : DataSettings
    model : ModelSettings
    sampler : SamplerSettings
        The ``[sampler]`` section, every key not given at its default.
    sampler_keys : frozenset of str
        The ``[sampler]`` keys that were given (in the file or on the command line).
    output_dir : pathlib.Path
    interval : float
        ``[output] interval``: probability of the central intervals in the summary, the
        printed table and the coefficient plot (default 0.9).
    compute : mapping
        The ``[compute]`` keys given: ``scheduler`` ("threads", "processes", "dask-local" or
        a Dask scheduler address) and ``workers``. ``run`` defaults to "threads", sweeps and
        calibrations to "processes" (they refuse "threads").
    overridden : frozenset of str
        ``section.key`` names set on the command line rather than in the file.
    """

    path: Path | None
    data: DataSettings
    model: ModelSettings
    sampler: SamplerSettings
    output_dir: Path
    overridden: frozenset = frozenset()
    compute: MappingProxyType = MappingProxyType({})
    sampler_keys: frozenset = frozenset()
    interval: float = DEFAULT_INTERVAL

    def sampler_given(self):
        """The ``[sampler]`` settings that were given, as keywords (for callers with defaults
        of their own, such as a calibration's shorter chains)."""
        return {key: getattr(self.sampler, key) for key in self.sampler_keys}

    @property
    def field_names(self):
        """Argument names of the lower layers mapped to the config keys (for `named_fields`)."""
        return _field_names(self.overridden)

    def named_fields(self):
        """Context manager: errors from models, priors and `sample` name the config key."""
        return named_fields(self.field_names)


def _label(key, overridden):
    return f"{key} (from the command line)" if key in overridden else key


def _field_names(overridden):
    return {arg: _label(key, overridden) for arg, key in _ARGUMENT_KEYS.items()}


def load_config(path, overrides=None):
    """Read and check a TOML run configuration.

    Parameters
    ----------
    path : path-like
        The config file. Relative paths inside it are relative to its folder.
    overrides : mapping of str to value, optional
        ``"section.key"`` to a value that replaces (or adds) the key, e.g. from command-line
        options; checked like the file's values. A relative ``output.dir`` here is relative to
        the current directory.

    Returns
    -------
    RunConfig

    Raises
    ------
    tallchain.InputError
        One line naming the key (``sampler.step_size: ...``) and the fix.
    """
    path = Path(path)
    if not path.is_file():
        what = "does not exist" if not path.exists() else "is not a file"
        fail(str(path), f"config file {what}", "give the path of a .toml file")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as exc:
        fail(path.name, f"is not UTF-8 text ({exc.reason})", "save the config as UTF-8")
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        problem = re.sub(r"\s*\(at [^)]*\)", "", msg)
        if m:
            fail(path.name, f"malformed TOML at line {m[1]}, column {m[2]}: {problem}",
                 f"fix the syntax on line {m[1]}")
        fail(path.name, f"malformed TOML: {problem} (tomllib gives no line for this)",
             "look for a key given twice or an unclosed table or string")
    return config_from_dict(raw, base_dir=path.parent, stem=path.stem, overrides=overrides,
                            path=path)


def config_from_dict(raw, *, base_dir=".", stem="run", overrides=None, path=None):
    """Check a parsed config (the dict `tomllib` returns) and resolve it.

    Parameters
    ----------
    raw : dict
    base_dir : path-like, default="."
        Folder that relative paths are relative to.
    stem : str, default="run"
        Name for the default output folder ``runs/<stem>``.
    overrides : mapping of str to value, optional
        As in `load_config`.
    path : pathlib.Path, optional
        Recorded in the result.

    Returns
    -------
    RunConfig
    """
    base_dir = Path(base_dir)
    raw = {sec: dict(val) if isinstance(val, dict) else val for sec, val in raw.items()}
    check_shape(raw)
    overrides = dict(overrides or {})
    overridden = frozenset(overrides)
    for dotted, value in overrides.items():
        section, _, key = dotted.partition(".")
        if section not in SCHEMA or key not in SCHEMA[section]:
            raise KeyError(f"not a config key: {dotted!r}")
        check_value(section, key, value, _label(dotted, overridden))
        raw.setdefault(section, {})[key] = value
    check_required(raw)
    with named_fields(_field_names(overridden)):
        model = _model_settings(raw.get("model", {}), raw.get("data", {}), base_dir)
        data = _data_settings(raw.get("data", {}), model.formula, base_dir)
        given = raw.get("sampler", {})
        sampler = SamplerSettings(**given)
        compute = dict(raw.get("compute", {}))
        _check_compute(compute)
    out = raw.get("output", {}).get("dir")
    if out is None:
        output_dir = base_dir / "runs" / stem
    else:
        output_dir = Path(out).expanduser()
        if not output_dir.is_absolute():
            output_dir = (Path.cwd() if "output.dir" in overridden else base_dir) / output_dir
    output_dir = Path(os.path.normpath(output_dir))
    check_folder(_label("output.dir", overridden), output_dir)
    interval = _interval(raw.get("output", {}).get("interval", DEFAULT_INTERVAL), overridden)
    return RunConfig(path=path, data=data, model=model, sampler=sampler,
                     sampler_keys=frozenset(given),
                     output_dir=output_dir, overridden=overridden,
                     compute=MappingProxyType(compute), interval=interval)


def _interval(value, overridden):
    try:
        return check_interval(value)
    except InputError as exc:
        raise InputError(str(exc).replace("interval:", f"{_label('output.interval', overridden)}:", 1)
                         .replace("e.g. interval=0.9", "e.g. 0.9")) from None


def _check_compute(compute):
    from ..executors import check_scheduler, check_workers

    seconds = (lambda v: positive_number("connect_seconds", v, "give the seconds to wait for "
                                         "the scheduler to answer, e.g. 10"))
    for key, check in (("scheduler", lambda v: check_scheduler(v, threads=True)),
                       ("workers", check_workers), ("connect_seconds", seconds)):
        if key in compute:
            try:
                check(compute[key])
            except InputError as exc:
                raise InputError(str(exc).replace(f"{key}:", f"compute.{key}:", 1)) from None



def _model_settings(table, data_table, base_dir):
    family = one_of("model.family", table["family"], tuple(FAMILIES), "family")
    for key in FAMILIES[family].required_options:   # per-row values: keys of [data]
        if key not in data_table:
            fail("model.family", f'"{family}" needs {key} per row, and data.{key} is missing',
                 f'add {key} = "<column>" (or a .npy/.npz file) under [data]')
    for key, given in (("noise_sd", table), ("noise_sd_prior", table),
                       ("dispersion_prior", table), ("offset", data_table),
                       ("trials", data_table)):
        users = [name for name, cls in FAMILIES.items() if key in cls.family_options]
        if key in given and family not in users:
            fail(key, f'is only used by family {" or ".join(map(repr, users))}, not "{family}"'
                 .replace("'", '"'), "remove it")
    if "prior_cov" in table and "prior_sd" in table:
        fail("prior cov", "is given together with prior_sd",
             "give one of them: prior_sd for independent coefficients, prior_cov for a full "
             "covariance")
    noise_sd = table.get("noise_sd")
    if noise_sd is not None:
        check_noise_sd(noise_sd)
    noise_prior = check_median_prior("noise_sd_prior", table.get("noise_sd_prior"))
    dispersion_prior = check_median_prior("dispersion_prior", table.get("dispersion_prior"))
    if noise_prior is not None and noise_sd is not None:
        fail("model.noise_sd_prior", "is given with noise_sd (a known noise sd has no prior)",
             "remove noise_sd to sample the noise sd, or remove noise_sd_prior")
    mean, sd = (_tuple_or_float(table.get(k)) for k in ("prior_mean", "prior_sd"))
    cov = None
    if "prior_cov" in table:
        cov = np.array(load_array(DataSource.parse(table["prior_cov"], base_dir),
                                  field="prior cov"), dtype=float)
        cov.flags.writeable = False
    # Each prior item checked by GaussianPrior itself, at its own length; whether the lengths
    # match the number of coefficients is checked when the model is built.
    if mean is not None:
        GaussianPrior(mean=mean).resolve(_length(mean))
    if sd is not None:
        GaussianPrior(sd=sd).resolve(_length(sd))
    if cov is not None:
        GaussianPrior(cov=cov).resolve(cov.shape[0] if cov.ndim else 1)
    formula = table.get("formula")
    if formula is not None and "~" not in formula:
        fail("model.formula", f"has no ~ in {formula!r}",
             'write it as "response ~ terms", e.g. "late ~ hour + C(carrier)"')
    return ModelSettings(family=family, formula=formula,
                         noise_sd=None if noise_sd is None else float(noise_sd),
                         noise_sd_prior=noise_prior, dispersion_prior=dispersion_prior,
                         prior_mean=mean, prior_sd=sd, prior_cov=cov)


def _tuple_or_float(v):
    if v is None:
        return None
    return tuple(float(e) for e in v) if isinstance(v, list) else float(v)


def _length(v):
    return len(v) if isinstance(v, tuple) else 1


def _data_settings(table, formula, base_dir):
    if "x" not in table and "table" not in table:
        fail("data.x", "is missing", 'give x = "X.npy" with y = "y.npy", or a table: '
             'table = "flights.parquet" with [model] formula = "y ~ a + b"')
    if "x" in table and "table" in table:
        fail("data.table", "is given together with data.x", "give the data once: x or table")
    missing = one_of("data.missing", table.get("missing", "drop"), MISSING_CHOICES,
                     "missing-value policy")
    cache_dir = table.get("cache_dir")
    if cache_dir is not None:
        cache_dir = Path(cache_dir).expanduser()
        cache_dir = cache_dir if cache_dir.is_absolute() else Path(base_dir) / cache_dir
        check_folder("data.cache_dir", cache_dir)
    common = {"add_intercept": table.get("add_intercept", True),
              "standardize": table.get("standardize", False), "missing": missing,
              "cache_dir": cache_dir, "reuse_setup": table.get("reuse_setup", True)}
    if "table" in table:
        return _table_settings(table, formula, base_dir, common)
    if formula is not None:
        fail("model.formula", "needs [data] table", 'give the data as table = "<file>" (a '
             "Parquet or CSV file) instead of x")
    x = DataSource.parse(table["x"], base_dir)
    _check_exists(x, "X")
    if x.is_table:
        if "y" not in table:
            fail("data.y", "is missing", 'name the response column of the table: y = "<column>"')
        y = table["y"]
        rows = {key: table.get(key) for key in ROW_KEYS}
    else:
        if x.path.suffix.lower() not in ARRAY_SUFFIXES:
            fail("X", f"{x.path.name} has an unsupported file type {x.path.suffix!r}",
                 "give a .npy, .npz, .csv or .parquet file")
        if "y" in table:
            y = DataSource.parse(table["y"], base_dir)
        elif x.path.suffix.lower() == ".npz":
            y = DataSource(x.path, None)
        else:
            fail("data.y", "is missing", 'give the response file: y = "y.npy"')
        _check_exists(y, "y")
        rows = {key: None if table.get(key) is None else DataSource.parse(table[key], base_dir)
                for key in ROW_KEYS}
        for key, source in rows.items():
            if source is not None:
                _check_exists(source, f"data.{key}")
    columns = table.get("columns")
    return DataSettings(x=x, y=y, columns=None if columns is None else tuple(columns),
                        **rows, **common)


def _table_settings(table, formula, base_dir, common):
    """``[data] table``: a file read by a formula, or by y and columns."""
    source = DataSource.parse(table["table"], base_dir)
    _check_exists(source, "data.table")
    if source.path.suffix.lower() not in TABLE_SUFFIXES:
        fail("data.table", f"{source.path.name} has an unsupported file type "
             f"{source.path.suffix!r}", "give a .parquet or .csv file")
    columns = table.get("columns")
    if formula is not None:
        for key in ("y", "columns", "add_intercept"):
            if key in table:
                fail(f"data.{key}", "is given together with model.formula",
                     "remove it: the formula names the response and the terms, and decides "
                     "the intercept (- 1 in the formula removes it)")
    elif "y" not in table or columns is None:
        fail("data.table", "needs a formula, or y and columns",
             'give [model] formula = "y ~ a + b", or y = "<response column>" and columns = '
             '["a", "b"] (every column is not taken by default: an identifier would go in as '
             "a covariate)")
    return DataSettings(x=None, y=table.get("y"),
                        columns=None if columns is None else tuple(columns),
                        table=source, **{key: table.get(key) for key in ROW_KEYS}, **common)


def _check_exists(source, field):
    if not source.path.exists():
        fail(field, f'file "{source.path}" does not exist',
             "check the path (relative paths are relative to the folder of the config file)")
    if not source.path.is_file():
        fail(field, f'"{source.path}" is a folder, not a file',
             "give a .npy, .npz or .csv file (or .parquet)")


__all__ = ["RunConfig", "DataSettings", "ModelSettings", "load_config", "config_from_dict",
           "named_fields", "SCHEMA"]
