"""Interrupting a run at a chosen round, as if Ctrl-C arrived while the chains were running."""

from tallchain.mcmc import _driver, _runners


def interrupt_on_rounds(monkeypatch, rounds, partial=300):
    """Make the k-th round (k in ``rounds``) run ``partial`` more iterations, stopping at a
    chunk boundary mid-round, and then behave as if Ctrl-C arrived: the driver writes the
    checkpoint and the run ends interrupted. Returns the round counter."""
    original = _runners.Runner.run
    count = {"n": 0}

    def run(self, states, until, n_batch, pool):
        count["n"] += 1
        if count["n"] in rounds:
            original(self, states, min(until, states[0].iteration + partial), n_batch, pool)
            raise _driver.Interrupted()
        return original(self, states, until, n_batch, pool)

    monkeypatch.setattr(_runners.Runner, "run", run)
    return count


def interrupt_after(monkeypatch, iteration, partial=300):
    """Interrupt the first round that starts at or after ``iteration`` (the warmup's many short
    segments make round numbers hard to predict), ``partial`` iterations into it."""
    original = _runners.Runner.run

    def run(self, states, until, n_batch, pool):
        if states[0].iteration >= iteration:
            original(self, states, min(until, states[0].iteration + partial), n_batch, pool)
            raise _driver.Interrupted()
        return original(self, states, until, n_batch, pool)

    monkeypatch.setattr(_runners.Runner, "run", run)
