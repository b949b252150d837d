"""Numba: the family codes, and what families with a parameter beyond eta compute (private).

A family parameter phi is sampled on an unconstrained scale after the coefficients; the rows
use its value v = family_value(family, phi):

* linear, unknown noise sd: phi = log s, v = s;
  l = -(y - eta)^2 / (2 s^2) - log s - log(2 pi) / 2.
* binomial with trials (no sampled parameter): the row's value is its number of trials m_i,
  l = y eta - m log(1 + e^eta) + log C(m, y).
* negative binomial NB2 (Cameron & Trivedi 2013, Regression Analysis of Count Data, 2nd ed.,
  section 3.3): mean mu = e^eta, variance mu + alpha mu^2; phi = log alpha, v = r = 1/alpha;
  l = lgamma(y + r) - lgamma(r) - lgamma(y + 1) + r log(r / (r + mu)) + y log(mu / (r + mu)).

With p = mu / (r + mu) = sigmoid(eta - log r) every NB2 derivative below is formed without
mu itself, so nothing overflows for large eta.
"""

import math

import numba

LINEAR = 0
LOGISTIC = 1
POISSON = 2
NEG_BINOMIAL = 3
BINOMIAL = 4

# Reassociation and contraction let LLVM vectorise the row dot products and sums; NaN and inf
# keep their IEEE meaning (no "nnan"/"ninf"), which the overflow handling relies on.
OPTIONS = dict(cache=True, nogil=True, fastmath={"reassoc", "contract"}, error_model="numpy")
jit = numba.njit(**OPTIONS)


@jit
def digamma(x):
    """psi(x) for x > 0: the recurrence psi(x) = psi(x + 1) - 1/x up to x >= 8, then the
    asymptotic series (Abramowitz & Stegun 1964, eq. 6.3.18)."""
    acc = 0.0
    while x < 8.0:
        acc -= 1.0 / x
        x += 1.0
    z = 1.0 / (x * x)
    series = z * (1.0 / 12 - z * (1.0 / 120 - z * (1.0 / 252 - z * (1.0 / 240 - z / 132))))
    return acc + math.log(x) - 0.5 / x - series


@jit
def trigamma(x):
    """psi'(x) for x > 0: psi'(x) = psi'(x + 1) + 1/x^2 up to x >= 12, then the asymptotic
    series (Abramowitz & Stegun 1964, eq. 6.4.12) to its x^-11 term (the next is below
    3e-15 there)."""
    acc = 0.0
    while x < 12.0:
        acc += 1.0 / (x * x)
        x += 1.0
    z = 1.0 / (x * x)
    series = 1.0 / 6 - z * (1.0 / 30 - z * (1.0 / 42 - z * (1.0 / 30 - z * 5.0 / 66)))
    return acc + 1.0 / x + 0.5 * z + z / x * series


@jit
def family_value(family, phi):
    """v, the value the rows use, from the sampled phi: s = e^phi (linear), r = e^-phi (NB2)."""
    if family == NEG_BINOMIAL:
        return math.exp(-phi)
    return math.exp(phi)


@jit
def _nb_p(eta, r):
    """p = mu / (r + mu) = sigmoid(eta - log r), without overflow."""
    z = eta - math.log(r)
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@jit
def nb_loglik(eta, y, r, log_norm):
    """NB2 l without its constant: r log(r / (r + mu)) + y log(mu / (r + mu)) + log_norm,
    with log(r + mu) = logaddexp(log r, eta)."""
    log_r = math.log(r)
    hi = max(log_r, eta)
    lse = hi + math.log1p(math.exp(-abs(log_r - eta)))
    return r * (log_r - lse) + y * (eta - lse) + log_norm


@jit
def nb_dloglik(eta, y, r):
    """dl/deta = r (y - mu) / (r + mu) = y (1 - p) - r p."""
    p = _nb_p(eta, r)
    return y * (1.0 - p) - r * p


@jit
def nb_d2loglik(eta, y, r):
    """d2l/deta2 = -r mu (y + r) / (r + mu)^2 = -(y + r) p (1 - p)."""
    p = _nb_p(eta, r)
    return -(y + r) * p * (1.0 - p)


@jit
def log_norm_phi(family, y, v):
    """The part of a row's constant that depends on phi: -log s (linear), lgamma(y + r) -
    lgamma(r) (NB2). Kept in the sampler's passes, which drop the rest of the constant."""
    if family == NEG_BINOMIAL:
        return math.lgamma(y + v) - math.lgamma(v)
    return -math.log(v)


@jit
def dloglik_phi(family, eta, y, v):
    """(dl/dphi, d2l/(deta dphi), d2l/dphi2) of one row.

    Linear, phi = log s, r = (y - eta)/s: (r^2 - 1, -2 r / s, -2 r^2).
    NB2, phi = log alpha, r = e^-phi (dr/dphi = -r), g = dl/dr = psi(y + r) - psi(r) +
    log(r / (r + mu)) + 1 - (y + r)/(r + mu): dl/dphi = -r g; d2l/dphi2 = r g + r^2 dg/dr with
    r^2 dg/dr = r^2 (psi'(y + r) - psi'(r)) + r p^2 + y (1 - p)^2; d2l/(deta dphi) =
    -r mu (y - mu) / (r + mu)^2 = p^2 r - y p (1 - p).
    """
    if family == NEG_BINOMIAL:
        r = v
        p = _nb_p(eta, r)
        log_r = math.log(r)
        hi = max(log_r, eta)
        lse = hi + math.log1p(math.exp(-abs(log_r - eta)))
        g = digamma(y + r) - digamma(r) + (log_r - lse) + 1.0 - (y + r) * (1.0 - p) / r
        r2_dg = r * r * (trigamma(y + r) - trigamma(r)) + r * p * p + y * (1.0 - p) * (1.0 - p)
        return -r * g, p * p * r - y * p * (1.0 - p), r * g + r2_dg
    r = (y - eta) / v
    return r * r - 1.0, -2.0 * r / v, -2.0 * r * r
