"""Advice after a run: is the minibatch log-ratio noise what the penalty method assumes? (private)"""

import math
import warnings

import numpy as np

from ..exceptions import NoisyLogRatioWarning
from ._noise_shape import BEYOND_SHARE_LIMIT, ERROR_LIMIT


def noise_advice(result):
    """Warn (`NoisyLogRatioWarning`) and keep the advice in ``result.warnings`` when the
    log-ratio of a penalised run is too noisy or too far from Gaussian.

    Three findings, each with its number: the median log-ratio sd above 2; the penalty's
    residual error `SampleResult.penalty_error_bound` (non-Gaussian noise, per-row moments
    pooled over the draws) above twice ``ERROR_LIMIT``, the level ``batch_size="auto"`` aims
    below (the pooled estimate is noisy: twice the aim leaves room for it); more than
    ``BEYOND_SHARE_LIMIT`` of the iterations beyond the Ceperley-Dewing validity bound (the
    share ``batch_size="auto"`` accepts; the count is in the result and run.json either way).
    """
    spec = result.settings.spec
    if not (spec.minibatch and spec.adjusted) or result.n_draws == 0:
        return
    med = float(np.nanmedian(result.stats["log_ratio_sd"]))
    msgs = []
    if med > 2.0:
        msgs.append(f"the minibatch log-ratio sd is {med:.2f} (median) > 2: acceptance drops as "
                    "exp(-sigma^2/2) and the Gaussian noise assumption is strained; use a larger "
                    "batch_size or control_variates=True")
    err = result.penalty_error_bound
    if math.isfinite(err) and err > 2.0 * ERROR_LIMIT:
        msgs.append(f"the minibatch log-ratio noise is not Gaussian: the penalty's residual "
                    f"error in the log acceptance ratio is {err:.3f} (limit "
                    f"{2.0 * ERROR_LIMIT:g}; skewness and kurtosis of the per-row terms pooled "
                    f"over the draws), so tails may be biased; use batch_size=\"auto\" or a "
                    "larger batch_size")
    k = result.penalty_beyond_bound_count
    share = k / result.stats["accepted"].size
    if share > BEYOND_SHARE_LIMIT:
        msgs.append(f"{k} iterations ({share:.1%}, limit {BEYOND_SHARE_LIMIT:.0%}) were beyond "
                    "the validity bound of the Ceperley-Dewing penalty and used the plug-in "
                    "sigma^2/2 instead; use a larger batch_size")
    if msgs:
        result.warnings.extend(msgs)
        warnings.warn("; and ".join(msgs), NoisyLogRatioWarning, stacklevel=3)
