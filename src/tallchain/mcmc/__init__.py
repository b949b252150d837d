"""Markov chains: the settings, the method table, the numba transition loop, warmup, runners,
checkpoints, `sample`, the result and its summary; coupled pairs and `estimate`."""

from ._acceptance_rules import (accept_probability, ceperley_dewing_closed_form,
                                ceperley_dewing_penalty, ceperley_dewing_series, mean_acceptance,
                                validity_bound)
from ._estimate_result import EstimateResult
from ._methods import METHODS
from ._result import SampleResult, to_arviz
from ._sampling import sample
from ._settings import RunOptions, SamplerSettings, settings_from
from ._setup import Preparation, prepare, spawn_seeds
from ._summary import Summary, ess_bulk, summarize
from ._unbiased import estimate

__all__ = ["sample", "estimate", "EstimateResult", "SamplerSettings", "RunOptions", "settings_from", "prepare",
           "Preparation", "spawn_seeds", "SampleResult", "to_arviz", "Summary", "summarize",
           "ess_bulk", "METHODS", "accept_probability", "mean_acceptance",
           "ceperley_dewing_series", "ceperley_dewing_closed_form", "ceperley_dewing_penalty",
           "validity_bound"]
