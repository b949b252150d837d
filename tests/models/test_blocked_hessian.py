"""The Hessian pass of wide designs by matrix products over row blocks (`models/_blocked.py`)
against the NumPy reference sum_i f''(eta_i) x_i x_i^T (`models/_reference.full_hessian`).

ulps budget (tests/ulps.py, relative to the same sums over absolute values,
`glm_problems.hessian_scale`): f''(eta_i) is the row-cache kernel's, eta a sum of d + 1 terms
and f'' a few more roundings (d + 6); the product sqrt(-w) x_a sqrt(-w) x_b against w x_a x_b
adds 4; the block sums over N rows in BLAS order, the reference's in NumPy's, N - 1 more;
the symmetrisation 1. So d + N + 12.
"""

import numpy as np
import pytest

import tallchain as tc
from glm_problems import hessian_scale
from tallchain.models import _blocked, _passes
from tallchain.models import _reference as R
from ulps import assert_ulps_close

N, P = 600, 219     # 219 features + intercept: above _passes.BLOCKED_MIN_COEF


def _model(family, intercept, rng):
    X = rng.normal(0.0, 0.15, size=(N, P))
    eta = 0.2 + X @ rng.normal(0.0, 0.3, P)
    if family == "logistic":
        y = (rng.random(N) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
        return tc.LogisticRegression(X, y, add_intercept=intercept)
    return tc.PoissonRegression(X, rng.poisson(np.exp(eta)).astype(float),
                                add_intercept=intercept)


@pytest.mark.parametrize("intercept", [True, False], ids=["intercept", "no-intercept"])
@pytest.mark.parametrize("family", ["logistic", "poisson"])
def test_blocked_hessian_matches_the_row_sum(family, intercept, rng, monkeypatch):
    model = _model(family, intercept, rng)
    assert model.n_coef >= _passes.BLOCKED_MIN_COEF
    # small blocks, so that several blocks are added
    monkeypatch.setattr(_blocked, "BLOCK_BYTES", 64 * 8 * P)
    data, beta = model.glm_data, rng.normal(0.0, 0.05, model.n_coef)
    got = _passes.hessian(data, beta)
    assert_ulps_close(got, R.full_hessian(data, beta), ulps=model.n_coef + N + 12,
                      scale=hessian_scale(data, beta))
    np.testing.assert_array_equal(got, got.T)


def test_blocked_hessian_with_weights_of_both_signs(rng):
    # the general product (no square root) when some f'' > 0: against Phi^T (w Phi) by NumPy
    model = _model("logistic", True, rng)
    data = model.glm_data
    w = rng.normal(size=N)
    phi = R.design(data.X, True)
    got = _blocked.blocked_hessian(data, np.zeros(model.n_coef), w)
    # N products of 2 roundings summed in two orders, and the symmetrisation
    assert_ulps_close(got, phi.T @ (w[:, None] * phi), ulps=N + 4,
                      scale=np.abs(phi).T @ (np.abs(w)[:, None] * np.abs(phi)))


def test_narrow_designs_keep_the_row_loop(rng, monkeypatch):
    def refuse(*args):
        raise AssertionError("blocked Hessian used below BLOCKED_MIN_COEF")

    monkeypatch.setattr(_passes, "blocked_hessian", refuse)
    X = rng.normal(size=(N, 5))
    model = tc.LogisticRegression(X, (rng.random(N) < 0.5).astype(float))
    assert model.log_likelihood_hessian(np.zeros(6)).shape == (6, 6)
    with pytest.raises(AssertionError, match="blocked Hessian used"):
        _model("logistic", True, rng).log_likelihood_hessian(np.zeros(P + 1))
