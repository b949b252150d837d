"""The summary as text: the coefficient table that `print(summary)`, `print(result)` and the
command line show."""

import math

#: Names longer than this get a line of their own, the numbers on the next line.
NAME_WIDTH = 24


def coefficient_table(summary):
    """The lines of the coefficient table: name, mean, sd, the central interval as
    ``[lo, hi]`` under a header that states its probability; the ratio exp(coefficient) and
    its interval when the family has one (odds ratio, rate ratio); bulk ESS and R-hat; and,
    when the run had a Laplace approximation, its KS distance from the draws in noise floors
    (``Laplace KS/floor``).

    Columns are as wide as their widest cell. A name longer than `NAME_WIDTH` is printed on
    a line of its own and its numbers on the next, so long names never push the columns out
    of line.
    """
    t = summary.table
    n = len(t["coef"])
    lower, upper = summary.interval_columns
    level = f"{100 * summary.interval:.6g}%"
    columns = [("mean", [f"{v:.4g}" for v in t["mean"]]),
               ("sd", [f"{v:.3g}" for v in t["sd"]]),
               (f"{level} interval", _bounds(t[lower], t[upper]))]
    if summary.ratio is not None:
        key = summary.ratio.replace(" ", "_")
        columns += [(summary.ratio, [_number(v, ".4g") for v in t[key]]),
                    (f"{level} interval", _bounds(t[f"{key}_{lower}"], t[f"{key}_{upper}"]))]
    columns += [("ESS (bulk)", [_number(v, ".0f") for v in t["ess_bulk"]]),
                ("R-hat", [f"{v:.3f}" for v in t["r_hat"]])]
    if "laplace_ks" in t:
        columns.append(("Laplace KS/floor", [_number(ks / floor, ".2f") for ks, floor
                                             in zip(t["laplace_ks"], t["ks_floor"])]))
    header = [h for h, _ in columns]
    rows = [[cells[i] for _, cells in columns] for i in range(n)]
    widths = [max([len(h), *(len(r[k]) for r in rows)]) for k, h in enumerate(header)]
    name_width = max([len("coefficient"),
                      *(len(name) for name in t["coef"] if len(name) <= NAME_WIDTH)])

    def line(name, cells):
        return f"{name:<{name_width}}" + "".join(f"  {c:>{w}}" for c, w in zip(cells, widths))

    lines = [line("coefficient", header)]
    for name, cells in zip(t["coef"], rows):
        if len(name) > NAME_WIDTH:
            lines.append(name)
            name = ""
        lines.append(line(name, cells))
    return lines


def run_header(result):
    """One line: method, chains x draws after warmup, rows, batch size (with the bound that
    set an "auto" batch and the penalty's error bound), and the proxy's drift when it ran."""
    n_batch = result.tuned["batch_size"]
    batch = f", batch size {n_batch}" if n_batch else ""
    if n_batch and result.tuned.get("batch_limited_by"):
        batch += f" (set by the {result.tuned['batch_limited_by']})"
    err = result.penalty_error_bound
    if math.isfinite(err):
        batch += f", penalty error bound {err:.2g}"
    if result.tuned.get("gradient_batch") == "proxy":
        batch += ", drift along the control variates' proxy"
    return (f"{result.method}: {result.n_chains} chains x {result.n_draws} draws after "
            f"{result.settings.warmup} warmup, N = {result.n_rows:,} rows{batch}")


def table_notes(summary):
    """What the optional columns mean, one line each (empty when there are none)."""
    notes = []
    if summary.ratio is not None:
        notes.append(f"{summary.ratio}: exp(coefficient), posterior median and interval "
                     "(none for the intercept)")
    if "laplace_ks" in summary.table:
        notes += ["Laplace KS/floor: KS distance of the draws from the normal approximation at "
                  "the mode,",
                  "  over its noise floor 1.358/sqrt(ECDF ESS); at most 1: a plain GLM fit's "
                  "normal approximation gives the same marginal"]
    return notes


def _bounds(lows, highs):
    """``[lo, hi]`` cells with the bounds aligned inside the brackets, so the intervals read
    down the column; ``-`` where the bounds are NaN."""
    lo = [f"{v:.4g}" for v in lows]
    hi = [f"{v:.4g}" for v in highs]
    lo_w, hi_w = (max([0, *(len(v) for v in vals)]) for vals in (lo, hi))
    return ["-" if math.isnan(a) else f"[{x:>{lo_w}}, {y:>{hi_w}}]"
            for a, x, y in zip(lows, lo, hi)]


def _number(value, spec):
    return f"{value:{spec}}" if math.isfinite(value) else ("-" if math.isnan(value) else "inf")
