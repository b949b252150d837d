"""The commands ``run`` and ``demo``."""

from pathlib import Path

from ._config import load_config
from .._validation import fail, positive_int
from ..outputs import removed_if_left_empty
from ._registry import (EXIT_OK, OVERRIDES, REPORT_OVERRIDES, add_config_arguments, command,
                        config_from_args, dest, warning_line, warnings_as_lines)
from ._report import print_outputs, print_summary
from ._service import run_config


def _add_run_arguments(parser):
    add_config_arguments(parser, extra=REPORT_OVERRIDES)
    parser.add_argument("--quiet", action="store_true", help="print only warnings and errors")
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted run from its checkpoint in the output "
                             "folder (same config and options)")
    parser.add_argument("--extend", type=int, default=None, metavar="N",
                        help="add N draws per chain to the run in the output folder, continuing "
                             "from its checkpoint (the same draws as a run started with the "
                             "larger count)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the run already in the output folder")
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
    _check_folder_options(args)
    config = config_from_args(args)
    with removed_if_left_empty(config.output_dir), warnings_as_lines():
        result, summary, dataset = run_config(config, progress=not args.quiet,
                                              resume=args.resume, scheduler=args.scheduler,
                                              workers=args.workers, extend=args.extend,
                                              overwrite=args.overwrite,
                                              command=_command_words(args))
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


def _check_folder_options(args):
    """--extend, --resume and --overwrite say what to do with the run in the output folder:
    one at a time (and --extend counts from the recorded draws, not --draws)."""
    if args.extend is not None:
        positive_int("--extend", args.extend)
        if args.override_draws is not None:
            fail("--extend", "adds draws to the recorded run, so --draws does not apply",
                 "give one of --extend N and --draws N")
    chosen = [flag for flag, on in (("--resume", args.resume),
                                    ("--extend", args.extend is not None),
                                    ("--overwrite", args.overwrite)) if on]
    if len(chosen) > 1:
        fail(chosen[1], f"cannot be combined with {chosen[0]}",
             "give one of --resume, --extend N and --overwrite")


def _command_words(args):
    """The words of this run's command line after ``tallchain run`` (without --resume,
    --extend and --overwrite), to repeat in the hint that continues it."""
    words = [args.config]
    for flag, *_ in OVERRIDES + REPORT_OVERRIDES:
        value = getattr(args, dest(flag), None)
        if value is not None:
            words += [flag, str(value)]
    for flag in ("scheduler", "workers"):
        if getattr(args, flag) is not None:
            words += [f"--{flag}", str(getattr(args, flag))]
    return words + [f"--{flag}" for flag in ("plots", "quiet") if getattr(args, flag)]


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
        result, summary, dataset = run_config(config, progress=True, overwrite=True)
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


