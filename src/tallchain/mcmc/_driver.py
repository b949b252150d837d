"""Driving a run: the chains' state, what they share, and the loop over rounds and segments (private).

A run is a schedule of segments. Each segment runs every chain up to an iteration with a fixed
batch size; after a segment the main thread may change the batch size (``batch_size="auto"``)
and restart the step tuning. Chains advance in rounds of ``ROUND`` iterations, after which a
checkpoint may be written. Kernel calls always run in worker threads and the main thread only
waits, so Ctrl-C (or SIGTERM turned into KeyboardInterrupt) never lands between a kernel call
and the bookkeeping that follows it: every state a checkpoint sees is a chunk boundary.

`Runner` runs the chains in threads of this process; `TaskRunner` makes each chain's round one
task on worker processes or a Dask cluster (`executors.TaskPool`), with the same draws.
"""

import os
import time
from contextlib import contextmanager

import numpy as np

from . import _transition as _chain
from ._methods import LOG_RATIO_VARIANCE
from ._proxy_drift import proxy_coordinates

CHUNK = 256
ROUND = 4 * CHUNK


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
        self.rng = rng
        self.iteration = 0
        self.drift_ready = False

    @property
    def arrays(self):
        """The state arrays as the kernel takes them: ``ChainArrays(beta, cur_grad,
        cur_loglik, adapt, pooled)`` (views of this state's arrays, updated in place)."""
        return _chain.ChainArrays(self.beta, self.cur_grad, self.cur_loglik, self.adapt,
                                  self.pooled)


class Interrupted(Exception):
    """Raised inside the driver when the user interrupts; sample() turns it into a result."""


class ChainJob:
    """What every chain of a run shares: the model, the method's codes, the row cache, the
    preconditioner and the tuning settings. When chains run as tasks it travels once per worker.
    ``gradient_batch`` is the setting as the set-up resolved it (`SetUp.gradient_batch`:
    "fresh", "carried" or "proxy", never "auto").

    The kernel's argument groups of the model, row cache and preconditioner are built from them
    at each `advance` (views, no copies); a job keeps only the objects, so that a model on a
    memory-mapped file still pickles as its path.
    """

    def __init__(self, model, settings, cache, pre, gradient_batch):
        spec = settings.spec
        self.model, self.spec, self.cache, self.pre = model, spec, cache, pre
        gradient = {"carried": _chain.CARRIED, "proxy": _chain.PROXY}.get(gradient_batch,
                                                                          spec.gradient)
        self.codes = _chain.MethodCodes(spec.proposal, gradient, spec.ratio, spec.rule,
                                        LOG_RATIO_VARIANCE[settings.log_ratio_variance])
        # Penalty methods aim at the exact-method rate times the share that the noise lets
        # through (see run_chain); target_log_ratio_sd caps the noise level used for that share.
        noise_cap = settings.target_log_ratio_sd if spec.penalised else 0.0
        self.tuning = _chain.Tuning(settings.adapts_step, settings.warmup,
                                    spec.acceptance_target, noise_cap)

    def advance(self, st, draws_out, stats_out, base, until, n_batch, stop=None, on_chunk=None):
        """Run chain state ``st`` up to iteration ``until``, chunk by chunk, in place.

        ``draws_out[k]`` and ``stats_out[k]`` receive iteration ``base + k``. The kernel keeps
        its whole state in ``st``, so how a stretch is cut into chunks or calls changes nothing.
        """
        data, prior = self.model.glm_data, self.model.prior_arrays
        rows, mass, n_batch = self.cache.rows, self.pre.matrices, int(n_batch)
        if self.codes.gradient == _chain.CARRIED and not st.drift_ready:
            _chain.init_carried_gradient(data, prior, rows, st.arrays, st.rng, n_batch)
            st.drift_ready = True
        elif self.codes.gradient == _chain.PROXY and not st.drift_ready:
            st.cur_grad[:] = proxy_coordinates(self.pre, st.beta)
            st.drift_ready = True
        while st.iteration < until and not (stop is not None and stop.is_set()):
            n = min(CHUNK, until - st.iteration)
            i0 = st.iteration
            k0 = i0 - base
            _chain.run_chain(data, prior, rows, mass, self.codes, self.tuning, st.arrays,
                             st.rng, n_batch, i0, draws_out[k0:k0 + n], stats_out[k0:k0 + n])
            st.iteration += n
            if on_chunk is not None:
                on_chunk(n)


def drive(runner, states, schedule, *, checkpoint=None, checkpoint_seconds=30.0):
    """Run the schedule to the end; the draws and statistics land in the runner's arrays.

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
                while min(st.iteration for st in states) < end:
                    target = min(end, min(st.iteration for st in states)
                                 + runner.round_length())
                    try:
                        runner.run(states, target, schedule.n_batch, pool)
                    except Interrupted:
                        if checkpoint is not None:
                            checkpoint.write(states, schedule, runner)
                        raise
                    if runner.bar is not None:
                        _show_progress(runner, states)
                    if checkpoint is not None and time.monotonic() - last_write > checkpoint_seconds:
                        checkpoint.write(states, schedule, runner)
                        last_write = time.monotonic()
                schedule.finish_segment(states, runner.all_stats)
                if end == schedule.warmup and checkpoint is not None:
                    # Warmup (tuning) is the part most costly to lose: keep it at once.
                    checkpoint.write(states, schedule, runner)
                    last_write = time.monotonic()
    finally:
        if runner.bar is not None:
            runner.bar.close()
            runner.bar = None
    if checkpoint is not None:
        checkpoint.write(states, schedule, runner)


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
