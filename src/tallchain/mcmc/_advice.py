"""Advice after a run: is the minibatch log-ratio noise what the penalty method assumes? (private)"""

import math
import warnings

import numpy as np

from ..exceptions import NoisyLogRatioWarning


def noise_advice(result):
    """Warn (`NoisyLogRatioWarning`) and keep the advice in ``result.warnings`` when the
    log-ratio of a penalised run is too noisy or too far from Gaussian."""
    spec = result.settings.spec
    if not (spec.minibatch and spec.adjusted) or result.n_draws == 0:
        return
    sd = result.stats["log_ratio_sd"]
    med = float(np.nanmedian(sd))
    n = result.tuned["batch_size"]
    msgs = []
    if med > 2.0:
        msgs.append(f"the minibatch log-ratio sd is {med:.2f} (median) > 2: acceptance drops as "
                    "exp(-sigma^2/2) and the Gaussian noise assumption is strained; use a larger "
                    "batch_size or control_variates=True")
    skew = float(np.nanmedian(np.abs(result.stats["log_ratio_skew"])))
    kurt = float(np.nanmedian(result.stats["log_ratio_kurtosis"]))
    # Error of the penalty's Gaussian assumption: sigma^3 g1/(6 sqrt(n)) + sigma^4 g2/(24 n)
    # (METHODS.md section 2); flag when it could move log acceptance by more than 0.05.
    err = med**3 * skew / (6 * math.sqrt(n)) + med**4 * abs(kurt) / (24 * n)
    if err > 0.05:
        msgs.append(f"the batch log-ratio terms are far from Gaussian (median |skewness| "
                    f"{skew:.2f}, excess kurtosis {kurt:.2f}; error term {err:.3f}); the penalty "
                    "correction may be biased: use a larger batch_size or control_variates=True")
    if result.penalty_beyond_bound_count:
        k = result.penalty_beyond_bound_count
        msgs.append(f"{k} iteration{'s were' if k > 1 else ' was'} beyond the validity bound of "
                    "the Ceperley-Dewing penalty and used the plug-in sigma^2/2 instead; use a "
                    "larger batch_size")
    if msgs:
        result.warnings.extend(msgs)
        warnings.warn("; and ".join(msgs), NoisyLogRatioWarning, stacklevel=3)
