"""The README's command-line synopsis and ``--help`` name the same options with the same
metavars, command by command."""

import re
from pathlib import Path

import pytest

from tallchain.app._cli import make_parser

README = Path(__file__).resolve().parents[2] / "README.md"


def _synopsis():
    """{command: {option: metavar or None}} from the README's "Command line" block."""
    text = README.read_text()
    block = text[text.index("## Command line"):]
    block = block[block.index("```\n") + 4:]
    block = block[:block.index("```")]
    entries = re.split(r"^(?=tallchain )", block, flags=re.M)
    out = {}
    for entry in filter(None, entries):
        command = entry.split()[1]
        out[command] = {m[1]: m[2] or None
                        for m in re.finditer(r"\[(--[a-z-]+)(?: ([^\]]+))?\]", entry)}
    return out


def _help_options(command):
    """{option: metavar or None} of the command's argument parser."""
    sub = next(a for a in make_parser()._actions if a.dest == "command")
    parser = sub.choices[command]
    return {action.option_strings[-1]: action.metavar if action.nargs != 0 else None
            for action in parser._actions if action.option_strings
            and action.option_strings[-1] != "--help"}


SYNOPSIS = _synopsis()


def test_the_synopsis_lists_every_command():
    sub = next(a for a in make_parser()._actions if a.dest == "command")
    assert set(SYNOPSIS) == set(sub.choices)


@pytest.mark.parametrize("command", sorted(SYNOPSIS))
def test_help_and_readme_agree(command):
    assert _help_options(command) == SYNOPSIS[command]


def test_help_shows_the_readme_metavars(capsys):
    # The usage line argparse prints, for one command: the metavars are the README's.
    with pytest.raises(SystemExit):
        make_parser().parse_args(["calibrate", "--help"])
    usage = " ".join(capsys.readouterr().out.split("\n\n")[0].split())
    for part in ("[--out DIR]", "[--method M]", "[--step-size H]", "[--batch-size N]",
                 "[--draws N]", "[--thinned-draws L]", "[--prior laplace|model]",
                 "[--level A]", "[--scheduler WHERE]"):
        assert part in usage
