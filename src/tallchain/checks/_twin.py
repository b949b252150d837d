"""The conjugate twin of a user's problem, and the check of a sampler setting against it."""

from dataclasses import dataclass

import numpy as np

from .._validation import check_seed
from ..mcmc import sample, settings_from
from ..models import LinearRegression, _passes, check_model
from ..posterior import conjugate_posterior, find_mode
from ._ks import MIN_ESS_FOR_VERDICT, check_level, family_threshold, ks_check


@dataclass
class TwinCheck:
    """Outcome of `check_on_twin`.

    Attributes
    ----------
    verdict : {"passed", "failed", "inconclusive"}
        "inconclusive" when some coefficient has fewer than `MIN_ESS_FOR_VERDICT` effective
        draws (ESS of the empirical CDF): too few to show bias or its absence. Otherwise
        "passed" when every coefficient's KS distance to the exact marginal is within the
        threshold of the check's family-wise ``level``, else "failed".
    passed : bool
        ``verdict == "passed"``.
    level : float
        Chance that a setting without bias fails the check (all coefficients together).
    ks : KSCheck
    noise_sd : float
        Noise sd of the twin (see `conjugate_twin`).
    response : str
        "user" (a linear model's own y) or "prior-predictive".
    result : SampleResult
    notes : list of str
    """

    verdict: str
    level: float
    ks: object
    noise_sd: float
    response: str
    result: object
    notes: list

    @property
    def passed(self):
        return self.verdict == "passed"

    def as_dict(self):
        return {"verdict": self.verdict, "passed": self.passed, "level": self.level,
                "min_ess_for_verdict": MIN_ESS_FOR_VERDICT, "noise_sd": self.noise_sd, "response": self.response,
                "method": self.result.method, "settings": self.result.settings.record(),
                "tuned": self.result.tuned,
                "ks": self.ks.as_dict(), "notes": list(self.notes),
                "acceptance_rate": self.result.acceptance_rate,
                "log_ratio_sd_mean": float(np.nanmean(self.result.stats["log_ratio_sd"]))
                if np.isfinite(self.result.stats["log_ratio_sd"]).any() else None}


def conjugate_twin(model, *, seed=None):
    """A linear-Gaussian model with the user's X and prior whose posterior is known exactly.

    For a `LinearRegression` the twin is the model itself (its own y and noise sd). For a GLM,
    the twin's noise sd s makes its posterior scale match the user's: s^2 = 1 / mean_i(-f''_i)
    at the user's posterior mode (the GLM's Fisher information is sum_i -f''_i x_i x_i^T, the
    twin's X^T X / s^2). Its y is simulated as X beta + s * noise, with beta drawn from the prior
    shrunk toward the user's mode so that y is on a realistic scale; the twin's posterior does
    not depend on how beta was drawn, so it is exactly `conjugate_posterior(twin)`.

    Returns
    -------
    twin : LinearRegression
    response : {"user", "prior-predictive"}

    Raises
    ------
    InputError
        When ``model`` is not a regression model or ``seed`` is not a valid seed (an integer
        from 0 to 2**64 - 1, None, a numpy Generator or SeedSequence); raised before the mode
        is found.
    """
    check_model(model)
    seed = check_seed(seed)
    if model.closed_form_posterior:
        return model, "user"
    lap = find_mode(model)
    n = model.n_rows
    eta, f1, f2 = np.empty(n), np.empty(n), np.empty(n)
    _passes.eta_derivatives(model.glm_data, lap.mode, eta, f1, f2)
    noise_sd = 1.0 / np.sqrt(max(float(np.mean(-f2)), 1e-12))
    rng = np.random.default_rng(seed)
    beta = lap.mode + 0.1 * rng.multivariate_normal(np.zeros(model.n_coef), model.prior_cov)
    y = model.linear_predictor(beta, with_offset=False) + noise_sd * rng.standard_normal(n)
    return model.with_response(y, family=LinearRegression, noise_sd=noise_sd), "prior-predictive"


def check_on_twin(model, settings=None, *, level=0.05, **options):
    """Run a sampler setting on the conjugate twin and compare with the exact posterior.

    Parameters
    ----------
    model : LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
    settings : SamplerSettings, optional
        The sampler settings to check (default: ``SamplerSettings()``); its ``seed`` also
        seeds the twin's simulated response (GLMs).
    level : float, default=0.05
        Family-wise false-alarm rate: each coefficient's KS distance is tested at
        ``level / n_coef`` (Bonferroni; see `family_threshold`), so that a setting without
        bias fails with probability at most ``level``.
    **options
        Settings of `tallchain.SamplerSettings` that replace those of ``settings`` (method,
        step_size, batch_size, seed, ...).

    Returns
    -------
    TwinCheck

    Raises
    ------
    InputError
        When ``model`` is not a regression model, ``level`` is not strictly between 0 and 1,
        ``seed`` is not a valid seed, or a setting would be refused by `tallchain.sample`
        (an unknown method or keyword, ``chains=0``, ...); raised before the mode is found or
        any sampling starts.
    ModeNotFoundError
        When the mode of a GLM cannot be found (see `tallchain.find_mode`).
    """
    check_model(model)
    settings = settings_from(settings, options, owner="check_on_twin()").check_against(model)
    level = check_level(level)
    tolerance, _ = family_threshold(level, model.n_coef)
    twin, response = conjugate_twin(model, seed=settings.seed)
    post = conjugate_posterior(twin)
    result = sample(twin, settings)
    check = ks_check(result.draws, post, coef_names=twin.coef_names, tolerance=tolerance)
    notes = []
    if settings.proxy_order_used == 2:
        notes.append("with second-order control variates the linear twin's log-ratio noise is "
                     "exactly zero: this check covers the proposal, tuning and chain, not the "
                     "noise correction; repeat with control_variates = false to test that")
    if not check.conclusive:
        verdict = "inconclusive"
        notes.append(f"the smallest ESS of a coefficient's empirical CDF is "
                     f"{float(np.min(check.ess)):.0f}, below {MIN_ESS_FOR_VERDICT}: too few "
                     "effective draws to judge; raise draws (or chains) and check again")
    else:
        verdict = "passed" if check.passed else "failed"
    return TwinCheck(verdict=verdict, level=level, ks=check, noise_sd=float(twin.noise_sd),
                     response=response, result=result, notes=notes)
