"""Paired SGLD chains at steps h and h/2 with shared noise, for Richardson-Romberg extrapolation
(private).

Richardson-Romberg extrapolation (Durmus, Simsekli, Moulines, Badeau & Richard, "Stochastic
gradient Richardson-Romberg Markov chain Monte Carlo", NeurIPS 2016): SGLD at step h has a
stationary law pi_h with E_{pi_h}[f] = E_pi[f] + C h + O(h^2), so 2 E_{pi_{h/2}}[f] - E_{pi_h}[f]
cancels the first-order term. The two chains are coupled so that the difference of their
averages has a small variance (section 3 of the paper): per coarse step the fine chain takes
two steps with Gaussian noises xi1, xi2 and the coarse chain one step with (xi1 + xi2)/sqrt(2),
the Brownian increment over the same time span. Minibatches: the coarse step uses the batch
of the fine chain's first step, S1; the fine chain's second step a fresh batch S2. Each
chain on its own still sees a fresh simple random sample per step, so its stationary law is
that of plain SGLD; sharing S1 only correlates the two chains' gradient noise further (any
coupling leaves the two expectations unchanged, it changes only the variance of their
difference). ``shared=False`` draws the coarse chain's noise and batch independently, the
uncoupled variant that the tests compare against.

The loop reuses the jitted steps of `_transition` (batch gradient with control variates) and
keeps its state in the arrays it is given.
"""

import math

import numpy as np

from ._batches import draw_batch
from ._setup import chain_generators, set_up
from ._transition import _batch_gradient, _buffers, _difference
from ..models._kernels import jit


@jit
def _langevin_step(mass, beta, grad, h, xi, out):
    """out = beta + (h/2) M^{-1} grad + sqrt(h) L xi, L L^T = M^{-1} (xi given)."""
    d = beta.shape[0]
    chol, m_inv = mass.mass_inv_chol, mass.mass_inv
    sqrt_h = math.sqrt(h)
    for a in range(d):
        s = 0.0
        for b in range(a + 1):
            s += chol[a, b] * xi[b]
        drift = 0.0
        for b in range(d):
            drift += m_inv[a, b] * grad[b]
        out[a] = beta[a] + sqrt_h * s + 0.5 * h * drift


@jit
def _gradient_at(data, prior, rows, beta, idx, buf, out):
    """The control-variate minibatch gradient at ``beta`` on the rows ``idx`` into ``out``."""
    _difference(beta, rows.beta_star, buf.delta)
    _batch_gradient(data, prior, rows, beta, buf.delta, idx, buf.tmp, buf.work, out)


@jit
def run_pair(data, prior, rows, mass, h, coarse, fine, rng, n_batch, shared, coarse_out,
             fine_out):
    """Advance a coarse SGLD chain (step h) by len(coarse_out) steps and a fine one (step h/2)
    by twice as many, in place.

    Parameters
    ----------
    data, prior, rows, mass : GLMData, PriorArrays, RowCache, MassMatrix
    h : float
        The coarse step; the fine chain steps h/2.
    coarse, fine : ndarray of shape (n_coef,)
        The two states, updated in place.
    rng : numpy.random.Generator
    n_batch : int
    shared : bool
        Couple the chains (shared Gaussian noise and first batch); False draws the coarse
        chain's noise and batch independently.
    coarse_out : ndarray of shape (n, n_coef)
        Receives the coarse state after each of its steps.
    fine_out : ndarray of shape (2 n, n_coef)
        Receives the fine state after each of its steps.
    """
    d = coarse.shape[0]
    buf = _buffers(d, n_batch)
    idx1, idx2, grad = buf.idx_grad, buf.idx_ratio, buf.grad
    xi1, xi2, xi_c, prop = buf.xi, buf.z, buf.delta_prop, buf.prop
    n_rows = data.X.shape[0]
    inv_sqrt2 = 1.0 / math.sqrt(2.0)
    for k in range(coarse_out.shape[0]):
        draw_batch(rng, n_rows, idx1)
        for a in range(d):
            xi1[a] = rng.standard_normal()
        for a in range(d):
            xi2[a] = rng.standard_normal()
        # fine, first half-step: batch S1, noise xi1
        _gradient_at(data, prior, rows, fine, idx1, buf, grad)
        _langevin_step(mass, fine, grad, 0.5 * h, xi1, prop)
        for a in range(d):
            fine[a] = prop[a]
            fine_out[2 * k, a] = prop[a]
        # coarse: batch S1 and noise (xi1 + xi2)/sqrt(2), or both fresh
        if not shared:
            draw_batch(rng, n_rows, idx1)
        _gradient_at(data, prior, rows, coarse, idx1, buf, grad)
        for a in range(d):
            xi_c[a] = (xi1[a] + xi2[a]) * inv_sqrt2 if shared else rng.standard_normal()
        _langevin_step(mass, coarse, grad, h, xi_c, prop)
        for a in range(d):
            coarse[a] = prop[a]
            coarse_out[k, a] = prop[a]
        # fine, second half-step: a fresh batch S2, noise xi2
        draw_batch(rng, n_rows, idx2)
        _gradient_at(data, prior, rows, fine, idx2, buf, grad)
        _langevin_step(mass, fine, grad, 0.5 * h, xi2, prop)
        for a in range(d):
            fine[a] = prop[a]
            fine_out[2 * k + 1, a] = prop[a]


def sample_pair(model, settings, *, preparation=None, shared=True):
    """Paired SGLD chains at ``settings.step_size`` (h) and h/2 with shared noise.

    Parameters
    ----------
    model : a tallchain regression model
    settings : SamplerSettings
        Of an ``sgld`` run with a fixed step size and batch size: its chains, draws, warmup,
        seed, control variates and mass matrix are used. Each pair starts both chains at the
        chain's starting point; the first ``warmup`` coarse steps (2 x warmup fine steps)
        are discarded.
    preparation : Preparation, optional
        Spares the mode search and row cache.
    shared : bool, default=True
        Shared noise (see the module notes); False for the uncoupled variant.

    Returns
    -------
    coarse : ndarray of shape (chains, draws, n_coef)
        Draws at step h.
    fine : ndarray of shape (chains, 2 draws, n_coef)
        Draws at step h/2, two per coarse draw (the fine steps 2t and 2t + 1 span coarse
        step t).
    """
    if settings.method != "sgld":
        raise ValueError("sample_pair runs sgld only")
    rngs = chain_generators(settings.seed, settings.chains + 1)
    setup = set_up(model, settings, preparation, rngs[0])
    data, prior = model.glm_data, model.prior_arrays
    rows, mass = setup.cache.rows, setup.preconditioner.matrices
    n_batch, h = int(settings.batch_size), float(settings.step_size)
    total = settings.warmup + settings.draws
    d = model.n_coef
    coarse = np.empty((settings.chains, settings.draws, d))
    fine = np.empty((settings.chains, 2 * settings.draws, d))
    for c in range(settings.chains):
        b_c = np.array(setup.starts[c], dtype=float)
        b_f = b_c.copy()
        c_out, f_out = np.empty((total, d)), np.empty((2 * total, d))
        run_pair(data, prior, rows, mass, h, b_c, b_f, rngs[c + 1], n_batch, bool(shared),
                 c_out, f_out)
        coarse[c], fine[c] = c_out[settings.warmup:], f_out[2 * settings.warmup:]
    return model.natural_scale(coarse), model.natural_scale(fine)
