"""Regression models: GLM families, Gaussian priors, their numba kernels and NumPy references."""

from .._validation import fail
from ._families import (FAMILIES, BinomialRegression, LinearRegression, LogisticRegression,
                        NegativeBinomialRegression, PoissonRegression)
from ._glm import _GLM
from ._inputs import check_median_prior, check_noise_sd
from ._prior import GaussianPrior
from ._response import (RESPONSES, BernoulliResponse, BinomialResponse,
                        NegativeBinomialResponse, NormalResponse, PoissonResponse, Response,
                        response_from_record)

__all__ = ["GaussianPrior", "LinearRegression", "LogisticRegression", "PoissonRegression",
           "NegativeBinomialRegression", "BinomialRegression", "FAMILIES", "check_model",
           "check_noise_sd", "check_median_prior", "Response", "NormalResponse",
           "BernoulliResponse", "PoissonResponse", "NegativeBinomialResponse",
           "BinomialResponse", "RESPONSES", "response_from_record"]


def check_model(model):
    """Refuse anything but a tallchain regression model, in the one-line message shape."""
    if not isinstance(model, _GLM):
        fail("model", "must be a LinearRegression, LogisticRegression, PoissonRegression or "
             f"NegativeBinomialRegression, got {type(model).__name__}",
             "build one, e.g. tc.LogisticRegression(X, y)")
