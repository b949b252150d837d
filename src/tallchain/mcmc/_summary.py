"""The per-coefficient summary of a run (ESS, R-hat and MCSE by ArviZ) and its cost figures."""

import warnings
from dataclasses import dataclass

import numpy as np

from .._validation import fail, is_number
from ..exceptions import ConvergenceWarning
from ..models import response_from_record
from ._laplace_gap import laplace_gap

RHAT_MAX = 1.01      # Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), Bayesian Analysis
ESS_MIN = 400        # ibid.: bulk and tail ESS of at least 100 per chain, 4 chains


def ess_bulk(draws):
    """Bulk ESS per coefficient of draws shaped (chain, draw, coef), computed by ArviZ."""
    import arviz as az

    return np.array([float(az.ess(draws[:, :, j], method="bulk")) for j in range(draws.shape[2])])


def check_interval(interval):
    """The probability of a central interval as a float; InputError unless 0 < interval < 1."""
    if not is_number(interval) or not 0.0 < interval < 1.0:
        fail("interval", f"must be a probability strictly between 0 and 1, got {interval!r}",
             "give the central interval's probability, e.g. interval=0.9")
    return float(interval)


def interval_columns(interval):
    """The summary's column names of the bounds of the central ``interval``:
    ``("lower_90", "upper_90")`` for 0.9, ``("lower_97.5", "upper_97.5")`` for 0.975."""
    percent = f"{100.0 * interval:.6g}"
    return f"lower_{percent}", f"upper_{percent}"


def summarize(result, *, warn=True, interval=0.9):
    """Per-coefficient summary computed by ArviZ, plus the run's cost and efficiency figures.

    Parameters
    ----------
    result : SampleResult
    warn : bool, default=True
        Raise the convergence advice as a `ConvergenceWarning` too.
    interval : float, default=0.9
        Probability of the central (equal-tailed) posterior interval, strictly between 0 and
        1; it names the interval's columns (``lower_90``/``upper_90`` for 0.9).

    Returns
    -------
    Summary
        ``table``: dict of column name to list, one entry per coefficient, with columns
        coef, mean, sd, the interval's lower bound, median, its upper bound; for logistic and
        Poisson the ratio exp(coefficient) (``odds_ratio`` or ``rate_ratio``, its median, and
        its interval, see `ratio_columns`); ess_bulk, ess_tail, r_hat, mcse_mean; and when the
        run had a Laplace approximation, laplace_ks, ks_floor, laplace_shift,
        laplace_sd_ratio (see `tallchain.mcmc.laplace_gap`); ``run``: dict with acceptance_rate, log_ratio_sd_mean,
        data_passes, sampling_seconds, ess_bulk_min, ess_per_second, ess_per_data_pass,
        total_seconds (start to the last draw, loading included) and ess_per_total_second
        (end-to-end effective draws per second), penalty_error_bound
        (`SampleResult.penalty_error_bound`); ``warnings``: list of str; ``interval``.
    """
    import arviz as az

    interval = check_interval(interval)
    draws = result.draws
    n_coef = draws.shape[2]
    table = {"coef": list(result.coef_names)}
    flat = draws.reshape(-1, n_coef)
    table["mean"] = flat.mean(axis=0).tolist()
    table["sd"] = (flat.std(axis=0, ddof=1) if flat.shape[0] > 1 else np.full(n_coef, np.nan)).tolist()
    tail = (1.0 - interval) / 2.0
    q = (np.quantile(flat, [tail, 0.5, 1.0 - tail], axis=0) if flat.size
         else np.full((3, n_coef), np.nan))
    lower, upper = interval_columns(interval)
    table[lower], table["median"], table[upper] = q[0].tolist(), q[1].tolist(), q[2].tolist()
    table.update(ratio_columns(flat, result.model_record, interval))
    if draws.shape[1] >= 4:
        tree = az.from_dict({"posterior": {"beta": draws}}, dims={"beta": ["coef"]},
                            coords={"coef": list(result.coef_names)})
        table["ess_bulk"] = az.ess(tree, method="bulk")["beta"].values.tolist()
        table["ess_tail"] = az.ess(tree, method="tail")["beta"].values.tolist()
        table["r_hat"] = az.rhat(tree)["beta"].values.tolist()
        table["mcse_mean"] = az.mcse(tree, method="mean")["beta"].values.tolist()
    else:
        for key in ("ess_bulk", "ess_tail", "r_hat", "mcse_mean"):
            table[key] = [float("nan")] * n_coef
    if result.laplace_cov is not None and draws.shape[1] >= 4:
        table.update({k: v.tolist() for k, v in
                      laplace_gap(draws, result.laplace_mode, result.laplace_cov,
                                  n_log=result.n_family_params).items()})
    ess_min = float(np.nanmin(table["ess_bulk"])) if n_coef else float("nan")
    sd = result.stats.get("log_ratio_sd")
    run = {
        "acceptance_rate": result.acceptance_rate,
        "log_ratio_sd_mean": float(np.nanmean(sd)) if sd is not None and np.isfinite(sd).any() else float("nan"),
        "data_passes": result.data_passes,
        "sampling_seconds": result.sampling_seconds,
        "ess_bulk_min": ess_min,
        "ess_per_second": ess_min / result.sampling_seconds if result.sampling_seconds > 0 else float("nan"),
        "total_seconds": result.time_to_last_draw,
        "ess_per_total_second": (ess_min / result.time_to_last_draw
                                 if result.time_to_last_draw > 0 else float("nan")),
        "ess_per_data_pass": ess_min / result.data_passes if result.data_passes > 0 else float("nan"),
        "penalty_error_bound": result.penalty_error_bound,
    }
    msgs = []
    rhat_max = _finite_extreme(table["r_hat"], np.max)
    if np.isfinite(rhat_max) and rhat_max > RHAT_MAX:
        msgs.append(f"R-hat is {rhat_max:.3f} > {RHAT_MAX} (Vehtari et al. 2021): the chains have "
                    "not mixed; run longer or check the model")
    ess_tail_min = _finite_extreme(table["ess_tail"], np.min)
    low = min(ess_min, ess_tail_min) if np.isfinite(ess_tail_min) else ess_min
    if not np.isfinite(low) or low < ESS_MIN:
        msgs.append(f"the smallest ESS is {low:.0f} < {ESS_MIN} (Vehtari et al. 2021): estimates "
                    "of tails and sd are unreliable; draw more")
    if warn and msgs:
        warnings.warn("; and ".join(msgs), ConvergenceWarning, stacklevel=2)
    return Summary(table=table, run=run, warnings=msgs, interval=interval,
                   ratio=_ratio_name(result.model_record))


def ratio_columns(flat, record, interval):
    """exp of the draws, for families whose exp(coefficient) is a ratio (the family's
    `Response.ratio_name`: odds ratio for logistic, rate ratio for Poisson): the posterior
    median and central interval of exp(beta_j), one column each, named after the ratio
    (``odds_ratio``, ``odds_ratio_lower_90``, ``odds_ratio_upper_90``). The intercept's
    entries are NaN: exp(intercept) is the odds or rate at x = 0, not a ratio; so are those
    of parameters other than coefficients (a dispersion). No columns for other families or
    without a model record."""
    if record is None:
        return {}
    ratio = _ratio_name(record)
    if ratio is None:
        return {}
    name = ratio.replace(" ", "_")
    tail = (1.0 - interval) / 2.0
    n_coef = flat.shape[1]
    q = (np.quantile(np.exp(flat), [0.5, tail, 1.0 - tail], axis=0) if flat.size
         else np.full((3, n_coef), np.nan))
    if record["add_intercept"]:
        q[:, 0] = np.nan
    n_coef = int(record["add_intercept"]) + len(record["feature_names"])
    q[:, n_coef:] = np.nan          # a dispersion or a noise sd: not a coefficient
    lower, upper = interval_columns(interval)
    return {name: q[0].tolist(), f"{name}_{lower}": q[1].tolist(),
            f"{name}_{upper}": q[2].tolist()}


def _ratio_name(record):
    if record is None:
        return None
    return response_from_record(record).ratio_name


def _finite_extreme(values, extreme):
    """``extreme`` of the finite values, NaN when there are none (e.g. R-hat of one short
    chain), without numpy's all-NaN warning."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    return float(extreme(v)) if v.size else float("nan")


@dataclass
class Summary:
    """What `summarize` returns.

    Attributes
    ----------
    table : dict of str to list
        One entry per coefficient: coef, mean, sd, lower_<P>, median, upper_<P> (the central
        interval of probability ``interval``, P in percent), the ratio columns (see
        ``ratio``), ess_bulk, ess_tail, r_hat, mcse_mean, and the Laplace columns when the run
        had a Laplace approximation (see `summarize`). ``print(summary)`` shows it as a table.
    run : dict
        acceptance_rate, log_ratio_sd_mean, data_passes, sampling_seconds, ess_bulk_min,
        ess_per_second, ess_per_data_pass, total_seconds, ess_per_total_second.
    warnings : list of str
        Convergence advice (R-hat, ESS).
    interval : float
        Probability of the central interval in ``table``.
    ratio : str or None
        What exp(coefficient) is for the family ("odds ratio", "rate ratio"), whose columns
        ``table`` then holds; None for families without one.
    """

    table: dict
    run: dict
    warnings: list
    interval: float = 0.9
    ratio: str | None = None

    def __str__(self):
        from ._tables import coefficient_table, table_notes

        return "\n".join(coefficient_table(self) + table_notes(self))

    @property
    def interval_columns(self):
        """The names of the interval's lower and upper columns in ``table``."""
        return interval_columns(self.interval)

    def to_csv(self, path):
        cols = list(self.table)
        with open(path, "w") as fh:
            fh.write(",".join(cols) + "\n")
            for i in range(len(self.table["coef"])):
                fh.write(",".join(_fmt(self.table[c][i]) for c in cols) + "\n")


def _fmt(v):
    return v if isinstance(v, str) else repr(float(v))
