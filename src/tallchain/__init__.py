"""tallchain: posterior sampling for regressions on tall data.

Minibatch Metropolis-Hastings with Langevin proposals and the penalty correction for the noise
of the minibatch log-ratio (Ceperley & Dewing 1999), control variates around the mode, and the
diagnostics to check the result.

The package is layered; each layer imports only the ones below it:
``data`` (files in) < ``models`` (families, priors, kernels) < ``posterior`` (mode, Laplace,
conjugate posteriors, mass matrices, control-variate caches) < ``mcmc`` (settings, the
transition loop, `sample`, the result) < ``checks`` (KS, twin, sweeps, calibration) < ``app``
(config, command line, demo). ``exceptions``, ``executors``, ``outputs`` and ``plots`` serve
every layer and import none of them.
"""

from importlib.metadata import PackageNotFoundError, version

from .checks import calibrate, check_on_twin, ks_check, sweep
from .exceptions import (ConvergenceWarning, DataNote, DataWarning, InputError, ModeNotFoundError,
                         NoisyLogRatioWarning, SamplingInterrupted, WorkerDiedError)
from .mcmc import EstimateResult, RunOptions, SampleResult, SamplerSettings, estimate, sample
from .models import (BinomialRegression, GaussianPrior, LinearRegression, LogisticRegression,
                     NegativeBinomialRegression, PoissonRegression)
from .posterior import GaussianPosterior, LaplaceApproximation, conjugate_posterior, find_mode

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
    "NegativeBinomialRegression",
    "BinomialRegression",
    # sampling
    "sample",
    "SamplerSettings",
    "RunOptions",
    "SampleResult",
    # unbiased estimates from coupled chains
    "estimate",
    "EstimateResult",
    # exact and approximate posteriors
    "conjugate_posterior",
    "GaussianPosterior",
    "find_mode",
    "LaplaceApproximation",
    # checks
    "check_on_twin",
    "sweep",
    "calibrate",
    "ks_check",
    # errors and warnings
    "InputError",
    "ModeNotFoundError",
    "SamplingInterrupted",
    "WorkerDiedError",
    "NoisyLogRatioWarning",
    "ConvergenceWarning",
    "DataWarning",
    "DataNote",
]
