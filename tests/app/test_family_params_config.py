"""Family parameters in the config: the linear family's noise sd (absent means sampled, with the
prior the config sets) and the negative binomial's dispersion.

Against what: the run's posterior of the noise sd against the residual sd of statsmodels' OLS
fit on the same data (its MLE of the noise sd; with N = 3000 the posterior sd of the noise sd
is about s / sqrt(2N) ~ 0.013 s, and the posterior mean lies within a few of those of the MLE);
the coefficients on the original scale against OLS's estimates in OLS's standard errors.
The negative binomial's dispersion against statsmodels' NB2 MLE, in posterior sds.
"""

import csv
import re

import numpy as np
import pytest
import statsmodels.api as sm

from tallchain.app import _cli as cli

FAST = """\
[sampler]
method = "penalty-mala"
chains = 2
draws = 400
warmup = 200
seed = 3
"""
N = 3000


def _setup(folder, X, y, model_extra="", data_extra="", family="linear"):
    """A config on X.npy and y.npy in ``folder``; its path."""
    for name, array in (("X", X), ("y", y)):
        np.save(folder / f"{name}.npy", array)
    sections = {"data": f'x = "X.npy"\ny = "y.npy"\n{data_extra}',
                "model": f'family = "{family}"\n{model_extra}'}
    text = "".join(f"[{k}]\n{v}\n" for k, v in sections.items()) + FAST
    (folder / "run.toml").write_text(text)
    return folder / "run.toml"


def _data(rng):
    X = rng.standard_normal((N, 2)) * [1000.0, 1.0] + [5000.0, 0.0]   # one raw-scale column
    y = 2.0 + X @ [0.003, -1.0] + 1.7 * rng.standard_normal(N)
    return X, y


@pytest.mark.parametrize("data_extra", ["", "standardize = true"])
def test_linear_without_noise_sd_samples_it(tmp_path, rng, capsys, data_extra):
    X, y = _data(rng)
    path = _setup(tmp_path, X, y, model_extra="noise_sd_prior = [2.0, 1.0]",
                  data_extra=data_extra)
    assert cli.main(["run", str(path), "--out", str(tmp_path / "out"), "--quiet"]) == 0
    with open(tmp_path / "out" / "summary.csv") as fh:
        rows = {r["coef"]: r for r in csv.DictReader(fh)}
    assert list(rows) == ["intercept", "x0", "x1", "noise_sd"]
    # reference: statsmodels OLS; its MLE of the noise sd is sqrt(SSR / N)
    fit = sm.OLS(y, sm.add_constant(X)).fit()
    s_mle = np.sqrt(fit.ssr / N)
    s_post = float(rows["noise_sd"]["mean"])
    assert abs(s_post - s_mle) < 4 * s_mle / np.sqrt(2 * N)
    # power: the old default (noise sd 1) is many posterior sds away
    assert abs(1.0 - s_mle) > 10 * s_mle / np.sqrt(2 * N)
    for name, est, se in zip(["intercept", "x0", "x1"], fit.params, fit.bse):
        assert abs(float(rows[name]["mean"]) - est) < 4 * se


def test_negative_binomial_family_samples_the_dispersion(tmp_path, rng):
    X = rng.standard_normal((N, 2))
    mu = np.exp(0.5 + X @ [0.4, -0.3])
    y = rng.poisson(mu * rng.gamma(1 / 0.6, 0.6, N)).astype(float)
    path = _setup(tmp_path, X, y, model_extra="dispersion_prior = [1.0, 2.5]",
                  family="negative-binomial")
    assert cli.main(["run", str(path), "--out", str(tmp_path / "out"), "--quiet"]) == 0
    with open(tmp_path / "out" / "summary.csv") as fh:
        rows = {r["coef"]: r for r in csv.DictReader(fh)}
    assert list(rows) == ["intercept", "x0", "x1", "dispersion"]
    # reference: statsmodels NegativeBinomial (NB2) MLE of alpha; posterior mean within 4
    # posterior sds (the prior's pull is a small fraction of one at N = 3000)
    fit = sm.NegativeBinomial(y, sm.add_constant(X), loglike_method="nb2").fit(
        method="newton", disp=0, maxiter=100)
    mean, sd = float(rows["dispersion"]["mean"]), float(rows["dispersion"]["sd"])
    assert abs(mean - fit.params[3]) < 4 * sd
    assert abs(mean - 0.0) > 10 * sd   # power: a Poisson fit (alpha = 0) is far off


@pytest.mark.parametrize("family, model_extra, pattern", [
    ("linear", "noise_sd = 1.0\nnoise_sd_prior = [1.0, 1.0]",
     r"model\.noise_sd_prior: is given with noise_sd"),
    ("logistic", "noise_sd_prior = [1.0, 1.0]",
     r"noise_sd_prior: is only used by family \"linear\", not \"logistic\""),
    ("linear", "noise_sd_prior = [1.0, -1.0]",
     r"model\.noise_sd_prior: must be two finite numbers > 0"),
    ("linear", "noise_sd_prior = 3.0", r"model\.noise_sd_prior: must be two numbers"),
    ("poisson", "dispersion_prior = [1.0, 1.0]",
     r"dispersion_prior: is only used by family \"negative-binomial\", not \"poisson\""),
])
def test_bad_noise_sd_prior_exits_2(tmp_path, rng, capsys, family, model_extra, pattern):
    X, y = _data(rng)
    if family == "logistic":
        y = (y > np.median(y)).astype(float)
    path = _setup(tmp_path, X[:50], y[:50], model_extra=model_extra, family=family)
    code = cli.main(["run", str(path), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1, err
    assert re.search(pattern, err[0]), err[0]


def test_binomial_family_without_trials_is_refused_naming_the_key(tmp_path, rng, capsys):
    X = rng.standard_normal((20, 1))
    path = _setup(tmp_path, X, (X[:, 0] > 0).astype(float), family="binomial")
    assert cli.main(["run", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and re.search(r'model\.family: "binomial" needs trials per row, and '
                                       r'data\.trials is missing; add trials = ', err[0]), err
