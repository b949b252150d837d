"""A cheap start for the mode on tall data: Newton on a row subsample (private).

From the prior mean, Newton takes 6-10 iterations, each a Hessian pass and one or more
gradient passes over all N rows. The same Newton on m << N rows drawn without replacement,
each weighted N/m (so that the subsample log-likelihood is an unbiased estimate of the full
one and the curvature is on the full data's scale), costs m/N of a pass per iteration and ends
within about sqrt(N/m) posterior standard deviations of the full-data mode, from where
full-data Newton converges in a few iterations (quadratic convergence near the mode: Nocedal &
Wright 2006, Numerical Optimization, 2nd ed., theorem 3.5).
"""

import numpy as np

from ..data import is_csr_design
from ..exceptions import ModeNotFoundError
from ..models import _passes
from ..models._kernels import kernel_view

# Rows of the subsample, and the fewest rows a model needs for it to be worth a start
# (below SUBSAMPLE_ROWS * MIN_RATIO rows the full passes are cheap anyway).
SUBSAMPLE_ROWS = 100_000
MIN_RATIO = 4
# The rows are drawn from a fixed seed: the mode, and so the draws, do not depend on chance.
_SEED = 20261203
# Newton on the subsample stops once its step is below this many posterior sds: the start
# lies about sqrt(N/m) sds from the full-data mode anyway, and the weighted subsample's sums
# round more coarsely than the full data's (on a one-hot design at 10^6 rows its log
# posterior moved by 1e-7 at steps of 1e-9 sds), so asking it for the full tolerance could
# spend a hundred iterations of 20-30 line-search halvings at that floor.
SUBSAMPLE_TOL = 1e-2


class _Subsample:
    """What `_mode._newton` reads of a model, on a weighted row subsample of it."""

    def __init__(self, model, rows):
        self.passes = 0   # over the subsample's rows
        data = model.glm_data
        n, m = data.X.shape[0], rows.shape[0]
        per_row = (lambda a: a[rows] if a.shape[0] == n else a)
        weights = (np.full(m, n / m) if data.weights.shape[0] != n
                   else data.weights[rows] * (n / m))
        X = (model.X.take_rows(rows).kernel_form() if is_csr_design(model.X)
             else np.ascontiguousarray(model.X[rows]))
        # read-only, as the full data's (`kernel_view`): no pass kernel compiles again
        view = kernel_view
        self.glm_data = data._replace(
            X=view(X), y=view(data.y[rows]), offset=view(per_row(data.offset)),
            trials=view(per_row(data.trials)), weights=view(weights))
        self.X = self.glm_data.X
        for key in ("prior_mean", "prior_prec", "n_beta", "n_coef", "coef_names",
                    "feature_names"):
            setattr(self, key, getattr(model, key))

    def log_likelihood_grad(self, beta):
        self.passes += 1
        return _passes.loglik_grad(self.glm_data, beta)

    def log_likelihood_hessian(self, beta):
        self.passes += 1
        return _passes.hessian(self.glm_data, beta)

    def check_mode(self, mode, information):
        return 0


def subsample_start(model, newton):
    """(start, full-data passes spent) for the mode of ``model``: the mode of a weighted row
    subsample found by ``newton(view, x0)`` (a `LaplaceApproximation` or an error; meant to
    stop at `SUBSAMPLE_TOL`), or None when the subsample has no mode (with the passes it
    spent) or the model is short (0 passes)."""
    n = model.n_rows
    if n < MIN_RATIO * SUBSAMPLE_ROWS:
        return None, 0
    rows = np.sort(np.random.default_rng(_SEED).choice(n, SUBSAMPLE_ROWS, replace=False))
    view = _Subsample(model, rows)
    try:
        mode = newton(view, np.array(model.prior_mean, dtype=float)).mode
    except ModeNotFoundError:
        mode = None   # the full-data Newton starts from the prior mean; the passes still count
    # the subsample's passes in full-data passes, rounded up (reading the rows once included)
    return mode, int(np.ceil((view.passes + 1) * SUBSAMPLE_ROWS / n))
