"""The command line: ``tallchain run CONFIG``, ``tallchain demo``.

Each command is one function registered with `command`; it receives the parsed arguments and
returns the exit code. Exit codes: 0 done, 1 a check failed, 2 bad input or usage (one line
``tallchain: error: ...`` on stderr, never a traceback). Warnings of a run are printed as one
line each, ``tallchain: warning: ...``.

To add a command::

    def _add_validate_arguments(parser):
        add_config_arguments(parser)

    @command("validate", "compare with the exact posterior", _add_validate_arguments)
    def _validate(args):
        config = config_from_args(args)
        ...
        return 0
"""

import argparse
import dataclasses
import math
import signal
import sys
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from . import __version__
from ._validation import InputError
from .config import load_config
from .executors import WorkerLostError
from .io import load_data
from .mode import ModeNotFoundError
from .models import FAMILIES
from .sampling import SamplingInterrupted

PROG = "tallchain"
EXIT_OK, EXIT_CHECK_FAILED, EXIT_BAD_INPUT = 0, 1, 2


class UsageError(Exception):
    """A command line that argparse rejected."""


@dataclass(frozen=True)
class Command:
    name: str
    help: str
    add_arguments: Callable
    run: Callable


COMMANDS = {}


def command(name, help, add_arguments=None):
    """Register ``run(args) -> int`` as the subcommand ``name``.

    Parameters
    ----------
    name : str
    help : str
        One line for ``tallchain --help``.
    add_arguments : callable, optional
        ``add_arguments(parser)`` declares the command's arguments.
    """
    def register(run):
        COMMANDS[name] = Command(name, help, add_arguments or (lambda parser: None), run)
        return run

    return register


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise UsageError(f"{message} (see '{self.prog} --help')")


def _number_or_auto(kind):
    def convert(text):
        if text == "auto":
            return text
        try:
            return kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f'must be {"an integer" if kind is int else "a number"} or "auto", got {text!r}'
            ) from None

    convert.__name__ = kind.__name__
    return convert


# Command-line options that override config keys: flag, key, type, help.
OVERRIDES = (
    ("--out", "output.dir", str, "output folder (default: [output] dir of the config)"),
    ("--seed", "sampler.seed", int, "random seed"),
    ("--draws", "sampler.draws", int, "draws per chain after warmup"),
    ("--chains", "sampler.chains", int, "number of chains"),
    ("--warmup", "sampler.warmup", int, "warmup iterations per chain"),
    ("--method", "sampler.method", str, "sampling method, e.g. penalty-mala"),
    ("--step-size", "sampler.step_size", _number_or_auto(float), 'step size or "auto"'),
    ("--batch-size", "sampler.batch_size", _number_or_auto(int), 'rows per minibatch or "auto"'),
)


def add_config_arguments(parser, *, exclude=()):
    """Add the CONFIG argument and the override options (minus the flags in ``exclude``)."""
    parser.add_argument("config", metavar="CONFIG", help="TOML run configuration")
    for flag, key, kind, text in OVERRIDES:
        if flag not in exclude:
            parser.add_argument(flag, dest=_dest(flag), type=kind, default=None,
                                metavar="N" if kind is int else "X",
                                help=f"{text} (overrides {key})")


def _dest(flag):
    return "override_" + flag.lstrip("-").replace("-", "_")


def config_from_args(args):
    """Load ``args.config`` with the override options that were given."""
    overrides = {key: getattr(args, _dest(flag)) for flag, key, _, _ in OVERRIDES
                 if getattr(args, _dest(flag), None) is not None}
    if "output.dir" in overrides:
        overrides["output.dir"] = str(Path(overrides["output.dir"]).absolute())
    return load_config(args.config, overrides)


def build_model(config):
    """Load the data of a `RunConfig` and build its model.

    Returns
    -------
    model : LinearRegression, LogisticRegression or PoissonRegression
    dataset : tallchain.io.Dataset
    """
    d, m = config.data, config.model
    with config.named_fields():
        dataset = load_data(d.x, d.y, offset=d.offset, columns=d.columns,
                            add_intercept=d.add_intercept, standardize=d.standardize)
        kw = {"prior": m.prior(), "add_intercept": d.add_intercept,
              "coef_names": dataset.feature_names}
        if m.family == "linear" and m.noise_sd is not None:
            kw["noise_sd"] = m.noise_sd
        if m.family == "poisson":
            kw["offset"] = dataset.offset
        model = FAMILIES[m.family](dataset.X, dataset.y, **kw)
    return model, dataset


def run_config(config, *, progress=False, resume=False, scheduler=None, workers=None):
    """Build the model, sample, map back to the original scale and write the output files.

    ``scheduler`` and ``workers`` (where the chains run) override the config's ``[compute]``
    section; without either, the chains run in threads of this process.

    Returns
    -------
    result : SampleResult
        With ``setup_seconds`` including the data loading.
    summary : tallchain.diagnostics.Summary
    dataset : tallchain.io.Dataset
    """
    from .outputs import save_result
    from .sampling import sample

    t0 = time.perf_counter()
    model, dataset = build_model(config)
    load_seconds = time.perf_counter() - t0
    checkpoint = Path(config.output_dir) / CHECKPOINT_NAME
    try:
        with config.named_fields():
            result = sample(model, **config.sampler, progress=progress, checkpoint=checkpoint,
                            resume=resume,
                            scheduler=option_or(scheduler, config.compute.get("scheduler", "threads")),
                            workers=option_or(workers, config.compute.get("workers")))
    except SamplingInterrupted as stop:
        partial = _to_original_scale(stop.result, dataset, load_seconds)
        save_result(partial, config.output_dir)
        raise KeyboardInterrupt(
            f"{partial.completed_draws} draws per chain kept in "
            f"{Path(config.output_dir) / 'posterior.nc'}; continue with: tallchain run "
            f"{config.path or 'CONFIG'} --resume (with the same options)") from None
    result = _to_original_scale(result, dataset, load_seconds)
    scaling = dataset.standardization
    extra = {"config": None if config.path is None else str(config.path.absolute()),
             "family": config.model.family,
             "data": {"x": str(config.data.x), "y": str(config.data.y),
                      "offset": None if config.data.offset is None else str(config.data.offset),
                      "add_intercept": config.data.add_intercept,
                      "standardization": None if scaling is None else scaling.as_dict()}}
    try:
        summary = save_result(result, config.output_dir, wall_seconds=time.perf_counter() - t0,
                              extra=extra)
    except KeyboardInterrupt:
        # The checkpoint holds every draw (the driver writes it at the end): keep it.
        raise KeyboardInterrupt(
            f"while writing the outputs; every draw is kept in {checkpoint}; write them with: "
            f"tallchain run {config.path or 'CONFIG'} --resume (with the same options)") from None
    checkpoint.unlink(missing_ok=True)   # only once the outputs are safely written
    return result, summary, dataset


CHECKPOINT_NAME = "checkpoint.npz"


def option_or(option, fallback):
    """A command-line option when it was given (even 0, which is then refused), else the fallback."""
    return fallback if option is None else option


def _to_original_scale(result, dataset, load_seconds):
    """Add the data loading to the set-up time and map standardised draws back."""
    changes = {"setup_seconds": result.setup_seconds + load_seconds}
    scaling = dataset.standardization
    if scaling is not None:
        changes["draws"] = scaling.to_original(result.draws)
        if result.laplace_mode is not None:
            changes["laplace_mode"] = scaling.to_original(result.laplace_mode)
    return dataclasses.replace(result, **changes)


def print_summary(result, summary, *, file=None, standardized=False):
    """Print the coefficient table and the run's cost figures."""
    out = sys.stdout if file is None else file
    s = result.settings
    batch = f", batch size {s['batch_size']}" if s.get("batch_size") else ""
    print(f"{result.method}: {result.n_chains} chains x {result.n_draws} draws after "
          f"{s['warmup']} warmup, N = {result.n_rows:,} rows{batch}", file=out)
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


def _one_line(text):
    return " ".join(str(text).split())


def warning_line(message, file=None):
    """Print ``tallchain: warning: <message>`` on stderr (one line)."""
    print(f"{PROG}: warning: {_one_line(message)}", file=sys.stderr if file is None else file)


@contextmanager
def warnings_as_lines():
    """Show each UserWarning raised inside as one ``tallchain: warning:`` line on stderr.

    Other warning categories (deprecations in libraries underneath) are not shown.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        warnings.simplefilter("always", UserWarning)
        warnings.showwarning = lambda message, *args, **kwargs: warning_line(message)
        yield


def _print_outputs(directory):
    print(f"wrote posterior.nc, summary.csv, run.json to {directory}")


def _add_run_arguments(parser):
    add_config_arguments(parser)
    parser.add_argument("--quiet", action="store_true", help="print only warnings and errors")
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted run from its checkpoint in the output "
                             "folder (same config and options)")
    parser.add_argument("--plots", action="store_true",
                        help="also write trace.png, rank.png and log_ratio_sd.png")
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
        from .plots import plot_run

        plot_run(result, config.output_dir)
    if not args.quiet:
        print_summary(result, summary, standardized=dataset.standardization is not None)
        _print_outputs(config.output_dir)
        if args.plots:
            print(f"wrote trace.png, rank.png, log_ratio_sd.png to {config.output_dir}")
    return EXIT_OK


@command("demo", "run the built-in invented example end to end, in ./tallchain-demo")
def _demo(args):
    from . import demo

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
    print("\nthe coefficients the invented data were simulated from, beside the posterior:")
    print(f"{'coef':<10}{'true':>9}{'mean':>9}{'5%':>9}{'95%':>9}  inside 90% interval")
    for i, name in enumerate(t["coef"]):
        truth = demo.TRUE_COEFFICIENTS[name]
        inside = "yes" if t["q5"][i] <= truth <= t["q95"][i] else "no"
        print(f"{name:<10}{truth:>9.3f}{t['mean'][i]:>9.3f}{t['q5'][i]:>9.3f}"
              f"{t['q95'][i]:>9.3f}  {inside}")
    print("(a 90% interval misses the true value about one time in ten)")
    _print_outputs(config.output_dir)
    return EXIT_OK


def make_parser():
    """The argument parser with one subcommand per registered command."""
    from . import _check_commands  # noqa: F401  (registers validate, sweep, calibrate)

    parser = _Parser(prog=PROG, description="Posterior sampling for regressions on tall data.")
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for cmd in COMMANDS.values():
        p = sub.add_parser(cmd.name, help=cmd.help, description=cmd.help)
        p.set_defaults(command=cmd.name)
        cmd.add_arguments(p)
    return parser


def main(argv=None):
    """Entry point of the ``tallchain`` command.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        The exit code: 0 done, 1 a check failed, 2 bad input or usage.
    """
    parser = make_parser()
    # SIGTERM, and SIGINT even where the shell started us with it ignored (background jobs),
    # stop a run the way Ctrl-C does.
    previous = None
    if _main_thread():
        previous = (signal.signal(signal.SIGTERM, _terminate),
                    signal.signal(signal.SIGINT, signal.default_int_handler))
    try:
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:  # --help and --version
            return int(exc.code or 0)
        if args.command is None:
            parser.print_help(sys.stderr)
            return EXIT_BAD_INPUT
        return COMMANDS[args.command].run(args)
    except (InputError, ModeNotFoundError, UsageError, WorkerLostError) as exc:
        return _error(exc)
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        return _error(f"{where}{exc.strerror or exc}")
    except KeyboardInterrupt as exc:  # run_config says how far the run got
        detail = f": {_one_line(exc)}" if str(exc) else ""
        print(f"{PROG}: interrupted{detail}", file=sys.stderr)
        return 130
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous[0])
            signal.signal(signal.SIGINT, previous[1])


def _terminate(signum, frame):
    """SIGTERM stops a run the way Ctrl-C does: completed draws are kept, the run resumable."""
    raise KeyboardInterrupt


def _main_thread():
    import threading

    return threading.current_thread() is threading.main_thread()


def _error(message):
    print(f"{PROG}: error: {_one_line(message)}", file=sys.stderr)
    return EXIT_BAD_INPUT


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
