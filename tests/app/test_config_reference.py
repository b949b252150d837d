"""docs/config.md against the config schema and the defaults in the code, so neither drifts.

The reference is the code itself (`_config.SCHEMA`, `SamplerSettings`, `GaussianPrior`, the
resolved settings of a minimal config): every key documented, no key undocumented, every
stated default the one the code applies.
"""

import dataclasses
import inspect
import json
import re
from pathlib import Path

import numpy as np
import pytest

import tallchain as tc
from tallchain.app import _config as config

DOC = Path(__file__).resolve().parents[2] / "docs" / "config.md"
ROW = re.compile(r"^\| `(?P<key>\w+)` \| (?P<type>[^|]+) \| (?P<default>[^|]+) \| (?P<meaning>.+) \|$")


def _tables(text):
    """{section: {key: (type, default, meaning)}} from the '## [section]' tables."""
    tables, section = {}, None
    for line in text.splitlines():
        head = re.match(r"^## \[(\w+)\]$", line)
        if head:
            section = tables.setdefault(head[1], {})
        elif section is not None and (row := ROW.match(line)):
            assert row["key"] not in section, f"{row['key']} documented twice"
            section[row["key"]] = (row["type"].strip(), row["default"].strip(),
                                   row["meaning"].strip())
    return tables


@pytest.fixture(scope="module")
def documented():
    return _tables(DOC.read_text(encoding="utf-8"))


def test_every_key_and_no_other_is_documented(documented):
    assert list(documented) == list(config.SCHEMA)
    for section, keys in config.SCHEMA.items():
        assert set(documented[section]) == set(keys), section
    # power: the parser sees a key that the schema lacks
    assert "bogus" in _tables(DOC.read_text().replace("| `dir` |", "| `bogus` |"))["output"]


def test_types_are_the_schema_types(documented):
    for section, keys in config.SCHEMA.items():
        for key, kind in keys.items():
            if kind is not None:          # [sampler]: checked by SamplerSettings
                assert documented[section][key][0] == kind[0], f"{section}.{key}"


def _toml(value):
    if value is None:
        return "none"
    return json.dumps(value) if isinstance(value, str) else str(value).lower() \
        if isinstance(value, bool) else str(value)


def test_sampler_defaults_are_the_settings_defaults(documented):
    for f in dataclasses.fields(tc.SamplerSettings):
        assert documented["sampler"][f.name][1] == _toml(f.default), f.name


def test_data_and_model_defaults_are_applied(documented, tmp_path, rng):
    np.save(tmp_path / "X.npy", rng.standard_normal((5, 2)))
    np.save(tmp_path / "y.npy", np.zeros(5))
    (tmp_path / "run.toml").write_text('[data]\nx = "X.npy"\ny = "y.npy"\n'
                                       '[model]\nfamily = "logistic"\n')
    cfg = config.load_config(tmp_path / "run.toml")
    for key in ("add_intercept", "standardize", "missing", "cache_dir", "offset", "columns",
                "table"):
        assert documented["data"][key][1] == _toml(getattr(cfg.data, key)), key
    assert documented["model"]["family"][1] == "required"
    assert documented["model"]["formula"][1] == _toml(cfg.model.formula)
    prior = inspect.signature(tc.GaussianPrior).parameters
    for key in ("mean", "sd", "cov"):
        assert documented["model"][f"prior_{key}"][1] == _toml(prior[key].default), key
    assert cfg.output_dir == tmp_path / "runs" / "run"          # "runs/<config name>"
    assert "runs/<config name>" in documented["output"]["dir"][2]
    assert dict(cfg.compute) == {}                              # [compute]: none by default
    assert documented["output"]["interval"][1] == _toml(cfg.interval)
    # scheduler and workers default per command; connect_seconds is the run option's default
    connect = {f.name: f.default for f in dataclasses.fields(tc.RunOptions)}["connect_seconds"]
    assert documented["compute"]["connect_seconds"][1] == _toml(connect)
    assert {documented["compute"][k][1] for k in ("scheduler", "workers")} == {"none"}


def test_readme_links_the_reference():
    readme = (DOC.parents[1] / "README.md").read_text(encoding="utf-8")
    assert "docs/config.md" in readme
