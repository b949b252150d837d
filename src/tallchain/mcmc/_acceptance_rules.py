"""Acceptance rules for Metropolis-Hastings with a noisy log target ratio.

The chain loop applies these rules inside numba (``_acceptance_kernels``); the functions here
are the same rules for inspection and testing, vectorised over NumPy arrays.

With Lambda = Delta + c the exact log acceptance ratio (Delta the log target ratio, c the
proposal-density term) and delta_hat ~ N(Delta, sigma^2) a minibatch estimate:

* exact MH: ``min(1, exp(Lambda))``;
* plug-in ("naive-mh"): ``min(1, exp(delta_hat + c))`` - biased;
* penalty: ``min(1, exp(delta_hat + c - sigma^2/2))`` - satisfies detailed balance exactly for
  Gaussian noise of known variance (Ceperley & Dewing 1999);
* penalty with an estimated variance chi^2 (n - 1 degrees of freedom): sigma^2/2 replaced by
  u_B, with e^{-u_B} the unbiased estimator of e^{-sigma^2/2} (Ceperley & Dewing 1999).

References
----------
D. M. Ceperley and M. Dewing, "The penalty method for random walks with uncertain energies",
J. Chem. Phys. 110, 9812 (1999).
"""

import math

import numpy as np
from scipy import special, stats

from . import _acceptance_kernels as _k
from ._acceptance_kernels import validity_bound  # noqa: F401  (part of this module's face)

RULES = ("exact", "plug-in", "penalty", "penalty-estimated")


def mean_acceptance(log_ratio, sigma):
    """Expected acceptance of the penalty rule with known sigma at exact log ratio Lambda:
    A(Lambda, sigma) = Phi((Lambda - sigma^2/2)/sigma) + e^Lambda Phi((-Lambda - sigma^2/2)/sigma).

    A(0, sigma) = 2 Phi(-sigma/2) (METHODS.md section 1; derived from the Gaussian integral).
    """
    lam = np.asarray(log_ratio, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    s2 = 0.5 * sigma**2
    with np.errstate(over="ignore", invalid="ignore"):
        return (stats.norm.cdf((lam - s2) / sigma)
                + np.exp(lam) * stats.norm.cdf((-lam - s2) / sigma))


def ceperley_dewing_series(chi2, n, terms=3):
    """u_B by its series chi^2/2 + chi^4/(4(n+1)) + chi^6/(3(n+1)(n+3)) + ...

    The first three terms are the ones printed by Ceperley & Dewing (1999); they are exact to
    O(chi^8 / n^3).
    """
    chi2 = np.asarray(chi2, dtype=float)
    out = 0.5 * chi2
    if terms >= 2:
        out = out + chi2**2 / (4.0 * (n + 1.0))
    if terms >= 3:
        out = out + chi2**3 / (3.0 * (n + 1.0) * (n + 3.0))
    return out


def ceperley_dewing_closed_form(chi2, n):
    """u_B in closed form, from e^{-u_B} = Gamma(b) x^{(1-b)/2} J_{b-1}(2 sqrt(x)),
    b = (n - 1)/2, x = (n - 1) chi^2 / 4 (scipy.special.jv; METHODS.md section 1).

    Returns NaN beyond the validity bound (where the Bessel expression is not positive). The
    product is formed in log space; J underflows for very large n (a few hundred and more with
    chi^2 of order 1), where `ceperley_dewing_penalty` (the power series used by the sampler)
    should be used.
    """
    chi2 = np.atleast_1d(np.asarray(chi2, dtype=float))
    b = 0.5 * (n - 1.0)
    out = np.zeros_like(chi2)
    pos = chi2 > 0
    x = 0.25 * (n - 1.0) * chi2[pos]
    j = special.jv(b - 1.0, 2.0 * np.sqrt(x))
    with np.errstate(divide="ignore", invalid="ignore"):
        log_e = special.gammaln(b) + 0.5 * (1.0 - b) * np.log(x) + np.log(j)
    out[pos] = np.where(j > 0, -log_e, np.nan)
    return out if out.size > 1 else out[0]


def ceperley_dewing_penalty(chi2, n):
    """u_B as the sampler computes it (power series of 0F1 in numba); NaN beyond validity."""
    return np.vectorize(lambda c: _k.ceperley_dewing_penalty(float(c), float(n)))(chi2)


def accept_probability(log_ratio_estimate, proposal_term=0.0, variance=0.0, *, rule="penalty",
                       batch_size=None):
    """Acceptance probability of a move under one of the rules.

    Parameters
    ----------
    log_ratio_estimate : array-like
        The (exact or estimated) log target ratio.
    proposal_term : array-like, default=0.0
        c = log q(theta | theta') - log q(theta' | theta).
    variance : array-like, default=0.0
        sigma^2 (known) or its estimate chi^2.
    rule : {"exact", "plug-in", "penalty", "penalty-estimated"}, default="penalty"
    batch_size : int, optional
        n, needed by "penalty-estimated".

    Returns
    -------
    ndarray
        Probabilities in [0, 1]; 0 where the log ratio is not finite.
    """
    codes = {"exact": _k.EXACT, "plug-in": _k.PLUGIN, "penalty": _k.PENALTY,
             "penalty-estimated": _k.PENALTY_CD}
    if rule not in codes:
        raise ValueError(f"rule: unknown rule {rule!r}; choose one of {', '.join(RULES)}")
    if rule == "penalty-estimated" and (batch_size is None or batch_size < 2):
        raise ValueError("batch_size: penalty-estimated needs the batch size n >= 2")
    n = float(batch_size or 2)
    lr, c, v = np.broadcast_arrays(np.asarray(log_ratio_estimate, float),
                                   np.asarray(proposal_term, float), np.asarray(variance, float))
    out = np.empty(lr.shape)
    for i in np.ndindex(lr.shape):
        pen, _ = _k.noise_penalty(codes[rule], float(v[i]), n, False)
        out[i] = math.exp(_k.log_accept_probability(float(lr[i]), float(c[i]), pen))
    return out if out.ndim else float(out)
