"""The printed coefficient table: header states the interval, columns stay aligned."""

import re

from tallchain.app._report import NAME_WIDTH, coefficient_table
from tallchain.mcmc import Summary


def _summary(names, interval=0.9):
    n = len(names)
    table = {"coef": names, "mean": [0.5, -12.25, 3e-5][:n], "sd": [0.01, 1.5, 2e-6][:n],
             "lower_90": [0.48, -14.75, 2.7e-5][:n], "median": [0.5, -12.2, 3e-5][:n],
             "upper_90": [0.52, -9.75, 3.3e-5][:n], "ess_bulk": [1234.4, 87.0, 4000.0][:n],
             "ess_tail": [900.0, 50.0, 3000.0][:n], "r_hat": [1.0, 1.0234, 0.9995][:n],
             "mcse_mean": [0.0, 0.1, 0.0][:n]}
    return Summary(table=table, run={}, warnings=[], interval=interval)


def test_table_states_the_interval_and_prints_it_as_bounds():
    lines = coefficient_table(_summary(["intercept", "wind_speed", "x"]))
    assert re.fullmatch(r"coefficient +mean +sd +90% interval +ESS \(bulk\) +R-hat", lines[0])
    assert re.fullmatch(r"wind_speed +-12\.25 +1\.5 +\[ *-14\.75, +-9\.75\] +87 +1\.023", lines[2])
    # Every number column ends where its header ends (the names are left-aligned).
    for line in lines[1:]:
        assert _ends(line) == _ends(lines[0]), line


def _ends(line):
    """Where the cells after the name end: a bracketed interval and a header of two words
    count as one cell."""
    cells = re.finditer(r"\[[^]]*\]|\d+% interval|ESS \(bulk\)|\S+", line)
    return [m.end() for m in cells][1:]


def test_a_long_name_gets_its_own_line_and_the_columns_stay_put():
    long = "passengers_booked_in_hundreds_on_the_inbound_leg"
    assert len(long) > NAME_WIDTH
    lines = coefficient_table(_summary(["intercept", "wind_speed", long]))
    assert lines[0].startswith("coefficient  ")   # the name column is as wide as before
    assert lines[3] == long
    assert lines[4].startswith(" " * len("coefficient"))
    assert _ends("x" + lines[4][1:]) == _ends(lines[0]) == _ends(lines[1])
