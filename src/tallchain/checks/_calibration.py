"""Simulation-based calibration (SBC) of a sampler setting on the user's own design matrix.

For r = 1..R: draw beta_r from a calibration prior, simulate y_r from the model with the user's
X, sample the posterior (under that same prior) with the configured method and settings, and
record the rank of each true coefficient among L thinned posterior draws. If the sampler is
calibrated the ranks are uniform on {0, ..., L} (Talts, Betancourt, Simpson, Vehtari & Gelman,
"Validating Bayesian inference algorithms with simulation-based calibration", 2018).
"""

import functools
import warnings
from dataclasses import dataclass, replace

import numpy as np
from scipy import stats

from .._validation import check_flag, check_seed, fail, is_integer, positive_int
from ..executors import check_scheduler, check_workers, run_tasks, worker_count
from ..mcmc import sample, settings_from, spawn_seeds
from ..exceptions import ModeNotFoundError
from ..models import check_model
from ..posterior import find_mode
from ._ks import check_level, ecdf_ess


@dataclass
class CalibrationResult:
    """Ranks and verdict of an SBC run.

    Attributes
    ----------
    ranks : ndarray of shape (R, n_coef)
        Rank of the true coefficient among the L thinned draws (0..L).
    n_draws : int
        L.
    p_values : ndarray of shape (n_coef,)
        The simultaneous ECDF test of rank uniformity (`ecdf_uniformity_pvalues`): the test
        of the verdict, the same statistic as the bands of the calibration plot.
    binned_p_values : ndarray of shape (n_coef,)
        Pearson's chi-square test over ``n_bins`` equal bins, for reference only: it reacts to
        lumps in single bins as much as to a shift or a wrong spread, which are how a sampler
        fails, and is not used for the verdict.
    n_bins : int
        Bins of the ranks in that chi-square test (2 <= n_bins <= L + 1).
    level : float
        Family-wise level; each coefficient is tested at level / n_coef (Bonferroni).
    verdict : {"passed", "failed", "inconclusive"}
        "inconclusive" when more than `MAX_SHORT_SHARE` of the replications have fewer
        effective draws (smallest ECDF ESS over coefficients) than the L draws they rank
        among: their thinned draws are autocorrelated, which over-disperses the ranks.
        Otherwise "passed" when every coefficient's ECDF p-value is above level / n_coef.
    passed : bool
        ``verdict == "passed"``.
    ess : ndarray of shape (R,)
        Smallest ECDF ESS over coefficients of each replication's draws.
    refits : ndarray of shape (R,)
        Simulated data sets each replication replaced because their posterior mode could not
        be found (at most ``ATTEMPTS - 1``).
    coef_names : list of str
    prior : str
        "laplace" or "model".
    settings : SamplerSettings
        The sampler settings of every replication (their seed is each replication's own).
    """

    ranks: np.ndarray
    n_draws: int
    p_values: np.ndarray
    n_bins: int
    level: float
    verdict: str
    coef_names: list
    prior: str
    settings: object
    ess: np.ndarray
    refits: np.ndarray
    binned_p_values: np.ndarray

    @property
    def passed(self):
        return self.verdict == "passed"

    @property
    def short_share(self):
        """Share of replications with fewer effective draws than ranked draws."""
        return float(np.mean(self.ess < self.n_draws))

    def ecdf_bands(self, n_points):
        """Simultaneous 1 - level bands of the rank ECDF difference at ``n_points`` points
        (see `ecdf_bands`)."""
        return ecdf_bands(self.ranks.shape[0], n_points, level=self.level)

    def as_dict(self):
        return {"replications": int(self.ranks.shape[0]), "n_draws": self.n_draws,
                "n_bins": self.n_bins, "level": self.level,
                "per_coefficient_level": self.level / len(self.coef_names),
                "verdict": self.verdict, "passed": self.passed,
                "replaced_data_sets": int(self.refits.sum()),
                "short_replications": {"share": self.short_share, "limit": MAX_SHORT_SHARE,
                                       "rule": "smallest ECDF ESS below the ranked draws L"},
                "ess_ecdf_min": self.ess.tolist(),
                "prior": self.prior, "settings": self.settings.record(),
                "test": "simultaneous ECDF test of rank uniformity (Saeilynoja, Buerkner & "
                        "Vehtari 2022); binned_p_value: chi-square over n_bins, for reference",
                "coefficients": [{"coef": n, "p_value": float(p), "binned_p_value": float(b),
                                  "verdict": "calibrated" if p > self.level / len(self.coef_names)
                                  else "miscalibrated"}
                                 for n, p, b in zip(self.coef_names, self.p_values,
                                                    self.binned_p_values)],
                "ranks": self.ranks.tolist()}


def _tail_table(n_replications, z):
    """(R + 1, len(z)): the two-sided tail probability 2 min(P(K <= k), P(K >= k)), capped at
    1, of K ~ Binomial(R, z_i) at every count k = 0..R."""
    k = np.arange(n_replications + 1)[:, None]
    return np.minimum(2.0 * np.minimum(stats.binom.cdf(k, n_replications, z),
                                       stats.binom.sf(k - 1, n_replications, z)), 1.0)


def _ecdf_statistic(below, tails):
    """Smallest pointwise tail probability of ECDFs: ``below[..., i]`` counts the R values
    under z_i, ``tails`` is `_tail_table` at those z."""
    return tails[below, np.arange(tails.shape[1])].min(axis=-1)


def _ranks_below(ranks, n_draws):
    """(rows, L): how many of each row's ranks (values 0..L) lie below i, for i = 1..L."""
    rows = ranks.shape[0]
    flat = (ranks + (n_draws + 1) * np.arange(rows)[:, None]).ravel()
    counts = np.bincount(flat, minlength=rows * (n_draws + 1)).reshape(rows, n_draws + 1)
    return np.cumsum(counts, axis=1)[:, :-1]


@functools.lru_cache(maxsize=8)
def _ecdf_null(n_replications, n_draws, n_sim, seed):
    """The sorted null statistics of `ecdf_uniformity_pvalues` (they depend on R and L only),
    simulated in chunks of 10,000 rank sets."""
    tails = _tail_table(n_replications, np.arange(1, n_draws + 1) / (n_draws + 1))
    rng = np.random.default_rng(seed)
    chunks = [_ecdf_statistic(_ranks_below(rng.integers(0, n_draws + 1,
                                                         size=(min(10_000, n_sim - a),
                                                               n_replications)), n_draws),
                              tails)
              for a in range(0, n_sim, 10_000)]
    return np.sort(np.concatenate(chunks))


def ecdf_uniformity_pvalues(ranks, n_draws, n_sim=100_000, seed=0):
    """Simultaneous ECDF test of the uniformity of ranks in {0..L}, one p-value per column.

    The statistic (Saeilynoja, Buerkner & Vehtari 2022, Statistics and Computing 32:32) is the
    smallest two-sided pointwise binomial tail probability of the rank ECDF at z_i = i / (L + 1),
    i = 1..L (under uniformity the count of ranks below i is Binomial(R, z_i)); its null
    distribution comes from ``n_sim`` sets of R uniform ranks (a fixed seed; the level's own
    Monte Carlo error at 0.005 is then about 0.0002), and the p-value
    is (1 + #{simulated <= observed}) / (1 + n_sim) (Davison & Hinkley 1997, eq. 4.11). It
    reacts to a shift of the ranks and to a wrong spread (a U or a hump), as a sampler's
    bias or wrong variance produces, rather than to a lump in one bin.
    """
    ranks = np.asarray(ranks)
    R = ranks.shape[0]
    z = np.arange(1, n_draws + 1) / (n_draws + 1)
    null = _ecdf_null(R, n_draws, n_sim, seed)
    observed = _ecdf_statistic(_ranks_below(ranks.T, n_draws), _tail_table(R, z))
    return (1.0 + np.searchsorted(null, observed, side="right")) / (1.0 + n_sim)


def rank_uniformity_pvalues(ranks, n_draws, n_bins):
    """Chi-square test of uniformity of ranks in {0..L}, binned into n_bins equal-width bins."""
    edges = np.linspace(0, n_draws + 1, n_bins + 1)
    out = np.empty(ranks.shape[1])
    for j in range(ranks.shape[1]):
        counts, _ = np.histogram(ranks[:, j], bins=edges)
        expected = ranks.shape[0] * np.diff(edges) / (n_draws + 1)
        out[j] = stats.chisquare(counts, expected).pvalue
    return out


def ecdf_bands(n_replications, n_points, level=0.05, n_sim=2000, seed=0):
    """Simultaneous bands for the ECDF difference of uniform ranks (Saeilynoja, Buerkner &
    Vehtari 2022, the simulation adjustment): pointwise binomial intervals whose width is
    chosen so that a fraction 1 - level of simulated uniform ECDFs stays inside everywhere.

    Returns (z, lower, upper): evaluation points in (0, 1) and bands for F_hat(z) - z.
    """
    rng = np.random.default_rng(seed)
    z = np.arange(1, n_points + 1) / (n_points + 1)
    sims = np.sort(rng.random((n_sim, n_replications)), axis=1)
    below = np.stack([np.searchsorted(s, z, side="right") for s in sims])
    # for each simulated ECDF, the smallest pointwise tail probability it reaches
    gamma = np.quantile(_ecdf_statistic(below, _tail_table(n_replications, z)), level)
    lo = stats.binom.ppf(gamma / 2, n_replications, z) / n_replications - z
    hi = stats.binom.ppf(1 - gamma / 2, n_replications, z) / n_replications - z
    return z, lo, hi


#: Simulated data sets a replication may draw before it gives up: one whose posterior mode
#: cannot be found (e.g. a separated logistic response) is replaced by a fresh draw.
ATTEMPTS = 5

#: Largest share of replications with fewer effective draws than ranked draws (L) for which
#: a verdict is still given; above it the check is "inconclusive".
MAX_SHORT_SHARE = 0.05


def _replicate(model, n_draws, seed, settings, parallel):
    """One replication: (ranks, smallest ECDF ESS, simulated data sets that failed), or
    (None, nan, ATTEMPTS) when none of ATTEMPTS data sets could be fitted.

    theta is drawn from the model's own prior (family parameters on the sampler's scale); the
    ranks compare it on the scale the draws are reported on (a monotone map: same ranks)."""
    for attempt in range(ATTEMPTS):
        # attempt 0 uses the replication's own seed; a retry, the next child spawned from it
        rng = np.random.default_rng(seed if attempt == 0 else seed.spawn(1)[0])
        beta = rng.multivariate_normal(model.prior_mean, model.prior_cov, method="cholesky")
        sim = model.with_response(model.simulate(beta, rng))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                r = sample(sim, replace(settings, seed=int(rng.integers(2**63))),
                           parallel=parallel)
        except ModeNotFoundError:
            continue
        flat = r.draws.reshape(-1, r.draws.shape[2])
        # thin to L draws, equally spaced over the pooled chains (thinning reduces the
        # autocorrelation that would otherwise make the ranks over-dispersed; Talts et al. 2018)
        pick = np.linspace(0, flat.shape[0] - 1, n_draws).round().astype(int)
        ranks = np.sum(flat[pick] < model.natural_scale(beta), axis=0)
        return ranks, float(np.min(ecdf_ess(r.draws))), attempt
    return None, float("nan"), ATTEMPTS


def _replicate_task(shared, seed):
    return _replicate(*shared[:2], seed, *shared[2:])


# The defaults of a replication's sampler, where calibrate() is given no SamplerSettings.
_REPLICATION_DEFAULTS = {"chains": 2, "draws": 500, "warmup": 300}


def calibrate(model, settings=None, *, replications=100, thinned_draws=99, prior="laplace",
              level=0.05, n_bins=10, seed=1, workers=None, scheduler="processes", progress=False,
              **options):
    """Simulation-based calibration of a sampler setting on the model's X.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
        Its X (and offset, noise sd) are used; its y only to build the Laplace prior.
    settings : SamplerSettings, optional
        The sampler settings of every replication (their seed is replaced by each
        replication's own). Default: ``SamplerSettings(chains=2, draws=500, warmup=300)``.
    replications : int, default=100
        R, an integer >= 2.
    thinned_draws : int, default=99
        L, thinned posterior draws per replication (ranks take L + 1 values): equally spaced
        over the ``chains * draws`` draws a replication keeps after warmup, so at most that
        many. The sampler's own ``chains`` and ``draws`` are settings (below).
    prior : {"laplace", "model"}, default="laplace"
        Calibration prior: the Laplace approximation of the user's posterior (proper and near
        the region that matters) or the model's own prior. SBC holds for any prior used
        consistently in simulation and inference.
    level : float, default=0.05
        Family-wise level of the rank-uniformity tests (Bonferroni over coefficients).
    n_bins : int, default=10
        Equal-width bins of the ranks in the chi-square test; an integer with
        2 <= n_bins <= thinned_draws + 1 (the number of rank values).
    seed : int, numpy.random.Generator or SeedSequence, default=1
        Replication r gets child r of ``SeedSequence(seed)`` (of a Generator: its r-th spawned
        child): results do not depend on workers.
    workers : int, optional
        Worker processes (default: the number of cores, at most ``replications``).
    scheduler : str or distributed.Client, default="processes"
        Where replications run: see `tallchain.executors`.
    progress : bool, default=False
        Show a progress line as replications finish.
    **options
        Settings of `tallchain.SamplerSettings` that replace those of ``settings`` (method,
        step_size, batch_size, control_variates, ...). Run options (``preparation``,
        ``checkpoint``, ...) are not accepted: every replication has its own simulated data.

    Returns
    -------
    CalibrationResult

    Raises
    ------
    InputError
        For a bad argument or sampler setting (an unknown method or keyword, ``chains=0``,
        ``thinned_draws`` above ``chains * draws``, ``n_bins`` out of range, a bad seed,
        scheduler or worker count, ...). Every check runs before the mode is found and before
        any worker starts.
    ModeNotFoundError
        When ``prior="laplace"`` and the mode of the user's posterior cannot be found.
    """
    check_model(model)
    if model.weights is not None:
        # The weighted likelihood counts row i w_i times, but a simulated data set has one
        # response per row: no data-generating process has that likelihood, so the ranks are
        # not uniform even for an exact sampler (Talts et al. 2018 need simulation and
        # inference from the same joint distribution).
        fail("model", "has frequency weights, which simulation-based calibration cannot "
             "honour (one simulated response per row, counted w_i times)",
             "calibrate the same settings on the model without weights, or on the data with "
             "each row repeated w_i times")
    replications = positive_int("replications", replications, minimum=2)
    draws = positive_int("thinned_draws", thinned_draws, minimum=1)
    if not is_integer(n_bins) or not 2 <= n_bins <= draws + 1:
        fail("n_bins", f"must be an integer from 2 to thinned_draws + 1 = {draws + 1}, "
             f"got {n_bins!r}", "give e.g. 10 (ranks take thinned_draws + 1 values)")
    n_bins = int(n_bins)
    level = check_level(level)
    if not isinstance(prior, str) or prior not in ("laplace", "model"):
        fail("prior", f"unknown calibration prior {prior!r}", 'use "laplace" or "model"')
    check_seed(seed)
    check_scheduler(scheduler)
    check_workers(workers)
    check_flag("progress", progress)
    settings = settings_from(settings, options, owner="calibrate()",
                             defaults=_REPLICATION_DEFAULTS).check_against(model)
    available = settings.chains * settings.draws
    if draws > available:
        fail("thinned_draws", f"is {draws}, more than the {available} draws of a replication "
             f"({settings.chains} chains x {settings.draws} draws after warmup), so draws "
             "would be ranked twice", f"raise draws (or chains), or give thinned_draws <= "
             f"{available}")

    if prior == "laplace":
        lap = find_mode(model)
        cal_model = model.with_theta_prior(lap.mode, lap.cov)
    else:
        cal_model = model
    seeds = spawn_seeds(seed, replications)
    n_workers = worker_count(workers, replications)
    parallel = scheduler == "serial" or (scheduler == "processes" and n_workers == 1)
    ranks = np.zeros((replications, model.n_coef), dtype=np.int64)
    ess = np.empty(replications)
    refits = np.zeros(replications, dtype=np.int64)

    def _done(i, outcome):
        rk, ess[i], refits[i] = outcome
        if rk is None:
            fail("calibrate", f"replication {i}: none of its {ATTEMPTS} simulated data sets "
                 "could be fitted (the posterior mode was not found)", "use prior = "
                 '"laplace" (simulated coefficients near the posterior) or a tighter prior')
        ranks[i] = rk

    run_tasks(_replicate_task, (cal_model, draws, settings, parallel), seeds,
              scheduler=scheduler,
              workers=n_workers, on_result=_done, progress="calibrate" if progress else None)
    p = ecdf_uniformity_pvalues(ranks, draws)
    if np.mean(ess < draws) > MAX_SHORT_SHARE:
        verdict = "inconclusive"
    else:
        verdict = "passed" if np.all(p > level / model.n_coef) else "failed"
    return CalibrationResult(ranks=ranks, n_draws=draws, p_values=p, n_bins=n_bins, level=level,
                             verdict=verdict, coef_names=model.output_names, prior=prior,
                             settings=settings, ess=ess, refits=refits,
                             binned_p_values=rank_uniformity_pvalues(ranks, draws, n_bins))
