"""The result of a sampling run."""

from dataclasses import dataclass, field

import numpy as np


@dataclass
class SampleResult:
    """Draws, per-iteration statistics, cost counters and timings of one run.

    Attributes
    ----------
    draws : ndarray of shape (n_chains, n_draws, n_coef)
        Post-warmup draws.
    stats : dict of str to ndarray of shape (n_chains, n_draws)
        Per-iteration statistics after warmup: ``accepted``, ``accept_prob``, ``log_ratio``
        (the log target ratio used, exact or estimated), ``log_ratio_sd`` (its estimated sd;
        0 for exact methods, NaN for SGLD), ``step_size``, ``batch_size``, ``nonfinite``,
        ``log_ratio_skew`` and ``log_ratio_kurtosis`` (of the batch log-ratio terms).
    warmup_stats : dict of str to ndarray of shape (n_chains, n_warmup)
        The same statistics during warmup.
    coef_names : list of str
    method : str
    settings : dict
        Settings after tuning (step size per chain, batch size, ...).
    n_rows : int
        Number of data rows N.
    data_evaluations : int
        Per-datum likelihood or gradient evaluations during warmup and sampling (row visits).
    nonfinite_count : int
        Iterations after warmup whose log acceptance ratio was NaN or infinite (rejected).
    cd_fallback_count : int
        Iterations after warmup where the Ceperley-Dewing correction was outside its validity
        bound and the plug-in sigma^2/2 was used instead.
    warmup_counts : dict
        The same two counts during warmup (``nonfinite``, ``cd_fallback``).
    setup_seconds, sampling_seconds : float
        Data checks, mode finding, and starting and stopping the workers; warmup and draws.
    completed_draws : int
        Draws completed per chain (less than requested when the run was interrupted).
    warnings : list of str
        Advice raised during the run (noise level, Gaussianity of the log-ratio).
    laplace_mode : ndarray of shape (n_coef,) or None
        The posterior mode found for the run (None when the method needed none).
    """

    draws: np.ndarray
    stats: dict
    warmup_stats: dict
    coef_names: list
    method: str
    settings: dict
    n_rows: int
    data_evaluations: int
    nonfinite_count: int
    cd_fallback_count: int
    setup_seconds: float
    sampling_seconds: float
    completed_draws: int
    warmup_counts: dict = field(default_factory=dict)
    laplace_mode: np.ndarray | None = None
    warnings: list = field(default_factory=list)

    @property
    def n_chains(self):
        return self.draws.shape[0]

    @property
    def n_draws(self):
        return self.draws.shape[1]

    @property
    def data_passes(self):
        """Data evaluations as a multiple of N (full-data passes)."""
        return self.data_evaluations / self.n_rows

    @property
    def acceptance_rate(self):
        return float(np.mean(self.stats["accepted"])) if self.n_draws else float("nan")

    def to_arviz(self):
        """The draws as ArviZ 1.x data.

        Returns
        -------
        xarray.DataTree
            Group ``posterior`` with ``beta`` over (chain, draw, coef), and group
            ``sample_stats`` with every per-iteration statistic of `stats`.
        """
        from .diagnostics import to_arviz

        return to_arviz(self)

    def summary(self):
        """Per-coefficient summary (ESS, R-hat and MCSE by ArviZ) and the run's cost figures.

        Returns
        -------
        tallchain.diagnostics.Summary
            See `tallchain.diagnostics.summarize`.

        Warns
        -----
        tallchain.diagnostics.ConvergenceWarning
            R-hat above 1.01 or a bulk/tail ESS below 400 for some coefficient.
        """
        from .diagnostics import summarize

        return summarize(self)

    def save(self, directory):
        """Write posterior.nc, summary.csv and run.json into ``directory``, atomically.

        Parameters
        ----------
        directory : path-like
            Created when missing.

        Returns
        -------
        tallchain.diagnostics.Summary
            The summary written to summary.csv.
        """
        from .outputs import save_result

        return save_result(self, directory)
