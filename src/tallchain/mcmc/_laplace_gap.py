"""How far the Laplace (normal) approximation at the mode is from the draws, coefficient by
coefficient, beside the Monte Carlo noise floor of the comparison."""

import numpy as np
from scipy import stats

# 95% quantile of the Kolmogorov distribution of sqrt(n) D_n (standard tables; METHODS.md 5).
KS_CRITICAL = 1.358


#: The quantiles at which `ecdf_ess` measures the ESS of the empirical CDF: both tails and
#: the middle, where the smallest of them usually lies for antithetic chains. Nine points
#: gave the same calibration as nineteen (0.05, 0.10, ..., 0.95) at half the cost.
ECDF_QUANTILES = (0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 0.8, 0.9, 0.95)


def ecdf_ess(draws):
    """Effective sample size of the empirical CDF, per coefficient: the smallest ESS of the
    indicator 1{x <= x_q} over the quantiles q in `ECDF_QUANTILES` (5% to 95%).

    The KS distance is the largest deviation of the empirical CDF, and at each point the
    empirical CDF is the mean of such an indicator; its Monte Carlo error follows that
    indicator's autocorrelation, not the position's. The bulk ESS (of the rank-normalised
    position) overstates it for chains that are antithetic in the position, as MALA is at
    steps above the tuned one: exact MALA on N(0, 1) at acceptance 0.66 exceeded the 95%
    point of the Kolmogorov distribution in 19.7% of 600 runs with the bulk ESS as n, 9.5%
    with the smaller of bulk and tail ESS, 5.0% with this one; at acceptance 0.78-0.95,
    2.3-4.3% with this one (benchmarks/bench_sweep_false_alarms.py).

    Parameters
    ----------
    draws : ndarray of shape (n_chains, n_draws, n_coef)

    Returns
    -------
    ndarray of shape (n_coef,)
        ``min over q of arviz.ess(draws[:, :, j], method="quantile", prob=q)``.
    """
    import arviz as az

    return np.array([min(float(az.ess(draws[:, :, j], method="quantile", prob=q))
                         for q in ECDF_QUANTILES) for j in range(draws.shape[2])])


def laplace_gap(draws, mode, cov, n_log=0):
    """Distances between each coefficient's draws and its Laplace marginal N(mode_j, cov_jj).

    The last ``n_log`` columns are family parameters (a noise sd, a dispersion) reported on
    their natural scale but approximated, like sampled, on the log scale: they are compared
    there (log draws against N(log mode_j, cov_jj)). The KS distance does not depend on that
    choice (a monotone map keeps it); the shift and sd ratio are those of the log.

    Parameters
    ----------
    draws : ndarray of shape (n_chains, n_draws, n_coef)
    mode : ndarray of shape (n_coef,)
    cov : ndarray of shape (n_coef, n_coef)
        Inverse of the negative log-posterior Hessian at the mode.

    Returns
    -------
    dict of str to ndarray of shape (n_coef,)
        ``laplace_ks``: the KS distance sup_x |F_draws(x) - Phi((x - mode_j) / sd_j)|
        (scipy.stats.kstest); ``ks_floor``: its noise floor 1.358 / sqrt(ECDF ESS) (the 95%
        point of the Kolmogorov distribution for that many independent draws; `ecdf_ess`);
        ``laplace_shift``: (posterior mean - mode) in posterior sds; ``laplace_sd_ratio``:
        the Laplace sd over the posterior sd. A KS distance within its floor says that the
        normal approximation of a plain GLM fit would have given the same marginal.
    """
    n_coef = draws.shape[2]
    draws, mode = np.array(draws, dtype=float), np.array(mode, dtype=float)
    if n_log:
        draws[..., n_coef - n_log:] = np.log(draws[..., n_coef - n_log:])
        mode[n_coef - n_log:] = np.log(mode[n_coef - n_log:])
    flat = draws.reshape(-1, n_coef)
    sd_laplace = np.sqrt(np.diag(cov))
    ks = np.array([stats.kstest(flat[:, j], stats.norm(mode[j], sd_laplace[j]).cdf).statistic
                   for j in range(n_coef)])
    sd = flat.std(axis=0, ddof=1)
    return {"laplace_ks": ks, "ks_floor": KS_CRITICAL / np.sqrt(ecdf_ess(draws)),
            "laplace_shift": (flat.mean(axis=0) - mode) / sd,
            "laplace_sd_ratio": sd_laplace / sd}
