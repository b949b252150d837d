"""Markov chains: the settings, the method table, the numba transition loop, warmup, runners,
checkpoints, `sample`, the result and its summary; coupled pairs and `estimate`."""

from ._acceptance_rules import (accept_probability, ceperley_dewing_closed_form,
                                ceperley_dewing_penalty, ceperley_dewing_series, mean_acceptance,
                                validity_bound)
from ._estimate_result import EstimateResult
from ._laplace_gap import ECDF_QUANTILES, KS_CRITICAL, ecdf_ess
from ._methods import METHODS
from ._predict import predict_blocks, prediction_columns, rows_per_block
from ._paired import sample_pair
from ._prepared_store import clear_preparations, load_or_prepare
from ._result import SampleResult, to_arviz
from ._sampling import sample
from ._settings import RunOptions, SamplerSettings, settings_from
from ._setup import Preparation, prepare, spawn_seeds
from ._summary import Summary, check_interval, ess_bulk, summarize
from ._tables import NAME_WIDTH, coefficient_table, run_header, table_notes
from ._unbiased import check_coupled_settings, check_estimate_arguments, estimate

__all__ = ["sample", "sample_pair", "estimate", "EstimateResult", "SamplerSettings",
           "RunOptions", "settings_from", "prepare", "Preparation", "spawn_seeds",
           "load_or_prepare", "clear_preparations",
           "SampleResult", "to_arviz", "Summary", "summarize",
           "ess_bulk", "METHODS", "accept_probability", "mean_acceptance",
           "ceperley_dewing_series", "ceperley_dewing_closed_form", "ceperley_dewing_penalty",
           "validity_bound", "ecdf_ess", "KS_CRITICAL", "ECDF_QUANTILES", "check_interval",
           "predict_blocks", "prediction_columns", "rows_per_block", "coefficient_table",
           "run_header", "table_notes", "NAME_WIDTH", "check_coupled_settings",
           "check_estimate_arguments"]
