"""The warmup schedule: segments, batch-size pilot phases and step-tuning restarts (private)."""

import math
from typing import NamedTuple

import numpy as np

from . import _transition as _chain
from ._acceptance_kernels import CHI2_MAX, validity_bound
from ._noise_shape import BEYOND_SHARE_LIMIT, ERROR_LIMIT, batch_for_error, pooled_moments

# The batch size of the first pilot phase of batch_size="auto".
PILOT_BATCH = 64


class NoiseLimits(NamedTuple):
    """What batch_size="auto" holds the noise's shape to (DEVELOPERS.md, "Non-Gaussian noise"):
    the penalty's residual error err(n) in the log acceptance ratio (`_noise_shape`), and the
    share of steps whose variance estimate is beyond the Ceperley-Dewing fallback point."""

    error: float
    beyond_share: float


NOISE_LIMITS = NoiseLimits(error=ERROR_LIMIT, beyond_share=BEYOND_SHARE_LIMIT)


def batch_for_target(sd, n, n_rows, target_sd, floor, ceiling):
    """Solve N^2 (1 - m/N) S^2 / m = target^2 for m, with S^2 from the variances seen at n."""
    var = float(np.nanmean(sd**2)) if np.isfinite(sd).any() else 0.0
    s2 = var * n / (n_rows**2 * (1.0 - n / n_rows)) if n < n_rows else 0.0
    need = n_rows**2 * s2 / (target_sd**2 + n_rows * s2) if s2 > 0 else floor
    return int(np.clip(math.ceil(need), floor, ceiling))


def fallback_point(n):
    """The chi^2 beyond which the kernel subtracts sigma^2/2 instead of u_B at batch n."""
    return min(CHI2_MAX, validity_bound(n)) if n >= 2 else 0.0


def batch_for_bound(sd, beyond, n, n_rows, share, floor, ceiling):
    """A batch at which at most ``share`` of steps would be beyond the fallback point: no
    constraint (``floor``) when the recorded share is within it, else n scaled so that the
    (1 - share) quantile of chi^2 (which falls as (1 - n/N)/n) lies at 0.9 of the fallback
    point."""
    if not np.isfinite(sd).any() or float(np.mean(beyond)) <= share:
        return floor
    q = float(np.nanquantile(sd**2, 1.0 - share)) / (1.0 - n / n_rows)
    m = n
    for _ in range(4):      # the fallback point grows with n below 46 rows: settle it
        target = 0.9 * fallback_point(m)
        m = int(min(ceiling, max(m, math.ceil(n * q / (target + n * q / n_rows)))))
    return max(m, n + 1) if m < ceiling else int(ceiling)


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
    set to the largest of three batches, from the phase's second half: the one at which the
    log-ratio variance N^2 (1 - n/N) S^2 / n meets target_sd^2, the one at which the penalty's
    residual error from non-Gaussian noise (`_noise_shape`, from per-row moments pooled over the
    steps) is below ``NOISE_LIMITS.error``, and the one at which at most
    ``NOISE_LIMITS.beyond_share`` of steps are beyond the Ceperley-Dewing fallback point; then
    the step tuning restarts; the rest of warmup tunes the step at that n; a last correction
    of n by the same rule from the end of warmup fixes the batch for the draws (the kernel is
    fixed from then on, so the chain stays valid).
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
        # what each rebatch chose (n, by the sd target, by the error, by the bound) and the
        # rule that set the last one
        self.history, self.limited_by = [], None

    def finish_segment(self, states, all_stats):
        end, rebatch, restart = self.segments[self.segment]
        # the segment's first iteration from the schedule, not from where the chains were when
        # this call's drive began: a run resumed mid-segment must see the same window
        start = self.segments[self.segment - 1][0] if self.segment else 0
        if rebatch:
            self.n_batch = self.next_batch(all_stats[:, (start + end) // 2:end])
        if restart:
            for st in states:
                restart_step_adaptation(st)
        self.segment += 1

    def next_batch(self, stats):
        """The batch for the next segment from the statistics (chains, steps, ST_*) of the
        stretch just run at ``self.n_batch`` (see the class notes)."""
        n, limits = self.n_batch, NOISE_LIMITS
        sd = stats[..., _chain.ST_LOG_RATIO_SD]
        by_sd = batch_for_target(sd, n, self.n_rows, self.target_sd, self.floor, self.ceiling)
        moments = pooled_moments(sd, stats[..., _chain.ST_SKEW], stats[..., _chain.ST_KURT],
                                 stats[..., _chain.ST_BATCH_SIZE], self.n_rows,
                                 stats[..., _chain.ST_ACCEPTANCE_PROBABILITY])
        by_error = batch_for_error(moments, limits.error, self.n_rows, self.floor, self.ceiling)
        by_bound = batch_for_bound(sd, stats[..., _chain.ST_PENALTY_BEYOND_BOUND], n,
                                   self.n_rows, limits.beyond_share, self.floor, self.ceiling)
        chosen = int(np.clip(max(by_sd, by_error, by_bound), self.floor, self.ceiling))
        self.limited_by = ("log-ratio sd" if chosen == by_sd else
                           "non-Gaussian error" if chosen == by_error else "validity bound")
        self.history.append((chosen, by_sd, by_error, by_bound))
        return chosen
