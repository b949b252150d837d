"""How far from Gaussian is the minibatch log-ratio noise? Pooled per-row moments and the
penalty's residual error (private).

The chain records, per step, the estimated sd of the minibatch log-ratio and the sample skewness
and excess kurtosis of the batch's per-row terms D_k (`scaled_sum_and_variance`). Write
v_i = N D_i (the per-row terms on the scale of the estimate delta_hat = mean of v over the
batch). For a batch of n rows, delta_hat has variance sigma^2 = mu2 / n, third cumulant
mu3 / n^2 and fourth cumulant (mu4 - 3 mu2^2) / n^3 (the cumulants of a mean of n independent
draws; without replacement the same to O(n/N)), mu_k the central moments of v over the rows.
The penalty exp(-sigma^2/2) is exact when delta_hat is Gaussian; otherwise
log E[exp(delta_hat - Delta)] - sigma^2/2 = kappa3/6 + kappa4/24 + ... (cumulant expansion),
so the error in the log acceptance ratio is about

    err(n) = |mu3| / (6 n^2) + |mu4 - 3 mu2^2| / (24 n^3)
           = sigma^3 |g1| / (6 sqrt(n)) + sigma^4 |g2| / (24 n)   (METHODS.md section 2),

g1, g2 the skewness and excess kurtosis of the per-row terms (not of their mean).

Why pool: when a few rows dominate v (rare events, rare features), a small batch usually holds
none of them, and its own skewness and kurtosis say "Gaussian". Each step's central moments
(recovered from the recorded sd, skewness and kurtosis) are unbiased-ish for the population's,
whether or not the batch caught a dominating row; their mean over many steps sees the tail as
often as the batches do. Steps are weighted by their acceptance probability: the error of a
move biases the chain only when the move is taken (the detailed-balance error of a pair of
states is the acceptance probability times the error in its log), and the rare huge-noise
moves far out in a tail, which a penalised chain hardly ever takes, would otherwise decide the
mean.
"""

import math
from dataclasses import dataclass

import numpy as np

# The penalty's residual error in the log acceptance ratio that batch_size="auto" aims below
# (DEVELOPERS.md, "Non-Gaussian minibatch noise").
ERROR_LIMIT = 0.005
# The share of steps beyond the Ceperley-Dewing fallback point that it accepts (same place).
BEYOND_SHARE_LIMIT = 0.01


@dataclass(frozen=True)
class RowMoments:
    """Per-row moments of v = N D pooled over the steps of a stretch of the chain: mu2, |mu3|
    and the excess fourth moment |mu4 - 3 mu2^2|, each the mean over steps (weighted by
    acceptance) of the step's own value; the number of steps pooled and how many of them
    carried half of the error."""

    mu2: float
    mu3: float
    excess4: float
    steps: int
    tail_steps: int

    def error(self, n, n_rows=None):
        """err(n): the penalty's residual error in the log acceptance ratio at batch n."""
        return _error(n, self.mu3, self.excess4, n_rows)


def _error(n, mu3, excess4, n_rows):
    n = np.asarray(n, dtype=float)
    fpc = 1.0 if n_rows is None else np.clip(1.0 - n / n_rows, 0.0, 1.0)
    return fpc * (abs(mu3) / (6.0 * n**2) + abs(excess4) / (24.0 * n**3))


def gaussian_error(n, mu2, mu3, mu4, n_rows=None):
    """|mu3| / (6 n^2) + |mu4 - 3 mu2^2| / (24 n^3), times (1 - n/N) when N is given (so that
    the full data, which has no noise, has no error)."""
    return _error(n, mu3, mu4 - 3.0 * mu2**2, n_rows)


def pooled_moments(sd, skew, kurt, n_batch, n_rows, weights=None):
    """`RowMoments` from per-step statistics (arrays of one shape: the log-ratio sd, the batch's
    sample skewness and excess kurtosis of D, the batch size), steps with NaN left out, each
    step weighted by ``weights`` (the move's acceptance probability: a move's error matters
    only as often as the move is taken; equal weights when None).

    sd^2 = N^2 (1 - n/N) s^2 / n gives the sample variance s^2 of D; the biased second moment
    m2 = s^2 (n - 1)/n restores m3 = g1 m2^{3/2} and m4 - 3 m2^2 = g2 m2^2 (times N^k for v).
    Each step's error is formed from its own moments before pooling: the scale of the noise
    varies from move to move (with the distance moved), and pooling raw fourth moments would
    read that variation as kurtosis.
    """
    arrays = [np.asarray(a, dtype=float).ravel() for a in (sd, skew, kurt, n_batch)]
    arrays.append(np.ones_like(arrays[0]) if weights is None
                  else np.asarray(weights, dtype=float).ravel())
    ok = np.logical_and.reduce([np.isfinite(a) for a in arrays]) & (arrays[3] >= 3)
    sd, skew, kurt, n, w = (a[ok] for a in arrays)
    if sd.size == 0 or w.sum() <= 0.0:
        return RowMoments(0.0, 0.0, 0.0, int(sd.size), 0)
    fpc = np.clip(1.0 - n / n_rows, 1e-12, 1.0)
    s2 = sd**2 * n / fpc                       # sample variance of v (divisor n - 1)
    m2 = s2 * (n - 1.0) / n
    # |m3| per step: a step's skewness changes sign with the direction of the move.
    m3 = np.abs(skew) * m2**1.5 * n**2 / ((n - 1.0) * (n - 2.0))
    k4 = np.abs(kurt) * m2**2
    w = w / w.sum()
    per_step = w * _error(n, m3, k4, None)
    share = np.sort(per_step)[::-1].cumsum() / max(float(per_step.sum()), 1e-300)
    tail_steps = int(np.searchsorted(share, 0.5) + 1)
    return RowMoments(float(w @ s2), float(w @ m3), float(w @ k4), int(sd.size), tail_steps)


def batch_for_error(moments, limit, n_rows, floor, ceiling):
    """The smallest batch n in [floor, ceiling] with ``moments.error(n) <= limit`` (err falls
    with n), by bisection; ``ceiling`` when none does."""
    if moments.error(floor, n_rows) <= limit:
        return int(floor)
    lo, hi = int(floor), int(ceiling)
    if moments.error(hi, n_rows) > limit:
        return hi
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if moments.error(mid, n_rows) <= limit:
            hi = mid
        else:
            lo = mid
    return hi


def run_error_bound(stats, n_rows, n_batch):
    """The penalty's residual error err(n) at the run's batch ``n_batch`` from the draws'
    statistics (a result's ``stats``); NaN without minibatch log-ratio statistics."""
    if n_batch is None or "log_ratio_skew" not in stats or stats["log_ratio_skew"].size == 0:
        return math.nan
    moments = pooled_moments(stats["log_ratio_sd"], stats["log_ratio_skew"],
                             stats["log_ratio_kurtosis"], stats["batch_size"], n_rows,
                             stats["acceptance_probability"])
    return float(moments.error(n_batch, n_rows)) if moments.steps else math.nan
