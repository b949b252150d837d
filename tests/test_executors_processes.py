"""Local worker processes: a worker that dies, and a script without the main guard, give one
clear error (`tallchain.WorkerDiedError`) instead of a bare BrokenProcessPool.

Python starts these workers with forkserver, and every worker imports the main script
(Python documentation, multiprocessing, "Safe importing of main module"): a script whose
calls are not under ``if __name__ == "__main__":`` runs them again in each worker."""

import os
import signal
import subprocess
import sys
import textwrap

import pytest

import tallchain as tc
from tallchain.app import _cli as cli
from tallchain.executors import TaskPool, run_tasks

pytestmark = pytest.mark.slow

LOST = r"workers: a worker process died before returning its task .*`if __name__"


def _die_on_task_one(shared, task):
    if task == 1:
        os.kill(os.getpid(), signal.SIGKILL)
    return shared * task


def test_a_killed_worker_is_a_worker_lost_error():
    assert run_tasks(_die_on_task_one, 3, [0, 2], workers=2) == [0, 6]   # it works otherwise
    with pytest.raises(tc.WorkerDiedError, match=LOST):
        run_tasks(_die_on_task_one, 3, [0, 1, 2], workers=2)


SCRIPT = """\
import operator, sys
import numpy as np
import tallchain as tc
from tallchain.executors import run_tasks

def work():
    rng = np.random.default_rng(0)
    X = rng.standard_normal((2000, 2))
    model = tc.LogisticRegression(X, (rng.random(2000) < 0.5).astype(float))
    r = tc.sample(model, scheduler="processes", workers=2, chains=2, draws=100, warmup=100)
    return run_tasks(operator.mul, 2, [1, 2, 3], workers=2), r.draws.shape

{call}
"""
CALL = """\
try:
    print(work())
except tc.WorkerDiedError as exc:
    print(exc, file=sys.stderr)
    sys.exit(3)
"""


@pytest.mark.parametrize("guarded", [True, False])
def test_a_script_runs_workers_under_the_main_guard_and_is_told_so_without_it(tmp_path,
                                                                                guarded):
    call = 'if __name__ == "__main__":\n' + textwrap.indent(CALL, "    ") if guarded else CALL
    script = tmp_path / "job.py"
    script.write_text(SCRIPT.format(call=call))
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                          timeout=300, cwd=tmp_path)
    if guarded:
        assert done.returncode == 0, done.stderr
        assert done.stdout.strip() == "([2, 4, 6], (2, 100, 3))"
    else:
        assert done.returncode == 3, done.stderr
        lines = done.stderr.strip().splitlines()
        assert "Traceback" not in done.stderr, done.stderr
        assert lines[-1].startswith("workers: a worker process died"), lines
        # each worker that started says in one line why it stopped (at least the one whose
        # death broke the pool)
        assert len(lines) >= 2, lines
        assert all(line.startswith("tallchain: a worker process re-ran the main script")
                   for line in lines[:-1]), lines


def test_the_cli_reports_a_lost_worker_on_one_line(tmp_path, rng, capsys, monkeypatch):
    import numpy as np

    from tallchain import executors

    def lost(self, futures):
        raise executors.WorkerDiedError(executors._WORKER_LOST)
        yield  # a generator, as the real one

    monkeypatch.setattr(TaskPool, "results", lost)
    X = rng.standard_normal((300, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", (rng.random(300) < 0.5).astype(float))
    (tmp_path / "run.toml").write_text(
        '[data]\nx = "X.npy"\ny = "y.npy"\n[model]\nfamily = "logistic"\n'
        '[sampler]\nmethod = "mala"\nchains = 2\ndraws = 50\nwarmup = 50\nseed = 1\n')
    code = cli.main(["run", str(tmp_path / "run.toml"), "--out", str(tmp_path / "out"),
                     "--scheduler", "processes", "--workers", "2", "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("tallchain: error: workers: a worker process died")
