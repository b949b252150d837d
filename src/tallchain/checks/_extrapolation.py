"""Extrapolation of posterior means and sds to the limit of a biased method, with Monte Carlo
errors (private).

- In the step size, for sgld (Richardson-Romberg; Durmus, Simsekli, Moulines, Badeau &
  Richard, NeurIPS 2016): E_{pi_h}[f] = E_pi[f] + C h + O(h^2), so the estimate at h -> 0 is
  2 pi_{h/2} - pi_h, from paired chains with shared noise (`tallchain.mcmc.sample_pair`).
- In the batch size, for the penalty methods (the jackknife in 1/n; Quenouille 1956): with a
  residual bias C/n, batch sizes n1 < n2 give pi_0 = (n2 pi_{n2} - n1 pi_{n1}) / (n2 - n1),
  which is 2 pi_{2n} - pi_n for n2 = 2 n1; the residual bias of the run at n2 is then
  pi_{n2} - pi_0 = n1 (pi_{n1} - pi_{n2}) / (n2 - n1).

Monte Carlo errors. Every estimate here is a difference of averages along chains; its error
is that of the average of one series (the "influence series"), whose MCSE ArviZ gives from
its ESS (Vehtari et al. 2021): for a mean, f(x) itself; for a standard deviation s, the
linearisation s_hat - s ~ mean of ((x - mu)^2 - s^2) / (2 s) (the delta method). For paired
chains the series of the pair is, per coarse step t, psi(fine_{2t}) + psi(fine_{2t+1}) -
psi(coarse_t), whose mean is exactly 2 pi_{h/2} - pi_h: the correlation that the shared noise
creates is in the series, not assumed away. Independent runs (the batch sizes) add variances.
"""

import numpy as np


def _influence(draws):
    """(means, sds, mean series, sd series) of draws (chains, n, d): the series are the
    influence functions of the mean and the sd at each draw (see the module notes)."""
    flat = draws.reshape(-1, draws.shape[-1])
    mu = flat.mean(axis=0)
    sd = flat.std(axis=0, ddof=1)
    return mu, sd, draws, ((draws - mu) ** 2 - sd**2) / (2.0 * sd)


def _mcse(series):
    """MCSE of the mean of series (chains, n, d), per column, from ArviZ's ESS of the mean."""
    import arviz as az

    out = np.empty(series.shape[-1])
    for j in range(series.shape[-1]):
        s = series[:, :, j]
        out[j] = float(az.mcse(s, method="mean")) if np.ptp(s) > 0 else 0.0
    return out


def moments(draws):
    """Posterior means and sds of draws (chains, n, d) with their Monte Carlo errors.

    Returns
    -------
    dict
        ``mean``, ``mean_mcse``, ``sd``, ``sd_mcse``: lists of floats, one per coefficient.
    """
    mu, sd, psi_mean, psi_sd = _influence(np.asarray(draws, dtype=float))
    return {"mean": mu.tolist(), "mean_mcse": _mcse(psi_mean).tolist(), "sd": sd.tolist(),
            "sd_mcse": _mcse(psi_sd).tolist()}


def richardson_romberg(coarse, fine):
    """Richardson-Romberg estimates 2 pi_{h/2} - pi_h of posterior means and sds, with their
    Monte Carlo errors, from paired chains.

    Parameters
    ----------
    coarse : ndarray of shape (chains, n, d)
        Draws at step h.
    fine : ndarray of shape (chains, 2 n, d)
        Draws at step h/2 of the chains paired with them (fine steps 2t, 2t + 1 span coarse
        step t).

    Returns
    -------
    dict
        ``mean``, ``mean_mcse``, ``sd``, ``sd_mcse`` (the extrapolated values), and
        ``coarse`` and ``fine``: `moments` of each chain set on its own.
    """
    coarse = np.asarray(coarse, dtype=float)
    fine = np.asarray(fine, dtype=float)
    c, n, d = coarse.shape
    if fine.shape != (c, 2 * n, d):
        raise ValueError(f"fine draws have shape {fine.shape}, expected {(c, 2 * n, d)}")
    mu_c, sd_c, m_c, s_c = _influence(coarse)
    mu_f, sd_f, m_f, s_f = _influence(fine)

    def paired(series_f, series_c):
        # 2 x the mean of the fine pair at each coarse step, minus the coarse value
        return series_f[:, 0::2] + series_f[:, 1::2] - series_c

    return {"mean": (2.0 * mu_f - mu_c).tolist(), "mean_mcse": _mcse(paired(m_f, m_c)).tolist(),
            "sd": (2.0 * sd_f - sd_c).tolist(), "sd_mcse": _mcse(paired(s_f, s_c)).tolist(),
            "coarse": moments(coarse), "fine": moments(fine)}


def batch_jackknife(small, large, n_small, n_large):
    """The jackknife in 1/n from independent runs at batch sizes n_small < n_large.

    Parameters
    ----------
    small, large : dict
        `moments` of the runs at n_small and n_large rows per batch.
    n_small, n_large : int

    Returns
    -------
    dict
        ``mean``, ``mean_mcse``, ``sd``, ``sd_mcse``: the extrapolated values at n -> infinity;
        ``bias_mean``, ``bias_mean_mcse``, ``bias_sd``, ``bias_sd_mcse``: the estimated
        residual bias of the run at n_large (its value minus the extrapolated one).
    """
    a = n_small / (n_large - n_small)          # pi_0 = (1 + a) pi_large - a pi_small
    out = {}
    for key in ("mean", "sd"):
        lo, hi = np.array(small[key]), np.array(large[key])
        e_lo, e_hi = np.array(small[key + "_mcse"]), np.array(large[key + "_mcse"])
        out[key] = ((1.0 + a) * hi - a * lo).tolist()
        out[key + "_mcse"] = np.hypot((1.0 + a) * e_hi, a * e_lo).tolist()
        out["bias_" + key] = (a * (lo - hi)).tolist()
        out["bias_" + key + "_mcse"] = (a * np.hypot(e_hi, e_lo)).tolist()
    return out


def error_in_mcse(estimate, reference):
    """max over coefficients of |estimate - reference| / MC error, for means and sds.

    ``reference`` is a dict with ``mean`` and ``sd`` (and optionally their ``_mcse``, added in
    quadrature): the exact posterior's, or a reference run's `moments`.
    """
    worst = 0.0
    for key in ("mean", "sd"):
        err = np.array(estimate[key + "_mcse"]) ** 2
        if key + "_mcse" in reference:
            err = err + np.array(reference[key + "_mcse"]) ** 2
        z = np.abs(np.array(estimate[key]) - np.array(reference[key])) / np.sqrt(err)
        worst = max(worst, float(np.max(z)))
    return worst


def reference_moments(reference):
    """Means and sds of a sweep's reference: the exact posterior (no Monte Carlo error), or
    reference draws (n, d) thinned to about one per effective sample (MCSE sd/sqrt(n) and, for
    the sd, sd/sqrt(2 n), the Gaussian value)."""
    if hasattr(reference, "cov"):
        return {"mean": np.asarray(reference.mean).tolist(),
                "sd": np.sqrt(np.diag(reference.cov)).tolist()}
    draws = np.asarray(reference, dtype=float)
    n = draws.shape[0]
    sd = draws.std(axis=0, ddof=1)
    return {"mean": draws.mean(axis=0).tolist(), "mean_mcse": (sd / np.sqrt(n)).tolist(),
            "sd": sd.tolist(), "sd_mcse": (sd / np.sqrt(2.0 * n)).tolist()}


def step_extrapolation(model, settings, preparation):
    """Richardson-Romberg estimates for an sgld point: paired chains at the point's step h and
    h/2 with the point's chains, draws, warmup and seed (`richardson_romberg`, without the
    per-chain-set moments)."""
    from ..mcmc import sample_pair

    coarse, fine = sample_pair(model, settings, preparation=preparation)
    rr = richardson_romberg(coarse, fine)
    out = {k: rr[k] for k in ("mean", "mean_mcse", "sd", "sd_mcse")}
    return {"kind": "step (Richardson-Romberg)", "from": [settings.step_size,
                                                            settings.step_size / 2], **out,
            "half_step": rr["fine"]}


def bias_columns(row, reference):
    """The sweep row's scalar extrapolation columns, from its ``moments`` and
    ``extrapolation`` (NaN without an extrapolation):

    - ``bias_estimate_sd``: the largest |row's value - extrapolated value| over the means and
      sds of the coefficients, in posterior sds (the row's own sd): the bias the
      extrapolation attributes to this setting;
    - ``bias_estimate_mcse_sd``: the Monte Carlo error of that figure, same units;
    - ``extrapolated_error_mcse``: the largest |extrapolated - reference| in Monte Carlo
      errors (`error_in_mcse`): above about 3, the extrapolation did not remove the bias.
    """
    nan = float("nan")
    ext, mom = row.get("extrapolation"), row.get("moments")
    if not ext or not mom:
        return {"bias_estimate_sd": nan, "bias_estimate_mcse_sd": nan,
                "extrapolated_error_mcse": nan}
    scale = np.array(mom["sd"])
    best, err = -1.0, nan
    for key in ("mean", "sd"):
        diff = np.abs(np.array(mom[key]) - np.array(ext[key])) / scale
        if "bias_" + key in ext:   # the jackknife gives the bias and its error directly
            mc = np.array(ext["bias_" + key + "_mcse"]) / scale
        else:                      # the row's run and the pair's are independent
            mc = np.hypot(mom[key + "_mcse"], ext[key + "_mcse"]) / scale
        j = int(np.argmax(diff))
        if diff[j] > best:
            best, err = float(diff[j]), float(mc[j])
    return {"bias_estimate_sd": best, "bias_estimate_mcse_sd": err,
            "extrapolated_error_mcse": error_in_mcse(ext, reference)}


def add_batch_extrapolations(rows, reference, minibatch_penalised):
    """Give each penalty-method row (method, step, batch n2) the jackknife in 1/n against the
    next smaller batch size n1 of the grid at the same method and step, and its columns
    (`bias_columns`). ``minibatch_penalised(method)`` says which methods take part."""
    groups = {}
    for r in rows:
        if r.get("moments") and r["batch_size"] and minibatch_penalised(r["method"]):
            groups.setdefault((r["method"], r["step_size"]), []).append(r)
    for group in groups.values():
        group.sort(key=lambda r: r["batch_size"])
        for small, large in zip(group, group[1:]):
            jk = batch_jackknife(small["moments"], large["moments"], small["batch_size"],
                                 large["batch_size"])
            large["extrapolation"] = {"kind": "batch size (jackknife in 1/n)",
                                      "from": [small["batch_size"], large["batch_size"]], **jk}
            large.update(bias_columns(large, reference))
