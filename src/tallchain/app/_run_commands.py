"""The commands ``run`` and ``demo``."""

from pathlib import Path

from ._config import load_config
from ._registry import (EXIT_OK, REPORT_OVERRIDES, add_config_arguments, command,
                        config_from_args, warning_line, warnings_as_lines)
from ._report import print_outputs, print_summary
from ._service import run_config


def _add_run_arguments(parser):
    add_config_arguments(parser, extra=REPORT_OVERRIDES)
    parser.add_argument("--quiet", action="store_true", help="print only warnings and errors")
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted run from its checkpoint in the output "
                             "folder (same config and options)")
    parser.add_argument("--plots", action="store_true",
                        help="also write trace.png, rank.png, log_ratio_sd.png and "
                             "coefficients.png")
    parser.add_argument("--scheduler", default=None, metavar="WHERE",
                        help='where the chains run: "threads" of this process (default), '
                             '"processes", "dask-local", or a Dask scheduler address such as '
                             "tcp://host:8786 (overrides compute.scheduler)")
    parser.add_argument("--workers", type=int, default=None, metavar="N",
                        help="worker processes for processes or dask-local (overrides "
                             "compute.workers)")


@command("run", "sample the posterior of a configured model", _add_run_arguments)
def _run(args):
    config = config_from_args(args)
    with warnings_as_lines():
        result, summary, dataset = run_config(config, progress=not args.quiet,
                                              resume=args.resume, scheduler=args.scheduler,
                                              workers=args.workers)
    for msg in summary.warnings:
        warning_line(msg)
    if args.plots:
        from ..plots import plot_coefficients, plot_run

        plot_run(result, config.output_dir)
        plot_coefficients(summary, Path(config.output_dir) / "coefficients.png")
    if not args.quiet:
        print_summary(result, summary, standardized=dataset.standardization is not None)
        print_outputs(config.output_dir)
        if args.plots:
            print(f"wrote trace.png, rank.png, log_ratio_sd.png, coefficients.png to "
                  f"{config.output_dir}")
    return EXIT_OK


@command("demo", "run the built-in invented example end to end, in ./tallchain-demo")
def _demo(args):
    from . import _demo as demo

    folder = Path.cwd() / demo.FOLDER
    print(f"tallchain demo: writing into {folder}")
    config_path = demo.write_demo(folder, n_rows=demo.N_ROWS)
    print(demo.DESCRIPTION.format(n=demo.N_ROWS))
    for name, meaning, _ in demo.FEATURES:
        print(f"  {name}: {meaning}")
    config = load_config(config_path)
    with warnings_as_lines():
        result, summary, dataset = run_config(config, progress=True)
    for msg in summary.warnings:
        warning_line(msg)
    print_summary(result, summary, standardized=dataset.standardization is not None)
    t = summary.table
    lower, upper = summary.interval_columns
    level = f"{100 * summary.interval:.6g}%"
    width = max(len("coefficient"), *(len(name) for name in t["coef"]))
    print("\nthe coefficients the invented data were simulated from, beside the posterior:")
    print(f"{'coefficient':<{width}}{'true':>9}{'mean':>9}  {level + ' interval':<20}inside")
    for i, name in enumerate(t["coef"]):
        truth = demo.TRUE_COEFFICIENTS[name]
        inside = "yes" if t[lower][i] <= truth <= t[upper][i] else "no"
        bounds = f"[{t[lower][i]:.3f}, {t[upper][i]:.3f}]"
        print(f"{name:<{width}}{truth:>9.3f}{t['mean'][i]:>9.3f}  {bounds:<20}{inside}")
    miss = round(1 / (1 - summary.interval))
    print(f"(a {level} interval misses the true value about one time in {miss})")
    print_outputs(config.output_dir)
    return EXIT_OK


