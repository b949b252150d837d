"""Throughput of the numba transition loop against a plain NumPy MALA loop, side by side.

Both sides run the same algorithm on the same data: full-data preconditioned MALA (Roberts &
Tweedie, Bernoulli 1996) on a logistic regression (and, as a second case, a linear regression
with known noise sd), N = 10,000 rows, 10 coefficients (intercept + 9 features), mass matrix
M = the Laplace precision at the mode, a fixed step, started at the mode, one chain, no
adaptation. The logistic case costs two exp and one log1p per row; the linear case none, so
it shows the loop itself.

* numba: the public entry ``tallchain.sample(model, method="mala", step_size=h, chains=1,
  warmup=0, init="mode")``; the time is ``result.sampling_seconds`` (the kernel loop and its
  chunking; mode finding and set-up are excluded).
* NumPy: ``numpy_mala`` below: vectorised NumPy for the log-likelihood and gradient (one pass
  of matrix-vector products per iteration), a Python loop over iterations.

The NumPy loop draws from the generator the kernel gets for chain 0 (``SeedSequence(seed)
.spawn(2)[1]``, see ``sampling._resolve_seed``) in the kernel's order (d normals, then one
uniform for the accept test), so with the same seed both sides follow the same path up to
rounding: the benchmark checks that, and that the acceptance rates agree within Monte Carlo
error, before it reports a ratio. Numba compilation (or loading its cache) is done before
timing. BLAS is limited to one thread, like the kernel, unless the caller sets the usual
*_NUM_THREADS variables.

Absolute times depend on the machine and its load; report the ratio. Run:

    .venv/bin/python benchmarks/bench_transition_loop.py [--family logistic linear]
        [--iterations 1000] [--repeats 5] [--quick]
"""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # must precede the NumPy import to take effect

import argparse  # noqa: E402
import math  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from scipy import special  # noqa: E402

import tallchain as tc  # noqa: E402
from tallchain.posterior import make_preconditioner  # noqa: E402


def make_model(family, n_rows, n_coef, seed=2026):
    rng = np.random.default_rng(seed)
    p = n_coef - 1
    X = rng.standard_normal((n_rows, p))
    beta = rng.normal(0.0, 0.5, size=n_coef)
    eta = beta[0] + X @ beta[1:]
    prior = tc.GaussianPrior(sd=5.0)
    if family == "linear":
        return tc.LinearRegression(X, eta + rng.standard_normal(n_rows), noise_sd=1.0,
                                   prior=prior)
    y = (rng.random(n_rows) < special.expit(eta)).astype(float)
    return tc.LogisticRegression(X, y, prior=prior)


def numpy_mala(model, pre, start, h, n_iter, rng):
    """Preconditioned MALA, one full-data pass per iteration, vectorised over rows.

    Proposal beta' = beta + (h/2) M^-1 g(beta) + sqrt(h) L xi with L L^T = M^-1;
    log q(b' | b) = -(1/2h) z^T M z, z = b' - b - (h/2) M^-1 g(b); accept with
    min(1, exp(log pi(b') - log pi(b) + log q(b | b') - log q(b' | b))).
    Returns draws (n_iter, d), acceptance probabilities and accept decisions (n_iter,).
    """
    X, y = model.X, model.y
    m, P = model.prior_mean, model.prior_prec
    mass, mass_inv, chol = pre.mass, pre.mass_inv, pre.mass_inv_chol
    d = start.shape[0]

    linear = model.family_name == "linear"
    s = model.noise_sd

    def loglik_grad(b):
        eta = b[0] + X @ b[1:]
        if linear:
            # The constant -N log(s sqrt(2 pi)) cancels in the ratio and is left out.
            res = (y - eta) / s
            ll = -0.5 * float(res @ res)
            r = res / s
        else:
            ll = float(np.sum(y * eta - np.logaddexp(0.0, eta)))
            r = y - special.expit(eta)
        g = np.empty(d)
        g[0] = r.sum()
        g[1:] = X.T @ r
        return ll, g - P @ (b - m)

    def log_q(to, frm, grad_frm):
        z = to - frm - 0.5 * h * (mass_inv @ grad_frm)
        return -0.5 * float(z @ mass @ z) / h

    beta = start.copy()
    ll, grad = loglik_grad(beta)
    draws = np.empty((n_iter, d))
    acceptance_probability = np.empty(n_iter)
    accepted = np.zeros(n_iter, dtype=bool)
    sqrt_h = math.sqrt(h)
    for k in range(n_iter):
        xi = rng.standard_normal(d)
        prop = beta + sqrt_h * (chol @ xi) + 0.5 * h * (mass_inv @ grad)
        ll_prop, grad_prop = loglik_grad(prop)
        prior_diff = -0.5 * float((prop - beta) @ P @ (prop + beta - 2.0 * m))
        c = log_q(beta, prop, grad_prop) - log_q(prop, beta, grad)
        log_alpha = min(0.0, prior_diff + ll_prop - ll + c)
        acceptance_probability[k] = math.exp(log_alpha)
        if math.log(rng.random()) < log_alpha:
            beta, ll, grad = prop, ll_prop, grad_prop
            accepted[k] = True
        draws[k] = beta
    return draws, acceptance_probability, accepted


def _mcse_of_mean(x):
    """MCSE of the mean of one autocorrelated sequence (initial positive sequence; Geyer 1992)."""
    n = x.size
    xc = x - x.mean()
    var = float(xc @ xc) / n
    if var == 0.0:
        return 0.0
    acf = np.correlate(xc, xc, mode="full")[n - 1:] / (n * var)
    tau = 1.0
    for t in range(1, n - 1, 2):
        pair = acf[t] + acf[t + 1]
        if pair <= 0.0:
            break
        tau += 2.0 * pair
    return math.sqrt(var * tau / n)


def bench_family(family, args):
    """Time both loops on one family; print the table and checks; return (ratio, ok)."""
    model = make_model(family, args.rows, args.coef)
    laplace = tc.find_mode(model)
    pre = make_preconditioner("laplace", model.n_coef, laplace)  # what sample() builds
    # Default MALA step in units of M (Roberts & Rosenthal 1998 scaling, as sampling.py uses).
    h = 1.65**2 * model.n_coef ** (-1.0 / 3.0)
    run = dict(method="mala", step_size=h, chains=1, warmup=0, init="mode", seed=args.seed)

    tc.sample(model, **{**run, "draws": 20})  # compile or load the numba cache
    numpy_mala(model, pre, laplace.mode, h, 20, np.random.default_rng(0))  # warm caches too

    t_numba, t_numpy = [], []
    for _ in range(args.repeats):
        res = tc.sample(model, **{**run, "draws": args.iterations})
        t_numba.append(res.sampling_seconds)
        rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(args.seed).spawn(2)[1]))
        t0 = time.perf_counter()
        np_draws, np_accept, np_accepted = numpy_mala(model, pre, laplace.mode, h,
                                                      args.iterations, rng)
        t_numpy.append(time.perf_counter() - t0)

    # --- the two loops compute the same thing -------------------------------------------------
    nb_accept = res.stats["acceptance_probability"][0]
    sd = np.sqrt(np.diag(laplace.cov))
    path_gap = float(np.max(np.abs(res.draws[0] - np_draws) / sd))
    same_decisions = float(np.mean(res.stats["accepted"][0] == np_accepted))
    rate_nb, rate_np = float(nb_accept.mean()), float(np_accept.mean())
    band = 4.0 * math.hypot(_mcse_of_mean(nb_accept), _mcse_of_mean(np_accept))
    rates_agree = abs(rate_nb - rate_np) <= band

    # --- table ----------------------------------------------------------------------------------
    n = args.iterations
    med_nb, med_np = statistics.median(t_numba), statistics.median(t_numpy)
    print(f"\nfull-data MALA, {family}, N = {model.n_rows}, d = {model.n_coef}, step h = {h:.4f}, "
          f"{n} iterations x {args.repeats} interleaved repeats, BLAS threads = "
          f"{os.environ.get('OPENBLAS_NUM_THREADS')}")
    print(f"{'implementation':<34}{'median s':>10}{'min s':>10}{'max s':>10}{'it/s':>10}"
          f"{'accept':>9}")
    for name, times, rate in (("numba kernel (tallchain.sample)", t_numba, rate_nb),
                              ("NumPy loop (vectorised rows)", t_numpy, rate_np)):
        med = statistics.median(times)
        print(f"{name:<34}{med:>10.3f}{min(times):>10.3f}{max(times):>10.3f}{n / med:>10.0f}"
              f"{rate:>9.3f}")
    print(f"check: mean acceptance prob. numba {rate_nb:.4f} vs NumPy {rate_np:.4f}, "
          f"|diff| {abs(rate_nb - rate_np):.2e} <= 4 MCSE = {band:.2e}: "
          f"{'ok' if rates_agree else 'FAILED'}")
    print(f"check: same seed stream -> max |path difference| = {path_gap:.1e} posterior sd, "
          f"accept decisions identical in {100 * same_decisions:.1f}% of iterations")
    ratio = (n / med_nb) / (n / med_np)
    print(f"ratio ({family}; numba it/s / NumPy it/s, medians): {ratio:.2f}")
    return ratio, rates_agree


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--family", nargs="+", choices=["logistic", "linear"],
                    default=["logistic", "linear"])
    ap.add_argument("--rows", type=int, default=10_000)
    ap.add_argument("--coef", type=int, default=10, help="coefficients, intercept included")
    ap.add_argument("--iterations", type=int, default=1000, help="MALA iterations per repeat")
    ap.add_argument("--repeats", type=int, default=5, help="interleaved repeats per side")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--quick", action="store_true", help="3 repeats of 500 iterations")
    args = ap.parse_args(argv)
    if args.quick:
        args.repeats, args.iterations = 3, 500
    ok = True
    for family in args.family:
        _, agree = bench_family(family, args)
        ok = ok and agree
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
