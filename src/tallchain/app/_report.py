"""What a run prints: the coefficient table and the cost figures."""

import sys

from ..mcmc import NAME_WIDTH, coefficient_table, run_header, table_notes  # noqa: F401


def print_summary(result, summary, *, file=None, standardized=False):
    """Print the coefficient table and the run's cost figures."""
    out = sys.stdout if file is None else file
    print(run_header(result), file=out)
    if standardized:
        print("fitted on standardised columns; coefficients below are on the original scale",
              file=out)
    for line in coefficient_table(summary) + table_notes(summary):
        print(line, file=out)
    r = summary.run
    print(f"acceptance {r['acceptance_rate']:.3f}, log-ratio sd {r['log_ratio_sd_mean']:.3g} "
          f"(mean), {r['data_passes']:.3g} data passes, sampling {r['sampling_seconds']:.2f} s",
          file=out)
    t = result.timing
    print(f"to the last draw {t['total_seconds']:.2f} s: loading {t['load_seconds']:.2f} s, "
          f"set-up {t['setup_seconds']:.2f} s (mode {t.get('setup_mode_seconds', 0.0):.2f} s, "
          f"caches {t.get('setup_cache_seconds', 0.0):.2f} s, "
          f"{t.get('setup_mode_passes', 0) + t.get('setup_cache_passes', 0)} data passes), "
          f"sampling {t['sampling_seconds']:.2f} s", file=out)
    if t.get("setup_store") in _STORE_NOTES:
        print(f"{_STORE_NOTES[t['setup_store']]} {t['setup_store_entry']}", file=out)
    print(f"ESS/s {r['ess_per_second']:.4g} sampling, {r['ess_per_total_second']:.4g} end to "
          f"end (smallest bulk ESS {r['ess_bulk_min']:.0f}), "
          f"ESS per data pass {r['ess_per_data_pass']:.3g}", file=out)


# How the set-up line tells where the mode and caches came from (`_service.stored_setup`).
_STORE_NOTES = {"loaded": "mode and caches read from an earlier run's store:",
                "written": "mode and caches stored for later runs of this data and model in"}


def print_outputs(directory):
    print(f"wrote posterior.nc, summary.csv, run.json to {directory}")


