"""Sweeps on a real Dask LocalCluster (2 worker processes): the same numbers as local processes,
a worker killed mid-sweep, and resume after an interrupt."""

import os
import signal
import threading
import time

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import SweepJournal, sweep

distributed = pytest.importorskip("distributed")
pytestmark = pytest.mark.slow

NUMBERS = ("method", "step_size", "batch_size", "ks_max", "ks_ratio_max", "ess_bulk_min",
           "acceptance_rate", "log_ratio_sd_mean", "data_evaluations_per_draw", "verdict")


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(12)
    X = rng.standard_normal((2000, 2))
    y = (rng.random(2000) < 1 / (1 + np.exp(-(X @ [0.8, -0.4])))).astype(float)
    return tc.LogisticRegression(X, y)


GRID = dict(methods=["penalty-mala", "sgld"], step_sizes=[0.25, 0.5, 1.0, 2.0], draws=400,
            warmup=200, chains=2, seed=5)


def _numbers(res):
    """The table's numbers (timings aside), with NaN made comparable. Compared exactly: the
    same kernel from the same per-point seeds, whatever scheduler ran it."""
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
                                       dashboard_address=":0")
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


def _start_killing(client, victims, seconds=120):
    """A thread that polls ``victims(client)`` until it names workers, then SIGKILLs them;
    ``lost`` gets what ``victims`` returned beside them."""
    lost = {}

    def kill():
        deadline = time.time() + seconds
        while time.time() < deadline and not lost:
            found = victims(client)
            if found:
                workers, record = found
                pids = client.run(os.getpid, workers=list(workers))
                lost.update(record, workers=len(pids))
                for pid in pids.values():
                    os.kill(pid, signal.SIGKILL)
                return
            time.sleep(0.05)

    killer = threading.Thread(target=kill)
    killer.start()
    return lost, killer


def _start_killing_one_busy_worker(client):
    """Kill the first worker seen running a task; ``lost["keys"]`` names its tasks."""
    def busy(client):
        for worker, keys in client.processing().items():
            if keys:
                return [worker], {"keys": list(keys)}
    return _start_killing(client, busy)


def _start_killing_the_holders_of(client, prefix):
    """Once a task runs, kill every worker holding data whose key starts with ``prefix``, so
    that the cluster loses its every copy."""
    def holders(client):
        if any(client.processing().values()):
            found = {w for key, ws in client.who_has().items()
                     if str(key).startswith(prefix) for w in ws}
            if found:
                return found, {}
    return _start_killing(client, holders)


def _count_scatters(monkeypatch):
    from tallchain.executors import TaskPool

    calls = {"n": 0}
    original = TaskPool._scatter_shared

    def counted(self):
        calls["n"] += 1
        return original(self)

    monkeypatch.setattr(TaskPool, "_scatter_shared", counted)
    return calls


def test_dask_local_with_one_or_two_workers_equals_local_processes(model, local, tmp_path):
    for workers in (1, 2):
        res = sweep(model, scheduler="dask-local", workers=workers, cache_dir=tmp_path, **GRID)
        assert _numbers(res) == _numbers(local)


def test_a_worker_killed_mid_sweep_is_replaced_and_the_table_completes(model, local, client,
                                                                        tmp_path):
    lost, killer = _start_killing_one_busy_worker(client)
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
            raise KeyboardInterrupt("stop after three rows")

    with pytest.raises(KeyboardInterrupt, match="^stop after three rows$"):
        sweep(model, scheduler="serial", cache_dir=tmp_path,
              journal=SweepJournal(on_row=stop_after_three), **GRID)
    rerun = []
    res = sweep(model, scheduler="serial", cache_dir=tmp_path,
                journal=SweepJournal(done_rows=seen, on_row=rerun.append), **GRID)
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


# --- the chains of one run as Dask tasks ---------------------------------------------------------

RUN = dict(method="penalty-mala", chains=2, draws=1500, warmup=600, seed=17)


def _same_run(a, b):
    # The same kernel from the same chain states, wherever it ran: bitwise equal.
    assert np.array_equal(a.draws, b.draws)
    assert a.stats.keys() == b.stats.keys() and "accepted" in a.stats
    for key in a.stats:
        assert np.array_equal(a.stats[key], b.stats[key], equal_nan=True), key
    assert a.data_evaluations == b.data_evaluations
    assert a.settings == b.settings


@pytest.fixture(scope="module")
def threads_run(model):
    return tc.sample(model, **RUN)


def test_chains_on_a_cluster_or_processes_equal_chains_in_threads(model, threads_run, client):
    _same_run(tc.sample(model, scheduler=client, **RUN), threads_run)
    _same_run(tc.sample(model, scheduler="processes", workers=2, **RUN), threads_run)


def _big_logistic(rng):
    """30k rows: a full-data MALA chain's rounds last long enough for a worker to be caught."""
    X = rng.standard_normal((30_000, 3))
    y = (rng.random(30_000) < 1 / (1 + np.exp(-(X @ [0.3, -0.2, 0.1])))).astype(float)
    return tc.LogisticRegression(X, y)


def test_a_worker_killed_mid_run_is_replaced_and_its_chain_rerun(client, rng):
    big = _big_logistic(rng)
    settings = dict(method="mala", chains=2, draws=3000, warmup=500, seed=3)
    lost, killer = _start_killing_one_busy_worker(client)
    on_cluster = tc.sample(big, scheduler=client, **settings)
    killer.join()
    assert lost, "no worker was busy to kill"
    print(f"killed a worker while it ran {lost['keys']}; the chain rounds were run again")
    _same_run(on_cluster, tc.sample(big, **settings))


def test_a_run_whose_job_is_lost_with_its_workers_scatters_it_again(client, rng, monkeypatch):
    # Every worker holding the scattered job is killed while a round runs: Dask cannot recover
    # scattered data, so the pool must scatter the job again and resend the cancelled rounds.
    big = _big_logistic(rng)
    settings = dict(method="mala", chains=2, draws=1500, warmup=500, seed=3)
    scatters = _count_scatters(monkeypatch)
    lost, killer = _start_killing_the_holders_of(client, "ChainJob-")
    on_cluster = tc.sample(big, scheduler=client, **settings)
    killer.join()
    assert lost, "no worker held the job while a round ran"
    assert scatters["n"] >= 2, "the job was never scattered again"
    print(f"killed {lost['workers']} workers holding the job; scattered {scatters['n']} times")
    _same_run(on_cluster, tc.sample(big, **settings))


def test_a_run_on_a_cluster_interrupted_and_resumed_in_threads_equals_the_whole_run(
        model, threads_run, client, tmp_path, monkeypatch):
    from tallchain.exceptions import SamplingInterrupted
    from tallchain.mcmc import _driver, _runners

    original = _runners.TaskRunner.run
    rounds = {"n": 0}

    def run(self, states, until, n_batch, pool):
        rounds["n"] += 1
        if rounds["n"] == 3:
            raise _driver.Interrupted()
        return original(self, states, until, n_batch, pool)

    monkeypatch.setattr(_runners.TaskRunner, "run", run)
    ckpt = tmp_path / "run.ckpt.npz"
    with pytest.raises(SamplingInterrupted, match=r"^interrupted after \d+ draws per chain$") \
            as stop:
        tc.sample(model, scheduler=client, checkpoint=ckpt, **RUN)
    assert stop.value.result.completed_draws < RUN["draws"] and ckpt.exists()
    _same_run(tc.sample(model, checkpoint=ckpt, resume=True, **RUN), threads_run)


def test_an_unknown_chain_scheduler_is_a_clear_error(model):
    with pytest.raises(tc.InputError, match=r"scheduler: unknown scheduler 'gpu'; use \"threads\""):
        tc.sample(model, scheduler="gpu", **RUN)
    with pytest.raises(tc.InputError, match=r"workers: must be a whole number >= 1"):
        tc.sample(model, scheduler="processes", workers=0, **RUN)


def test_coupled_pairs_on_a_cluster_equal_pairs_in_this_process(model, client):
    # estimate()'s pairs are tasks with their own seeds: the same numbers on a cluster
    kw = dict(method="penalty-mala", replicates=4, seed=3, warmup=200)
    here = tc.estimate(model, scheduler="serial", **kw)
    there = tc.estimate(model, scheduler=client, **kw)
    assert np.array_equal(here.replicates, there.replicates)
    assert np.array_equal(here.meeting_times, there.meeting_times)
    assert here.span == there.span
