"""The per-coefficient summary of a run (ESS, R-hat and MCSE by ArviZ) and its cost figures."""

import warnings
from dataclasses import dataclass

import numpy as np

from ..exceptions import ConvergenceWarning

RHAT_MAX = 1.01      # Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), Bayesian Analysis
ESS_MIN = 400        # ibid.: bulk and tail ESS of at least 100 per chain, 4 chains


def ess_bulk(draws):
    """Bulk ESS per coefficient of draws shaped (chain, draw, coef), computed by ArviZ."""
    import arviz as az

    return np.array([float(az.ess(draws[:, :, j], method="bulk")) for j in range(draws.shape[2])])


def summarize(result, *, warn=True):
    """Per-coefficient summary computed by ArviZ, plus the run's cost and efficiency figures.

    Returns
    -------
    Summary
        ``table``: dict of column name to list, one entry per coefficient, with columns
        coef, mean, sd, q5, q50, q95, ess_bulk, ess_tail, r_hat, mcse_mean; ``run``: dict
        with acceptance_rate, log_ratio_sd_mean, data_passes, sampling_seconds,
        ess_bulk_min, ess_per_second, ess_per_data_pass; ``warnings``: list of str.
    """
    import arviz as az

    draws = result.draws
    n_coef = draws.shape[2]
    table = {"coef": list(result.coef_names)}
    flat = draws.reshape(-1, n_coef)
    table["mean"] = flat.mean(axis=0).tolist()
    table["sd"] = (flat.std(axis=0, ddof=1) if flat.shape[0] > 1 else np.full(n_coef, np.nan)).tolist()
    q = np.quantile(flat, [0.05, 0.5, 0.95], axis=0) if flat.size else np.full((3, n_coef), np.nan)
    table["q5"], table["q50"], table["q95"] = q[0].tolist(), q[1].tolist(), q[2].tolist()
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
    ess_min = float(np.nanmin(table["ess_bulk"])) if n_coef else float("nan")
    sd = result.stats.get("log_ratio_sd")
    run = {
        "acceptance_rate": result.acceptance_rate,
        "log_ratio_sd_mean": float(np.nanmean(sd)) if sd is not None and np.isfinite(sd).any() else float("nan"),
        "data_passes": result.data_passes,
        "sampling_seconds": result.sampling_seconds,
        "ess_bulk_min": ess_min,
        "ess_per_second": ess_min / result.sampling_seconds if result.sampling_seconds > 0 else float("nan"),
        "ess_per_data_pass": ess_min / result.data_passes if result.data_passes > 0 else float("nan"),
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
    return Summary(table=table, run=run, warnings=msgs)


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
        One entry per coefficient: coef, mean, sd, q5, q50, q95, ess_bulk, ess_tail, r_hat,
        mcse_mean.
    run : dict
        acceptance_rate, log_ratio_sd_mean, data_passes, sampling_seconds, ess_bulk_min,
        ess_per_second, ess_per_data_pass.
    warnings : list of str
        Convergence advice (R-hat, ESS).
    """

    table: dict
    run: dict
    warnings: list

    def to_csv(self, path):
        cols = list(self.table)
        with open(path, "w") as fh:
            fh.write(",".join(cols) + "\n")
            for i in range(len(self.table["coef"])):
                fh.write(",".join(_fmt(self.table[c][i]) for c in cols) + "\n")


def _fmt(v):
    return v if isinstance(v, str) else repr(float(v))
