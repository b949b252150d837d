"""Sparse (CSR) and dense storage of the same design give the same posterior.

What is checked, and against what:

* The full-data passes (log-likelihood, gradient, Hessian, the control-variate row cache) and
  the minibatch estimators with control variates, CSR against dense on the same values, for
  the logistic, Poisson, weighted and linear-with-sampled-noise-sd models. Different code paths
  (a CSR row sums its non-zeros, a dense row every column, in another association under
  fastmath): compared in units of machine epsilon (``ulps.assert_ulps_close``). Budget: row
  i's linear predictor is a sum of at most p + 2 terms (columns, intercept, offset) whose
  rounding differs by at most p + 2 ulps of S_i = sum_j |x_ij beta_j| + |beta_0| + |o_i|
  (Higham, Accuracy and Stability of Numerical Algorithms, 2002, eq. 4.4, recursive
  summation); a family function f, f', f'' of eta changes by at most |f'| (|f''|, |f'''|)
  times that, the derivatives bounded by the value sizes computed below, and the two
  sums over the N rows (same row order, rounded differently) differ by at most N ulps of the
  sum of the terms' sizes. So each quantity gets (p + 2 + N + 4) ulps of the sum over rows of
  the size of its terms (the scale), the + 4 for the family function's own rounding.
* The mode (damped Newton) of both storages agrees to 1e-6 posterior sds: mode finding stops
  at a gradient-norm tolerance (tol = 1e-8 relative), so the two stopping points agree far
  closer than the posterior width.
* Penalty-MALA draws of the two storages with the same seed: two-sample KS distance
  (scipy.stats.ks_2samp) within 1.5 noise floors 1.358 sqrt(2 / ESS) (ECDF ESS of the draws,
  `tallchain.checks` convention). Power: the same test on a design whose column 0 is moved by
  +1 in every row holding a non-zero fails on that column's coefficient. Marked slow.
* The same with the parallel passes forced (prange over blocks of rows), which pass a CSR
  design to their threads taken apart.
* A scipy.sparse X from a model constructor, and pickling (workers receive models as files):
  the CSR arrays of a memory map travel as file paths and reopen equal.
* A sparse run interrupted and resumed from its checkpoint equals the uninterrupted run
  (bitwise: the same code twice); a changed CSR value is refused on resume.
* NaN and too-large values in a sparse X are named by row and column.
* Memory (slow): a whole run on a 10^6-row one-hot design (d = 100, about 9 non-zeros a row)
  grows the peak RSS of a fresh process by less than the dense form's N x d x 8 bytes.
"""

import pickle

import numpy as np
import pytest
import scipy.sparse as sp
from scipy import stats

import tallchain as tc
from tallchain.checks._ks import ecdf_ess
from tallchain.data import CSRDesign
from tallchain.mcmc import _estimators as E
from tallchain.models import _kernels as K
from tallchain.models import _passes
from tallchain.posterior._control_variates import RowCache, row_cache
from ulps import assert_ulps_close

N, P, NNZ_ROW = 2000, 12, 3


def sparse_design(rng, n=N, p=P, k=NNZ_ROW):
    """k distinct columns per row with standard normal values (density k / p)."""
    cols = np.argsort(rng.random((n, p)), axis=1)[:, :k]
    rows = np.repeat(np.arange(n), k)
    return sp.csr_matrix((rng.standard_normal(n * k), (rows, cols.ravel())), shape=(n, p))


def make_pair(rng, family, **options):
    Xs = sparse_design(rng)
    Xd = Xs.toarray()
    beta = 0.4 * rng.standard_normal(P)
    eta = Xd @ beta + 0.2
    if family is tc.LogisticRegression:
        y = (rng.random(N) < 1 / (1 + np.exp(-eta))).astype(float)
    elif family is tc.PoissonRegression:
        y = rng.poisson(np.exp(eta)).astype(float)
    else:
        y = eta + 0.8 * rng.standard_normal(N)
    return family(Xd, y, **options), family(Xs, y, **options)


CASES = [(tc.LogisticRegression, {}), (tc.PoissonRegression, {}),
         (tc.LinearRegression, {"noise_sd": None}), ("weighted", {})]


@pytest.fixture(params=range(len(CASES)), ids=["logistic", "poisson", "linear-sd", "weighted"])
def pair(request, rng):
    family, options = CASES[request.param]
    if family == "weighted":
        family, options = tc.LogisticRegression, {"weights": rng.integers(0, 4, N).astype(float)}
    return make_pair(rng, family, **options)


def row_sizes(model, theta):
    """S_i = sum_j |x_ij beta_j| + |beta_0| + |o_i| (the size of eta_i's terms)."""
    k = int(model.add_intercept)
    Xd = np.abs(model.X.toarray() if hasattr(model.X, "toarray") else model.X)
    return Xd @ np.abs(theta[k:model.n_beta]) + abs(theta[0]) * k + np.abs(model.offset)


def test_model_keeps_scipy_sparse_as_csr(pair):
    dense, csr = pair
    assert isinstance(csr.X, CSRDesign) and csr.X.shape == dense.X.shape
    assert csr.X.nnz == N * NNZ_ROW
    # the scipy matrix's values are kept, not densified
    assert csr.X.nbytes < dense.X.nbytes


@pytest.fixture(params=["serial", "parallel"])
def passes(request, monkeypatch):
    """Serial passes (N below the parallel threshold), or the parallel kernels forced: their
    prange loop hands a CSR design to its threads apart and joins it inside."""
    if request.param == "parallel":
        monkeypatch.setattr(_passes, "PARALLEL_MIN_ROWS", 0)
    return request.param


def test_full_data_passes_agree_in_ulps(pair, rng, passes):
    dense, csr = pair
    theta = dense.prior_mean + 0.3 * rng.standard_normal(dense.n_coef)
    ulps = P + 2 + N + 4
    size = row_sizes(dense, theta)
    w = np.ones(N) if dense.weights is None else dense.weights
    # |l_i| + |f'_i| S_i bounds the size of a term and of its change (f' <= 1 + |y| + e^eta
    # for these families); computed from the dense pointwise values (scipy-free NumPy).
    eta = dense.linear_predictor(theta)
    f1 = np.abs(dense.y) + np.exp(np.minimum(np.abs(eta), 50)) + 1.0
    if dense.n_coef > dense.n_beta:   # linear with sampled sd: f' = (y - eta) / s^2
        f1 = f1 + np.abs(dense.y - eta) / np.exp(2 * theta[-1])
    l_d = dense.log_likelihood(theta)
    l_s = csr.log_likelihood(theta)
    pointwise = np.abs(dense.pointwise_log_likelihood(theta, np.arange(N)))
    assert_ulps_close(l_s, l_d, ulps=ulps, scale=np.sum(pointwise + w * f1 * size),
                      err_msg="log-likelihood")
    (_, g_d), (_, g_s) = dense.log_likelihood_grad(theta), csr.log_likelihood_grad(theta)
    # phi_i = (1, |x_i|, 1 for a family parameter): term a of row i is at most
    # w_i c_i (1 + S_i) phi_ia, c_i bounding the family's derivatives (f1 squared: generous)
    n_fam = dense.n_coef - dense.n_beta
    phi = np.column_stack([np.ones(N)] * dense.add_intercept + [np.abs(dense.X)]
                          + [np.ones(N)] * n_fam)
    c = w * f1 * f1 * (1.0 + size)
    assert_ulps_close(g_s, g_d, ulps=ulps, scale=c @ phi, err_msg="gradient")
    assert_ulps_close(csr.log_likelihood_hessian(theta), dense.log_likelihood_hessian(theta),
                      ulps=ulps, scale=phi.T @ (c[:, None] * phi), err_msg="Hessian")


def test_row_cache_and_minibatch_estimators_agree_in_ulps(pair, rng, passes):
    dense, csr = pair
    star = tc.find_mode(dense).mode
    d = dense.n_coef
    data_d, data_s = dense.glm_data, csr.glm_data
    aux_d, aux_s = row_cache(data_d, star), row_cache(data_s, star)
    size = row_sizes(dense, star)
    ulps = P + 2 + 4
    assert_ulps_close(aux_s[:, 1], aux_d[:, 1], ulps=ulps, scale=size, err_msg="eta*")
    g = np.zeros(d)
    H = np.zeros((d, d))
    K.full_loglik_grad(data_d, star, g, True, 0, N)
    K.full_hessian(data_d, star, H, 0, N)
    idx = np.sort(rng.choice(N, 64, replace=False)).astype(np.int64)
    nrows = 5
    for order in (1, 2):
        rows_d = RowCache(order, star, aux_d, g, H)
        rows_s = RowCache(order, star, aux_s, g, H)
        delta = 0.05 * rng.standard_normal(d)
        delta2 = 0.05 * rng.standard_normal(d)
        out_d, out_s = np.empty(d), np.empty(d)
        E.cv_gradient_rows(data_d, rows_d, delta, idx, out_d, np.full((nrows, 64), np.nan))
        E.cv_gradient_rows(data_s, rows_s, delta, idx, out_s, np.full((nrows, 64), np.nan))
        scale = 10.0 * (1 + np.abs(dense.y[idx]) + size[idx]).sum()
        assert_ulps_close(out_s, out_d, ulps=ulps + 64, scale=scale, err_msg="cv gradient")
        r_d, r_s = np.empty(64), np.empty(64)
        E.batch_residual_diffs(data_d, rows_d, delta, delta2, idx, r_d, np.full((nrows, 64), np.nan))
        E.batch_residual_diffs(data_s, rows_s, delta, delta2, idx, r_s, np.full((nrows, 64), np.nan))
        assert_ulps_close(r_s, r_d, ulps=ulps + 8, scale=10.0 * (1 + size[idx]) ** 2,
                          err_msg="residual differences")


def test_mode_agrees(pair):
    dense, csr = pair
    lap_d, lap_s = tc.find_mode(dense), tc.find_mode(csr)
    sd = np.sqrt(np.diag(lap_d.cov))
    assert np.all(np.abs(lap_s.mode - lap_d.mode) <= 1e-6 * sd)
    assert_ulps_close(np.diag(lap_s.cov), np.diag(lap_d.cov), ulps=1e6)   # ~1e-10 relative


def test_linear_predictor_and_simulate_agree(pair, rng):
    dense, csr = pair
    theta = dense.prior_mean + 0.3 * rng.standard_normal(dense.n_coef)
    assert_ulps_close(csr.linear_predictor(theta), dense.linear_predictor(theta),
                      ulps=P + 2, scale=row_sizes(dense, theta))
    # the same random stream through the same inverse link: a continuous response moves by
    # the predictor's difference (P + 3 ulps), a count or label flips only where a uniform
    # falls within those ulps of a boundary (no row of 2000 expected to)
    a, b = dense.simulate(theta, rng=5), csr.simulate(theta, rng=5)
    size = row_sizes(dense, theta) + np.abs(a)
    assert np.mean(np.abs(a - b) <= (P + 3) * np.finfo(float).eps * size) >= 0.999


def test_pickled_csr_memory_map_travels_as_files(tmp_path, rng):
    Xs = sparse_design(rng)
    y = (rng.random(N) < 0.5).astype(float)
    parts = {}
    for name in ("data", "indices", "indptr"):
        a = getattr(Xs, name).astype(np.int64) if name == "indptr" else getattr(Xs, name)
        np.save(tmp_path / f"{name}.npy", a)
        parts[name] = np.load(tmp_path / f"{name}.npy", mmap_mode="r")
    model = tc.LogisticRegression(CSRDesign(parts["data"], parts["indices"], parts["indptr"],
                                            Xs.shape), y)
    blob = pickle.dumps(model)
    in_memory = pickle.dumps(tc.LogisticRegression(Xs, y))
    assert len(in_memory) - len(blob) >= 0.9 * model.X.nbytes   # files, not the arrays' bytes
    back = pickle.loads(blob)
    assert isinstance(back.X.data, np.memmap)
    assert back.fingerprint() == model.fingerprint()
    theta = np.full(model.n_coef, 0.1)
    assert back.log_likelihood(theta) == model.log_likelihood(theta)   # same code, same bits


def test_fingerprint_changes_with_any_csr_array(rng):
    Xs = sparse_design(rng)
    y = (rng.random(N) < 0.5).astype(float)
    base = tc.LogisticRegression(Xs, y).fingerprint()["data values (X)"]
    moved = Xs.copy()
    moved.indices[0] = (moved.indices[0] + 1) % P if (moved.indices[0] + 1) % P not in \
        moved.indices[1:NNZ_ROW] else moved.indices[0]
    moved.data[1] += 1.0
    assert tc.LogisticRegression(moved, y).fingerprint()["data values (X)"] != base


def two_sample_ks(a, b):
    """Per coefficient: (KS distance, floor 1.358 sqrt(1/ESS_a + 1/ESS_b))."""
    ess = np.minimum(ecdf_ess(a), ecdf_ess(b))
    fa, fb = a.reshape(-1, a.shape[2]), b.reshape(-1, b.shape[2])
    ks = np.array([stats.ks_2samp(fa[:, j], fb[:, j]).statistic for j in range(fa.shape[1])])
    return ks, 1.358 * np.sqrt(2.0 / ess)


@pytest.mark.slow
def test_penalty_mala_draws_agree_and_a_shifted_column_fails(rng):
    Xs = sparse_design(rng, n=20_000)
    Xd = Xs.toarray()
    beta = 0.4 * rng.standard_normal(P)
    y = (rng.random(Xd.shape[0]) < 1 / (1 + np.exp(-(Xd @ beta + 0.2)))).astype(float)
    run = dict(method="penalty-mala", chains=4, draws=3000, warmup=500, seed=11)
    dense = tc.sample(tc.LogisticRegression(Xd, y), **run).draws
    csr = tc.sample(tc.LogisticRegression(Xs, y), **run).draws
    ks, floor = two_sample_ks(csr, dense)
    print("\nCSR vs dense KS/floor:", np.round(ks / floor, 2))
    assert np.all(ks <= 1.5 * floor)
    shifted = Xs.copy()
    shifted.data[shifted.indices == 0] += 1.0
    wrong = tc.sample(tc.LogisticRegression(shifted, y), **run).draws
    ks_w, floor_w = two_sample_ks(wrong, dense)
    print("shifted column 0 KS/floor:", np.round(ks_w / floor_w, 2))
    assert ks_w[1] > 1.5 * floor_w[1]   # coefficient 1 is column 0's (after the intercept)


_MEMORY_SCRIPT = """
import resource, sys
import gc
import numpy as np
import tallchain as tc
from tallchain.data import CSRDesign

def one_hot(n, rng, n_vars=10, levels=11):
    level = rng.integers(0, levels, size=(n, n_vars), dtype=np.int32)
    nz = level > 0
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(nz.sum(axis=1), out=indptr[1:])
    cols = (np.arange(n_vars, dtype=np.int32) * (levels - 1))[None, :] + level - 1
    X = CSRDesign(np.ones(int(indptr[-1])), cols[nz].astype(np.int32), indptr,
                  (n, n_vars * (levels - 1)))
    y = (rng.random(n) < 0.3).astype(float)
    return X, y

def rss():
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * resource.getpagesize()

rng = np.random.default_rng(1)
run = dict(method="penalty-mala", chains=2, draws=200, warmup=100, seed=1, parallel=False)
n = int(sys.argv[1])
# A whole run of the same size first: every kernel it needs is compiled (or loaded) before
# the measured one, whatever numba's cache held (a fresh clone compiles ~1 GB worth).
tc.sample(tc.LogisticRegression(*one_hot(n, rng)), **run)
gc.collect()
base = rss()
with open("/proc/self/clear_refs", "w") as fh:   # reset the peak (VmHWM) to the current RSS
    fh.write("5")
X, y = one_hot(n, rng)
tc.sample(tc.LogisticRegression(X, y), **run)
with open("/proc/self/status") as fh:
    peak = next(int(line.split()[1]) * 1024 for line in fh if line.startswith("VmHWM:"))
print(max(peak, rss()) - base, X.nbytes, X.shape[0] * X.shape[1] * 8)
"""


@pytest.mark.slow
def test_a_million_row_one_hot_design_runs_in_less_memory_than_its_dense_form(tmp_path):
    """Peak RSS growth of a whole run (design, model, set-up, sampling) in a fresh process,
    over the RSS after compiling, against the N x d x 8 bytes of the dense form (never built).
    The peak includes the CSR arrays themselves (checked: the measure sees them)."""
    import os
    import subprocess
    import sys
    script = tmp_path / "memory.py"
    script.write_text(_MEMORY_SCRIPT)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    out = subprocess.run([sys.executable, str(script), "1000000"], capture_output=True,
                         text=True, env=env, timeout=1200, check=True).stdout.split()
    grown, csr_bytes, dense_bytes = map(int, out[-3:])
    print(f"\npeak RSS growth {grown / 2**20:.0f} MiB, CSR {csr_bytes / 2**20:.0f} MiB, "
          f"dense form {dense_bytes / 2**20:.0f} MiB")
    assert csr_bytes <= grown < dense_bytes


def test_bad_values_in_a_sparse_x_are_named_by_row_and_column(rng):
    from tallchain.exceptions import InputError
    Xs = sparse_design(rng, n=200)
    y = (rng.random(200) < 0.5).astype(float)
    bad = Xs.copy()
    bad.data[7] = np.nan
    row, col = np.searchsorted(bad.indptr, 7, side="right") - 1, bad.indices[7]
    with pytest.raises(InputError, match=rf"^X: contains nan in row {row}, column {col};"):
        tc.LogisticRegression(bad, y)
    big = Xs.copy()
    big.data[7] = 1e300
    with pytest.raises(InputError, match=rf"^X: column x{col} holds 1e\+300 in row {row}, too "):
        tc.LogisticRegression(big, y)


def test_a_sparse_run_resumes_from_its_checkpoint_and_refuses_changed_data(tmp_path, rng,
                                                                          monkeypatch):
    """Same code resumed from its saved state: bitwise equal draws (as tests/mcmc/
    test_checkpoint.py for dense X); a changed CSR value changes the fingerprint's X digest,
    so the resume is refused naming it."""
    from interrupts import interrupt_on_rounds
    from tallchain.exceptions import SamplingInterrupted

    Xs = sparse_design(rng)
    y = (rng.random(N) < 1 / (1 + np.exp(-(Xs @ (0.3 * rng.standard_normal(P)))))).astype(float)
    model = tc.LogisticRegression(Xs, y)
    run = dict(method="penalty-mala", chains=2, draws=600, warmup=400, seed=5)
    full = tc.sample(model, **run)
    ckpt = tmp_path / "run.ckpt.npz"
    interrupt_on_rounds(monkeypatch, {2})
    with pytest.raises(SamplingInterrupted):
        tc.sample(model, checkpoint=ckpt, **run)
    done = tc.sample(model, checkpoint=ckpt, resume=True, **run)
    assert np.array_equal(done.draws, full.draws)
    changed = Xs.copy()
    changed.data[0] += 0.5
    with pytest.raises(tc.InputError, match=r"resume: .*changed: data values \(X\)"):
        tc.sample(tc.LogisticRegression(changed, y), checkpoint=ckpt, resume=True, **run)


def _one_hot_pair(rng, n_rows, n_cols, per_row):
    """The same logistic data as a CSR and a dense design: per_row one-hot blocks."""
    import scipy.sparse as sp

    cols = np.concatenate([b * (n_cols // per_row) + rng.integers(0, n_cols // per_row, n_rows)
                           for b in range(per_row)])
    rows = np.tile(np.arange(n_rows), per_row)
    X = sp.csr_matrix((np.ones(rows.size), (rows, cols)), shape=(n_rows, n_cols))
    eta = -1.0 + X @ (0.2 * rng.standard_normal(n_cols))
    y = (rng.random(n_rows) < 1 / (1 + np.exp(-eta))).astype(float)
    return tc.LogisticRegression(X.toarray(), y), tc.LogisticRegression(X, y)


def test_the_wide_hessian_of_a_csr_design_agrees_with_the_blocked_dense_one(rng):
    # From _passes.BLOCKED_MIN_COEF coefficients the dense Hessian is a BLAS product over row
    # blocks; a CSR design keeps its row loop over non-zeros. Same budget as above: the
    # entries are sums over N rows of w_i x_ia x_ib with |x| <= 1 and |f''| <= 1/4, so
    # (p + 2 + N + 4) ulps of N/4 (here with a larger p, the same reasoning).
    from tallchain.models import _passes

    dense, csr = _one_hot_pair(rng, 3000, _passes.BLOCKED_MIN_COEF + 20, 4)
    theta = 0.1 * rng.standard_normal(dense.n_coef)
    p = dense.n_coef
    assert_ulps_close(csr.log_likelihood_hessian(theta), dense.log_likelihood_hessian(theta),
                      ulps=p + 2 + 3000 + 4, scale=3000 / 4, err_msg="wide Hessian")


def test_the_subsample_start_of_a_tall_csr_design_reaches_the_dense_mode(rng):
    # From posterior._start's MIN_RATIO * SUBSAMPLE_ROWS rows the mode starts from a weighted
    # row subsample; the rows of a CSR design are taken as CSR (no dense copy).
    from tallchain.posterior import _start

    n = _start.MIN_RATIO * _start.SUBSAMPLE_ROWS
    dense, csr = _one_hot_pair(rng, n, 24, 2)
    lap_d, lap_s = tc.find_mode(dense), tc.find_mode(csr)
    assert lap_s.n_evaluations == lap_d.n_evaluations   # the same path, the cheap start too
    sd = np.sqrt(np.diag(lap_d.cov))
    assert np.all(np.abs(lap_s.mode - lap_d.mode) <= 1e-6 * sd)


def test_the_subsample_start_keeps_the_read_only_flags_of_the_full_data(rng):
    # numba types read-only and writable arrays apart: a subsample whose weights (or rows of
    # X, y) differ in that flag from the full data's would compile every pass kernel again
    # inside a run, for the subsample alone.
    from tallchain.posterior import _start

    n = _start.MIN_RATIO * _start.SUBSAMPLE_ROWS
    _, csr = _one_hot_pair(rng, n, 24, 2)
    full, view = csr.glm_data, _start._Subsample(csr, np.arange(0, n, 4)).glm_data
    arrays = {"weights": (full.weights, view.weights), "y": (full.y, view.y)}
    arrays.update({f"X.{k}": (getattr(full.X, k), getattr(view.X, k)) for k in full.X._fields
                   if isinstance(getattr(full.X, k), np.ndarray)})
    flags = {k: (a.flags.writeable, b.flags.writeable) for k, (a, b) in arrays.items()}
    assert all(a == b for a, b in flags.values()), flags
    assert not full.weights.flags.writeable     # the no-weights placeholder: read-only
