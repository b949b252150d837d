"""The command registry and what every command shares: config options, exit codes, warnings.

Each command is one function registered with `command`; it receives the parsed arguments and
returns the exit code. Exit codes: 0 done, 1 a check failed, 2 bad input or usage (one line
``tallchain: error: ...`` on stderr, never a traceback). Warnings of a run are printed as one
line each, ``tallchain: warning: ...``.

To add a command (in a module that `tallchain.app._cli.make_parser` imports)::

    def _add_validate_arguments(parser):
        add_config_arguments(parser)

    @command("validate", "compare with the exact posterior", _add_validate_arguments)
    def _validate(args):
        config = config_from_args(args)
        ...
        return 0
"""

import argparse
import sys
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from ._config import load_config

PROG = "tallchain"
EXIT_OK, EXIT_CHECK_FAILED, EXIT_BAD_INPUT, EXIT_INCONCLUSIVE = 0, 1, 2, 3


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


class Parser(argparse.ArgumentParser):
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


# Command-line options that override config keys: flag, key, type, metavar, help. The
# metavars are those of the README's synopsis (a test holds the two together).
OVERRIDES = (
    ("--out", "output.dir", str, "DIR", "output folder (default: [output] dir of the config)"),
    ("--seed", "sampler.seed", int, "N", "random seed"),
    ("--draws", "sampler.draws", int, "N", "draws per chain after warmup"),
    ("--chains", "sampler.chains", int, "N", "number of chains"),
    ("--warmup", "sampler.warmup", int, "N", "warmup iterations per chain"),
    ("--method", "sampler.method", str, "M", "sampling method, e.g. penalty-mala"),
    ("--step-size", "sampler.step_size", _number_or_auto(float), "H", 'step size or "auto"'),
    ("--batch-size", "sampler.batch_size", _number_or_auto(int), "N",
     'rows per minibatch or "auto"'),
)


# Overrides only some commands take (``add_config_arguments(parser, extra=...)``).
REPORT_OVERRIDES = (
    ("--interval", "output.interval", float, "P",
     "probability of the central intervals in the summary and plots (default 0.9)"),
)


def add_config_arguments(parser, *, exclude=(), extra=()):
    """Add the CONFIG argument and the override options (minus the flags in ``exclude``,
    plus the entries of ``extra``, such as `REPORT_OVERRIDES`)."""
    parser.add_argument("config", metavar="CONFIG", help="TOML run configuration")
    for flag, key, kind, metavar, text in OVERRIDES + tuple(extra):
        if flag not in exclude:
            parser.add_argument(flag, dest=dest(flag), type=kind, default=None,
                                metavar=metavar, help=f"{text} (overrides {key})")


def dest(flag):
    """The attribute of the parsed arguments that holds an override option."""
    return "override_" + flag.lstrip("-").replace("-", "_")


def config_from_args(args):
    """Load ``args.config`` with the override options that were given."""
    overrides = {key: getattr(args, dest(flag))
                 for flag, key, *_ in OVERRIDES + REPORT_OVERRIDES
                 if getattr(args, dest(flag), None) is not None}
    if "output.dir" in overrides:
        overrides["output.dir"] = str(Path(overrides["output.dir"]).absolute())
    return load_config(args.config, overrides)


def option_or(option, fallback):
    """A command-line option when it was given (even 0, which is then refused), else the fallback."""
    return fallback if option is None else option


def one_line(text):
    return " ".join(str(text).split())


def warning_line(message, file=None):
    """Print ``tallchain: warning: <message>`` on stderr (one line)."""
    print(f"{PROG}: warning: {one_line(message)}", file=sys.stderr if file is None else file)


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


