"""GLM families and Gaussian priors."""

from ._glm import FAMILIES, LinearRegression, LogisticRegression, PoissonRegression
from ._prior import GaussianPrior

__all__ = ["GaussianPrior", "LinearRegression", "LogisticRegression", "PoissonRegression",
           "FAMILIES"]
