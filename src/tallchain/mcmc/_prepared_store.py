"""A store of `Preparation`s on disk, reused across runs of the same data and model (private).

The mode, the Laplace approximation and the control-variate row caches are the costly part of
a run's set-up (O(N d^2)); they depend only on the model (data, family, options, prior), so a
later run of the same model, with any seed or sampler setting, reads them back instead.

One entry per key, a folder ``preparation-<16 hex>/`` in the store folder, holding
``meta.json`` (the small fields, what the entry was made for, a CRC-32 of every array) and one
``.npy`` file per array. The key hashes the model's fingerprint (`model.fingerprint`), the
proxy orders cached and `STORE_VERSION`. Entries are written into a temporary folder and
renamed into place (as the data cache does, `tallchain.data._cache`), so an interrupted write
leaves no torn entry; an entry that cannot be read, or does not match what it claims, is
ignored with a `DataWarning`, made again and rewritten. The row caches (N x 4) are opened
memory-mapped read-only: a large cache costs no copy.
"""

import hashlib
import json
import os
import shutil
import time
import warnings
import zlib
from pathlib import Path

import numpy as np

from ..exceptions import DataWarning
from ..posterior import ControlVariateCache, LaplaceApproximation
from ._setup import Preparation, prepare

#: Bump when what `prepare` computes changes, so that older entries are no longer used.
STORE_VERSION = 1
PREFIX = "preparation-"
_CACHE_ARRAYS = ("beta_star", "aux", "g_star", "H_star")
_BAD_ENTRY = (OSError, ValueError, KeyError, TypeError, EOFError)


def entry_for(model, folder, proxy_orders=(2, 0)):
    """``(path, made_for)``: the store entry of ``model`` with the caches of ``proxy_orders``
    in ``folder``, and the JSON record it must hold (one pass over the data)."""
    made_for = json.loads(json.dumps(
        {"store version": STORE_VERSION, "proxy orders": sorted(set(proxy_orders)),
         "n_rows": model.n_rows, "n_coef": model.n_coef, **model.fingerprint()}))
    key = hashlib.sha256(json.dumps(made_for, sort_keys=True).encode()).hexdigest()[:16]
    return Path(folder) / f"{PREFIX}{key}", made_for


def load_or_prepare(model, folder, *, proxy_orders=(2, 0), make=True):
    """The `Preparation` of ``model``: read from the store in ``folder``, else made and stored.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression, NegativeBinomialRegression
        or BinomialRegression
    folder : path-like
        The store folder (created when missing). The command line uses the data's cache
        folder (``[data] cache_dir``, or ``.tallchain-cache`` beside the data file).
    proxy_orders : sequence of int, default=(2, 0)
        Orders of the Taylor proxies to cache, as in `prepare`.
    make : bool, default=True
        False: only read the store; nothing is made or written when it holds no entry.

    Returns
    -------
    preparation : Preparation or None
        Pass it to `sample` (``preparation=...``). Read from the store, its ``parts`` count
        no full-data pass, and its row caches are read-only memory maps. None only with
        ``make=False`` and no usable entry.
    record : dict
        ``store``: ``"loaded"``, ``"written"``, ``"not written"`` (the folder could not be
        written; a `DataWarning` says why) or ``"absent"`` (``make=False``); ``entry``: the
        entry's folder; ``seconds``: the time spent, fingerprint included.

    Warns
    -----
    DataWarning
        An entry that could not be read or did not match (made again and rewritten), or a
        folder that could not be written.

    Notes
    -----
    Draws of a run from a stored preparation are bitwise equal to those of a run that made it
    in-process with the same seed. The entry is found again only for the same data values,
    family, family options, prior and proxy orders; delete a ``preparation-*`` folder (or
    call `clear_preparations`) to free its space.
    """
    t0 = time.perf_counter()
    path, made_for = entry_for(model, folder, proxy_orders)
    found = _open(path, made_for, model)
    if found is not None:
        store = "loaded"
    elif not make:
        store = "absent"
    else:
        found = prepare(model, proxy_orders=proxy_orders)
        store = "written" if _write(found, path, made_for) else "not written"
    seconds = time.perf_counter() - t0
    return found, {"store": store, "entry": str(path.absolute()), "seconds": seconds}


def clear_preparations(folder):
    """Delete every stored preparation in ``folder`` (and any left-over temporary folder of
    an interrupted write); return the names removed."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    removed = []
    for entry in sorted(folder.iterdir()):
        if entry.is_dir() and entry.name.startswith((PREFIX, f".tmp-{PREFIX}")):
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry.name)
    return removed


def _arrays(prep):
    """The arrays of a `Preparation` by file name."""
    lap = prep.laplace
    arrays = {"mode": lap.mode, "precision": lap.precision, "cov": lap.cov}
    if lap.loglik_derivatives is not None:
        arrays["loglik_gradient"], arrays["loglik_hessian"] = lap.loglik_derivatives
    for order, cache in prep.caches.items():
        arrays.update({f"order{order}_{name}": getattr(cache, name) for name in _CACHE_ARRAYS})
    return {name: np.ascontiguousarray(a, dtype=np.float64) for name, a in arrays.items()}


def _crc(a):
    return f"{zlib.crc32(memoryview(np.ascontiguousarray(a)).cast('B')):08x}"


def _write(prep, path, made_for):
    """Write ``prep`` as the entry ``path``; False (with a `DataWarning`) when the folder
    cannot be written."""
    tmp = path.with_name(f".tmp-{path.name}-{os.getpid()}")
    arrays = _arrays(prep)
    lap = prep.laplace
    meta = {"made for": made_for, "n_evaluations": int(lap.n_evaluations),
            "message": lap.message, "orders": sorted(prep.caches),
            "arrays": {name: {"shape": list(a.shape), "crc32": _crc(a)}
                       for name, a in arrays.items()}}
    try:
        tmp.mkdir(parents=True, exist_ok=True)
        for name, a in arrays.items():
            np.save(tmp / f"{name}.npy", a, allow_pickle=False)
        (tmp / "meta.json").write_text(json.dumps(meta, indent=1))   # last: marks it complete
        try:
            os.replace(tmp, path)
        except OSError:   # another process wrote the same entry first: keep theirs
            shutil.rmtree(tmp, ignore_errors=True)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        warnings.warn(f"could not store the run's set-up in {path.parent} ({exc.strerror}); "
                      "the next run makes it again; make that folder writable or set "
                      "data.cache_dir", DataWarning, stacklevel=3)
        return False
    return True


def _open(path, made_for, model):
    """The `Preparation` stored at ``path``; None when there is none, or (with a
    `DataWarning`) when it cannot be read or does not match ``made_for``."""
    if not path.exists():
        return None
    try:
        return _read(path, json.loads((path / "meta.json").read_text()), made_for, model)
    except _BAD_ENTRY as exc:
        shutil.rmtree(path, ignore_errors=True)   # so that the rename can put a good one there
        warnings.warn(f"ignored the stored set-up {path} ({_reason(exc)}); it is made again and "
                      "rewritten", DataWarning, stacklevel=3)
        return None


def _reason(exc):
    return exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc) or \
        type(exc).__name__


def _read(path, meta, made_for, model):
    if meta["made for"] != made_for:
        raise ValueError("it was made for another model")
    arrays = {}
    for name, info in meta["arrays"].items():
        a = np.load(path / f"{name}.npy", mmap_mode="r", allow_pickle=False)
        if a.dtype != np.float64 or list(a.shape) != info["shape"] or _crc(a) != info["crc32"]:
            raise ValueError(f"{name}.npy does not hold what meta.json records")
        # the small arrays in memory; the row caches stay memory-mapped (read-only)
        arrays[name] = a if name.endswith("_aux") else np.array(a)
    d = model.n_coef
    if arrays["mode"].shape != (d,):
        raise ValueError(f"its mode has {arrays['mode'].shape} coefficients, not {d}")
    known = ((arrays["loglik_gradient"], arrays["loglik_hessian"])
             if "loglik_gradient" in arrays else None)
    laplace = LaplaceApproximation(arrays["mode"], arrays["precision"], arrays["cov"],
                                   int(meta["n_evaluations"]), str(meta["message"]), known)
    caches = {}
    for order in meta["orders"]:
        parts = [arrays[f"order{order}_{name}"] for name in _CACHE_ARRAYS]
        if parts[1].shape != (model.n_rows, 4):
            raise ValueError(f"its order-{order} row cache has {parts[1].shape[0]} rows, "
                             f"not {model.n_rows}")
        caches[int(order)] = ControlVariateCache(int(order), *parts)
    parts = {"mode_seconds": 0.0, "mode_passes": 0, "cache_seconds": 0.0, "cache_passes": 0}
    return Preparation(laplace, caches, model.n_rows, model.n_coef, parts)
