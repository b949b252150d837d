"""The method table: names users type, mapped to the transition loop's codes (private)."""

from dataclasses import dataclass

from . import _acceptance_kernels as acc
from . import _transition as _chain


@dataclass(frozen=True)
class MethodSpec:
    name: str
    proposal: int
    gradient: int
    ratio: int
    rule: int
    acceptance_target: float
    summary: str

    @property
    def minibatch(self):
        """Some of the step works on a minibatch of rows."""
        return self.ratio == _chain.BATCH or self.gradient == _chain.BATCH

    @property
    def adjusted(self):
        return self.rule != acc.NONE

    @property
    def penalised(self):
        """The acceptance test subtracts a noise penalty (penalty-rwm, penalty-mala)."""
        return self.rule in (acc.PENALTY, acc.PENALTY_CD)

    @property
    def langevin(self):
        return self.proposal != _chain.PROPOSAL_RW

    @property
    def targets_posterior(self):
        """Exact, or exact in the limit of Gaussian log-ratio noise (the penalty methods);
        sgld and naive-mh are biased by construction."""
        return self.rule in (acc.EXACT, acc.PENALTY, acc.PENALTY_CD)


_RW, _LANG = _chain.PROPOSAL_RW, _chain.PROPOSAL_LANGEVIN
_F, _B = _chain.FULL, _chain.BATCH

METHODS = {
    spec.name: spec
    for spec in (
        MethodSpec("rwm", _RW, _F, _F, acc.EXACT, 0.234,
                   "random-walk Metropolis on all rows (exact)"),
        MethodSpec("mala", _LANG, _F, _F, acc.EXACT, 0.574,
                   "Metropolis-adjusted Langevin on all rows (exact)"),
        MethodSpec("naive-mh", _RW, _F, _B, acc.PLUGIN, 0.234,
                   "random walk, minibatch log-ratio plugged into MH, no correction (biased)"),
        MethodSpec("penalty-rwm", _RW, _F, _B, acc.PENALTY_CD, 0.234,
                   "random walk, minibatch log-ratio with the penalty correction"),
        MethodSpec("penalty-mala", _LANG, _B, _B, acc.PENALTY_CD, 0.574,
                   "Langevin with minibatch gradients, minibatch log-ratio, penalty correction"),
        MethodSpec("sgld", _LANG, _B, _F, acc.NONE, 0.574,
                   "stochastic-gradient Langevin, no accept step (biased)"),
    )
}

# Deliberately wrong variants for the power checks of the statistical tests; not offered to
# users (sample() accepts them only through the private name).
BROKEN_METHODS = {
    "_mala-without-proposal-term": MethodSpec(
        "_mala-without-proposal-term", _chain.PROPOSAL_LANGEVIN_NO_C, _F, _F, acc.EXACT, 0.574,
        "MALA with the proposal-density term dropped (wrong; for power checks only)"),
    "_penalty-mala-without-proposal-term": MethodSpec(
        "_penalty-mala-without-proposal-term", _chain.PROPOSAL_LANGEVIN_NO_C, _B, _B,
        acc.PENALTY_CD, 0.574,
        "penalty-mala with the proposal-density term dropped (wrong; for power checks only)"),
}

LOG_RATIO_VARIANCE = {"same-batch": _chain.VAR_SAME, "independent-batch": _chain.VAR_INDEPENDENT,
                  "pooled": _chain.VAR_POOLED}
