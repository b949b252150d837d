"""Every config shipped in configs/ runs as the README says (make the example data, then
`tallchain run configs/<name>.toml`) and recovers the coefficients its invented data were
simulated from (examples/make_example_data.py writes them to truth.json).

Reference: the simulation truth. With these sample sizes the posterior is close to normal
around the maximum-likelihood estimate (Bernstein-von Mises; the priors are wide), so
(mean - truth) / sd is close to a standard normal draw per coefficient: the check
|mean - truth| <= 4 sqrt(sd^2 + MCSE^2) has a false-alarm chance of about 6e-5 per coefficient
(scipy.stats.norm), about 1e-3 over the 18 coefficients of the four configs. Power: the Poisson
config without its exposure offset puts the intercept about log(1000) away and fails.
"""

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tallchain.app import _cli as cli

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[2]
CONFIGS = sorted((REPO / "configs").glob("*.toml"))
SHORT = ["--draws", "300", "--warmup", "300", "--quiet"]


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    """A copy of configs/ beside freshly made example data, as in a clone of the repository."""
    root = tmp_path_factory.mktemp("shipped")
    shutil.copytree(REPO / "configs", root / "configs")
    subprocess.run([sys.executable, str(REPO / "examples" / "make_example_data.py"), "--out",
                    str(root / "examples" / "data"), "--rows", "5000"], check=True,
                   capture_output=True)
    return root


def _summary(folder):
    rows = np.genfromtxt(folder / "summary.csv", delimiter=",", names=True, dtype=None,
                         encoding="utf-8")
    return {str(r["coef"]): (float(r["mean"]), float(r["sd"]), float(r["mcse_mean"]))
            for r in np.atleast_1d(rows)}


def _misses(summary, truth):
    return {name: (summary[name][0], value) for name, value in truth.items()
            if abs(summary[name][0] - value) > 4 * np.hypot(summary[name][1], summary[name][2])}


def test_every_family_has_a_shipped_config():
    assert {c.stem for c in CONFIGS} == {"linear", "logistic", "poisson", "binomial"}


@pytest.mark.parametrize("config", CONFIGS, ids=lambda c: c.stem)
def test_a_shipped_config_recovers_its_simulation_truth(workspace, config, capsys):
    out = workspace / "out" / config.stem
    code = cli.main(["run", str(workspace / "configs" / config.name), "--out", str(out), *SHORT])
    err = capsys.readouterr().err
    assert code == 0 and "Traceback" not in err, err
    truth = json.loads((workspace / "examples" / "data" / "truth.json").read_text())[config.stem]
    summary = _summary(out)
    assert set(truth) <= set(summary), (sorted(truth), sorted(summary))
    assert not _misses(summary, truth)


def test_power_the_poisson_config_without_its_offset_misses_the_intercept(workspace, capsys):
    text = (workspace / "configs" / "poisson.toml").read_text()
    assert "\noffset = " in text
    no_offset = workspace / "configs" / "poisson_no_offset.toml"
    no_offset.write_text("\n".join(line for line in text.splitlines()
                                   if not line.startswith("offset = ")) + "\n")
    out = workspace / "out" / "poisson_no_offset"
    assert cli.main(["run", str(no_offset), "--out", str(out), *SHORT]) == 0, \
        capsys.readouterr().err
    truth = json.loads((workspace / "examples" / "data" / "truth.json").read_text())["poisson"]
    assert "intercept" in _misses(_summary(out), truth)
