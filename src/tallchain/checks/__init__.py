"""Checks of a sampler's answer: KS distances with their noise floor, the conjugate twin,
step-size sweeps and simulation-based calibration."""

from ._calibration import (MAX_SHORT_SHARE, CalibrationResult, calibrate, ecdf_bands,
                           ecdf_uniformity_pvalues, rank_uniformity_pvalues)
from ._ks import (KS_CRITICAL, MIN_ESS_FOR_VERDICT, KSCheck, ecdf_ess, family_threshold,
                  ks_check)
from ._sweep import SweepJournal, SweepResult, reference_draws, sweep, write_sweep
from ._twin import TwinCheck, check_on_twin, conjugate_twin

__all__ = ["calibrate", "CalibrationResult", "MAX_SHORT_SHARE", "ecdf_bands",
           "ecdf_uniformity_pvalues", "rank_uniformity_pvalues",
           "ks_check", "KSCheck", "KS_CRITICAL", "MIN_ESS_FOR_VERDICT", "ecdf_ess", "family_threshold", "sweep",
           "SweepResult", "SweepJournal", "write_sweep", "reference_draws", "check_on_twin", "TwinCheck",
           "conjugate_twin"]
