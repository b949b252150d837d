"""What a run prints: the coefficient table and the cost figures."""

import math
import sys


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
    t = summary.table
    cols = [("mean", "mean"), ("sd", "sd"), ("q5", "5%"), ("q95", "95%"),
            ("ess_bulk", "ess_bulk"), ("r_hat", "r_hat")]
    width = max(4, *(len(c) for c in t["coef"]))
    print(f"{'coef':<{width}}" + "".join(f"{h:>11}" for _, h in cols), file=out)
    for i, name in enumerate(t["coef"]):
        cells = []
        for key, _ in cols:
            v = t[key][i]
            cells.append(f"{v:>11.0f}" if key == "ess_bulk" and math.isfinite(v)
                         else f"{v:>11.3f}" if key == "r_hat" else f"{v:>11.4g}")
        print(f"{name:<{width}}" + "".join(cells), file=out)
    r = summary.run
    print(f"acceptance {r['acceptance_rate']:.3f}, log-ratio sd {r['log_ratio_sd_mean']:.3g} "
          f"(mean), {r['data_passes']:.3g} data passes, sampling {r['sampling_seconds']:.2f} s",
          file=out)
    print(f"ESS/s {r['ess_per_second']:.4g} (smallest bulk ESS {r['ess_bulk_min']:.0f}), "
          f"ESS per data pass {r['ess_per_data_pass']:.3g}", file=out)


def print_outputs(directory):
    print(f"wrote posterior.nc, summary.csv, run.json to {directory}")


