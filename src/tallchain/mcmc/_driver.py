"""Running the chains: chunked kernel calls in threads, the warmup schedule, checkpoints (private).

A run is a schedule of segments. Each segment runs every chain up to an iteration with a fixed
batch size; after a segment the main thread may change the batch size (``batch_size="auto"``)
and restart the step tuning. Chains advance in rounds of ``ROUND`` iterations, after which a
checkpoint may be written. Kernel calls always run in worker threads and the main thread only
waits, so Ctrl-C (or SIGTERM turned into KeyboardInterrupt) never lands between a kernel call
and the bookkeeping that follows it: every state a checkpoint sees is a chunk boundary.

`Runner` runs the chains in threads of this process; `TaskRunner` makes each chain's round one
task on worker processes or a Dask cluster (`executors.TaskPool`), with the same draws.
"""

import json
import math
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .._validation import fail
from ..executors import worker_count
from . import _transition as _chain

CHUNK = 256
ROUND = 4 * CHUNK
# Chains as tasks: rounds sized to about this many seconds, at most this many ROUNDs.
TASK_SECONDS = 2.0
MAX_TASK_ROUNDS = 256
CHECKPOINT_VERSION = 2


class ChainState:
    """Everything one chain carries between kernel calls (and what a checkpoint stores)."""

    def __init__(self, start, n_coef, log_h, adapt_mu, rng):
        self.beta = np.array(start, dtype=float)
        self.cur_grad = np.zeros(n_coef)
        self.cur_loglik = np.zeros(1)
        self.adapt = np.zeros(_chain.N_ADAPT)
        self.adapt[_chain.AD_LOG_H] = log_h
        self.adapt[_chain.AD_MU] = adapt_mu
        self.pooled = np.zeros(2)
        self.counters = np.zeros(_chain.N_COUNTERS, dtype=np.int64)
        self.rng = rng
        self.iteration = 0
        self.carried_ready = False


class Interrupted(Exception):
    """Raised inside the driver when the user interrupts; sample() turns it into a result."""


class ChainJob:
    """What every chain of a run shares: the model, the method's codes, the row cache, the
    preconditioner and the tuning settings. When chains run as tasks it travels once per worker.
    """

    def __init__(self, model, spec, grad_code, var_code, noise_cap, cache, pre, warmup,
                 adapt_step):
        self.model, self.spec, self.cache, self.pre = model, spec, cache, pre
        self.grad_code, self.var_code, self.noise_cap = grad_code, var_code, noise_cap
        self.warmup, self.adapt_step = warmup, adapt_step

    def advance(self, st, draws_out, stats_out, base, until, n_batch, stop=None, on_chunk=None):
        """Run chain state ``st`` up to iteration ``until``, chunk by chunk, in place.

        ``draws_out[k]`` and ``stats_out[k]`` receive iteration ``base + k``. The kernel keeps
        its whole state in ``st``, so how a stretch is cut into chunks or calls changes nothing.
        """
        m, s, c, p = self.model, self.spec, self.cache, self.pre
        if self.grad_code == _chain.CARRIED and not st.carried_ready:
            _chain.init_carried_gradient(m.family, m.X, c.aux, m.noise_sd, int(m.add_intercept),
                                         m.prior_mean, m.prior_prec, c.order, c.beta_star,
                                         c.g_star, c.H_star, int(n_batch), st.rng, st.beta,
                                         st.cur_grad)
            st.carried_ready = True
        while st.iteration < until and not (stop is not None and stop.is_set()):
            n = min(CHUNK, until - st.iteration)
            i0 = st.iteration
            k0 = i0 - base
            _chain.run_chain(
                *m.kernel_args, m.prior_mean, m.prior_prec,
                s.proposal, self.grad_code, s.ratio, s.rule, self.var_code, c.order,
                c.beta_star, c.aux, c.g_star, c.H_star,
                p.mass, p.mass_inv, p.mass_inv_chol, int(n_batch), st.rng,
                st.beta, st.cur_grad, st.cur_loglik, st.adapt, st.pooled, st.counters,
                i0, n, self.warmup, self.adapt_step, s.target_accept, self.noise_cap,
                draws_out[k0:k0 + n], stats_out[k0:k0 + n])
            st.iteration += n
            if on_chunk is not None:
                on_chunk(n)


class Runner:
    """Advances every chain round by round in threads of this process (the kernel releases
    the GIL), writing into the run's draw and statistics arrays."""

    def __init__(self, job, all_draws, all_stats, progress, parallel):
        self.job = job
        self.spec, self.warmup = job.spec, job.warmup
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

    def __init__(self, job, all_draws, all_stats, progress, scheduler, workers):
        super().__init__(job, all_draws, all_stats, progress, parallel=True)
        self.scheduler, self.workers = scheduler, workers
        self._round = ROUND

    def open_pool(self, n_chains):
        from ..executors import TaskPool

        return TaskPool(_advance_task, self.job, self.scheduler, min(self.workers, n_chains))

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


def batch_for_target(sd, n, n_rows, target_sd, floor, ceiling):
    """Solve N^2 (1 - m/N) S^2 / m = target^2 for m, with S^2 from the variances seen at n."""
    var = float(np.nanmean(sd**2)) if np.isfinite(sd).any() else 0.0
    s2 = var * n / (n_rows**2 * (1.0 - n / n_rows)) if n < n_rows else 0.0
    need = n_rows**2 * s2 / (target_sd**2 + n_rows * s2) if s2 > 0 else floor
    return int(np.clip(math.ceil(need), floor, ceiling))


def restart_step_adaptation(st):
    """Restart dual averaging from the current averaged step (the noise level just changed)."""
    if st.adapt[_chain.AD_COUNT] > 0:
        log_h = st.adapt[_chain.AD_LOG_HBAR]
        st.adapt[:] = 0.0
        st.adapt[_chain.AD_LOG_H] = log_h
        st.adapt[_chain.AD_MU] = log_h + math.log(10.0)
    st.pooled[:] = 0.0


class Schedule:
    """Segments of the run and the batch size in force; resumable from (segment, n_batch).

    Fixed batch (or full-data methods): one warmup segment and one sampling segment. For
    ``batch_size="auto"``: three pilot phases of warmup/5 iterations, after each of which n is
    set so that the log-ratio variance N^2 (1 - n/N) S^2 / n meets target_sd^2 (S^2 from the
    phase's second half) and the step tuning restarts; the rest of warmup tunes the step at that
    n; a last correction of n from the end of warmup fixes the batch for the draws (the kernel
    is fixed from then on, so the chain stays valid).
    """

    def __init__(self, spec, batch_size, n_rows, warmup, draws, target_sd, floor, ceiling,
                 pilot):
        self.n_rows, self.target_sd = n_rows, target_sd
        self.floor = min(max(2, int(floor)), n_rows)
        self.ceiling = max(self.floor, min(int(ceiling), n_rows))
        total = warmup + draws
        self.auto = spec.minibatch and batch_size == "auto" and spec.ratio == _chain.BATCH
        if not spec.minibatch:
            self.n_batch = 1
        elif batch_size == "auto":
            self.n_batch = int(np.clip(pilot, self.floor, self.ceiling))
        else:
            self.n_batch = int(batch_size)
        if self.auto:
            phase = warmup // 5
            # (end, rebatch after, restart the step tuning after)
            self.segments = [(phase, True, True), (2 * phase, True, True),
                             (3 * phase, True, True), (warmup, True, False), (total, False, False)]
        else:
            self.segments = [(warmup, False, False), (total, False, False)]
        self.segment = 0
        self.warmup = warmup

    def finish_segment(self, states, all_stats, start):
        end, rebatch, restart = self.segments[self.segment]
        if rebatch:
            sd = all_stats[:, (start + end) // 2:end, _chain.ST_LOG_RATIO_SD]
            self.n_batch = batch_for_target(sd, self.n_batch, self.n_rows, self.target_sd,
                                            self.floor, self.ceiling)
        if restart:
            for st in states:
                restart_step_adaptation(st)
        self.segment += 1


def drive(runner, states, schedule, *, checkpoint=None, checkpoint_seconds=30.0,
          after_warmup=None):
    """Run the schedule to the end. Returns the counters summed over chains at the end of warmup.

    Raises Interrupted (after writing the checkpoint) when the user interrupts.
    """
    total = schedule.segments[-1][0]
    todo = sum(max(0, total - st.iteration) for st in states)
    if runner.progress and todo and os.isatty(2):
        from tqdm import tqdm

        runner.bar = tqdm(total=todo, unit="it", desc=runner.spec.name, leave=False)
    last_write = time.monotonic()
    try:
        with _timed_pool(runner, len(states)) as pool:
            while schedule.segment < len(schedule.segments):
                end = schedule.segments[schedule.segment][0]
                start = min(st.iteration for st in states)
                while min(st.iteration for st in states) < end:
                    target = min(end, min(st.iteration for st in states)
                                 + runner.round_length())
                    try:
                        runner.run(states, target, schedule.n_batch, pool)
                    except Interrupted:
                        if checkpoint is not None:
                            checkpoint.write(states, schedule, runner, after_warmup)
                        raise
                    if runner.bar is not None:
                        _show_progress(runner, states)
                    if checkpoint is not None and time.monotonic() - last_write > checkpoint_seconds:
                        checkpoint.write(states, schedule, runner, after_warmup)
                        last_write = time.monotonic()
                at_warmup_end = end == schedule.warmup
                if at_warmup_end and after_warmup is None:
                    after_warmup = np.sum([st.counters for st in states], axis=0)
                schedule.finish_segment(states, runner.all_stats, start)
                if at_warmup_end and checkpoint is not None:
                    # Warmup (tuning) is the part most costly to lose: keep it at once.
                    checkpoint.write(states, schedule, runner, after_warmup)
                    last_write = time.monotonic()
    finally:
        if runner.bar is not None:
            runner.bar.close()
            runner.bar = None
    if after_warmup is None:
        after_warmup = np.sum([st.counters for st in states], axis=0)
    if checkpoint is not None:
        checkpoint.write(states, schedule, runner, after_warmup)
    return after_warmup


@contextmanager
def _timed_pool(runner, n_chains):
    """The runner's pool; the time to start and to stop it is added to ``runner.pool_seconds``."""
    t0 = time.perf_counter()
    try:
        with runner.open_pool(n_chains) as pool:
            runner.pool_seconds += time.perf_counter() - t0
            try:
                yield pool
            finally:
                t0 = time.perf_counter()
    finally:
        runner.pool_seconds += time.perf_counter() - t0


def _show_progress(runner, states):
    """Acceptance and log-ratio sd over the last round, beside the bar's iterations per second."""
    hi = min(st.iteration for st in states)
    lo = max(0, hi - ROUND)
    recent = runner.all_stats[:, lo:hi]
    acc = float(np.nanmean(recent[:, :, _chain.ST_ACCEPTED])) if hi > lo else float("nan")
    sd = recent[:, :, _chain.ST_LOG_RATIO_SD]
    sd = float(np.nanmean(sd)) if np.isfinite(sd).any() else float("nan")
    phase = "warmup" if hi < runner.warmup else "sampling"
    runner.bar.set_postfix_str(f"{phase} acc={acc:.2f} log-ratio sd={sd:.3g}", refresh=False)


class Checkpoint:
    """A resumable snapshot of a run in one .npz file, replaced atomically on every write.

    It stores each chain's state arrays and generator state, the draws and statistics so far,
    the schedule's position and batch size, and the settings that must match on resume.
    """

    def __init__(self, path, identity):
        self.path = Path(path)
        self.identity = identity

    def write(self, states, schedule, runner, after_warmup):
        done = max(st.iteration for st in states)
        meta = {
            "version": CHECKPOINT_VERSION,
            "identity": self.identity,
            "segment": schedule.segment,
            "n_batch": schedule.n_batch,
            "after_warmup": None if after_warmup is None else [int(v) for v in after_warmup],
            "chains": [{"iteration": st.iteration, "carried_ready": st.carried_ready,
                        "rng": st.rng.bit_generator.state} for st in states],
        }
        arrays = {
            "draws": runner.all_draws[:, :done], "stats": runner.all_stats[:, :done],
            "beta": np.stack([st.beta for st in states]),
            "cur_grad": np.stack([st.cur_grad for st in states]),
            "cur_loglik": np.stack([st.cur_loglik for st in states]),
            "adapt": np.stack([st.adapt for st in states]),
            "pooled": np.stack([st.pooled for st in states]),
            "counters": np.stack([st.counters for st in states]),
        }
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(f".{self.path.name}.tmp-{os.getpid()}.npz")
        try:
            np.savez(tmp, meta=np.array(json.dumps(meta)), **arrays)
            os.replace(tmp, self.path)
        finally:
            if tmp.exists():
                tmp.unlink()

    def restore(self, states, schedule, runner):
        """Load the snapshot into fresh states; returns the end-of-warmup counters (or None)."""
        if not self.path.exists():
            fail("resume", f"no checkpoint at {self.path}", "run once without --resume first")
        with np.load(self.path, allow_pickle=False) as z:
            meta = json.loads(str(z["meta"]))
            if meta.get("version") != CHECKPOINT_VERSION or meta["identity"] != self.identity:
                changed = sorted(k for k in set(self.identity) | set(meta["identity"])
                                 if self.identity.get(k) != meta["identity"].get(k))
                fail("resume", f"the checkpoint was made with other settings ({', '.join(changed)})",
                     "resume with the settings and data of the interrupted run, or start anew")
            done = z["draws"].shape[1]
            runner.all_draws[:, :done] = z["draws"]
            runner.all_stats[:, :done] = z["stats"]
            for c, st in enumerate(states):
                st.beta[:] = z["beta"][c]
                st.cur_grad[:] = z["cur_grad"][c]
                st.cur_loglik[:] = z["cur_loglik"][c]
                st.adapt[:] = z["adapt"][c]
                st.pooled[:] = z["pooled"][c]
                st.counters[:] = z["counters"][c]
                st.iteration = meta["chains"][c]["iteration"]
                st.carried_ready = meta["chains"][c]["carried_ready"]
                st.rng.bit_generator.state = meta["chains"][c]["rng"]
        schedule.segment = meta["segment"]
        schedule.n_batch = meta["n_batch"]
        aw = meta["after_warmup"]
        return None if aw is None else np.array(aw, dtype=np.int64)
