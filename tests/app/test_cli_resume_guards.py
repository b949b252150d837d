"""Resume through the command line refuses a changed problem or a damaged checkpoint in one
line (exit 2, no traceback) and loses nothing: the interrupted run's outputs and checkpoint are
left byte for byte, and the unchanged config then resumes to the uninterrupted run's draws, bit
for bit (the same code resumed from its saved state)."""

import json
import re
import shutil

import arviz as az
import numpy as np
import pytest

from interrupts import interrupt_after
from tallchain.app import _cli as cli

CONFIG = """\
[data]
x = "d.csv"
y = "y"
columns = {columns}
{data_extra}
[model]
family = "linear"
noise_sd = {noise_sd}
prior_mean = {prior_mean}
prior_sd = {prior_sd}
[sampler]
method = "penalty-mala"
chains = 2
draws = 3000
warmup = 200
seed = 5
"""
BASE = dict(columns='["a", "b"]', data_extra="", noise_sd=1.0, prior_mean=0.0, prior_sd=5.0)
OUTPUTS = ("posterior.nc", "summary.csv", "run.json", "checkpoint.npz")


def _write_csv(path, table):
    np.savetxt(path, table, delimiter=",", header="a,b,c,y", comments="", fmt="%.17g")


def _config(folder, **changes):
    path = folder / "run.toml"
    path.write_text(CONFIG.format(**{**BASE, **changes}))
    return path


def _beta(folder):
    return az.from_netcdf(folder / "posterior.nc")["posterior"]["beta"].values


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """A linear problem on a CSV; its uninterrupted run and the same run interrupted."""
    root = tmp_path_factory.mktemp("resume")
    rng = np.random.default_rng(20_261_203)
    X = rng.standard_normal((400, 3))
    table = np.column_stack([X, 0.5 + X @ [1.0, -0.5, 0.25] + rng.standard_normal(400)])
    _write_csv(root / "d.csv", table)
    config = _config(root)
    assert cli.main(["run", str(config), "--out", str(root / "full"), "--quiet"]) == 0
    with pytest.MonkeyPatch.context() as mp:
        interrupt_after(mp, 1000)
        assert cli.main(["run", str(config), "--out", str(root / "cut"), "--quiet"]) == 130
    kept = _beta(root / "cut").shape[1]
    assert 0 < kept < 3000, kept
    return root, table


def _copy_cut(runs, tmp_path):
    """A copy of the interrupted run's folder, and its files' bytes."""
    root, table = runs
    shutil.copytree(root / "cut", tmp_path / "cut")
    _write_csv(tmp_path / "d.csv", table)
    return tmp_path / "cut", {name: (tmp_path / "cut" / name).read_bytes() for name in OUTPUTS}


def _resume(capsys, config, out):
    code = cli.main(["run", str(config), "--out", str(out), "--resume", "--quiet"])
    return code, capsys.readouterr().err


def _assert_refused(code, err, pattern):
    # The copied CSV is a new file to the table cache, which says once that it encoded it.
    lines = [line for line in err.strip().splitlines()
             if not line.startswith("tallchain: warning: wrote the encoded table")]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err
    assert re.search(pattern, lines[0]), lines[0]


def _assert_untouched(out, before):
    for name, data in before.items():
        assert (out / name).read_bytes() == data, name


def _one_value_changed(folder, table):
    changed = table.copy()
    changed[123, 0] += 1e-9
    _write_csv(folder / "d.csv", changed)
    return {}


def _standardized(folder, table):
    return {"data_extra": "standardize = true"}


# One change at a time, and what the refusal names (from the fingerprint: models/_fingerprint.py,
# and the data identity the CLI adds: app/_service._data_identity).
CHANGES = {
    "prior mean": (lambda folder, table: {"prior_mean": 0.5}, "prior mean"),
    "prior sd": (lambda folder, table: {"prior_sd": 0.5}, "prior covariance"),
    "noise sd": (lambda folder, table: {"noise_sd": 2.0}, "noise sd"),
    "standardisation": (_standardized, "data values (X), standardization"),
    "column selection": (lambda folder, table: {"columns": '["a", "c"]'},
                         "coefficient names, data values (X), data.columns"),
    "one data value": (_one_value_changed, "data values (X)"),
}


@pytest.mark.parametrize("change", list(CHANGES))
def test_a_resume_with_a_changed_problem_is_refused_naming_the_change(runs, tmp_path, capsys,
                                                                     change):
    out, before = _copy_cut(runs, tmp_path)
    edit, named = CHANGES[change]
    config = _config(tmp_path, **edit(tmp_path, runs[1]))
    code, err = _resume(capsys, config, out)
    _assert_refused(code, err, r"^tallchain: error: resume: the checkpoint was made with other "
                               r"settings or data \(changed: " + re.escape(named) + r"\); resume with the "
                               r"settings, model and data of the interrupted run")
    _assert_untouched(out, before)


def test_the_unchanged_config_resumes_bit_for_bit(runs, tmp_path, capsys):
    out, _ = _copy_cut(runs, tmp_path)
    code, err = _resume(capsys, _config(tmp_path), out)
    assert code == 0, err
    assert np.array_equal(_beta(out), _beta(runs[0] / "full"))
    assert json.loads((out / "run.json").read_text())["status"] == "complete"


def _truncated(path):
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return r"damaged \(not a complete \.npz archive: truncated or overwritten\)"


def _no_meta(path):
    with np.load(path) as z:
        arrays = {k: z[k] for k in z.files if k != "meta"}
    np.savez(path, **arrays)
    return r"damaged \(the entry 'meta' is missing\)"


def _meta_not_json(path):
    with np.load(path) as z:
        arrays = dict(z)
    arrays["meta"] = np.array("{not json")
    np.savez(path, **arrays)
    return r"damaged \(unreadable: JSONDecodeError"


def _draws_cut_short(path):
    with np.load(path) as z:
        arrays = dict(z)
    arrays["beta"] = arrays["beta"][:, :2]
    np.savez(path, **arrays)
    return r"damaged \(its arrays do not have the shapes of this run\)"


@pytest.mark.parametrize("damage", [_truncated, _no_meta, _meta_not_json, _draws_cut_short])
def test_a_damaged_checkpoint_is_one_line_and_nothing_is_touched(runs, tmp_path, capsys, damage):
    out, before = _copy_cut(runs, tmp_path)
    ckpt = out / "checkpoint.npz"
    pattern = damage(ckpt)
    before["checkpoint.npz"] = ckpt.read_bytes()
    code, err = _resume(capsys, _config(tmp_path), out)
    _assert_refused(code, err, rf"^tallchain: error: resume: the checkpoint {re.escape(str(ckpt))}"
                               rf" is {pattern}.*; start afresh without resuming \(on the "
                               r"command line: --overwrite instead of --resume\)")
    _assert_untouched(out, before)


def test_a_damaged_checkpoint_gives_way_to_overwrite_as_the_message_says(runs, tmp_path,
                                                                          capsys):
    out, _ = _copy_cut(runs, tmp_path)
    _truncated(out / "checkpoint.npz")
    code = cli.main(["run", str(_config(tmp_path)), "--out", str(out), "--overwrite", "--quiet"])
    assert code == 0, capsys.readouterr().err
    assert np.array_equal(_beta(out), _beta(runs[0] / "full"))


def test_power_an_intact_copy_of_the_checkpoint_is_not_called_damaged(runs, tmp_path, capsys):
    # The same file written back by numpy unchanged passes: the refusals above come from the
    # damage, not from rewriting the archive.
    out, _ = _copy_cut(runs, tmp_path)
    with np.load(out / "checkpoint.npz") as z:
        arrays = dict(z)
    np.savez(out / "checkpoint.npz", **arrays)
    code, err = _resume(capsys, _config(tmp_path), out)
    assert code == 0, err
    assert np.array_equal(_beta(out), _beta(runs[0] / "full"))
