"""Checkpoints: a resumable snapshot of a run in one .npz file, replaced atomically (private)."""

import json
import zipfile
import zlib
from pathlib import Path

import numpy as np

from .._validation import fail
from ..outputs import write_npz

CHECKPOINT_VERSION = 5   # 5: drift_ready, the batch rule's outcome
_ARRAYS = ("draws", "stats", "beta", "cur_grad", "cur_loglik", "adapt", "pooled")


class Checkpoint:
    """A resumable snapshot of a run in one .npz file, replaced atomically on every write.

    It stores each chain's state arrays and generator state, the draws and statistics so far,
    the schedule's position and batch size, and the identity a resume must match: the
    settings but ``draws`` and the model's fingerprint (prior, family options, data digests,
    ...). A resume may ask for more draws than the run it continues (``draws``): the sampling
    segment then runs on, and the draws equal those of a run started with the larger count
    (the kernel's state does not depend on the count; chunking changes nothing).
    """

    def __init__(self, path, identity, draws):
        self.path = Path(path)
        self.identity = identity
        self.draws = draws

    def write(self, states, schedule, runner):
        done = max(st.iteration for st in states)
        meta = {
            "version": CHECKPOINT_VERSION,
            "identity": self.identity,
            "draws": self.draws,
            "segment": schedule.segment,
            "n_batch": schedule.n_batch,
            "batch_limited_by": schedule.limited_by,
            "batch_history": [[int(v) for v in h] for h in schedule.history],
            "chains": [{"iteration": st.iteration, "drift_ready": st.drift_ready,
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

    def check(self):
        """Refuse (InputError, one line) a missing or damaged checkpoint, or one made for
        another problem or other settings, naming what changed. Reads only the metadata."""
        meta = self._read(with_arrays=False)[0]
        if meta.get("version") != CHECKPOINT_VERSION or meta.get("identity") != self.identity:
            old = meta.get("identity") if isinstance(meta.get("identity"), dict) else {}
            changed = [k for k in dict.fromkeys([*self.identity, *old])
                       if self.identity.get(k) != old.get(k)]
            if meta.get("version") != CHECKPOINT_VERSION:
                changed = ["checkpoint version"]
            fail("resume", f"the checkpoint was made with other settings or data (changed: "
                 f"{', '.join(changed)})",
                 "resume with the settings, model and data of the interrupted run, or start anew")
        try:
            kept = max(int(c["iteration"]) for c in meta["chains"]) - self.identity["warmup"]
        except (TypeError, KeyError, ValueError):
            self._damaged("the chains' positions are unreadable")
        if kept > self.draws:
            fail("draws", f"is {self.draws}, fewer than the {kept} draws per chain the "
                 "checkpoint holds", "give at least as many draws to resume this run")
        return meta

    def restore(self, states, schedule, runner):
        """Load the snapshot into fresh states, the schedule and the runner's arrays."""
        meta, z = self._read(with_arrays=True)
        chains, n_coef = len(states), states[0].beta.shape[0]
        done = z["draws"].shape[1] if z["draws"].ndim == 3 else -1
        if (z["draws"].shape != (chains, done, n_coef) or done > runner.all_draws.shape[1]
                or z["beta"].shape != (chains, n_coef) or len(meta["chains"]) != chains):
            self._damaged("its arrays do not have the shapes of this run")
        runner.all_draws[:, :done] = z["draws"]
        runner.all_stats[:, :done] = z["stats"]
        for c, st in enumerate(states):
            st.beta[:] = z["beta"][c]
            st.cur_grad[:] = z["cur_grad"][c]
            st.cur_loglik[:] = z["cur_loglik"][c]
            st.adapt[:] = z["adapt"][c]
            st.pooled[:] = z["pooled"][c]
            st.iteration = meta["chains"][c]["iteration"]
            st.drift_ready = meta["chains"][c]["drift_ready"]
            st.rng.bit_generator.state = meta["chains"][c]["rng"]
        # A finished run resumed with more draws re-enters its sampling segment, the last.
        schedule.segment = min(meta["segment"], len(schedule.segments) - 1)
        schedule.n_batch = meta["n_batch"]
        schedule.limited_by = meta["batch_limited_by"]
        schedule.history = [tuple(h) for h in meta["batch_history"]]

    def _read(self, with_arrays):
        """The metadata and (optionally) every array, read whole; a file that cannot be read
        is reported in one line with the way to start afresh."""
        if not self.path.exists():
            fail("resume", f"no checkpoint at {self.path}", "run once without --resume first")
        try:
            # An open file of our own: np.load leaks its handle when the archive is torn.
            with open(self.path, "rb") as fh, np.load(fh, allow_pickle=False) as z:
                missing = [k for k in ("meta", *(_ARRAYS if with_arrays else ()))
                           if k not in z.files]
                meta = json.loads(str(z["meta"])) if not missing else {}
                if not isinstance(meta, dict):
                    raise TypeError("the metadata is not a JSON object")
                missing += [f"meta.{k}" for k in ("identity", "segment", "n_batch", "chains")
                            if not missing and k not in meta]
                arrays = {k: z[k] for k in _ARRAYS} if with_arrays and not missing else None
        except zipfile.BadZipFile:
            self._damaged("not a complete .npz archive: truncated or overwritten")
        except (ValueError, EOFError, OSError, zlib.error, TypeError, KeyError) as exc:
            detail = str(exc).splitlines()[0][:80] if str(exc) else ""
            self._damaged(f"unreadable: {type(exc).__name__}" + (f": {detail}" if detail else ""))
        if missing:
            self._damaged(f"the entry {missing[0]!r} is missing")
        return meta, arrays

    def _damaged(self, what):
        fail("resume", f"the checkpoint {self.path} is damaged ({what})",
             "start afresh without resuming (on the command line: --overwrite instead of "
             "--resume); the outputs already written are kept until then")
