"""rank.png: no text of one panel overlaps another panel's, and none leaves the figure."""

import warnings

import numpy as np
import pytest

import tallchain as tc
from tallchain.plots import plot_run, rank_plot


def _run(n_coef, names=None):
    rng = np.random.default_rng(n_coef)
    X = rng.standard_normal((400, n_coef - 1))
    y = 0.3 + X @ np.linspace(-1.0, 1.0, n_coef - 1) + rng.standard_normal(400)
    model = tc.LinearRegression(X, y, noise_sd=1.0, coef_names=names)
    return tc.sample(model, method="mala", chains=4, draws=200, warmup=200, seed=1)


def _texts(ax):
    """The visible, non-empty texts of one panel: title, notes, axis labels, tick labels."""
    texts = [ax.title, *ax.texts]
    for axis, k in ((ax.xaxis, 0), (ax.yaxis, 1)):
        if axis.get_visible():
            lo, hi = sorted(axis.get_view_interval())
            # matplotlib draws only the ticks inside the view
            texts += [axis.label, *(t for t in axis.get_ticklabels()
                                    if lo <= t.get_position()[k] <= hi)]
    return [t for t in texts if t.get_visible() and t.get_text()]


@pytest.mark.parametrize("n_coef", [2, 6, 11])
def test_rank_plot_texts_do_not_overlap(n_coef):
    names = ["a_rather_long_coefficient_name", *(f"c{j}" for j in range(n_coef - 2))]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")    # few draws: ESS advice
        fig = rank_plot(_run(n_coef, names).to_arviz())
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    panels = [ax for ax in fig.axes if ax.get_visible() and ax.axison]
    assert len(panels) == n_coef
    boxes = [(i, t.get_text(), t.get_window_extent(renderer))
             for i, ax in enumerate(panels) for t in _texts(ax)]
    assert {text for _, text, _ in boxes} >= {"intercept", "a_rather_long_coefficient_name"}
    whole = fig.bbox
    for i, text, box in boxes:
        assert whole.x0 <= box.x0 and box.x1 <= whole.x1 and whole.y0 <= box.y0 \
            and box.y1 <= whole.y1, f"{text!r} leaves the figure"
    for i, text, box in boxes:
        for k, other, obox in boxes:
            if k != i:
                assert not box.overlaps(obox), f"{text!r} overlaps {other!r} of another panel"


def test_plot_run_writes_its_three_figures(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        files = plot_run(_run(3), tmp_path)
    assert [f.name for f in files] == ["trace.png", "rank.png", "log_ratio_sd.png"]
    assert all(f.stat().st_size > 10_000 for f in files)


def _logistic_summary(interval):
    from scipy import special

    rng = np.random.default_rng(5)
    X = rng.standard_normal((1000, 3))
    y = (rng.random(1000) < special.expit(0.2 + X @ [0.8, -0.5, 0.05])).astype(float)
    model = tc.LogisticRegression(X, y, coef_names=["dose", "a_rather_long_coefficient_name",
                                                    "income"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run = tc.sample(model, chains=2, draws=300, warmup=300, seed=1, progress=False)
    return run.summary(warn=False, interval=interval)


def test_coefficient_plot_shows_the_summary_and_its_texts_stay_apart(tmp_path):
    """Each row's point is the summary's median and its line the interval, in both panels
    (coefficients; odds ratios on a log axis), the numbers beside them read the same, and
    no text leaves the figure or overlaps another."""
    from tallchain.plots import coefficient_figure, plot_coefficients

    s = _logistic_summary(0.8)
    t = s.table
    fig = coefficient_figure(s)
    panels = fig.axes
    assert len(panels) == 2 and panels[1].get_xscale() == "log"
    assert "odds ratio: median and 80% interval" == panels[1].get_title()
    for ax, (mid, lo, hi) in zip(panels, [("median", "lower_80", "upper_80"),
                                          ("odds_ratio", "odds_ratio_lower_80",
                                           "odds_ratio_upper_80")]):
        # rows in the summary's order from the top (the intercept is left out)
        rows = [tick.get_position()[1] for tick in ax.get_yticklabels()]
        assert [tick.get_text() for tick in ax.get_yticklabels()] == t["coef"][1:]
        assert rows == sorted(rows, reverse=True)
        segments = ax.collections[0].get_segments()
        points = ax.lines[0].get_xdata()
        for j, (seg, point) in enumerate(zip(segments, points), start=1):
            assert (seg[0][0], seg[1][0], point) == (t[lo][j], t[hi][j], t[mid][j])
        notes = sorted(a.get_text() for a in ax.texts)
        assert notes == sorted(f"{t[mid][j]:.3g} [{t[lo][j]:.3g}, {t[hi][j]:.3g}]"
                               for j in (1, 2, 3))
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    boxes = [(t.get_text(), t.get_window_extent(renderer))
             for ax in panels for t in [*_texts(ax), *ax.texts]]
    for text, box in boxes:
        assert fig.bbox.x0 <= box.x0 and box.x1 <= fig.bbox.x1 and fig.bbox.y0 <= box.y0 \
            and box.y1 <= fig.bbox.y1, f"{text!r} leaves the figure"
    for i, (text, box) in enumerate(boxes):
        for other, obox in boxes[i + 1:]:
            assert text == other or not box.overlaps(obox), f"{text!r} overlaps {other!r}"
    path = plot_coefficients(s, tmp_path / "coefficients.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
