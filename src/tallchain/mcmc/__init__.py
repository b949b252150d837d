"""Markov chains: the settings, the method table, the numba transition loop, warmup, runners,
checkpoints, `sample`, the result and its summary."""

from ._acceptance_rules import (accept_probability, ceperley_dewing_closed_form,
                                ceperley_dewing_penalty, ceperley_dewing_series, mean_acceptance,
                                validity_bound)
from ._methods import METHODS
from ._result import SampleResult, to_arviz
from ._paired import sample_pair
from ._sampling import sample
from ._settings import RunOptions, SamplerSettings, settings_from
from ._setup import Preparation, prepare, spawn_seeds
from ._summary import Summary, ess_bulk, summarize

__all__ = ["sample", "sample_pair", "SamplerSettings", "RunOptions", "settings_from", "prepare",
           "Preparation", "spawn_seeds", "SampleResult", "to_arviz", "Summary", "summarize",
           "ess_bulk", "METHODS", "accept_probability", "mean_acceptance",
           "ceperley_dewing_series", "ceperley_dewing_closed_form", "ceperley_dewing_penalty",
           "validity_bound"]
