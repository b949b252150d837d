"""`tallchain run` keeps its set-up (mode, Laplace, row caches) in the data's cache folder and
reads it back on the next run of the same data and model.

Bitwise comparisons: the second run samples with the same code and seed from the stored
arrays, which `np.save`/`np.load` give back bit for bit, so its draws must equal the first's
exactly (the same code running twice, see tests/conftest.py).
"""

import json

import arviz as az
import numpy as np
import pytest

from tallchain.app import _cli as cli
from tallchain.app import _service
from tallchain.app._config import load_config

FAST = """\
[sampler]
method = "penalty-mala"
chains = 2
draws = 100
warmup = 100
seed = 3
"""


def _config(folder, rng, *, n=400, data_extra=""):
    """A logistic regression of 400 invented rows, as X.npy and y.npy beside run.toml."""
    X = rng.standard_normal((n, 2))
    arrays = {"X": X, "y": (rng.random(n) < 1.0 / (1.0 + np.exp(-(0.3 + X @ [1.0, -0.5]))))}
    for name, values in arrays.items():
        np.save(folder / f"{name}.npy", values.astype(float))
    lines = ["[data]", 'x = "X.npy"', 'y = "y.npy"', data_extra, "[model]",
             'family = "logistic"', FAST]
    (folder / "run.toml").write_text("\n".join(lines))
    return folder / "run.toml"


def _run(capsys, config, out, *extra):
    code = cli.main(["run", str(config), "--out", str(out), *map(str, extra)])
    text, err = capsys.readouterr()
    assert code == 0, err
    record = json.loads((out / "run.json").read_text())
    draws = az.from_netcdf(out / "posterior.nc").posterior["coef"].values
    return record["timing"], draws, text


def _entries(folder):
    return sorted(p.name for p in folder.glob("preparation-*"))


def test_second_run_reads_the_store_and_draws_the_same(tmp_path, rng, capsys):
    config = _config(tmp_path, rng)
    first, draws1, text1 = _run(capsys, config, tmp_path / "a")
    second, draws2, text2 = _run(capsys, config, tmp_path / "b")
    store = tmp_path / ".tallchain-cache"
    assert len(_entries(store)) == 1
    assert first["setup_store"] == "written" and first["setup_mode_passes"] > 0
    assert first["setup_cache_passes"] > 0
    assert second["setup_store"] == "loaded"
    assert second["setup_mode_passes"] == 0 and second["setup_cache_passes"] == 0
    entry = store / _entries(store)[0]
    assert f"mode and caches stored for later runs of this data and model in {entry}" in text1
    assert f"mode and caches read from an earlier run's store: {entry}" in text2
    np.testing.assert_array_equal(draws2, draws1)   # bitwise: same code, same seed


def test_another_seed_still_reads_the_store(tmp_path, rng, capsys):
    config = _config(tmp_path, rng)
    _run(capsys, config, tmp_path / "a")
    timing, _, _ = _run(capsys, config, tmp_path / "b", "--seed", 7)
    assert timing["setup_store"] == "loaded"


@pytest.mark.parametrize("change", ["data", "prior", "family option"])
def test_a_changed_model_misses_the_store(tmp_path, rng, capsys, change):
    config = _config(tmp_path, rng)
    _run(capsys, config, tmp_path / "a")
    if change == "data":
        X = np.load(tmp_path / "X.npy")
        X[17, 1] += 1e-9   # one value, in its last digits
        np.save(tmp_path / "X.npy", X)
    elif change == "prior":
        config.write_text(config.read_text().replace('family = "logistic"',
                                                     'family = "logistic"\nprior_sd = 3.0'))
    else:   # a family option: a negative binomial's dispersion prior
        y = (np.load(tmp_path / "y.npy") * 3).round()
        np.save(tmp_path / "y.npy", y)
        config.write_text(config.read_text().replace('"logistic"', '"negative-binomial"'))
        _run(capsys, config, tmp_path / "b")
        config.write_text(config.read_text().replace(
            '"negative-binomial"', '"negative-binomial"\ndispersion_prior = [3.0, 1.0]'))
    timing, _, _ = _run(capsys, config, tmp_path / "c")
    assert timing["setup_store"] == "written"
    assert len(_entries(tmp_path / ".tallchain-cache")) == (3 if change == "family option"
                                                             else 2)


def test_a_corrupt_entry_is_made_again_with_a_warning(tmp_path, rng, capsys):
    config = _config(tmp_path, rng)
    _, draws1, _ = _run(capsys, config, tmp_path / "a")
    entry = tmp_path / ".tallchain-cache" / _entries(tmp_path / ".tallchain-cache")[0]
    aux = next(entry.glob("order*_aux.npy"))
    aux.write_bytes(aux.read_bytes()[:-40])   # truncated
    code = cli.main(["run", str(config), "--out", str(tmp_path / "b")])
    _, err = capsys.readouterr()
    assert code == 0
    assert "ignored the stored set-up" in err and "Traceback" not in err
    record = json.loads((tmp_path / "b" / "run.json").read_text())
    assert record["timing"]["setup_store"] == "written"
    timing, draws3, _ = _run(capsys, config, tmp_path / "c")   # the rewritten entry is good
    assert timing["setup_store"] == "loaded"
    np.testing.assert_array_equal(draws3, draws1)


def test_reuse_setup_false_and_cache_dir(tmp_path, rng, capsys):
    config = _config(tmp_path, rng, data_extra="reuse_setup = false")
    timing, _, _ = _run(capsys, config, tmp_path / "a")
    assert "setup_store" not in timing and not (tmp_path / ".tallchain-cache").exists()
    config = _config(tmp_path, rng, data_extra='cache_dir = "elsewhere"')
    _run(capsys, config, tmp_path / "b")
    assert len(_entries(tmp_path / "elsewhere")) == 1
    assert not (tmp_path / ".tallchain-cache").exists()


def test_a_resume_only_reads_the_store(tmp_path, rng, capsys):
    # A resume must refuse a changed problem before the mode is searched for (sample checks
    # the checkpoint first): it reads an entry but never makes one.
    config = load_config(_config(tmp_path, rng))
    model, _ = _service.build_model(config)
    assert _service.stored_setup(config, model, resume=True) is None
    assert not (tmp_path / ".tallchain-cache").exists()
    prep, record = _service.stored_setup(config, model)   # power: a fresh run makes one
    assert record["store"] == "written"
    again, record = _service.stored_setup(config, model, resume=True)
    assert record["store"] == "loaded"
    np.testing.assert_array_equal(again.laplace.mode, prep.laplace.mode)
