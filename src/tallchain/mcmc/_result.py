"""The result of a sampling run, and its conversion to ArviZ data."""

import warnings
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version

import numpy as np

from ._noise_shape import run_error_bound
from ._summary import summarize


@dataclass(repr=False)
class SampleResult:
    """Draws, per-iteration statistics, cost counters and timings of one run.

    Attributes
    ----------
    draws : ndarray of shape (n_chains, n_draws, n_coef)
        Post-warmup draws.
    stats : dict of str to ndarray of shape (n_chains, n_draws)
        Per-iteration statistics after warmup: ``accepted`` (bool), ``acceptance_probability``
        (min(1, e^(log ratio + c - penalty)); 1 for SGLD), ``log_ratio`` (the log target ratio
        used, exact or estimated), ``log_ratio_sd`` (its estimated sd; 0 for exact methods,
        NaN for SGLD), ``step_size``, ``batch_size``, ``nonfinite`` (bool: the log acceptance
        ratio was NaN or infinite, and the move rejected), ``log_ratio_skew`` and
        ``log_ratio_kurtosis`` (of the batch log-ratio terms), ``rows_read`` (int: per-datum
        likelihood or gradient evaluations of the iteration) and ``penalty_beyond_bound``
        (bool: the estimated variance was beyond the validity bound of the Ceperley-Dewing
        penalty, and the plug-in sigma^2/2 was subtracted instead).
    warmup_stats : dict of str to ndarray of shape (n_chains, n_warmup)
        The same statistics during warmup.
    coef_names : list of str
    settings : SamplerSettings
        The settings of the run, as given (checked and standardised).
    tuned : dict
        What warmup chose: ``step_size`` (one per chain), ``batch_size`` (minibatch methods),
        ``acceptance_target`` (the acceptance rate the step tuning aimed at, None for a given
        step size) and ``mass_matrix`` (the kind of preconditioner used).
    n_rows : int
        Number of data rows N.
    setup_seconds, sampling_seconds : float
        Data checks, mode finding, Laplace approximation and row caches, and starting and
        stopping the workers; warmup and draws.
    completed_draws : int
        Draws completed per chain (less than requested when the run was interrupted).
    status : {"complete", "interrupted"}
        Property: whether ``completed_draws`` reached the requested ``settings.draws``.
    warnings : list of str
        Advice raised during the run (noise level, Gaussianity of the log-ratio).
    laplace_mode : ndarray of shape (n_coef,) or None
        The posterior mode found for the run (None when the method needed none).
    laplace_cov : ndarray of shape (n_coef, n_coef) or None
        The covariance of the Laplace (normal) approximation at that mode: the inverse of the
        negative log-posterior Hessian there.
    model_record : dict or None
        What predictions need of the model: its family and options (e.g. ``noise_sd``),
        ``add_intercept`` and ``feature_names`` (``model.record()``).
    load_seconds : float
        Reading the data before `sample` was called (0 unless the caller measured it, as the
        command line does).
    setup_parts : dict
        The set-up split: ``mode_seconds`` (mode and Laplace approximation),
        ``cache_seconds`` (control-variate row cache and proxy sums), ``mode_passes`` and
        ``cache_passes`` (full-data passes of each).
    total_seconds : float or None
        Wall time from the start (loading included) to the last draw; None means
        ``load_seconds + setup_seconds + sampling_seconds`` (see `time_to_last_draw`).
    """

    draws: np.ndarray
    stats: dict
    warmup_stats: dict
    coef_names: list
    settings: object
    tuned: dict
    n_rows: int
    setup_seconds: float
    sampling_seconds: float
    completed_draws: int
    laplace_mode: np.ndarray | None = None
    warnings: list = field(default_factory=list)
    laplace_cov: np.ndarray | None = None
    model_record: dict | None = None
    load_seconds: float = 0.0
    setup_parts: dict = field(default_factory=dict)
    total_seconds: float | None = None

    @property
    def time_to_last_draw(self):
        """Wall seconds from the start (loading included) to the last draw."""
        if self.total_seconds is not None:
            return self.total_seconds
        return self.load_seconds + self.setup_seconds + self.sampling_seconds

    @property
    def timing(self):
        """Where the time to the last draw went: ``load_seconds``, ``setup_seconds`` (with
        its parts, see ``setup_parts``), ``sampling_seconds`` and ``total_seconds``; the parts
        add up to at most the total (the rest is bookkeeping between them)."""
        return {"load_seconds": float(self.load_seconds),
                "setup_seconds": float(self.setup_seconds),
                **{f"setup_{k}": v for k, v in self.setup_parts.items()},
                "sampling_seconds": float(self.sampling_seconds),
                "total_seconds": float(self.time_to_last_draw)}

    @property
    def n_family_params(self):
        """Columns after the coefficients: the family's sampled parameters (a noise sd, a
        dispersion), reported on their natural scale."""
        record = self.model_record
        if record is None:
            return 0
        return self.draws.shape[2] - int(record["add_intercept"]) - len(record["feature_names"])

    def __repr__(self):
        """The run in a few lines and the coefficient table (see `summary`)."""
        from ._tables import coefficient_table, run_header, table_notes

        if self.n_draws == 0:
            return f"{run_header(self)}; no draws"
        summary = self.summary(warn=False)
        return "\n".join([run_header(self), *coefficient_table(summary), *table_notes(summary)])

    @property
    def method(self):
        return self.settings.method

    @property
    def status(self):
        """``"complete"`` when every requested draw was made, else ``"interrupted"``."""
        return "complete" if self.completed_draws >= self.settings.draws else "interrupted"

    @property
    def n_chains(self):
        return self.draws.shape[0]

    @property
    def n_draws(self):
        return self.draws.shape[1]

    @property
    def data_evaluations(self):
        """Per-datum likelihood or gradient evaluations during warmup and sampling (row
        visits): the sum of the ``rows_read`` statistic."""
        return int(self.stats["rows_read"].sum() + self.warmup_stats["rows_read"].sum())

    @property
    def nonfinite_count(self):
        """Iterations after warmup whose log acceptance ratio was NaN or infinite (rejected)."""
        return int(self.stats["nonfinite"].sum())

    @property
    def penalty_beyond_bound_count(self):
        """Iterations after warmup whose variance estimate was beyond the validity bound of the
        Ceperley-Dewing penalty, so that the plug-in sigma^2/2 was subtracted instead."""
        return int(self.stats["penalty_beyond_bound"].sum())

    @property
    def penalty_error_bound(self):
        """The penalty's residual error in the log acceptance ratio from non-Gaussian minibatch
        noise, |mu3| / (6 n^2) + |mu4 - 3 mu2^2| / (24 n^3) at the run's batch n, with the
        per-row moments pooled over the draws (an upper bound: mean + 2 standard errors;
        `tallchain.mcmc._noise_shape`); NaN for methods without a penalised minibatch ratio."""
        spec = self.settings.spec
        if not (spec.minibatch and spec.adjusted):
            return float("nan")
        return run_error_bound(self.stats, self.n_rows, self.tuned.get("batch_size"))

    @property
    def warmup_counts(self):
        """The two counts above during warmup: ``{"nonfinite": ..., "penalty_beyond_bound": ...}``."""
        return {key: int(self.warmup_stats[key].sum())
                for key in ("nonfinite", "penalty_beyond_bound")}

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
        return to_arviz(self)

    def summary(self, *, warn=True, interval=0.9):
        """Per-coefficient summary (ESS, R-hat and MCSE by ArviZ) and the run's cost figures.

        Parameters
        ----------
        warn : bool, default=True
        interval : float, default=0.9
            Probability of the central posterior interval (columns ``lower_90``, ``median``,
            ``upper_90`` for 0.9).

        Returns
        -------
        tallchain.mcmc.Summary
            See `tallchain.mcmc.summarize`.

        Warns
        -----
        tallchain.exceptions.ConvergenceWarning
            R-hat above 1.01 or a bulk/tail ESS below 400 for some coefficient.
        """
        return summarize(self, warn=warn, interval=interval)

    def predict(self, new_X, *, interval=0.9, offset=None, seed=None, chunk_rows=None):
        """Posterior predictions for new rows, block by block of rows (bounded memory).

        For every new row x and every draw beta: eta = x . beta (+ intercept, + offset), the
        mean response mu = E[y | eta] (the family's inverse link) and one new observation
        y ~ p(y | eta) drawn from the family (normal noise of the run's sd, Bernoulli,
        Poisson). Their quantiles over the draws give the intervals.

        Parameters
        ----------
        new_X : array-like of shape (n_new, n_features), or a table
            A pandas, polars or pyarrow table (or a dict of columns) is read by column name
            (the run's coefficient names without the intercept); a plain array must hold the
            features in the run's order. On the scale the draws are on (a run of
            ``tallchain run`` with ``standardize`` writes draws on the original scale).
        interval : float, default=0.9
            Probability of the central intervals.
        offset : array-like of shape (n_new,), optional
            Offset of the new rows (log exposure for Poisson); default 0.
        seed : int, optional
            Seed of the simulated observations; default: the run's seed when it was a number,
            else 0.
        chunk_rows : int, optional
            Rows per block; default: as many as keep a block of rows x draws within 2^22
            values. The values do not depend on it beyond the last bits of a matrix
            product.

        Returns
        -------
        dict of str to ndarray of shape (n_new,)
            ``mean``: posterior mean of the mean response; ``lower_90``, ``upper_90``: its
            central interval (named for ``interval``); ``predictive_lower_90``,
            ``predictive_upper_90``: the central interval of a new observation.
        """
        from ._predict import predict

        return predict(self, new_X, interval=interval, offset=offset, seed=seed,
                       chunk_rows=chunk_rows)

    def save(self, directory, *, interval=0.9):
        """Write posterior.nc, summary.csv and run.json into ``directory``, atomically.

        Parameters
        ----------
        directory : path-like
            Created when missing.
        interval : float, default=0.9
            Probability of the central interval in summary.csv (see `summary`).

        Returns
        -------
        tallchain.mcmc.Summary
            The summary written to summary.csv.
        """
        from ..outputs import save_result

        return save_result(self, directory, interval=interval)


def _package_version():
    try:
        return version("tallchain")
    except PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "0.0.0"


def to_arviz(result):
    """Convert a `SampleResult` to ArviZ 1.x data (an xarray DataTree).

    Groups: ``posterior`` with ``beta`` over (chain, draw, coef); ``sample_stats`` with every
    per-iteration statistic; ``warmup_sample_stats``; the run's settings and cost counters in
    the attributes of the root and of ``posterior``.
    """
    import arviz as az

    attrs = {
        "tallchain_version": _package_version(),
        "method": result.method,
        "n_rows": int(result.n_rows),
        "data_evaluations": int(result.data_evaluations),
        "nonfinite_count": int(result.nonfinite_count),
        "penalty_beyond_bound_count": int(result.penalty_beyond_bound_count),
        "load_seconds": float(result.load_seconds),
        "penalty_error_bound": float(result.penalty_error_bound),
        "setup_seconds": float(result.setup_seconds),
        "sampling_seconds": float(result.sampling_seconds),
        "total_seconds": float(result.time_to_last_draw),
        "completed_draws": int(result.completed_draws),
        "status": result.status,
    }
    for key, val in result.settings.record().items():
        attrs[f"setting_{key}"] = _attr_value(val)
    for key, val in result.tuned.items():
        attrs[f"tuned_{key}"] = _attr_value(val)
    data = {"posterior": {"beta": result.draws},
            "sample_stats": {k: v for k, v in result.stats.items()}}
    if result.warmup_stats and next(iter(result.warmup_stats.values())).shape[1]:
        data["warmup_sample_stats"] = dict(result.warmup_stats)
    # ArviZ drops every group whose name holds "warmup" unless asked to keep it (its rcParam
    # data.save_warmup defaults to False).
    with warnings.catch_warnings():
        # Every dimension is named, so ArviZ's guess that a short draw dimension (an
        # interrupted run) is misnamed does not apply.
        warnings.filterwarnings("ignore", "Found chain dimension to be longer than draw")
        tree = az.from_dict(data, dims={"beta": ["coef"]},
                            coords={"coef": list(result.coef_names)}, save_warmup=True)
    tree.attrs.update(attrs)
    tree["posterior"].attrs.update(attrs)
    return tree


def _attr_value(val):
    if val is None:
        return "none"
    if isinstance(val, (list, tuple)):
        return np.asarray(val, dtype=float) if all(isinstance(v, (int, float)) for v in val) else str(val)
    if isinstance(val, (bool, np.bool_)):
        return int(val)
    return val
