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
  worker process; tasks whose worker dies are retried (``retries``). If the cluster loses every
  copy of ``shared`` (the worker holding the last one died: Dask's memory manager may drop the
  other copies of scattered data), it is scattered again and the tasks that needed it are
  sent again, also up to ``retries`` times.
* ``"tcp://host:port"``: an existing Dask scheduler; or a ``distributed.Client`` object.

The chains of one run use `TaskPool` directly (see ``_driver``): each chain's next stretch of
iterations is one task, and ``"threads"`` (the default there) keeps them in this process.

Dask is optional: ``pip install 'tallchain[distributed]'``.
"""

import multiprocessing
import os
import sys
import threading
import uuid
import warnings
from concurrent.futures import CancelledError, ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool


from ._addresses import CONNECT_SECONDS, looks_like_address, parse_address
from ._validation import fail, is_integer
from .exceptions import WorkerDiedError

_SHARED = None


_WORKER_LOST = (
    "workers: a worker process died before returning its task (it was killed, ran out of "
    "memory, or re-ran a script whose calls are not under `if __name__ == \"__main__\":`, "
    "which worker processes import); guard the script's top-level calls, give fewer workers, "
    'or use scheduler="serial"')


def _refuse_in_a_starting_worker():
    # A forkserver worker imports the main script before its first task; a script without the
    # __main__ guard reaches its pool again here. multiprocessing marks that phase with the
    # process attribute ``_inheriting`` (its own check, spawn._check_not_importing_main, reads
    # it too). Leave with one line instead of that check's traceback; the parent then raises
    # WorkerDiedError.
    if getattr(multiprocessing.current_process(), "_inheriting", False):
        sys.stderr.write("tallchain: a worker process re-ran the main script and reached a call "
                         "that starts workers; put the script's calls under "
                         '`if __name__ == "__main__":`\n')
        sys.stderr.flush()
        raise SystemExit(1)


def _one_numba_thread():
    # Workers run side by side, one per core: the parallel set-up passes of a task (mode
    # finding in a calibration replication) would only oversubscribe the cores.
    import numba

    numba.set_num_threads(1)


def _set_shared(fn, shared):
    global _SHARED
    _SHARED = (fn, shared)
    warnings.simplefilter("ignore")
    _one_numba_thread()


def _call_local(i, task):
    fn, shared = _SHARED
    return i, fn(shared, task)


def _call_dask(fn, shared, i, task):
    _one_numba_thread()
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


def _connect(distributed, address, timeout):
    """A Client of the scheduler at ``address``, or one line when none answers in ``timeout``
    seconds.

    The Client is made in a helper thread and waited for: distributed's own ``timeout``
    bounds the TCP connection, but its handshake read has no bound (comm/core.py,
    ``connect``: ``await comm.read()``), so a listener that is no scheduler would hang the run
    for ever. Such a thread is left behind (a daemon) when it does not finish.
    """
    made = {}

    def make():
        try:
            made["client"] = distributed.Client(address, timeout=timeout)
        except Exception as exc:   # reported below, in the caller's thread
            made["error"] = exc

    thread = threading.Thread(target=make, name="tallchain-connect", daemon=True)
    thread.start()
    thread.join(timeout)
    if "client" in made:
        return made["client"]
    detail = str(made.get("error") or "no answer").splitlines()[0] or "no answer"
    fail("scheduler", f"could not connect to {address} within {timeout:g} s ({detail[:120]})",
         "start the scheduler or check the address; if it is slow to answer, raise "
         "connect_seconds")


def check_scheduler(scheduler, *, threads=False):
    """Validate a scheduler setting early (before any work), with the one-line message shape.

    ``threads=True`` also admits ``"threads"`` (the chains of one run, in this process).
    """
    if scheduler in ("processes", "serial") or (threads and scheduler == "threads"):
        return
    if looks_like_address(scheduler):
        parse_address(scheduler)    # scheme, host and port range, before Dask is imported
    if scheduler == "dask-local" or looks_like_address(scheduler):
        _import_distributed(repr(scheduler))
        return
    if type(scheduler).__name__ == "Client":
        return
    local = '"threads", "processes"' if threads else '"processes"'
    fail("scheduler", f"unknown scheduler {scheduler!r}",
         f'use {local}, "serial", "dask-local" or a scheduler address like tcp://host:8786')


def check_workers(workers):
    """Refuse a worker count that is not a whole number >= 1 (None means the default)."""
    if workers is not None and (not is_integer(workers) or workers < 1):
        fail("workers", f"must be a whole number >= 1, got {workers!r}",
             "give the number of worker processes, or leave it out")


def worker_count(workers, n_tasks):
    """The workers to start for ``n_tasks`` tasks: ``workers`` (default: the number of cores),
    never more than the tasks, at least one."""
    return max(1, min(n_tasks, workers or os.cpu_count() or 1))


class TaskPool:
    """Workers that run ``fn(shared, task)``, with ``shared`` sent once per worker.

    A context manager over local worker processes (``"processes"``) or a Dask cluster
    (``"dask-local"``, an address, or a Client). `submit` sends a task; `results` hands back
    ``(i, fn(shared, task))`` for each task as it finishes.

    Parameters
    ----------
    fn : callable
        A module-level function (it is pickled to the workers).
    shared : object
    scheduler : str or distributed.Client
    workers : int
        Worker processes for "processes" and "dask-local".
    retries : int, default=2
        Dask only: how often a task whose worker died is resubmitted, and how often a task is
        sent again after the cluster lost every copy of ``shared``.
    timeout : float, default=10.0
        Dask address only: seconds to wait for the scheduler to answer.
    """

    def __init__(self, fn, shared, scheduler, workers, retries=2, timeout=CONNECT_SECONDS):
        check_scheduler(scheduler)
        if scheduler == "serial":
            fail("scheduler", '"serial" has no worker pool', "call the function directly")
        self.fn, self.shared, self.scheduler = fn, shared, scheduler
        self.workers, self.retries, self.timeout = max(1, int(workers)), retries, timeout
        self._pool = self._client = self._cluster = self._shared_f = None
        self._run = uuid.uuid4().hex[:8]
        self._distributed = None
        self._sent = {}     # future -> (i, task, label, attempt, the shared copy it was sent with)

    def __enter__(self):
        _refuse_in_a_starting_worker()
        if self.scheduler == "processes":
            ctx = multiprocessing.get_context("forkserver")
            self._pool = ProcessPoolExecutor(self.workers, mp_context=ctx,
                                             initializer=_set_shared,
                                             initargs=(self.fn, self.shared))
            return self
        distributed = self._distributed = _import_distributed(repr(self.scheduler))
        if self.scheduler == "dask-local":
            # dashboard on a free port: None means 8787, and a second cluster on the machine
            # (another run, a parallel test worker) would warn that it is taken
            self._cluster = distributed.LocalCluster(n_workers=self.workers, threads_per_worker=1,
                                                     processes=True, dashboard_address=":0")
            self._client = distributed.Client(self._cluster)
        elif isinstance(self.scheduler, str):
            self._client = _connect(distributed, self.scheduler, self.timeout)
        else:
            self._client = self.scheduler
        try:
            self._scatter_shared()
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def _scatter_shared(self):
        # hash=False: a fresh key each time, and no hashing of a large model.
        self._shared_f = self._client.scatter(self.shared, broadcast=True, hash=False)

    def submit(self, i, task, label=None):
        """Send task number ``i``; ``label`` names the Dask task (default: its number)."""
        if self._pool is None:
            return self._send(i, task, label, 0)
        try:
            f = self._pool.submit(_call_local, i, task)
        except (BrokenProcessPool, ConnectionError):   # a worker gone before its start
            raise WorkerDiedError(_WORKER_LOST) from None
        self._sent[f] = (i, task, label, 0, None)
        return f

    def _send(self, i, task, label, attempt):
        name = i if label is None else label
        key = f"tallchain-{self._run}-{name}" + (f"-again{attempt}" if attempt else "")
        f = self._client.submit(_call_dask, self.fn, self._shared_f, i, task, key=key,
                                retries=self.retries, pure=False)
        self._sent[f] = (i, task, label, attempt, self._shared_f)
        return f

    def results(self, futures):
        """Yield ``(i, fn(shared, task))`` for each of ``futures`` as it finishes.

        On Dask, a task cancelled because the cluster lost its copy of ``shared`` is sent again
        with a fresh copy (the same input gives the same result), at most ``retries`` times.
        """
        if self._pool is not None:
            try:
                for f in as_completed(futures):
                    self._sent.pop(f, None)
                    yield f.result()
            except BrokenProcessPool:
                raise WorkerDiedError(_WORKER_LOST) from None
            return
        pending = self._distributed.as_completed(futures)
        for f in pending:
            i, task, label, attempt, shared_f = self._sent.pop(f)
            try:
                out = f.result()
            except CancelledError:
                if attempt >= self.retries:
                    raise
                if shared_f is self._shared_f:    # the first of its tasks to notice the loss
                    self._scatter_shared()
                pending.add(self._send(i, task, label, attempt + 1))
                continue
            yield out

    def cancel(self):
        """Drop every task not yet finished (a local task already running runs to its end)."""
        for f in list(self._sent):
            f.cancel()
        self._sent.clear()

    def __exit__(self, *exc):
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        if self._cluster is not None:
            self._client.close()
            self._cluster.close()
        elif isinstance(self.scheduler, str) and self._client is not None:
            self._client.close()
        self._client = self._cluster = None
        return False


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
    check_workers(workers)
    tasks = list(tasks)
    bar = None
    if progress and tasks and os.isatty(2):
        from tqdm import tqdm

        bar = tqdm(total=len(tasks), unit="task", desc=progress, leave=False)
    results = [None] * len(tasks)

    def _done(i, r):
        results[i] = r
        if on_result is not None:
            on_result(i, r)
        if bar is not None:
            bar.update(1)

    n_workers = worker_count(workers, len(tasks))
    try:
        if not tasks:
            return results
        if scheduler == "serial" or (scheduler == "processes" and n_workers == 1):
            for i, t in enumerate(tasks):
                _done(i, fn(shared, t))
            return results
        with TaskPool(fn, shared, scheduler, n_workers, retries) as pool:
            futures = [pool.submit(i, t) for i, t in enumerate(tasks)]
            for i, r in pool.results(futures):
                _done(i, r)
        return results
    finally:
        if bar is not None:
            bar.close()
