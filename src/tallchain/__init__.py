"""tallchain: posterior sampling for regressions on tall data.

Minibatch Metropolis-Hastings with Langevin proposals and the penalty correction for the noise
of the minibatch log-ratio (Ceperley & Dewing 1999), control variates around the mode, and the
diagnostics to check the result.
"""

from importlib.metadata import PackageNotFoundError, version

from .conjugate import GaussianPosterior, conjugate_posterior
from .mode import LaplaceApproximation, ModeNotFoundError, find_mode
from .models import GaussianPrior, LinearRegression, LogisticRegression, PoissonRegression
from .result import SampleResult
from .sampling import NoisyLogRatioWarning, SamplingInterrupted, sample
from ._validation import InputError
from .executors import WorkerLostError

try:
    __version__ = version("tallchain")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0.0.0"

__all__ = [
    # models
    "GaussianPrior",
    "LinearRegression",
    "LogisticRegression",
    "PoissonRegression",
    # sampling
    "sample",
    "SampleResult",
    "NoisyLogRatioWarning",
    "SamplingInterrupted",
    # exact and approximate posteriors
    "conjugate_posterior",
    "GaussianPosterior",
    "find_mode",
    "LaplaceApproximation",
    "ModeNotFoundError",
    # errors
    "InputError",
    "WorkerLostError",
]
