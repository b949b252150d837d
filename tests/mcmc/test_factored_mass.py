"""The factored mass matrices ("laplace-lowrank", "laplace-diagonal"): M^{-1} = S C_k S.

* Construction (`posterior/_mass.factored_preconditioner`) against NumPy's eigendecomposition
  of the Laplace correlation matrix: at full rank M^{-1} is the covariance and M its inverse
  (`numpy.linalg.inv`); at rank 0 M^{-1} is diag(cov); at rank k, C_k has the k eigenpairs
  farthest from 1 and eigenvalue 1 elsewhere (the definition, checked on eigenvectors).
* The kernel's O(d k) steps (`mcmc/_factored_mass.py`) against the NumPy references
  `mcmc/_reference.propose` and `langevin_log_density`, which apply the same low-rank plus
  diagonal matrices as dense products to the same vectors (ulps stated per test).
* Exactness (slow): penalty-mala with the low-rank mass on a conjugate linear regression
  against the exact posterior (Bishop, PRML 2006, eqs. 3.53-3.54) by KS beside its noise floor
  1.358/sqrt(ECDF ESS), 1.5 floors; power: the same run whose proposal density takes half the
  low-rank part of M (the noise is drawn right, the density is wrong along the k kept
  directions) fails the same test. Measured while writing it (seed 8): 0.70 floors at most
  (ECDF ESS >= 2434) against 2.13 floors for the broken density (ECDF ESS >= 1752); dropping
  the low-rank part of the density entirely stalls the chain (ECDF ESS < 12, inconclusive).
"""

import math

import numpy as np
import pytest

import tallchain as tc
from tallchain.checks import ks_check
from tallchain.mcmc import _reference as MR
from tallchain.mcmc import _setup
from tallchain.mcmc import _transition as T
from tallchain.posterior import _mass
from tallchain.posterior._mass import Preconditioner, factored_preconditioner
from ulps import assert_ulps_close

D = 12


def _cov(rng, d=D):
    """A covariance with correlations and standard deviations spread over 4 decades."""
    a = rng.normal(size=(d, d + 3))
    sd = 10.0 ** rng.uniform(-2, 2, d)
    return (a @ a.T / (d + 3) + 0.1 * np.eye(d)) * np.outer(sd, sd)


def test_full_rank_is_the_covariance_and_rank_zero_its_diagonal(rng):
    cov = _cov(rng)
    full = factored_preconditioner("laplace-lowrank", cov, D)
    # eigendecomposition and back: d-term sums of products, relative to |cov| (scaled): 4d
    assert_ulps_close(full.mass_inv, cov, ulps=4 * D,
                      scale=np.sqrt(np.outer(np.diag(cov), np.diag(cov))))
    want = np.linalg.inv(cov)
    assert_ulps_close(full.mass, want, ulps=4 * D * np.linalg.cond(cov / np.sqrt(
        np.outer(np.diag(cov), np.diag(cov)))), scale=np.sqrt(np.outer(np.diag(want),
                                                                        np.diag(want))))
    diag = factored_preconditioner("laplace-diagonal", cov, 0)
    assert diag.factors[1].shape == (D, 0)
    # sqrt then square: 2 roundings
    assert_ulps_close(diag.mass_inv, np.diag(np.diag(cov)), ulps=2)


def test_low_rank_keeps_the_eigenpairs_farthest_from_one(rng):
    cov, k = _cov(rng), 4
    pre = factored_preconditioner("laplace-lowrank", cov, k)
    sd = np.sqrt(np.diag(cov))
    lam, vec = np.linalg.eigh(cov / np.outer(sd, sd))
    far = np.argsort(-np.abs(np.log(lam)))
    c_k = pre.mass_inv / np.outer(sd, sd)
    for rank, j in enumerate(far):
        want = lam[j] if rank < k else 1.0
        # C_k v = want v: d-term products, relative to the largest eigenvalue: 4d ulps
        assert_ulps_close(c_k @ vec[:, j], want * vec[:, j], ulps=4 * D, scale=lam.max())
    # the kernel's square root: L L^T = M^{-1}
    assert_ulps_close(pre.mass_inv_chol @ pre.mass_inv_chol.T, pre.mass_inv, ulps=8 * D,
                      scale=np.outer(sd, sd) * lam.max())


@pytest.mark.parametrize("k", [0, 5])
@pytest.mark.parametrize("langevin", [False, True], ids=["random-walk", "langevin"])
def test_propose_matches_dense_reference(k, langevin, rng):
    pre = factored_preconditioner("laplace-lowrank", _cov(rng), k)
    dense = pre.dense_matrices
    beta, grad, h = rng.normal(size=D), rng.normal(size=D) * 5, 0.37
    xi, prop = np.full(D, np.nan), np.full(D, np.nan)
    T._propose(pre.matrices, langevin, beta, grad, h, np.random.default_rng(4), xi, prop)
    assert np.all(np.isfinite(xi)) and np.ptp(xi) > 0
    want = MR.propose(dense, beta, h, xi, grad if langevin else None)
    # S (xi + Q_k (c * Q_k' xi)) and the drift S (w + Q_k (c * Q_k' w)): d + k terms and 3
    # scalings each in the kernel; the reference's dense matrices were built with k + 2
    # roundings per entry and are applied as d-term sums: 2 (d + k) + 10 in all
    scale = (np.abs(beta) + math.sqrt(h) * np.abs(dense.mass_inv_chol) @ np.abs(xi)
             + (0.5 * h * np.abs(dense.mass_inv) @ np.abs(grad) if langevin else 0.0))
    assert_ulps_close(prop, want, ulps=2 * (D + k) + 10, scale=scale)


@pytest.mark.parametrize("k", [0, 5])
def test_langevin_log_density_matches_dense_reference(k, rng):
    pre = factored_preconditioner("laplace-lowrank", _cov(rng), k)
    dense = pre.dense_matrices
    z = np.empty(D)
    for _ in range(20):
        to, frm, g = rng.normal(size=D), rng.normal(size=D), rng.normal(size=D) * 3
        h = float(rng.uniform(0.05, 2.0))
        got = T._langevin_log_density(to, frm, g, h, pre.matrices, z)
        zs = np.abs(to) + np.abs(frm) + 0.5 * h * np.abs(dense.mass_inv) @ np.abs(g)
        # z as in the proposal (2 (d + k) + 10), then z'Mz: d + k terms of products of 3
        # against the reference's d^2: d^2 + 3 (d + k) + 20
        assert_ulps_close(got, MR.langevin_log_density(to, frm, g, h, dense),
                          ulps=D * D + 3 * (D + k) + 20,
                          scale=0.5 * zs @ np.abs(dense.mass) @ zs / h)


def test_kinds_choose_their_form():
    lap = tc.posterior.LaplaceApproximation(np.zeros(3), np.eye(3), np.eye(3), 0, "")
    assert _mass.make_preconditioner("laplace", 3, lap).factors is None
    assert _mass.make_preconditioner("laplace-lowrank", 3, lap).factors[1].shape == (3, 2)
    wide = _mass.LOW_RANK + 5
    lap = tc.posterior.LaplaceApproximation(np.zeros(wide), np.eye(wide), np.eye(wide), 0, "")
    low = _mass.make_preconditioner("laplace-lowrank", wide, lap)
    assert low.factors[1].shape == (wide, _mass.LOW_RANK)
    assert low.matrices.mass.shape == (0, 0)   # the kernel gets the factors only
    assert _mass.make_preconditioner("laplace-diagonal", wide, lap).factors[1].shape == (wide, 0)


# --- exactness ---------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def linear_wide():
    """A conjugate linear regression with 13 coefficients (AR(1) correlation 0.8 between
    features, mean 0.5, so the intercept correlates too): LOW_RANK = 10 of 13 directions kept."""
    g = np.random.default_rng(20261203)
    p = D
    lag = np.arange(p)
    X = 0.5 + g.multivariate_normal(np.zeros(p), 0.8 ** np.abs(lag[:, None] - lag[None, :]),
                                    size=3000)
    y = 0.3 + X @ g.normal(0.0, 0.5, p) + g.standard_normal(3000)
    model = tc.LinearRegression(X, y, noise_sd=1.0, prior=tc.GaussianPrior(sd=10.0))
    return model, tc.conjugate_posterior(model)


def _run(model):
    return tc.sample(model, method="penalty-mala", mass_matrix="laplace-lowrank", batch_size=50,
                     chains=4, draws=3000, warmup=500, seed=8)


@pytest.mark.slow
def test_penalty_mala_with_low_rank_mass_matches_exact_posterior(linear_wide):
    model, post = linear_wide
    r = _run(model)
    assert r.tuned["mass_matrix"] == "laplace-lowrank"
    check = ks_check(r.draws, post)
    assert check.conclusive and check.passed, check.as_dict()


@pytest.mark.slow
def test_power_proposal_density_without_the_low_rank_part_fails(linear_wide, monkeypatch):
    make = _setup.make_preconditioner

    def broken(kind, n_coef, laplace):
        pre = make(kind, n_coef, laplace)
        scale, basis, powers = pre.factors
        powers = powers.copy()
        powers[2] *= 0.5       # z'Mz with half the low-rank part; the noise keeps S C_k^{1/2}
        return Preconditioner(pre.kind, pre.mass, pre.mass_inv, pre.mass_inv_chol,
                              (scale, basis, powers))

    monkeypatch.setattr(_setup, "make_preconditioner", broken)
    model, post = linear_wide
    check = ks_check(_run(model).draws, post)
    assert check.conclusive and not check.passed, check.as_dict()
