"""Diagnostics: ArviZ conversion, summary table, KS distance with its Monte Carlo noise floor."""

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

# 95% quantile of the Kolmogorov distribution of sqrt(n) D_n (standard tables; METHODS.md 5).
KS_CRITICAL = 1.358
RHAT_MAX = 1.01      # Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), Bayesian Analysis
ESS_MIN = 400        # ibid.: bulk and tail ESS of at least 100 per chain, 4 chains


class ConvergenceWarning(UserWarning):
    """R-hat or ESS says the draws are not yet trustworthy."""


def to_arviz(result):
    """Convert a `SampleResult` to ArviZ 1.x data (an xarray DataTree).

    Groups: ``posterior`` with ``beta`` over (chain, draw, coef); ``sample_stats`` with every
    per-iteration statistic; ``warmup_sample_stats``; the run's settings and cost counters in
    the attributes of the root and of ``posterior``.
    """
    import arviz as az

    from . import __version__

    attrs = {
        "tallchain_version": __version__,
        "method": result.method,
        "n_rows": int(result.n_rows),
        "data_evaluations": int(result.data_evaluations),
        "nonfinite_count": int(result.nonfinite_count),
        "cd_fallback_count": int(result.cd_fallback_count),
        "setup_seconds": float(result.setup_seconds),
        "sampling_seconds": float(result.sampling_seconds),
        "completed_draws": int(result.completed_draws),
    }
    for key, val in result.settings.items():
        attrs[f"setting_{key}"] = _attr_value(val)
    data = {"posterior": {"beta": result.draws},
            "sample_stats": {k: v for k, v in result.stats.items()}}
    if result.warmup_stats and next(iter(result.warmup_stats.values())).shape[1]:
        data["warmup_sample_stats"] = dict(result.warmup_stats)
    tree = az.from_dict(data, dims={"beta": ["coef"]}, coords={"coef": list(result.coef_names)})
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


@dataclass
class KSCheck:
    """KS distance of each coefficient's draws to a reference, beside its noise floor.

    ``floor`` is 1.358 / sqrt(ESS) (95% point of the Kolmogorov distribution, with the bulk ESS
    standing in for the number of independent draws); for a two-sample comparison the floor is
    1.358 sqrt(1/ESS + 1/n_ref). ``ratio = ks / floor``; verdict "within noise" when
    ratio <= tolerance, else "biased".
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

    def as_dict(self):
        return {"coef": list(self.coef_names), "ks": self.ks.tolist(), "floor": self.floor.tolist(),
                "ratio": self.ratio.tolist(), "ess_bulk": self.ess.tolist(),
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
    ess = ess_bulk(draws)
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
