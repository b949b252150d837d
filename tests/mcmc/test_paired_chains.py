"""The paired SGLD chains of Richardson-Romberg extrapolation (mcmc/_paired.py).

Outside reference: the Brownian increment over a time span h is the sum of those over its two
halves, sqrt(h/2) L xi1 + sqrt(h/2) L xi2 = sqrt(h) L (xi1 + xi2)/sqrt(2) (Durmus, Simsekli,
Moulines, Badeau & Richard, NeurIPS 2016, section 3). With zero gradient an SGLD step is that
increment alone, so two fine steps at h/2 must land where one coarse step at h lands.
"""

import numpy as np

from tallchain import LinearRegression
from tallchain.mcmc._paired import run_pair
from tallchain.models._kernels import PriorArrays
from tallchain.posterior import control_variate_cache
from tallchain.posterior._mass import MassMatrix
from ulps import assert_ulps_close


def _zero_gradient_problem(rng, d=3, n_rows=50):
    """A model whose every gradient is zero: X = 0, no intercept, a flat prior (precision 0),
    no control variates."""
    model = LinearRegression(np.zeros((n_rows, d)), rng.standard_normal(n_rows), noise_sd=1.0,
                             add_intercept=False, check=False)
    prior = PriorArrays(np.zeros(d), np.zeros((d, d)))
    rows = control_variate_cache(model, None, 0).rows
    a = rng.standard_normal((d, d))
    m_inv = a @ a.T + d * np.eye(d)          # a preconditioner that mixes coordinates
    mass = MassMatrix(np.linalg.inv(m_inv), m_inv, np.linalg.cholesky(m_inv))
    return model, prior, rows, mass


def test_fine_pair_of_half_steps_reproduces_the_coarse_step_with_zero_gradient(rng):
    model, prior, rows, mass = _zero_gradient_problem(rng)
    d, h = 3, 0.37
    gen = np.random.default_rng(5)
    for _ in range(200):
        start = rng.standard_normal(d)
        coarse, fine = start.copy(), start.copy()
        c_out, f_out = np.empty((1, d)), np.empty((2, d))
        run_pair(model.glm_data, prior, rows, mass, h, coarse, fine, gen, 10, True, c_out,
                 f_out)
        # Rounding: each path rounds a lower-triangular product (d terms), a scaling and one
        # or two additions; relative to the size of the terms added (|start| and the
        # increments, |L xi| sqrt(h)), d + 6 = 9 ulps bound the two paths' difference.
        scale = np.abs(start) + np.abs(f_out[0] - start) + np.abs(f_out[1] - f_out[0])
        assert_ulps_close(c_out[0], f_out[1], ulps=d + 6, scale=scale)
        assert_ulps_close(coarse, fine, ulps=d + 6, scale=scale)
        # the chains did move (a test of a chain that stands still could not fail)
        assert np.all(np.abs(fine - start) > 1e-3 * np.sqrt(h))


def test_without_shared_noise_the_pair_separates(rng):
    """Power: the uncoupled variant (independent noise) does not land on the fine chain."""
    model, prior, rows, mass = _zero_gradient_problem(rng)
    d = 3
    start = rng.standard_normal(d)
    coarse, fine = start.copy(), start.copy()
    c_out, f_out = np.empty((1, d)), np.empty((2, d))
    run_pair(model.glm_data, prior, rows, mass, 0.37, coarse, fine, np.random.default_rng(5),
             10, False, c_out, f_out)
    assert np.max(np.abs(coarse - fine)) > 1e-3
