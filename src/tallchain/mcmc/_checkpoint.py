"""Checkpoints: a resumable snapshot of a run in one .npz file, replaced atomically (private)."""

import json
from pathlib import Path

import numpy as np

from .._validation import fail
from ..outputs import write_npz

CHECKPOINT_VERSION = 3


class Checkpoint:
    """A resumable snapshot of a run in one .npz file, replaced atomically on every write.

    It stores each chain's state arrays and generator state, the draws and statistics so far,
    the schedule's position and batch size, and the settings that must match on resume.
    """

    def __init__(self, path, identity):
        self.path = Path(path)
        self.identity = identity

    def write(self, states, schedule, runner):
        done = max(st.iteration for st in states)
        meta = {
            "version": CHECKPOINT_VERSION,
            "identity": self.identity,
            "segment": schedule.segment,
            "n_batch": schedule.n_batch,
            "chains": [{"iteration": st.iteration, "carried_ready": st.carried_ready,
                        "rng": st.rng.bit_generator.state} for st in states],
        }
        arrays = {
            "draws": runner.all_draws[:, :done], "stats": runner.all_stats[:, :done],
            "beta": np.stack([st.beta for st in states]),
            "cur_grad": np.stack([st.cur_grad for st in states]),
            "cur_loglik": np.stack([st.cur_loglik for st in states]),
            "adapt": np.stack([st.adapt for st in states]),
            "pooled": np.stack([st.pooled for st in states]),
        }
        self.path.parent.mkdir(parents=True, exist_ok=True)
        write_npz(self.path, meta=np.array(json.dumps(meta)), **arrays)

    def restore(self, states, schedule, runner):
        """Load the snapshot into fresh states, the schedule and the runner's arrays."""
        if not self.path.exists():
            fail("resume", f"no checkpoint at {self.path}", "run once without --resume first")
        with np.load(self.path, allow_pickle=False) as z:
            meta = json.loads(str(z["meta"]))
            if meta.get("version") != CHECKPOINT_VERSION or meta["identity"] != self.identity:
                changed = sorted(k for k in set(self.identity) | set(meta["identity"])
                                 if self.identity.get(k) != meta["identity"].get(k))
                if meta.get("version") != CHECKPOINT_VERSION:
                    changed.insert(0, "checkpoint version")
                fail("resume", f"the checkpoint was made with other settings ({', '.join(changed)})",
                     "resume with the settings and data of the interrupted run, or start anew")
            done = z["draws"].shape[1]
            runner.all_draws[:, :done] = z["draws"]
            runner.all_stats[:, :done] = z["stats"]
            for c, st in enumerate(states):
                st.beta[:] = z["beta"][c]
                st.cur_grad[:] = z["cur_grad"][c]
                st.cur_loglik[:] = z["cur_loglik"][c]
                st.adapt[:] = z["adapt"][c]
                st.pooled[:] = z["pooled"][c]
                st.iteration = meta["chains"][c]["iteration"]
                st.carried_ready = meta["chains"][c]["carried_ready"]
                st.rng.bit_generator.state = meta["chains"][c]["rng"]
        schedule.segment = meta["segment"]
        schedule.n_batch = meta["n_batch"]
