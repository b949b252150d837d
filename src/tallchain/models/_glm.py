"""Regression models: linear (known noise sd), logistic and Poisson GLMs."""

import numpy as np

from .._validation import check_finite_matrix, fail
from . import _kernels
from ._prior import GaussianPrior


class _GLM:
    """Shared storage and validation; the family is fixed by the subclass.

    The design matrix is kept as given (float32 or float64, C-contiguous, possibly a memory
    map): it is never copied whole. An intercept is handled inside the kernels, not by a
    column of ones.
    """

    family = None
    family_name = None

    def __init__(self, X, y, *, prior=None, add_intercept=True, offset=None, noise_sd=1.0,
                 coef_names=None, check=True):
        X = _as_design(X)
        n_rows, n_cols = X.shape
        y = np.asarray(y)
        if y.ndim != 1:
            y = y.reshape(-1) if y.ndim == 2 and 1 in y.shape else y
        if y.ndim != 1:
            fail("y", f"must be one-dimensional, got shape {y.shape}", "give one response per row")
        if y.shape[0] != n_rows:
            fail("y", f"has {y.shape[0]} rows but X has {n_rows}",
                 "give X and y with the same number of rows")
        if n_rows < 2:
            fail("X", f"has {n_rows} rows", "give at least 2 rows")
        y = np.ascontiguousarray(y, dtype=np.float64)
        if offset is None:
            offset = np.zeros(n_rows)
        else:
            offset = np.ascontiguousarray(offset, dtype=np.float64).reshape(-1)
            if offset.shape[0] != n_rows:
                fail("offset", f"has {offset.shape[0]} rows but X has {n_rows}",
                     "give one offset per row")
        if check:
            check_finite_matrix("X", X)
            check_finite_matrix("y", y)
            check_finite_matrix("offset", offset)
            self._check_response(y)
        self.X = X
        self.y = y
        self.offset = offset
        self.add_intercept = bool(add_intercept)
        self.noise_sd = float(noise_sd)
        self.n_rows = n_rows
        self.n_coef = n_cols + int(self.add_intercept)
        names = list(coef_names) if coef_names is not None else [f"x{j}" for j in range(n_cols)]
        if len(names) != n_cols:
            fail("coef_names", f"has {len(names)} names for {n_cols} columns",
                 "give one name per column of X")
        self.coef_names = (["intercept"] if self.add_intercept else []) + [str(n) for n in names]
        self.prior = prior if prior is not None else GaussianPrior()
        if not isinstance(self.prior, GaussianPrior):
            fail("prior", f"must be a GaussianPrior, got {type(self.prior).__name__}",
                 "pass tallchain.GaussianPrior(...)")
        self.prior_mean, self.prior_prec, self.prior_cov = self.prior.resolve(self.n_coef)

    def _check_response(self, y):
        pass

    def __repr__(self):
        return (f"{type(self).__name__}(n_rows={self.n_rows}, n_coef={self.n_coef}, "
                f"intercept={self.add_intercept}, prior={self.prior!r})")

    def __getstate__(self):
        # A memory-mapped array travels as its file, not its bytes: workers of a sweep or a
        # calibration (local processes, or a Dask cluster on shared storage) map it again.
        state = self.__dict__.copy()
        for name in ("X", "y", "offset"):
            source = _mapped_source(state[name])
            if source is not None:
                state[name] = _MappedArray(*source)
        if isinstance(state["offset"], np.ndarray) and not np.any(state["offset"]):
            state["offset"] = _ZeroOffset(state["offset"].shape[0])
        return state

    def __setstate__(self, state):
        for name in ("X", "y", "offset"):
            if isinstance(state[name], (_MappedArray, _ZeroOffset)):
                state[name] = state[name].open()
        self.__dict__.update(state)

    # Arguments shared by every kernel call: (family, X, y, offset, noise_sd, intercept).
    @property
    def kernel_args(self):
        return (self.family, self.X, self.y, self.offset, self.noise_sd, int(self.add_intercept))

    def log_likelihood(self, beta):
        """Full-data log-likelihood sum_i l_i(beta)."""
        return _kernels.full_loglik(*self.kernel_args, _coef(beta, self.n_coef))

    def log_likelihood_grad(self, beta):
        """Full-data log-likelihood and its gradient, in one pass over the rows (parallel over
        rows on tall data)."""
        from .._full_passes import loglik_grad  # imported here: it imports this module

        return loglik_grad(self.kernel_args, beta)

    def log_likelihood_hessian(self, beta):
        """Full-data log-likelihood Hessian sum_i f''(eta_i) x_i x_i^T (parallel over rows on
        tall data)."""
        from .._full_passes import hessian

        return hessian(self.kernel_args, beta)

    def log_prior(self, beta):
        """Log prior density up to its normalising constant."""
        r = _coef(beta, self.n_coef) - self.prior_mean
        return -0.5 * r @ self.prior_prec @ r

    def log_posterior(self, beta):
        """Unnormalised log posterior density."""
        return self.log_likelihood(beta) + self.log_prior(beta)

    def pointwise_log_likelihood(self, beta, rows):
        """l_i(beta) for each index in ``rows``."""
        idx = np.ascontiguousarray(rows, dtype=np.int64)
        out = np.empty(idx.shape[0])
        _kernels.batch_loglik(*self.kernel_args, _coef(beta, self.n_coef), idx, out)
        return out


class LinearRegression(_GLM):
    """Linear regression with Gaussian noise of known standard deviation.

    y_i ~ Normal(x_i . beta, noise_sd^2). With a Gaussian prior the posterior is Gaussian and
    known exactly (`tallchain.conjugate_posterior`).

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
        Design matrix, float32 or float64; kept as given (a memory map stays one).
    y : array-like of shape (n_rows,)
        Response.
    noise_sd : float, default=1.0
        Known noise standard deviation s > 0.
    prior : GaussianPrior, default=GaussianPrior(sd=10.0)
    add_intercept : bool, default=True
        Add an intercept as coefficient 0.
    coef_names : sequence of str, optional
        Names of the columns of X (default x0, x1, ...).
    """

    family = _kernels.LINEAR
    family_name = "linear"

    def __init__(self, X, y, *, noise_sd=1.0, prior=None, add_intercept=True, coef_names=None,
                 check=True):
        if not np.isfinite(noise_sd) or noise_sd <= 0:
            fail("noise_sd", f"must be > 0, got {noise_sd}", "give the known noise sd, > 0")
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, noise_sd=noise_sd,
                         coef_names=coef_names, check=check)


class LogisticRegression(_GLM):
    """Logistic regression, y_i in {0, 1}, P(y_i = 1) = 1 / (1 + exp(-x_i . beta)).

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
    y : array-like of shape (n_rows,)
        Labels, each 0 or 1.
    prior : GaussianPrior, default=GaussianPrior(sd=10.0)
    add_intercept : bool, default=True
    coef_names : sequence of str, optional
    """

    family = _kernels.LOGISTIC
    family_name = "logistic"

    def __init__(self, X, y, *, prior=None, add_intercept=True, coef_names=None, check=True):
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, coef_names=coef_names,
                         check=check)

    def _check_response(self, y):
        bad = np.flatnonzero((y != 0) & (y != 1))
        if bad.size:
            fail("y", f"has label {y[bad[0]]:g} in row {bad[0]} ({bad.size} rows outside {{0, 1}})",
                 "logistic regression needs labels 0 or 1")


class PoissonRegression(_GLM):
    """Poisson regression with log link: y_i ~ Poisson(exp(x_i . beta + offset_i)).

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
    y : array-like of shape (n_rows,)
        Counts: non-negative integers.
    offset : array-like of shape (n_rows,), optional
        Log exposure added to the linear predictor (default 0).
    prior : GaussianPrior, default=GaussianPrior(sd=10.0)
    add_intercept : bool, default=True
    coef_names : sequence of str, optional
    """

    family = _kernels.POISSON
    family_name = "poisson"

    def __init__(self, X, y, *, offset=None, prior=None, add_intercept=True, coef_names=None,
                 check=True):
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, offset=offset,
                         coef_names=coef_names, check=check)

    def _check_response(self, y):
        bad = np.flatnonzero((y < 0) | (y != np.floor(y)))
        if bad.size:
            fail("y", f"has count {y[bad[0]]:g} in row {bad[0]} ({bad.size} rows not a count)",
                 "Poisson regression needs non-negative integer counts")


FAMILIES = {"linear": LinearRegression, "logistic": LogisticRegression,
            "poisson": PoissonRegression}


class _MappedArray:
    """A read-only memory map to reopen: file, byte offset, dtype, shape (C order)."""

    def __init__(self, filename, offset, dtype, shape):
        self.filename, self.offset, self.dtype, self.shape = filename, offset, dtype, shape

    def open(self):
        return np.memmap(self.filename, mode="r", dtype=np.dtype(self.dtype), shape=self.shape,
                         offset=self.offset, order="C")


class _ZeroOffset:
    """The all-zero offset of a model without exposure, sent as its length."""

    def __init__(self, n):
        self.n = n

    def open(self):
        return np.zeros(self.n)


def _mapped_source(a):
    """(filename, offset, dtype, shape) when ``a`` is exactly a whole read-only file map."""
    base = a
    while base is not None and not isinstance(base, np.memmap):
        base = getattr(base, "base", None)
    if base is None or getattr(base, "filename", None) is None or base.mode != "r":
        return None
    same_start = a.__array_interface__["data"][0] == base.__array_interface__["data"][0]
    if not (same_start and a.shape == base.shape and a.dtype == base.dtype
            and a.flags.c_contiguous):
        return None
    return base.filename, base.offset, a.dtype.str, a.shape


def _as_design(X):
    if isinstance(X, np.ndarray) and X.dtype == object:
        fail("X", "is an object array", "give a numeric array (pickled arrays are not read)")
    X = np.asarray(X)
    if X.ndim == 1:
        X = X.reshape(-1, 1)
    if X.ndim != 2:
        fail("X", f"must be two-dimensional, got shape {X.shape}", "give an (n_rows, n_features) array")
    if X.dtype not in (np.float32, np.float64):
        if X.dtype.kind not in "iub":
            fail("X", f"has dtype {X.dtype}", "give a float or integer array")
        X = X.astype(np.float64)
    if not X.flags.c_contiguous:
        X = np.ascontiguousarray(X)
    return X


def _coef(beta, n):
    b = np.ascontiguousarray(beta, dtype=np.float64)
    if b.shape != (n,):
        fail("beta", f"has shape {b.shape}, expected ({n},)", "give one value per coefficient")
    return b
