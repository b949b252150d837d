"""Rank histograms of chains with bands that hold for autocorrelated draws (the check behind
rank.png).

Rank plots (Vehtari, Gelman, Simpson, Carpenter & Buerkner, Bayesian Analysis 2021, section
4.2) pool the draws of all chains, rank them, and show each chain's histogram of ranks: if the
chains sample the same distribution, every chain holds its share of every rank bin. Bands
drawn for independent draws are too narrow for a Markov chain (its bin counts vary more, by
the integrated autocorrelation time), so well-mixed exact runs fall out of them. Here each
chain is first thinned to about one draw per effective draw: by k = ceil(S / ESS_bulk) for
chains of S draws, with ESS_bulk the mean over the chains of each chain's own bulk ESS
(Vehtari et al. 2021, by ArviZ; not the ESS of the chains together, which falls when they
disagree - the very thing the plot is to show - so that thinning by it would hide a stuck
chain: one chain shifted by 0.5 sd raised the factor from 5 to 52), and further until the
chains' autocorrelation at lag k is below 0.05 (`MAX_RESIDUAL_AUTOCORRELATION`: the bulk ESS
alone left AR(1) chains with rho = 0.5 at lag 3, autocorrelation 0.125, and a false-alarm
rate of 0.083 for a stated 0.05). After thinning the draws are close to independent, and then a chain's count in a bin is hypergeometric exactly (the n_c
thinned draws of chain c are a random subset of the M pooled ones, of which m_b fall in bin
b). Thinning was chosen over widening the bands by the ESS because the ESS of the bulk is the
ESS of one smooth statistic, not of each bin's indicator (tail bins mix more slowly): thinned
draws make the count's law the one the band is computed for, whatever the bin.

The band check is two-sided with Bonferroni's correction over every cell of the figure
(coefficients x chains x bins), so that chains that sample the same distribution leave any
band with probability at most ``level`` (the hypergeometric law is discrete, so the actual
rate is a little below).
"""

from dataclasses import dataclass

import numpy as np


@dataclass
class RankCheck:
    """The rank histograms of one coefficient's chains and their bands.

    Attributes
    ----------
    counts : ndarray of shape (chains, bins)
        Thinned draws of each chain per rank bin.
    lower, upper : ndarray of shape (chains, bins)
        The band: a count outside [lower, upper] is out of band.
    thin : int
        The thinning factor applied to each chain.
    ess_bulk : float
        The mean of the chains' own bulk ESS.
    out_of_band : ndarray of bool, shape (chains, bins)
    """

    counts: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    thin: int
    ess_bulk: float
    out_of_band: np.ndarray

    @property
    def flagged(self):
        """Whether some chain leaves the band in some bin."""
        return bool(self.out_of_band.any())


def default_bins(n_per_chain):
    """Bins such that a chain expects about 10 thinned draws per bin, between 4 and 20."""
    return int(np.clip(n_per_chain // 10, 4, 20))


def rank_checks(draws, *, level=0.05, bins=None, thin=True):
    """Rank histograms with simultaneous bands for each coefficient of ``draws``.

    Parameters
    ----------
    draws : ndarray of shape (chains, draws, n_coef)
    level : float, default=0.05
        The family-wise false-alarm rate of the whole set of bands (all coefficients, chains
        and bins).
    bins : int, optional
        Rank bins (default: `default_bins` of the thinned chain length).
    thin : bool, default=True
        Thin each chain to about one draw per effective draw first (the module notes). False
        ranks every draw, as bands for independent draws assume: a deliberately wrong variant
        kept for the tests' power check.

    Returns
    -------
    list of RankCheck
    """
    import arviz as az

    draws = np.asarray(draws, dtype=float)
    n_chains, n_draws, n_coef = draws.shape
    plan = []
    for j in range(n_coef):
        x = draws[:, :, j]
        # within each chain: the multi-chain ESS falls when the chains disagree, which is what
        # the plot must show, and thinning by it would hide it
        ess = (float(np.mean([az.ess(x[c:c + 1], method="bulk") for c in range(n_chains)]))
               if np.ptp(x) > 0 else float(n_draws))
        k = _thinning(x, ess) if thin else 1
        plan.append((x[:, ::k], k, ess))
    n_bins = [bins or default_bins(x.shape[1]) for x, _, _ in plan]
    cells = sum(n_chains * b for b in n_bins)
    return [_check(x, k, ess, b, level / cells) for (x, k, ess), b in zip(plan, n_bins)]


# Thinned draws whose lag-1 autocorrelation is still r widen a bin count's sd by about
# sqrt((1 + r)/(1 - r)); at the per-cell levels of a Bonferroni band (z about 3.5) a 4% wider sd
# already doubles the tail probability, so thinning goes on until r is below this.
MAX_RESIDUAL_AUTOCORRELATION = 0.05


def _thinning(x, ess):
    """ceil(draws per chain / a chain's bulk ESS ``ess``), raised until the chains' mean autocorrelation at that lag is
    below `MAX_RESIDUAL_AUTOCORRELATION` (at most a quarter of the chain length)."""
    n_chains, n = x.shape
    k = int(np.ceil(n / ess)) if np.isfinite(ess) and ess > 0 else 1
    centred = x - x.mean(axis=1, keepdims=True)
    spec = np.fft.rfft(centred, n=2 * n, axis=1)
    acov = np.fft.irfft(spec * np.conj(spec), axis=1)[:, :n]
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.nanmean(acov / acov[:, :1], axis=0)
    limit = max(1, n // 4)
    while k < limit and rho[k] >= MAX_RESIDUAL_AUTOCORRELATION:
        k += 1
    return max(1, min(k, limit))


def _check(x, k, ess, n_bins, cell_level):
    """The `RankCheck` of thinned chains ``x`` (chains, n) with per-cell level ``cell_level``."""
    from scipy import stats

    n_chains, n = x.shape
    total = n_chains * n
    # ordinal ranks of the pooled draws (ties, from rejected moves, stay within their chain)
    ranks = np.empty(total, dtype=np.int64)
    ranks[np.argsort(x.ravel(), kind="stable")] = np.arange(total)
    which = (ranks * n_bins) // total
    counts = np.stack([np.bincount(which[c * n:(c + 1) * n], minlength=n_bins)
                       for c in range(n_chains)])
    bin_sizes = np.bincount(which, minlength=n_bins)
    law = stats.hypergeom(total, bin_sizes[None, :], n)
    lower = np.broadcast_to(law.ppf(cell_level / 2), counts.shape)
    upper = np.broadcast_to(law.isf(cell_level / 2), counts.shape)
    out = (counts < lower) | (counts > upper)
    return RankCheck(counts, lower, upper, k, ess, out)
