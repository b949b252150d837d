"""What a run computes from the full data before it samples (private).

The mode and Laplace approximation, the preconditioner, the control-variate row cache, the
starting points and the first step size. `prepare` keeps the costly part for reuse (a sweep
prepares once for all its grid points).
"""

import time
from dataclasses import dataclass, field

import numpy as np

from .._validation import check_seed, fail
from ..posterior import (ControlVariateCache, cache_passes, control_variate_cache, find_mode,
                         make_preconditioner, proxy_preconditioner)


@dataclass
class Preparation:
    """What `sample` computes from the full data before it samples, kept for reuse.

    Attributes
    ----------
    laplace : LaplaceApproximation
    caches : dict of int to ControlVariateCache
        Row caches by Taylor-proxy order (0: the cache of runs without control variates).
    n_rows, n_coef : int
        Of the model it was made for.
    parts : dict
        What making it cost: ``mode_seconds``, ``mode_passes``, ``cache_seconds`` and
        ``cache_passes`` (full-data passes), as in ``SampleResult.setup_parts``.
    """

    laplace: object
    caches: dict
    n_rows: int
    n_coef: int
    parts: dict = field(default_factory=dict)

    def check(self, model):
        """Refuse a model other than the one this was made for (InputError)."""
        if (model.n_rows, model.n_coef) != (self.n_rows, self.n_coef):
            fail("preparation", f"was made for {self.n_rows} rows and {self.n_coef} "
                 f"coefficients, not {model.n_rows} and {model.n_coef}",
                 "prepare() the model you sample")


def prepare(model, *, proxy_orders=(2, 0)):
    """Find the mode and build the row caches of ``model`` once (O(N d^2)).

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    proxy_orders : sequence of int, default=(2, 0)
        Orders of the Taylor proxies to cache (0 is the cache of runs without control
        variates).

    Returns
    -------
    Preparation
    """
    t0 = time.perf_counter()
    laplace = find_mode(model)
    t1 = time.perf_counter()
    caches = {k: control_variate_cache(model, laplace.mode if k else None, k,
                                       _known(laplace, k))
              for k in proxy_orders}
    parts = {"mode_seconds": t1 - t0, "mode_passes": laplace.n_evaluations,
             "cache_seconds": time.perf_counter() - t1,
             "cache_passes": sum(cache_passes(k, _known(laplace, k)) for k in proxy_orders)}
    return Preparation(laplace, caches, model.n_rows, model.n_coef, parts)


def _known(laplace, order):
    """The log-likelihood's gradient and Hessian at the mode, from Newton's last passes, for
    a row cache of ``order`` around the mode (None: the cache computes them)."""
    return laplace.loglik_derivatives if order and laplace is not None else None


def spawn_seeds(seed, n):
    """n independent children of ``seed``: Generators of a Generator, else SeedSequences of
    ``SeedSequence(seed)``. Spawning advances a Generator or SeedSequence, so each caller
    (sample, a sweep, a calibration) spawns once."""
    seed = check_seed(seed)
    if isinstance(seed, np.random.Generator):
        return seed.spawn(n)
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    return root.spawn(n)


def chain_generators(seed, n):
    """n independent Generators from ``seed`` (see `spawn_seeds`)."""
    return [s if isinstance(s, np.random.Generator) else np.random.Generator(np.random.PCG64(s))
            for s in spawn_seeds(seed, n)]


@dataclass
class SetUp:
    """The full-data work of one run: Laplace approximation (None when the settings need no
    mode), preconditioner, row cache, starting points (chains, n_coef) and first step size;
    ``gradient_batch`` is the setting resolved ("auto" becomes "proxy" or "fresh"); ``parts``
    times the mode and the caches and counts their full-data passes (none when a
    `Preparation` supplied them)."""

    laplace: object
    preconditioner: object
    cache: ControlVariateCache
    starts: np.ndarray
    first_step: float
    gradient_batch: str = "fresh"
    parts: dict = field(default_factory=dict)


def set_up(model, settings, preparation, rng):
    """The `SetUp` of a run of ``settings`` on ``model``; ``preparation`` (or None) spares the
    mode search and the row cache; ``rng`` draws the overdispersed starting points."""
    parts = {"mode_seconds": 0.0, "mode_passes": 0, "cache_seconds": 0.0, "cache_passes": 0}
    t0 = time.perf_counter()
    laplace = None
    if settings.needs_laplace:
        if preparation is not None:
            laplace = preparation.laplace
        else:
            laplace = find_mode(model)
            parts["mode_passes"] = laplace.n_evaluations
    pre = make_preconditioner(settings.mass_matrix, model.n_coef, laplace)
    t1 = time.perf_counter()
    order = settings.proxy_order_used
    spec = settings.spec
    if not spec.minibatch:
        cache = ControlVariateCache.empty(model.n_coef)
    elif preparation is not None and order in preparation.caches:
        cache = preparation.caches[order]
    else:
        known = _known(laplace, order)
        cache = control_variate_cache(model, laplace.mode if order else None, order, known)
        parts["cache_passes"] = cache_passes(order, known)
    parts["mode_seconds"], parts["cache_seconds"] = t1 - t0, time.perf_counter() - t1
    drift, pre = _drift(settings, model, cache, pre)
    starts = _starting_points(settings, model, laplace, rng)
    step = (_default_step(spec, pre, laplace, model.n_coef) if settings.adapts_step
            else settings.step_size)
    return SetUp(laplace, pre, cache, starts, step, drift, parts)


def _drift(settings, model, cache, pre):
    """(gradient_batch resolved, preconditioner): "proxy" runs use the proxy's own precision
    (`proxy_preconditioner`), which is the Laplace one at the mode up to rounding."""
    choice = settings.gradient_batch
    if choice == "auto":
        choice = "proxy" if settings.proxy_drift_applies else "fresh"
    if choice != "proxy":
        return choice, pre
    proxy = proxy_preconditioner(cache.rows, model.prior_arrays)
    if proxy is not None:
        return choice, proxy
    if settings.gradient_batch == "proxy":
        fail("gradient_batch", '"proxy": the proxy\'s precision P - H* at the mode is not '
             "positive definite", 'use gradient_batch="fresh"')
    return "fresh", pre


def _starting_points(settings, model, laplace, rng):
    given = settings.starting_points()
    if given is not None:
        return given
    if settings.init == "laplace":
        # Overdispersed: twice the Laplace standard deviation (common practice for
        # starting points that let R-hat detect non-convergence).
        chol = np.linalg.cholesky(laplace.cov)
        return laplace.mode + 2.0 * rng.standard_normal((settings.chains, model.n_coef)) @ chol.T
    if settings.init == "mode":
        return np.tile(laplace.mode, (settings.chains, 1))
    return np.tile(model.prior_mean, (settings.chains, 1))


def _default_step(spec, pre, laplace, n_coef):
    # Optimal scalings (Roberts, Gelman & Gilks 1997; Roberts & Rosenthal 1998), in units of the
    # mass matrix: proposal variance 2.38^2/d for RWM, 1.65^2 d^(-1/3) for MALA.
    h = 1.65**2 * n_coef ** (-1 / 3) if spec.langevin else 2.38**2 / n_coef
    if pre.kind == "identity" and laplace is not None:
        h *= float(np.mean(np.diag(laplace.cov)))
    return h
