"""One sampler run checked by KS against a reference, printed for the review notes.

Import in a test as ``from ks_runs import run_and_check`` (``tests`` is on pytest's path).
"""

import tallchain as tc
from tallchain.checks import ks_check


def run_and_check(model, reference, method, *, seed, names, **ks_options):
    """Sample ``model`` (4 chains, 3000 draws after 500 warmup), assert the reported names,
    and return the `ks_check` of the draws against ``reference`` (printed for ``pytest -s``)."""
    result = tc.sample(model, method=method, chains=4, draws=3000, warmup=500, seed=seed)
    assert result.coef_names == names
    check = ks_check(result.draws, reference, coef_names=result.coef_names, **ks_options)
    print(f"\n{method}: KS/floor " + ", ".join(f"{n}={r:.2f}" for n, r in
                                           zip(check.coef_names, check.ratio)))
    return check
