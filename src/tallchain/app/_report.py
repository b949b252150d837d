"""What a run prints: the coefficient table and the cost figures."""

import math
import sys

#: Names longer than this get a line of their own, the numbers on the next line.
NAME_WIDTH = 24


def print_summary(result, summary, *, file=None, standardized=False):
    """Print the coefficient table and the run's cost figures."""
    out = sys.stdout if file is None else file
    n_batch = result.tuned["batch_size"]
    batch = f", batch size {n_batch}" if n_batch else ""
    print(f"{result.method}: {result.n_chains} chains x {result.n_draws} draws after "
          f"{result.settings.warmup} warmup, N = {result.n_rows:,} rows{batch}", file=out)
    if standardized:
        print("fitted on standardised columns; coefficients below are on the original scale",
              file=out)
    for line in coefficient_table(summary):
        print(line, file=out)
    r = summary.run
    print(f"acceptance {r['acceptance_rate']:.3f}, log-ratio sd {r['log_ratio_sd_mean']:.3g} "
          f"(mean), {r['data_passes']:.3g} data passes, sampling {r['sampling_seconds']:.2f} s",
          file=out)
    print(f"ESS/s {r['ess_per_second']:.4g} (smallest bulk ESS {r['ess_bulk_min']:.0f}), "
          f"ESS per data pass {r['ess_per_data_pass']:.3g}", file=out)


def coefficient_table(summary):
    """The lines of the coefficient table: name, mean, sd, the central interval as
    ``[lo, hi]`` under a header that states its probability, bulk ESS and R-hat.

    Columns are as wide as their widest cell. A name longer than `NAME_WIDTH` is printed on
    a line of its own and its numbers on the next, so long names never push the columns out
    of line.
    """
    t = summary.table
    lower, upper = summary.interval_columns
    header = ["mean", "sd", f"{100 * summary.interval:.6g}% interval", "ESS (bulk)", "R-hat"]
    n = len(t["coef"])
    # The bounds are aligned inside the brackets, so the intervals read down the column.
    lo, hi = ([f"{t[key][i]:.4g}" for i in range(n)] for key in (lower, upper))
    lo_w, hi_w = (max([0, *(len(v) for v in vals)]) for vals in (lo, hi))
    rows = [[f"{t['mean'][i]:.4g}", f"{t['sd'][i]:.3g}", f"[{lo[i]:>{lo_w}}, {hi[i]:>{hi_w}}]",
             f"{t['ess_bulk'][i]:.0f}" if math.isfinite(t["ess_bulk"][i]) else "nan",
             f"{t['r_hat'][i]:.3f}"] for i in range(n)]
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


def print_outputs(directory):
    print(f"wrote posterior.nc, summary.csv, run.json to {directory}")


