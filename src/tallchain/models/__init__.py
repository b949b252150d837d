"""Regression models: GLM families, Gaussian priors, their numba kernels and NumPy references."""

from .._validation import fail
from ._families import FAMILIES, LinearRegression, LogisticRegression, PoissonRegression
from ._glm import _GLM
from ._inputs import check_noise_sd, check_noise_sd_prior
from ._prior import GaussianPrior

__all__ = ["GaussianPrior", "LinearRegression", "LogisticRegression", "PoissonRegression",
           "FAMILIES", "check_model", "check_noise_sd", "check_noise_sd_prior"]


def check_model(model):
    """Refuse anything but a tallchain regression model, in the one-line message shape."""
    if not isinstance(model, _GLM):
        fail("model", f"must be a LinearRegression, LogisticRegression or PoissonRegression, "
             f"got {type(model).__name__}", "build one, e.g. tc.LogisticRegression(X, y)")
