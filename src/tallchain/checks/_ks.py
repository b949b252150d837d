"""Kolmogorov-Smirnov distances of MCMC draws to a reference, beside their Monte Carlo noise floor."""

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._validation import fail, is_number
from ..mcmc import ECDF_QUANTILES, KS_CRITICAL, ecdf_ess  # noqa: F401

#: Below this ESS of the empirical CDF a KS verdict is "inconclusive": ESS estimates are
#: themselves unreliable from short chains, and the floor is too wide to show bias (common
#: practice puts the minimum for trusting ESS and R-hat at 100 or more effective draws).
MIN_ESS_FOR_VERDICT = 100


def check_level(level):
    """A family-wise false-alarm rate as a float; InputError unless strictly in (0, 1)."""
    if not is_number(level) or not 0 < level < 1:
        fail("level", f"must be a probability strictly between 0 and 1, got {level!r}",
             "give the false-alarm rate of the whole check, e.g. 0.05")
    return float(level)


def family_threshold(level, n_tests):
    """The KS threshold, in noise floors, that keeps the chance of any false alarm among
    ``n_tests`` tests at most ``level`` (Bonferroni).

    Each test is run at ``level / n_tests``: its critical value is that upper quantile of
    the Kolmogorov distribution (`scipy.stats.kstwobign`, the limit of sqrt(n) D_n), and a
    distance counts as bias when it exceeds that many multiples of sqrt(1/n_eff) - that is,
    ``critical / KS_CRITICAL`` noise floors. Bonferroni needs no independence between the
    tests (a table's points share the reference; a point's coefficients share the chain).

    Returns
    -------
    threshold : float
        In multiples of the floor 1.358/sqrt(n_eff).
    per_test_level : float
    """
    per_test = level / n_tests
    return float(stats.kstwobign.isf(per_test)) / KS_CRITICAL, per_test


@dataclass
class KSCheck:
    """KS distance of each coefficient's draws to a reference, beside its noise floor.

    ``floor`` is 1.358 / sqrt(ESS) (95% point of the Kolmogorov distribution, with the ESS of
    the empirical CDF, `ecdf_ess`, standing in for the number of independent draws); for a
    two-sample comparison the floor is 1.358 sqrt(1/ESS + 1/n_ref). ``ratio = ks / floor``;
    verdict "within noise" when ratio <= tolerance, else "biased".
    """

    coef_names: list
    ks: np.ndarray
    floor: np.ndarray
    ess: np.ndarray
    tolerance: float

    @property
    def ratio(self):
        return self.ks / self.floor

    @property
    def verdicts(self):
        return ["within noise" if r <= self.tolerance else "biased" for r in self.ratio]

    @property
    def passed(self):
        return bool(np.all(self.ratio <= self.tolerance))

    @property
    def conclusive(self):
        """Every coefficient has at least `MIN_ESS_FOR_VERDICT` ECDF ESS."""
        return bool(np.all(self.ess >= MIN_ESS_FOR_VERDICT))

    def as_dict(self):
        return {"coef": list(self.coef_names), "ks": self.ks.tolist(), "floor": self.floor.tolist(),
                "ratio": self.ratio.tolist(), "ess_ecdf": self.ess.tolist(),
                "verdict": self.verdicts, "tolerance": self.tolerance, "passed": self.passed}


def _weighted_ks(x, ref, weights):
    """sup |F_x - G| with F_x the ECDF of x and G the weighted ECDF of ref."""
    order = np.argsort(ref)
    ref, w = ref[order], weights[order] / weights.sum()
    cum_w = np.concatenate([[0.0], np.cumsum(w)])
    xs = np.sort(x)
    grid = np.concatenate([xs, ref])
    f = np.searchsorted(xs, grid, side="right") / xs.size
    g = cum_w[np.searchsorted(ref, grid, side="right")]
    f_left = np.searchsorted(xs, grid, side="left") / xs.size
    g_left = cum_w[np.searchsorted(ref, grid, side="left")]
    return float(max(np.max(np.abs(f - g)), np.max(np.abs(f_left - g_left))))


def ks_check(draws, reference, *, coef_names=None, tolerance=1.5, reference_weights=None):
    """Per-coefficient KS distance of MCMC draws to a reference, with its ESS noise floor.

    Parameters
    ----------
    draws : ndarray of shape (n_chains, n_draws, n_coef)
    reference : GaussianPosterior, sequence of frozen scipy.stats distributions, or ndarray
        An exact posterior (its marginals are used), one marginal per coefficient, or reference
        draws of shape (n_ref, n_coef) (two-sample KS; assumed independent).
    reference_weights : ndarray of shape (n_ref,), optional
        Importance weights of the reference draws; the floor then uses their effective size
        (sum w)^2 / sum w^2.
    tolerance : float, default=1.5
        Multiple of the floor up to which the distance counts as noise.

    Returns
    -------
    KSCheck
    """
    n_coef = draws.shape[2]
    flat = draws.reshape(-1, n_coef)
    ess = ecdf_ess(draws)
    ks = np.empty(n_coef)
    floor = KS_CRITICAL / np.sqrt(ess)
    if isinstance(reference, np.ndarray):
        if reference.ndim != 2 or reference.shape[1] != n_coef:
            raise ValueError(f"reference draws must have shape (n, {n_coef})")
        if reference_weights is None:
            for j in range(n_coef):
                ks[j] = stats.ks_2samp(flat[:, j], reference[:, j]).statistic
            n_ref = reference.shape[0]
        else:
            w = np.asarray(reference_weights, dtype=float)
            for j in range(n_coef):
                ks[j] = _weighted_ks(flat[:, j], reference[:, j], w)
            n_ref = w.sum() ** 2 / np.sum(w**2)
        floor = KS_CRITICAL * np.sqrt(1.0 / ess + 1.0 / n_ref)
    else:
        marginals = ([reference.marginal(j) for j in range(n_coef)]
                     if hasattr(reference, "marginal") else list(reference))
        for j in range(n_coef):
            ks[j] = stats.kstest(flat[:, j], marginals[j].cdf).statistic
    names = coef_names if coef_names is not None else [f"beta{j}" for j in range(n_coef)]
    return KSCheck(list(names), ks, floor, ess, tolerance)
