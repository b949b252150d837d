"""One sampler run checked by KS against a reference, printed for the review notes.

Import in a test as ``from ks_runs import run_and_check`` (``tests`` is on pytest's path).
"""

import tallchain as tc
from tallchain.checks import ks_check


def run_and_check(model, reference, method, *, seed, names, **ks_options):
    """Sample ``model`` (4 chains, 3000 draws after 500 warmup), assert the reported names,
    and return the `ks_check` of the draws against ``reference`` (printed for ``pytest -s``)."""
    result = tc.sample(model, method=method, chains=4, draws=3000, warmup=500, seed=seed)
    assert result.coef_names == names
    check = ks_check(result.draws, reference, coef_names=result.coef_names, **ks_options)
    print(f"\n{method}: KS/floor " + ", ".join(f"{n}={r:.2f}" for n, r in
                                           zip(check.coef_names, check.ratio)))
    return check


def importance_reference(model, log_posterior, *, n=40_000, seed=5, min_ess=20_000):
    """Draws and weights of an importance-sampling reference for ``model``'s posterior:
    a Student-t proposal (5 degrees of freedom) at the Laplace mode with 1.5 x its covariance
    (scipy.stats.multivariate_t), weighted by ``log_posterior(thetas)`` (NumPy/scipy densities
    written by the test). Draws are returned on the reported scale (`model.natural_scale`)."""
    import numpy as np
    from scipy import stats

    lap = tc.find_mode(model)
    proposal = stats.multivariate_t(lap.mode, 1.5 * lap.cov, df=5,
                                    seed=np.random.default_rng(seed))
    thetas = proposal.rvs(n)
    logw = log_posterior(thetas) - proposal.logpdf(thetas)
    w = np.exp(logw - logw.max())
    assert w.sum() ** 2 / np.sum(w**2) > min_ess   # a good proposal: weights not degenerate
    return model.natural_scale(thetas), w
