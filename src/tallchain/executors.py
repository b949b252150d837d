"""Where independent runs execute: local worker processes, or a Dask cluster.

Sweeps and calibrations are many independent runs. `run_tasks` runs ``fn(shared, task)`` for
each task and hands each result back as it finishes. ``shared`` (the model, the reference, the
settings) travels once per worker, never once per task: an initializer for local processes,
``Client.scatter(broadcast=True)`` for Dask. Seeds belong to the tasks (callers derive them
with ``SeedSequence.spawn``), so results do not depend on the scheduler, the number of workers
or the order of completion.

Schedulers:

* ``"processes"`` (default): local worker processes (``concurrent.futures``, forkserver).
* ``"serial"``: in this process, one task after another.
* ``"dask-local"``: a ``distributed.LocalCluster`` started and closed here, one thread per
  worker process; tasks whose worker dies are retried (``retries``).
* ``"tcp://host:port"``: an existing Dask scheduler; or a ``distributed.Client`` object.

Dask is optional: ``pip install 'tallchain[distributed]'``.
"""

import multiprocessing
import os
import uuid
import warnings
from concurrent.futures import ProcessPoolExecutor, as_completed

from ._validation import fail

_SHARED = None


def _set_shared(fn, shared):
    global _SHARED
    _SHARED = (fn, shared)
    warnings.simplefilter("ignore")


def _call_local(i, task):
    fn, shared = _SHARED
    return i, fn(shared, task)


def _call_dask(fn, shared, i, task):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return i, fn(shared, task)


def _import_distributed(what):
    try:
        import distributed
    except ImportError:
        fail("scheduler", f"{what} needs Dask's distributed scheduler, which is not installed",
             "pip install 'tallchain[distributed]'")
    return distributed


def check_scheduler(scheduler):
    """Validate a scheduler setting early (before any work), with the one-line message shape."""
    if scheduler in ("processes", "serial"):
        return
    if scheduler == "dask-local" or (isinstance(scheduler, str) and "://" in scheduler):
        _import_distributed(repr(scheduler))
        return
    if type(scheduler).__name__ == "Client":
        return
    fail("scheduler", f"unknown scheduler {scheduler!r}",
         'use "processes", "serial", "dask-local" or a scheduler address like tcp://host:8786')


def run_tasks(fn, shared, tasks, *, scheduler="processes", workers=None, retries=2,
              on_result=None, progress=None):
    """Run ``fn(shared, task)`` for every task; return the results in task order.

    Parameters
    ----------
    fn : callable
        A module-level function (it is pickled to the workers).
    shared : object
        Sent once per worker.
    tasks : sequence
    scheduler : str or distributed.Client, default="processes"
    workers : int, optional
        Worker processes for "processes" and "dask-local" (default: the number of cores).
    retries : int, default=2
        Dask only: how often a task whose worker died is resubmitted.
    on_result : callable, optional
        ``on_result(i, result)`` in this process as each task finishes (e.g. to write it out).
    progress : str, optional
        Label of a progress bar over the tasks (shown only on a terminal).
    """
    check_scheduler(scheduler)
    tasks = list(tasks)
    bar = None
    if progress and tasks and os.isatty(2):
        from tqdm import tqdm

        bar = tqdm(total=len(tasks), unit="task", desc=progress, leave=False)
    try:
        return _run(fn, shared, tasks, scheduler, workers, retries, on_result, bar)
    finally:
        if bar is not None:
            bar.close()


def _run(fn, shared, tasks, scheduler, workers, retries, on_result, bar):
    results = [None] * len(tasks)

    def _done(i, r):
        results[i] = r
        if on_result is not None:
            on_result(i, r)
        if bar is not None:
            bar.update(1)

    n_workers = max(1, min(len(tasks), workers or os.cpu_count() or 1))
    if not tasks:
        return results
    if scheduler == "serial" or (scheduler == "processes" and n_workers == 1):
        for i, t in enumerate(tasks):
            _done(i, fn(shared, t))
        return results
    if scheduler == "processes":
        ctx = multiprocessing.get_context("forkserver")
        with ProcessPoolExecutor(n_workers, mp_context=ctx, initializer=_set_shared,
                                 initargs=(fn, shared)) as pool:
            futures = [pool.submit(_call_local, i, t) for i, t in enumerate(tasks)]
            for f in as_completed(futures):
                _done(*f.result())
        return results

    distributed = _import_distributed(repr(scheduler))
    cluster = None
    if scheduler == "dask-local":
        cluster = distributed.LocalCluster(n_workers=n_workers, threads_per_worker=1,
                                           processes=True, dashboard_address=None)
        client = distributed.Client(cluster)
    elif isinstance(scheduler, str):
        client = distributed.Client(scheduler)
    else:
        client = scheduler
    try:
        shared_f = client.scatter(shared, broadcast=True)
        run = uuid.uuid4().hex[:8]
        futures = [client.submit(_call_dask, fn, shared_f, i, t, key=f"tallchain-{run}-{i}",
                                 retries=retries, pure=False) for i, t in enumerate(tasks)]
        for f in distributed.as_completed(futures):
            _done(*f.result())
    finally:
        if cluster is not None:
            client.close()
            cluster.close()
        elif isinstance(scheduler, str):
            client.close()
    return results
