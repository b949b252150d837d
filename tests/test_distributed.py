"""Sweeps on a real Dask LocalCluster (2 worker processes): the same numbers as local processes,
a worker killed mid-sweep, and resume after an interrupt."""

import os
import signal
import threading
import time

import numpy as np
import pytest

import tallchain as tc
from tallchain.sweep import sweep

distributed = pytest.importorskip("distributed")
pytestmark = pytest.mark.slow

NUMBERS = ("method", "step_size", "batch_size", "ks_max", "ks_ratio_max", "ess_bulk_min",
           "acceptance", "log_ratio_sd_mean", "data_evals_per_draw", "verdict")


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(12)
    X = rng.standard_normal((2000, 2))
    y = (rng.random(2000) < 1 / (1 + np.exp(-(X @ [0.8, -0.4])))).astype(float)
    return tc.LogisticRegression(X, y)


GRID = dict(methods=["penalty-mala", "sgld"], step_sizes=[0.25, 0.5, 1.0, 2.0], draws=400,
            warmup=200, chains=2, seed=5)


def _numbers(res):
    """The table's numbers (timings aside), with NaN made comparable."""
    def same(v):
        return "nan" if isinstance(v, float) and v != v else v
    return [tuple(same(r[k]) for k in NUMBERS) for r in res.rows]


@pytest.fixture(scope="module")
def local(model, tmp_path_factory):
    return sweep(model, scheduler="processes", workers=2,
                 cache_dir=tmp_path_factory.mktemp("ref"), **GRID)


@pytest.fixture()
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None)
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


def test_dask_local_with_one_or_two_workers_equals_local_processes(model, local, tmp_path):
    for workers in (1, 2):
        res = sweep(model, scheduler="dask-local", workers=workers, cache_dir=tmp_path, **GRID)
        assert _numbers(res) == _numbers(local)


def test_a_worker_killed_mid_sweep_is_replaced_and_the_table_completes(model, local, client,
                                                                        tmp_path):
    lost = {}

    def kill_one_busy_worker():
        deadline = time.time() + 60
        while time.time() < deadline and not lost:
            busy = {w: keys for w, keys in client.processing().items() if keys}
            if busy:
                worker, keys = next(iter(busy.items()))
                pid = client.run(os.getpid, workers=[worker])[worker]
                lost["keys"] = list(keys)
                os.kill(pid, signal.SIGKILL)
                return
            time.sleep(0.05)

    killer = threading.Thread(target=kill_one_busy_worker)
    killer.start()
    res = sweep(model, scheduler=client, cache_dir=tmp_path, **GRID)
    killer.join()
    assert lost, "no worker was busy to kill"
    print(f"killed a worker while it ran {lost['keys']}; those tasks were retried")
    assert len(res.rows) == len(local.rows) and all(r is not None for r in res.rows)
    assert _numbers(res) == _numbers(local)


def test_resume_after_interrupt_runs_only_the_missing_points(model, local, tmp_path):
    seen = []

    def stop_after_three(row):
        seen.append(row)
        if len(seen) == 3:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        sweep(model, scheduler="serial", cache_dir=tmp_path, on_row=stop_after_three, **GRID)
    rerun = []
    res = sweep(model, scheduler="serial", cache_dir=tmp_path, done_rows=seen,
                on_row=rerun.append, **GRID)
    assert len(rerun) == len(local.rows) - 3
    assert _numbers(res) == _numbers(local)


def test_missing_dask_is_a_clear_error(monkeypatch, model):
    import builtins

    real = builtins.__import__

    def no_distributed(name, *args, **kwargs):
        if name == "distributed":
            raise ImportError("no distributed")
        return real(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_distributed)
    with pytest.raises(tc.InputError, match=r"scheduler: .* pip install 'tallchain\[distributed\]'"):
        sweep(model, scheduler="dask-local", **GRID)
