"""The store of preparations (`load_or_prepare`): what it keys on, what it gives back, and
what it does with a damaged entry.

Bitwise comparisons only where the same code runs twice: `np.save`/`np.load` return the
stored float64 arrays bit for bit, and `sample` from a stored preparation runs the same
kernels, with the same seed, as `sample` that prepares in-process (tests/conftest.py).
The mode itself is checked against an outside fit: statsmodels' logistic regression
(Logit, Newton) of the same data under a flat prior.
"""

import json
import warnings

import numpy as np
import pytest

from tallchain.exceptions import DataWarning
from tallchain.mcmc import clear_preparations, load_or_prepare, prepare, sample
from tallchain.models import GaussianPrior, LogisticRegression, PoissonRegression

RUN = dict(method="penalty-mala", chains=2, warmup=100, draws=100, seed=5, progress=False)


def _logistic(rng, n=600, **options):
    X = rng.standard_normal((n, 2))
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-(0.2 + X @ [0.8, -0.4])))).astype(float)
    return LogisticRegression(X, y, **options)


def _entries(folder):
    return sorted(p.name for p in folder.glob("preparation-*"))


def test_stored_arrays_come_back_bitwise_and_the_aux_read_only(rng, tmp_path):
    model = _logistic(rng)
    made, record = load_or_prepare(model, tmp_path)
    assert record["store"] == "written" and made.parts["mode_passes"] > 0
    back, record = load_or_prepare(model, tmp_path)
    assert record["store"] == "loaded"
    assert back.parts == {"mode_seconds": 0.0, "mode_passes": 0, "cache_seconds": 0.0,
                          "cache_passes": 0}
    for name in ("mode", "precision", "cov"):
        np.testing.assert_array_equal(getattr(back.laplace, name), getattr(made.laplace, name))
    for got, want in zip(back.laplace.loglik_derivatives, made.laplace.loglik_derivatives):
        np.testing.assert_array_equal(got, want)
    assert sorted(back.caches) == [0, 2]
    for order, cache in made.caches.items():
        for name in ("beta_star", "aux", "g_star", "H_star"):
            np.testing.assert_array_equal(getattr(back.caches[order], name),
                                          getattr(cache, name))
    aux = back.caches[2].aux
    assert isinstance(aux, np.memmap) and not aux.flags.writeable
    with pytest.raises(ValueError):
        aux[0, 0] = 1.0


def test_the_stored_mode_is_the_maximum_likelihood_fit(rng, tmp_path):
    # statsmodels Logit (Newton) of the same rows. Under a N(0, 1e6^2) prior the mode moves
    # from the MLE by about cov * beta / 1e12, far below the solvers' tolerances, so the two
    # agree to 1e-6 relative (two solvers with their own stopping rules: not in ulps).
    sm = pytest.importorskip("statsmodels.api")
    model = _logistic(rng, prior=GaussianPrior(sd=1e6))
    load_or_prepare(model, tmp_path)
    back, _ = load_or_prepare(model, tmp_path)
    fit = sm.Logit(model.y, sm.add_constant(np.asarray(model.X))).fit(disp=0, tol=1e-12)
    np.testing.assert_allclose(back.laplace.mode, fit.params, rtol=1e-6)


def test_draws_from_the_store_equal_draws_prepared_in_process(rng, tmp_path):
    model = _logistic(rng)
    load_or_prepare(model, tmp_path, proxy_orders=(2,))
    stored, record = load_or_prepare(model, tmp_path, proxy_orders=(2,))
    assert record["store"] == "loaded"
    fresh = sample(model, **RUN)
    again = sample(model, preparation=stored, **RUN)
    np.testing.assert_array_equal(again.draws, fresh.draws)
    assert again.setup_parts["mode_passes"] == 0 and again.setup_parts["cache_passes"] == 0
    # power: another seed from the same store gives other draws
    assert not np.array_equal(sample(model, preparation=stored, **{**RUN, "seed": 6}).draws,
                              fresh.draws)


def test_what_the_key_covers(rng, tmp_path):
    X = rng.standard_normal((500, 2))
    y = rng.poisson(np.exp(0.1 + X @ [0.3, -0.2])).astype(float)
    offset = rng.normal(0.0, 0.1, 500)
    base = PoissonRegression(X, y, offset=offset)
    load_or_prepare(base, tmp_path)
    assert load_or_prepare(PoissonRegression(X.copy(), y.copy(), offset=offset.copy()),
                           tmp_path)[1]["store"] == "loaded"   # equal values: the same key
    changed_y = y.copy()
    changed_y[3] += 1.0
    changed_offset = offset.copy()
    changed_offset[0] = np.nextafter(offset[0], 1.0)   # one ulp
    variants = [PoissonRegression(X, changed_y, offset=offset),
                PoissonRegression(X, y, offset=changed_offset),
                PoissonRegression(X, y, offset=offset, prior=GaussianPrior(sd=3.0))]
    for model in variants:
        assert load_or_prepare(model, tmp_path)[1]["store"] == "written"
    assert load_or_prepare(base, tmp_path, proxy_orders=(2,))[1]["store"] == "written"
    assert len(_entries(tmp_path)) == 5
    assert len(clear_preparations(tmp_path)) == 5 and _entries(tmp_path) == []


@pytest.mark.parametrize("damage", ["truncated aux", "flipped byte", "bad meta", "no meta",
                                    "no array"])
def test_a_damaged_entry_is_made_again_with_a_warning(rng, tmp_path, damage):
    model = _logistic(rng)
    made, record = load_or_prepare(model, tmp_path)
    entry = tmp_path / _entries(tmp_path)[0]
    if damage == "truncated aux":
        path = entry / "order2_aux.npy"
        path.write_bytes(path.read_bytes()[:-8])
    elif damage == "flipped byte":
        path = entry / "mode.npy"
        raw = bytearray(path.read_bytes())
        raw[-1] ^= 0x01
        path.write_bytes(bytes(raw))
    elif damage == "bad meta":
        (entry / "meta.json").write_text("{not json")
    elif damage == "no meta":
        (entry / "meta.json").unlink()
    else:
        (entry / "cov.npy").unlink()
    with pytest.warns(DataWarning, match="ignored the stored set-up"):
        again, record = load_or_prepare(model, tmp_path)
    assert record["store"] == "written" and again.parts["mode_passes"] > 0
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        back, record = load_or_prepare(model, tmp_path)
    assert record["store"] == "loaded"
    np.testing.assert_array_equal(back.laplace.mode, made.laplace.mode)


def test_an_unwritable_folder_warns_and_still_prepares(rng, tmp_path):
    model = _logistic(rng)
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    with pytest.warns(DataWarning, match="could not store"):
        prep, record = load_or_prepare(model, blocker / "store")
    assert record["store"] == "not written"
    reference = prepare(model)
    # the same code twice on the same data: bitwise
    np.testing.assert_array_equal(prep.laplace.mode, reference.laplace.mode)


def test_no_temporary_folder_is_left_and_meta_says_what_it_was_made_for(rng, tmp_path):
    model = _logistic(rng)
    load_or_prepare(model, tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == _entries(tmp_path)
    meta = json.loads((tmp_path / _entries(tmp_path)[0] / "meta.json").read_text())
    assert meta["made for"]["family"] == "logistic"
    assert meta["made for"]["proxy orders"] == [0, 2]
    assert meta["n_evaluations"] == prepare(model).laplace.n_evaluations
