"""What is known about the posterior before sampling: mode, Laplace approximation, exact
conjugate posteriors, mass matrices and control-variate caches."""

from ._conjugate import GaussianPosterior, conjugate_posterior
from ._control_variates import ControlVariateCache, cache_passes, control_variate_cache
from ._mass import MASS_MATRIX_KINDS, Preconditioner, make_preconditioner, proxy_preconditioner
from ._mode import LaplaceApproximation, find_mode

__all__ = ["GaussianPosterior", "conjugate_posterior", "ControlVariateCache",
           "control_variate_cache", "cache_passes", "MASS_MATRIX_KINDS", "Preconditioner",
           "make_preconditioner", "proxy_preconditioner", "LaplaceApproximation",
           "find_mode"]
