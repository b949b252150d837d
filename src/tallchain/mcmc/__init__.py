"""Markov chains: the method table, the numba transition loop, warmup, runners, checkpoints,
`sample`, the result and its summary."""

from ._acceptance_rules import (ceperley_dewing_closed_form, ceperley_dewing_penalty,
                                ceperley_dewing_series, accept_probability, mean_acceptance,
                                validity_bound)
from ._methods import METHODS
from ._result import SampleResult, to_arviz
from ._sampling import Preparation, check_sample_settings, prepare, sample, spawn_seeds
from ._summary import Summary, ess_bulk, summarize

__all__ = ["sample", "prepare", "Preparation", "check_sample_settings", "spawn_seeds",
           "SampleResult", "to_arviz", "Summary", "summarize", "ess_bulk", "METHODS",
           "accept_probability", "mean_acceptance", "ceperley_dewing_series",
           "ceperley_dewing_closed_form", "ceperley_dewing_penalty", "validity_bound"]
