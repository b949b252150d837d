"""Where the chains advance: threads of this process, or one task per chain and round (private)."""

import threading
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ..executors import CONNECT_SECONDS, TaskPool, worker_count
from . import _transition as _chain
from ._driver import ROUND, Interrupted

# Chains as tasks: rounds sized to about this many seconds, at most this many ROUNDs.
TASK_SECONDS = 2.0
MAX_TASK_ROUNDS = 256


class Runner:
    """Advances every chain round by round in threads of this process (the kernel releases
    the GIL), writing into the run's draw and statistics arrays."""

    def __init__(self, job, all_draws, all_stats, progress, parallel):
        self.job = job
        self.spec, self.warmup = job.spec, job.tuning.n_warmup
        self.all_draws, self.all_stats = all_draws, all_stats
        self.progress, self.parallel = progress, parallel
        self.stop = threading.Event()
        self.bar = None
        self.pool_seconds = 0.0   # starting and stopping the workers (a cluster takes seconds)

    def open_pool(self, n_chains):
        """The workers of the run (a context manager)."""
        workers = worker_count(None, n_chains) if self.parallel else 1
        return ThreadPoolExecutor(max_workers=workers)

    def round_length(self):
        """Iterations per chain between two checkpoint opportunities."""
        return ROUND

    def _tick(self, n):
        if self.bar is not None:
            self.bar.update(n)

    def _advance(self, st, chain, until, n_batch):
        self.job.advance(st, self.all_draws[chain], self.all_stats[chain], 0, until, n_batch,
                         stop=self.stop, on_chunk=self._tick)

    def run(self, states, until, n_batch, pool):
        """Advance every chain to ``until``; raise Interrupted on Ctrl-C after the threads stop."""
        futures = [pool.submit(self._advance, st, c, until, n_batch)
                   for c, st in enumerate(states)]
        try:
            for f in futures:
                f.result()
        except KeyboardInterrupt:
            self.stop.set()
            for f in futures:
                f.result()
            raise Interrupted() from None
        except BaseException:
            self.stop.set()
            raise


def _advance_task(job, task):
    """One chain's stretch of iterations as a task: returns the advanced state and its draws."""
    st, until, n_batch = task
    base = st.iteration
    draws = np.zeros((until - base, job.model.n_coef))
    stats = np.full((until - base, _chain.N_STATS), np.nan)
    job.advance(st, draws, stats, base, until, n_batch)
    return st, draws, stats


class TaskRunner(Runner):
    """Advances each chain as one task per round on worker processes or a Dask cluster.

    A task carries the chain's state (a few vectors and the generator state) and returns it
    advanced, with the round's draws; the job (model, row cache) is sent once per worker.
    Chains give the same draws as in threads, bit for bit: the kernel's state travels whole.
    A task whose worker dies is run again from the same state (Dask's retries), and so is one
    whose worker held the cluster's last copy of the job (`executors.TaskPool.results`).
    Rounds grow to about ``TASK_SECONDS`` of work, so that task overhead stays small and an
    interrupt loses at most one round.
    """

    def __init__(self, job, all_draws, all_stats, progress, scheduler, workers,
                 timeout=CONNECT_SECONDS):
        super().__init__(job, all_draws, all_stats, progress, parallel=True)
        self.scheduler, self.workers, self.timeout = scheduler, workers, timeout
        self._round = ROUND

    def open_pool(self, n_chains):
        return TaskPool(_advance_task, self.job, self.scheduler, min(self.workers, n_chains),
                        timeout=self.timeout)

    def round_length(self):
        return self._round

    def run(self, states, until, n_batch, pool):
        t0 = time.monotonic()
        start = {c: st.iteration for c, st in enumerate(states) if st.iteration < until}
        futures = [pool.submit(c, (states[c], until, n_batch), label=f"chain{c}-to{until}")
                   for c in start]
        try:
            for c, (new, draws, stats) in pool.results(futures):
                self.all_draws[c, start[c]:until] = draws
                self.all_stats[c, start[c]:until] = stats
                states[c].__dict__.update(new.__dict__)
                self._tick(until - start[c])
        except KeyboardInterrupt:
            pool.cancel()
            raise Interrupted() from None
        except BaseException:
            pool.cancel()
            raise
        done = max((until - i for i in start.values()), default=0)
        if done:
            per_iteration = (time.monotonic() - t0) / done
            self._round = int(np.clip(TASK_SECONDS / max(per_iteration, 1e-9), ROUND,
                                      MAX_TASK_ROUNDS * ROUND))
