"""The ``tallchain`` command line: the parser of every registered command, and `main`."""

import signal
import sys
from importlib.metadata import PackageNotFoundError, version

from ..exceptions import InputError, ModeNotFoundError, WorkerDiedError
from . import _check_commands, _estimate_command, _predict_command, _run_commands  # noqa: F401  (they register the commands)
from ._registry import COMMANDS, EXIT_BAD_INPUT, PROG, UsageError, Parser, one_line


def make_parser():
    """The argument parser with one subcommand per registered command."""
    parser = Parser(prog=PROG, description="Posterior sampling for regressions on tall data.")
    parser.add_argument("--version", action="version", version=f"{PROG} {_version()}")
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
    except (InputError, ModeNotFoundError, UsageError, WorkerDiedError) as exc:
        return _error(exc)
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        return _error(f"{where}{exc.strerror or exc}")
    except KeyboardInterrupt as exc:  # run_config says how far the run got
        detail = f": {one_line(exc)}" if str(exc) else ""
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
    print(f"{PROG}: error: {one_line(message)}", file=sys.stderr)
    return EXIT_BAD_INPUT


def _version():
    try:
        return version("tallchain")
    except PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "0.0.0"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
