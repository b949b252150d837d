"""The warmup schedule: segments, batch-size pilot phases and step-tuning restarts (private)."""

import math

import numpy as np

from . import _transition as _chain

# The batch size of the first pilot phase of batch_size="auto".
PILOT_BATCH = 64


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

    def __init__(self, settings, n_rows, pilot=PILOT_BATCH):
        spec, warmup = settings.spec, settings.warmup
        self.n_rows, self.target_sd = n_rows, settings.target_log_ratio_sd
        self.floor = min(settings.batch_floor, n_rows)
        self.ceiling = max(self.floor, min(settings.batch_ceiling, n_rows))
        total = warmup + settings.draws
        self.auto = settings.auto_batch and spec.ratio == _chain.BATCH
        if not spec.minibatch:
            self.n_batch = 1
        elif settings.batch_size == "auto":
            self.n_batch = int(np.clip(pilot, self.floor, self.ceiling))
        else:
            self.n_batch = settings.batch_size
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
