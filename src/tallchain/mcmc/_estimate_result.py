"""The result of `estimate`: R coupled pairs' estimates, meeting times, TV bound (private)."""

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from . import _coupled_loop as _pair

# The distance to the posterior below which the bound's implied warmup is read off.
TV_TARGET = 0.01
MEETING_QUANTILES = (0.5, 0.9, 0.99, 1.0)


@dataclass(repr=False)
class EstimateResult:
    """Unbiased estimates of posterior means (and sds) from R coupled pairs.

    Attributes
    ----------
    coef_names : list of str
        On the sampler's scale (a sampled noise sd appears as its log).
    mean, se, lower, upper : ndarray of shape (n_coef,)
        The average of the R unbiased estimates H_{k:m}(theta), its standard error (sd over
        the replicates / sqrt(R)) and the ``level`` interval mean -+ t_{R-1} se.
    sd, sd_se : ndarray of shape (n_coef,)
        sqrt(mean of H(theta^2) - mean^2), a ratio of unbiased estimates (consistent in R, not
        unbiased), and its delta-method standard error.
    replicates : ndarray of shape (R_met, 2, n_coef)
        H_{k:m} of theta and theta^2 of each pair that met.
    meeting_times : ndarray of int, shape (R,)
        tau of each pair; -1 for a pair that had not met at ``max_iterations``.
    lag, span, level, method, step_size, batch_size, max_iterations
        What the estimates were made with; ``span`` is (k, m).
    tv_bound : ndarray
        Estimated upper bound on the total variation distance between the chain at iteration
        t and the posterior, t = 0, 1, ... (Biswas, Jacob & Vanetti 2019):
        E[max(0, ceil((tau - L - t) / L))], the expectation an average over the pairs.
    iterations : ndarray of int, shape (R,)
        Single-chain transitions each pair computed (its cost).
    seconds : float
    """

    coef_names: list
    mean: np.ndarray
    se: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    sd: np.ndarray
    sd_se: np.ndarray
    replicates: np.ndarray
    meeting_times: np.ndarray
    iterations: np.ndarray
    lag: int
    span: tuple
    level: float
    method: str
    step_size: float
    batch_size: int | None
    max_iterations: int
    tv_bound: np.ndarray
    pilot_meeting_times: np.ndarray | None = None
    seconds: float = 0.0
    notes: list = field(default_factory=list)

    @property
    def unmet(self):
        """Pairs that had not met at ``max_iterations`` (left out of the estimates)."""
        return int(np.sum(self.meeting_times < 0))

    @property
    def warmup_for_tv(self):
        """The first t where the bound on the total variation is below TV_TARGET (0.01)."""
        below = np.flatnonzero(self.tv_bound < TV_TARGET)
        return int(below[0]) if below.size else None

    def meeting_quantiles(self):
        """Quantiles 0.5, 0.9, 0.99 and 1 (the largest) of the met pairs' meeting times."""
        met = self.meeting_times[self.meeting_times >= 0]
        if met.size == 0:
            return {str(q): None for q in MEETING_QUANTILES}
        return {str(q): float(np.quantile(met, q)) for q in MEETING_QUANTILES}

    @property
    def table(self):
        """The estimates as a pandas DataFrame, one row per coefficient."""
        import pandas as pd

        return pd.DataFrame({"mean": self.mean, "se": self.se, "lower": self.lower,
                             "upper": self.upper, "sd": self.sd, "sd_se": self.sd_se},
                            index=pd.Index(self.coef_names, name="coef"))

    def to_dict(self):
        """A JSON-ready record of the estimates, meeting times and settings."""
        k, m = self.span
        return {
            "method": self.method, "replicates": int(self.meeting_times.size),
            "unmet": self.unmet, "lag": self.lag, "k": k, "m": m, "level": self.level,
            "step_size": self.step_size, "batch_size": self.batch_size,
            "max_iterations": self.max_iterations,
            "coefficients": {name: {"mean": float(self.mean[j]), "se": float(self.se[j]),
                                    "lower": float(self.lower[j]),
                                    "upper": float(self.upper[j]), "sd": float(self.sd[j]),
                                    "sd_se": float(self.sd_se[j])}
                             for j, name in enumerate(self.coef_names)},
            "meeting_times": [int(t) for t in self.meeting_times],
            "meeting_time_quantiles": self.meeting_quantiles(),
            "pilot_meeting_times": (None if self.pilot_meeting_times is None
                                    else [int(t) for t in self.pilot_meeting_times]),
            "tv_target": TV_TARGET, "warmup_for_tv": self.warmup_for_tv,
            "iterations_per_pair": float(np.mean(self.iterations)),
            "seconds": self.seconds, "notes": list(self.notes),
        }

    def write_csv(self, path):
        """The table as CSV (coef, mean, se, lower, upper, sd, sd_se)."""
        self.table.to_csv(path, float_format="%.10g")

    def plot(self, path):
        """Write the plot of the bound on the total variation against iteration (PNG)."""
        from ..plots import plot_tv_bound

        plot_tv_bound(self, path)

    def __repr__(self):
        k, m = self.span
        return (f"<EstimateResult {self.method}: {self.meeting_times.size} pairs "
                f"({self.unmet} unmet), lag {self.lag}, k = {k}, m = {m}>\n"
                + self.table.to_string(float_format=lambda v: f"{v:.4g}"))


def tv_bound(meeting_times, lag):
    """E[max(0, ceil((tau - L - t) / L))] for t = 0 .. max tau - L (the last is 0), the mean
    over the pairs; an unmet pair (tau = -1) counts with tau = ``max`` of the others, which
    understates its term."""
    tau = np.asarray(meeting_times, dtype=float)
    met = tau[tau >= 0]
    if met.size == 0:
        return np.zeros(1)
    tau = np.where(tau >= 0, tau, met.max())
    t = np.arange(int(met.max() - lag) + 1 if met.max() >= lag else 1)
    terms = np.maximum(0.0, np.ceil((tau[:, None] - lag - t[None, :]) / lag))
    return terms.mean(axis=0)


def summarize_replicates(sums, counts, *, coef_names, level, lag, span, method, step_size,
                         batch_size, pilot_meeting_times, max_iterations):
    """An `EstimateResult` from the pairs' H arrays (2, n_coef) and their counts OUT_*."""
    tau = counts[:, _pair.OUT_TAU]
    met = np.array([s for s, t in zip(sums, tau) if t >= 0]).reshape(-1, 2, len(coef_names))
    r = met.shape[0]
    h1, h2 = met[:, 0], met[:, 1]
    mean = h1.mean(axis=0) if r else np.full(len(coef_names), np.nan)
    se = h1.std(axis=0, ddof=1) / np.sqrt(r) if r > 1 else np.full_like(mean, np.nan)
    half = stats.t.ppf(0.5 + level / 2, r - 1) * se if r > 1 else np.full_like(mean, np.nan)
    var = (h2.mean(axis=0) if r else np.nan) - mean**2
    sd = np.sqrt(np.maximum(var, 0.0))
    # delta method: d sd = (d E[theta^2] - 2 mean d mean) / (2 sd), per replicate
    lin = (h2 - 2.0 * mean * h1) / (2.0 * np.where(sd > 0, sd, np.nan))
    sd_se = lin.std(axis=0, ddof=1) / np.sqrt(r) if r > 1 else np.full_like(mean, np.nan)
    return EstimateResult(
        coef_names=list(coef_names), mean=mean, se=se, lower=mean - half, upper=mean + half,
        sd=sd, sd_se=sd_se, replicates=met, meeting_times=tau.astype(np.int64),
        iterations=counts[:, _pair.OUT_STEPS].astype(np.int64), lag=lag, span=tuple(span),
        level=level, method=method, step_size=step_size, batch_size=batch_size,
        max_iterations=max_iterations, tv_bound=tv_bound(tau, lag),
        pilot_meeting_times=pilot_meeting_times)
