"""Acceptance rules for Metropolis-Hastings with a noisy log-ratio, as numba kernels (private).

Rule codes used by the chain loop:
    EXACT      accept with min(1, exp(Lambda)), Lambda computed on all rows
    PLUGIN     accept with min(1, exp(delta_hat + c)): minibatch estimate, no correction (biased)
    PENALTY    min(1, exp(delta_hat + c - sigma^2/2)), sigma^2 treated as known
               (Ceperley & Dewing 1999)
    PENALTY_CD as PENALTY with sigma^2/2 replaced by u_B(chi^2, n), the Ceperley-Dewing
               correction for a variance estimated from n samples
    NONE       always move (unadjusted Langevin, SGLD)
"""

import math

import numpy as np
from scipy import optimize, special

from ..models._kernels import jit

EXACT = 0
PLUGIN = 1
PENALTY = 2
PENALTY_CD = 3
NONE = 4

# The series for e^{-u_B} is evaluated only up to chi^2 = 16 (its rounding grows as e^{chi^2});
# from n = 46 on the validity bound lies above that.
CHI2_MAX = 16.0
_TABLE_N = 46


def validity_bound(n):
    """Largest chi^2 for which e^{-u_B} is positive: j_{(n-3)/2, 1}^2 / (n - 1), with j the
    first positive zero of the Bessel function J_{(n-3)/2} (about n/4 for large n)."""
    nu = 0.5 * (n - 3.0)
    # j_{nu,1} lies in (nu, nu + 2 nu^{1/3} + 3) for nu >= 0 (first zero beyond the order).
    lo = max(nu, 1e-9)
    hi = nu + 2.0 * max(nu, 1.0) ** (1.0 / 3.0) + 3.0
    j1 = optimize.brentq(lambda z: special.jv(nu, z), lo + 1e-9 if nu > 0 else 1.0, hi)
    return j1**2 / (n - 1.0)


# The bound for the batch sizes where it lies below CHI2_MAX (index n; 0 for n < 2).
_BOUNDS = np.array([0.0, 0.0] + [validity_bound(n) for n in range(2, _TABLE_N)])


@jit
def log_hyp0f1_neg(b, x):
    """log 0F1(; b; -x) for x >= 0, summed as a power series; NaN where the sum is <= 0.

    The series is alternating; its terms peak near k ~ sqrt(x) for small b and near k ~ x/b for
    large b, so the relative rounding error is about e^{2 x / b} * 1e-16, which stays below 1e-9
    for chi^2 = 2x/b < 16 (the caller falls back long before that).
    """
    term = 1.0
    total = 1.0
    k = 0
    while k < 100000:
        term *= -x / ((b + k) * (k + 1.0))
        total += term
        k += 1
        if abs(term) <= 1e-17 * abs(total) and k > x / b:
            break
    if total <= 0.0:
        return math.nan
    return math.log(total)


@jit
def ceperley_dewing_penalty(chi2, n):
    """u_B with e^{-u_B} = 0F1(; (n-1)/2; -(n-1) chi^2 / 4), the unbiased estimator of
    e^{-sigma^2/2} from a variance estimate chi^2 with n - 1 degrees of freedom
    (Ceperley & Dewing 1999; closed form in METHODS.md section 1).

    Returns NaN outside the domain where the estimator is a valid (positive) probability
    factor: beyond the first Bessel zero, and beyond chi^2 = 16 where the series is not
    evaluated.
    """
    if chi2 <= 0.0:
        return 0.0
    b = 0.5 * (n - 1.0)
    x = 0.25 * (n - 1.0) * chi2
    if chi2 > CHI2_MAX:
        return math.nan
    # Below 46 rows the series turns positive again beyond its second zero: the first zero
    # (METHODS.md section 1) is the bound, whatever the sign further on.
    k = int(n)
    if k < _TABLE_N and chi2 >= _BOUNDS[k]:
        return math.nan
    lf = log_hyp0f1_neg(b, x)
    if math.isnan(lf):
        return math.nan
    return -lf


@jit
def noise_penalty(rule, var, n_batch, var_is_known):
    """The amount subtracted from the log acceptance ratio, and whether the Ceperley-Dewing
    correction fell back to the plug-in sigma^2/2 (beyond its validity bound).

    EXACT and PLUGIN subtract nothing; PENALTY subtracts var/2; PENALTY_CD subtracts u_B(var, n)
    unless the variance is treated as known (a pooled estimate), when it subtracts var/2.
    """
    if rule == PENALTY or (rule == PENALTY_CD and var_is_known):
        return 0.5 * var, False
    if rule == PENALTY_CD:
        u = ceperley_dewing_penalty(var, n_batch)
        if math.isnan(u):
            return 0.5 * var, True
        return u, False
    return 0.0, False


@jit
def log_accept_probability(log_ratio, proposal_term, penalty):
    """log min(1, exp(log_ratio + c - penalty)); -inf when that is not a finite number."""
    z = log_ratio + proposal_term - penalty
    if not math.isfinite(z):
        return -math.inf
    return z if z < 0.0 else 0.0
