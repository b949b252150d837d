"""Figures: the sweep's bias-against-cost picture and a run's trace, rank and noise plots."""

from pathlib import Path

import numpy as np


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_sweep(result, path):
    """Panels against step size (log scale), one line per method and batch size:
    KS distance over its noise floor (the unbiased region shaded) and ESS per second, the
    recommended setting starred; and, when the sweep extrapolated, a third panel with the
    bias that the extrapolation attributes to each setting (`_plot_extrapolation`)."""
    plt = _pyplot()
    extrapolated = any(np.isfinite(r.get("bias_estimate_sd", np.nan)) for r in result.rows)
    n_panels = 3 if extrapolated else 2
    fig, axes = plt.subplots(1, n_panels, figsize=(5.5 * n_panels, 4.4),
                             constrained_layout=True)
    ax_bias, ax_cost = axes[0], axes[1]
    groups = {}
    for r in result.rows:
        key = r["method"] if r["batch_size"] is None else f"{r['method']} (n={r['batch_size']})"
        groups.setdefault(key, []).append(r)
    for key, rows in groups.items():
        rows = sorted(rows, key=lambda r: r["step_size"])
        h = [r["step_size"] for r in rows]
        line, = ax_bias.plot(h, [r["ks_ratio_max"] for r in rows], marker="o", label=key)
        ax_cost.plot(h, [r["ess_per_second"] for r in rows], marker="o", color=line.get_color(),
                     label=key)
        weak = [r for r in rows if r["verdict"].startswith("inconclusive")]
        for ax, col in ((ax_bias, "ks_ratio_max"), (ax_cost, "ess_per_second")):
            ax.plot([r["step_size"] for r in weak], [r[col] for r in weak], marker="o", ls="none",
                    mfc="white", mec=line.get_color(), zorder=4)
    tol = result.tolerance
    ax_bias.axhspan(0, tol, color="tab:green", alpha=0.12,
                    label=f"within noise (<= {tol:.2f}: false-alarm rate {result.level:g} "
                          f"for the table)")
    ax_bias.axhline(tol, color="tab:green", lw=1, ls="--")
    best = result.recommended
    if best is not None:
        for ax, key in ((ax_bias, "ks_ratio_max"), (ax_cost, "ess_per_second")):
            ax.plot([best["step_size"]], [best[key]], marker="*", ms=16, color="gold",
                    markeredgecolor="black", ls="none", label="recommended", zorder=5)
    for ax in (ax_bias, ax_cost):
        ax.set_xscale("log")
        ax.set_xlabel("step size h (proposal variance h M^-1)")
        ax.grid(True, which="both", alpha=0.3)
    ax_bias.set_yscale("log")
    ax_bias.set_ylabel("max KS distance / noise floor 1.358/sqrt(ECDF ESS)")
    ax_bias.set_title(f"bias against {result.reference}")
    ax_cost.set_yscale("log")
    ax_cost.set_ylabel("ESS per second (min over coefficients)")
    ax_cost.set_title("cost")
    if any(r["verdict"].startswith("inconclusive") for r in result.rows):
        ax_bias.plot([], [], marker="o", ls="none", mfc="white", mec="gray",
                     label="inconclusive (ECDF ESS < 100)")
    ax_bias.legend(fontsize=8, loc="upper left")
    if extrapolated:
        _plot_extrapolation(axes[2], groups, ax_bias)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


def _plot_extrapolation(ax, groups, ax_bias):
    """The estimated bias of each setting (its means and sds against their extrapolated limit,
    the largest over coefficients, in posterior sds) with +-2 Monte Carlo errors; hollow
    markers where the extrapolated values themselves miss the reference by more than 3 Monte
    Carlo errors (the extrapolation did not remove the bias there)."""
    colors = {line.get_label(): line.get_color() for line in ax_bias.get_lines()}
    for key, rows in groups.items():
        rows = [r for r in sorted(rows, key=lambda r: r["step_size"])
                if np.isfinite(r.get("bias_estimate_sd", np.nan))]
        if not rows:
            continue
        h = np.array([r["step_size"] for r in rows])
        b = np.array([r["bias_estimate_sd"] for r in rows])
        e = np.array([r["bias_estimate_mcse_sd"] for r in rows])
        kind = rows[0]["extrapolation"]["kind"].split(" (")[0]
        color = colors.get(key)
        ax.errorbar(h, b, yerr=2 * e, marker="o", capsize=3, color=color,
                    label=f"{key}: h -> 0" if kind == "step" else f"{key}: n -> inf")
        off = [r["extrapolated_error_mcse"] > 3 for r in rows]
        ax.plot(h[off], b[off], marker="o", ls="none", mfc="white", mec=color, ms=9)
    ax.axhline(0, color="gray", lw=0.8)
    ax.set_xscale("log")
    ax.set_xlabel("step size h (proposal variance h M^-1)")
    ax.set_ylabel("estimated bias (posterior sds), +-2 MC errors")
    ax.set_title("bias by extrapolation (sgld: 2 pi_h/2 - pi_h; penalty: jackknife in 1/n)",
                 fontsize=9)
    ax.grid(True, which="both", alpha=0.3)
    ax.plot([], [], marker="o", ls="none", mfc="white", mec="gray",
            label="extrapolated value > 3 MC errors from the reference")
    ax.legend(fontsize=7, loc="upper left")


def plot_run(result, directory):
    """Write trace.png (ArviZ, matplotlib backend), rank.png (`rank_plot`) and
    log_ratio_sd.png.

    Returns the list of files written.
    """
    import arviz as az

    plt = _pyplot()
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    tree = result.to_arviz()
    files = []
    # compact=False: one row per coefficient, labelled, chains coloured.
    pc = az.plot_trace_dist(tree, var_names=["beta"], compact=False, backend="matplotlib")
    pc.savefig(out / "trace.png")
    files.append(out / "trace.png")
    rank_plot(tree).savefig(out / "rank.png", dpi=110)
    files.append(out / "rank.png")
    plt.close("all")

    fig, ax = plt.subplots(figsize=(8, 3.2), constrained_layout=True)
    sd = result.stats["log_ratio_sd"]
    warm = result.warmup_stats.get("log_ratio_sd")
    n_warm = 0 if warm is None else warm.shape[1]
    positive = False
    for c in range(sd.shape[0]):
        series = sd[c] if warm is None else np.concatenate([warm[c], sd[c]])
        positive |= bool(np.any(series > 0))
        ax.plot(np.arange(series.size), np.where(series > 0, series, np.nan), lw=0.6,
                label=f"chain {c}")
    if n_warm:
        ax.axvline(n_warm, color="black", ls="--", lw=1, label="end of warmup")
    if positive:
        ax.set_yscale("log")
    else:
        ax.text(0.5, 0.5, "no log-ratio noise (exact method, or exact control variates)",
                transform=ax.transAxes, ha="center")
    ax.set_xlabel("iteration")
    ax.set_ylabel("estimated sd of the log-ratio")
    ax.set_title(f"{result.method}: log-ratio noise (the penalty method assumes it is Gaussian)")
    ax.legend(fontsize=7, ncol=4)
    fig.savefig(out / "log_ratio_sd.png", dpi=110)
    plt.close(fig)
    files.append(out / "log_ratio_sd.png")
    return files


def rank_plot(tree, columns=4, level=0.05):
    """Rank histograms of each coefficient's chains with bands that hold for autocorrelated
    draws (`tallchain._ranks`): the chains are thinned to about one draw per effective draw,
    then ranked together; the shaded band is where a chain's count in a bin falls, when all
    chains sample the same distribution, with probability 1 - ``level`` for the whole figure
    (hypergeometric counts, Bonferroni over coefficients x chains x bins). Counts out of band
    are marked with a red cross, the panel's title turns red and a note says which chains.

    ArviZ's rank plot draws bands for independent draws: on exact full-data MALA runs with
    R-hat 1.000 and ESS > 2,400 it marked ranks out of band, and on simulated AR(1) chains
    (rho = 0.9) ranking every draw gives false alarms in 99% of runs against 2% thinned
    (tests/test_rank_check.py).

    Parameters
    ----------
    tree : DataTree
        A run's `to_arviz`, with ``beta`` over (chain, draw, coef).
    columns : int, default=4
        Panels per row (one panel of 3 x 2.4 inches per coefficient).
    level : float, default=0.05

    Returns
    -------
    matplotlib.figure.Figure
    """
    from ._ranks import rank_checks

    plt = _pyplot()
    beta = tree["posterior"]["beta"]
    draws = np.asarray(beta.transpose("chain", "draw", "coef").values, dtype=float)
    names = [str(v) for v in beta["coef"].values]
    checks = rank_checks(draws, level=level)
    n_coef = len(checks)
    cols = min(n_coef, columns)
    rows = -(-n_coef // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(3.0 * cols, 2.4 * rows), squeeze=False,
                             layout="constrained")
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for j, chk in enumerate(checks):
        ax = axes[j // cols][j % cols]
        n_chains, n_bins = chk.counts.shape
        edges = np.arange(n_bins + 1)
        ax.fill_between(edges, np.append(chk.lower[0], chk.lower[0][-1]),
                        np.append(chk.upper[0], chk.upper[0][-1]), step="post", color="gray",
                        alpha=0.25, lw=0)
        for c in range(n_chains):
            ax.stairs(chk.counts[c], edges, baseline=None, color=colors[c % len(colors)],
                      lw=1.1)
            bad = chk.out_of_band[c]
            ax.plot(edges[:-1][bad] + 0.5, chk.counts[c][bad], "x", color="red", ms=7, mew=2)
        flagged = [str(c) for c in range(n_chains) if chk.out_of_band[c].any()]
        note = (f"out of band: chain {', '.join(flagged)}" if flagged
                else f"in band (thinned by {chk.thin})")
        ax.set_title(names[j], fontsize=9, color="red" if flagged else "black")
        ax.text(0.02, 0.03, note, transform=ax.transAxes, fontsize=7,
                color="red" if flagged else "dimgray",
                bbox={"fc": "white", "ec": "none", "alpha": 0.7, "pad": 1})
        ax.set_xticks([0.5, n_bins - 0.5], ["low ranks", "high"])
        ax.tick_params(labelsize=8)
        if j % cols == 0:
            ax.set_ylabel("draws per rank bin", fontsize=8)
    for k in range(n_coef, rows * cols):
        axes[k // cols][k % cols].axis("off")
    fig.suptitle(f"rank histograms per chain, thinned to the ESS; band: {100 * (1 - level):g}% "
                 "for the figure", fontsize=9)
    return fig


def plot_calibration(result, path):
    """ECDF-difference plot of the ranks with simultaneous 1 - level bands, one panel each."""
    plt = _pyplot()
    d = result.ranks.shape[1]
    cols = min(d, 4)
    rows = (d + cols - 1) // cols
    fig, axes = plt.subplots(rows, cols, figsize=(3.2 * cols, 2.6 * rows), squeeze=False,
                             constrained_layout=True)
    R = result.ranks.shape[0]
    z, lo, hi = result.ecdf_bands(100)
    for j in range(d):
        ax = axes[j // cols][j % cols]
        u = (result.ranks[:, j] + 0.5) / (result.n_draws + 1)
        ecdf = np.searchsorted(np.sort(u), z, side="right") / R
        ax.fill_between(z, lo, hi, color="tab:blue", alpha=0.15,
                        label=f"{100 * (1 - result.level):.0f}% simultaneous band")
        ax.plot(z, ecdf - z, color="black", lw=1.2)
        ax.axhline(0, color="gray", lw=0.6)
        ax.set_title(f"{result.coef_names[j]} (p = {result.p_values[j]:.3f})", fontsize=9)
        ax.set_xlabel("fractional rank")
        ax.set_ylabel("ECDF - uniform")
    for k in range(d, rows * cols):
        axes[k // cols][k % cols].axis("off")
    axes[0][0].legend(fontsize=7, loc="lower left")
    fig.suptitle(f"simulation-based calibration: R = {R}, L = {result.n_draws}", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def plot_coefficients(summary, path):
    """The coefficient plot of a report: per coefficient (the intercept left out, its scale
    being another), the posterior median as a point and the central interval as a line,
    with the numbers printed beside them, so coefficients on very different scales stay
    readable; a second panel with the ratios exp(coefficient) on a log axis when the family
    has them (odds ratio, rate ratio), a line marking 1 (no effect).

    Parameters
    ----------
    summary : tallchain.mcmc.Summary
    path : path-like
        The PNG to write.

    Returns
    -------
    pathlib.Path
    """
    plt = _pyplot()
    fig = coefficient_figure(summary)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return Path(path)


def coefficient_figure(summary):
    """The figure `plot_coefficients` writes (a matplotlib Figure, left open)."""
    plt = _pyplot()
    t = summary.table
    lower, upper = summary.interval_columns
    keep = [i for i, name in enumerate(t["coef"]) if name != "intercept"] or [0]
    panels = [("coefficient", "median", lower, upper, 0.0, False)]
    if summary.ratio is not None:
        key = summary.ratio.replace(" ", "_")
        panels.append((summary.ratio, key, f"{key}_{lower}", f"{key}_{upper}", 1.0, True))
    height = 1.2 + 0.42 * len(keep)
    fig, axes = plt.subplots(1, len(panels), figsize=(6.4 * len(panels), height),
                             constrained_layout=True, squeeze=False)
    rows = np.arange(len(keep))[::-1]                   # the first coefficient on top
    for ax, (label, mid, lo, hi, null, log) in zip(axes[0], panels):
        m, a, b = (np.array([t[k][i] for i in keep]) for k in (mid, lo, hi))
        ax.hlines(rows, a, b, color="tab:blue", lw=2.2)
        ax.plot(m, rows, "o", color="tab:blue", ms=6)
        ax.axvline(null, color="gray", ls="--", lw=1)
        from matplotlib import ticker

        if not log:   # at most 6 ticks: five-character labels such as -0.25 do not run together
            ax.xaxis.set_major_locator(ticker.MaxNLocator(6))
        else:
            ax.set_xscale("log")
            # Plain numbers (0.6, 1, 2) rather than powers of ten: ratios are read as such.
            ax.xaxis.set_major_locator(ticker.LogLocator(subs=(1.0, 2.0, 3.0, 5.0)))
            ax.xaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}"))
            ax.xaxis.set_minor_formatter(ticker.NullFormatter())
        for y, mi, ai, bi in zip(rows, m, a, b):
            ax.annotate(f"{mi:.3g} [{ai:.3g}, {bi:.3g}]", (1.0, y),
                        xycoords=("axes fraction", "data"), xytext=(6, 0),
                        textcoords="offset points", va="center", fontsize=8)
        ax.set_yticks(rows, [t["coef"][i] for i in keep])
        ax.set_ylim(-0.7, len(keep) - 0.3)
        ax.set_xlabel(label)
        ax.grid(True, axis="x", alpha=0.3)
        ax.set_title(f"{label}: median and {100 * summary.interval:.6g}% interval", fontsize=10)
    if len(keep) < len(t["coef"]):
        axes[0][0].set_xlabel("coefficient (the intercept is in summary.csv)")
    return fig


def plot_tv_bound(result, path):
    """Write the bound on the total variation distance to the posterior against iteration
    (`EstimateResult.tv_bound`, Biswas, Jacob & Vanetti 2019), with the warmup it implies."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6.4, 4.0), layout="constrained")
    bound = np.asarray(result.tv_bound)
    t = np.arange(bound.size)
    ax.step(t, np.maximum(bound, 1e-4), where="post", color="C0",
            label=f"lag {result.lag}, {int(np.sum(result.meeting_times >= 0))} pairs")
    ax.set_yscale("log")
    ax.axhline(1.0, color="0.6", lw=0.8)
    target = 0.01
    ax.axhline(target, color="C3", lw=0.8, ls="--", label=f"TV = {target:g}")
    warm = result.warmup_for_tv
    if warm is not None:
        ax.axvline(warm, color="C3", lw=0.8, ls=":", label=f"warmup {warm}")
    ax.set_xlabel("iteration t")
    ax.set_ylabel("upper bound on TV distance (floored at 1e-4)")
    ax.set_title(f"{result.method}: coupling bound on the distance to the posterior")
    ax.legend(loc="upper right", fontsize="small")
    fig.savefig(Path(path), dpi=110)
    plt.close(fig)
