"""Exact posteriors for the linear-Gaussian model with known noise."""

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._arrays import row_blocks, spd_inverse
from .._validation import fail


@dataclass
class GaussianPosterior:
    """An exact multivariate normal posterior.

    Attributes
    ----------
    mean : ndarray of shape (n_coef,)
    cov : ndarray of shape (n_coef, n_coef)
    coef_names : list of str
    """

    mean: np.ndarray
    cov: np.ndarray
    coef_names: list

    @property
    def sd(self):
        """Marginal standard deviations."""
        return np.sqrt(np.diag(self.cov))

    def marginal(self, j):
        """The exact marginal of coefficient j as a frozen scipy.stats normal."""
        return stats.norm(loc=self.mean[j], scale=self.sd[j])

    def sample(self, size, rng=None):
        """Independent draws, shape (size, n_coef)."""
        rng = np.random.default_rng(rng)
        return rng.multivariate_normal(self.mean, self.cov, size=size, method="cholesky")


def conjugate_posterior(model):
    """Exact posterior of a `LinearRegression` with a Gaussian prior.

    S_N^{-1} = S_0^{-1} + Phi^T Phi / s^2,   m_N = S_N (S_0^{-1} m_0 + Phi^T y / s^2)
    (Bishop, Pattern Recognition and Machine Learning, 2006, eqs. 3.50-3.51 and 3.53-3.54 with
    prior mean m_0 and covariance S_0). Phi is X with a column of ones prepended when the model
    has an intercept; the products are accumulated in row blocks so X is never copied whole.

    Parameters
    ----------
    model : LinearRegression

    Returns
    -------
    GaussianPosterior
    """
    if not getattr(model, "closed_form_posterior", False):
        what = ("a LinearRegression whose noise sd is sampled"
                if getattr(model, "noise_sd", 0) is None else type(model).__name__)
        fail("model", f"is {what}",
             "conjugate_posterior needs a LinearRegression with a known noise_sd")
    d = model.n_coef
    gram = np.zeros((d, d))
    xty = np.zeros(d)
    for start, xb in row_blocks(model.X):
        yb = model.y[start:start + xb.shape[0]] - model.offset[start:start + xb.shape[0]]
        if model.add_intercept:
            xb = np.column_stack([np.ones(xb.shape[0]), xb])
        wx = xb if model.weights is None else xb * model.weights[start:start + xb.shape[0], None]
        gram += wx.T @ xb      # frequency weights: X' W X and X' W y
        xty += wx.T @ yb
    s2 = model.noise_sd**2
    precision = model.prior_prec + gram / s2
    cov = spd_inverse(precision)
    mean = cov @ (model.prior_prec @ model.prior_mean + xty / s2)
    return GaussianPosterior(mean=mean, cov=cov, coef_names=list(model.coef_names))
