"""The set-up's full-data passes (mode finding, Hessian, row cache), parallel over rows (private).

From ``PARALLEL_MIN_ROWS`` rows on, the parallel kernels of ``models/_kernels.py`` run (numba
``prange`` over fixed blocks of rows, block sums added in block order, so the values do not
depend on the number of threads); below it, starting the threads costs more than they save and
the serial kernels run. The choice depends on the number of rows only.

Parallel kernels are launched under one lock: with numba's "workqueue" threading layer (the
fallback when neither OpenMP nor TBB is available) two Python threads launching parallel kernels
at once abort the process. The chains' serial kernels do not take it.
"""

import threading

import numpy as np

from . import _kernels
from ._blocked import blocked_hessian
from ._inputs import coef_vector

# Measured at d = 10 (logistic, 2 cores). On an idle machine the parallel passes break even
# near 5e3 rows and are 1.8-1.9x faster from 1e5 rows on. While another job keeps a core busy
# they gain nothing at any N, and each launch can wait a whole scheduler time slice (8-12 ms)
# for the descheduled worker: 0.6-0.9x at 1e5-5e5 rows. From 2e5 rows the idle-machine saving
# per pass (~5 ms and up) outweighs that risk.
PARALLEL_MIN_ROWS = 200_000
# From this many coefficients on, the Hessian pass is one pass for f'' and matrix products
# over blocks of rows (`_blocked`); below it the row loop is as fast. Measured at N = 10^5,
# logistic, 2 loaded cores (fastest of 3): loop/blocked 1.0-1.4x at d = 100, 0.75-2.3x at
# d = 300 and 1.7-4.4x at d = 500, depending on whether BLAS got its threads.
BLOCKED_MIN_COEF = 200

_LOCK = threading.Lock()


def _run(serial, parallel, data, *rest):
    """Call the serial kernel on all rows of short data, else the parallel one under the lock."""
    n_rows = data.X.shape[0]
    if n_rows < PARALLEL_MIN_ROWS:
        return serial(data, *rest, 0, n_rows)
    with _LOCK:
        return parallel(data, *rest)


def _beta(data, beta):
    """beta as a contiguous float64 vector of the model's length (checked)."""
    return coef_vector(beta, data.X.shape[1] + data.intercept + data.n_family)


def loglik_grad(data, beta):
    """Full-data log-likelihood (constants included) and its gradient at beta, in one pass.

    Parameters
    ----------
    data : GLMData
    beta : array-like of shape (n_coef,)

    Returns
    -------
    float, ndarray of shape (n_coef,)
    """
    beta = _beta(data, beta)
    grad = np.empty(beta.shape[0])
    val = _run(_kernels.full_loglik_grad, _kernels.par_loglik_grad, data, beta, grad, True)
    return val, grad


def hessian(data, beta):
    """Full-data log-likelihood Hessian sum_i f''(eta_i) x_i x_i^T at beta (``data``: GLMData)."""
    beta = _beta(data, beta)
    # a CSR design keeps the row loop: it adds the outer products of each row's non-zeros only
    if (data.n_family == 0 and beta.shape[0] >= BLOCKED_MIN_COEF
            and isinstance(data.X, np.ndarray)):
        n_rows = data.X.shape[0]
        eta, f1, f2 = np.empty(n_rows), np.empty(n_rows), np.empty(n_rows)
        eta_derivatives(data, beta, eta, f1, f2)
        return blocked_hessian(data, beta, f2)
    hess = np.empty((beta.shape[0], beta.shape[0]))
    _run(_kernels.full_hessian, _kernels.par_hessian, data, beta, hess)
    return hess


def eta_derivatives(data, beta, eta, f1, f2):
    """Write eta_i, f'(eta_i), f''(eta_i) at beta into eta, f1, f2 (length-N, may be strided)."""
    _run(_kernels.full_eta_derivatives, _kernels.par_eta_derivatives, data, _beta(data, beta),
         eta, f1, f2)
