"""Regression models: linear (known noise sd), logistic and Poisson GLMs."""

import numpy as np

from .._validation import check_finite_matrix, check_flag, fail, is_number, show_value
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
        # Cheap checks first: nothing below scans or copies the data until they have passed.
        add_intercept = check_flag("add_intercept", add_intercept)
        check = check_flag("check", check)
        if prior is None:
            prior = GaussianPrior()
        if not isinstance(prior, GaussianPrior):
            fail("prior", f"must be a GaussianPrior, got {type(prior).__name__}",
                 "pass tallchain.GaussianPrior(...)")
        X = _as_design(X)
        n_rows, n_cols = X.shape
        if n_cols == 0 and not add_intercept:
            fail("X", "has 0 columns and add_intercept=False, so the model has no coefficients",
                 "give at least one column of X, or set add_intercept=True")
        y = _read_array("y", y)
        if y.ndim != 1:
            y = y.reshape(-1) if y.ndim == 2 and 1 in y.shape else y
        if y.ndim != 1:
            fail("y", f"must be one-dimensional, got shape {y.shape}", "give one response per row")
        if y.shape[0] != n_rows:
            fail("y", f"has {_rows(y.shape[0])} but X has {n_rows}",
                 "give X and y with the same number of rows")
        if n_rows < 2:
            fail("X", f"has {_rows(n_rows)}", "give at least 2 rows")
        if offset is not None:
            offset = _read_array("offset", offset).reshape(-1)
            if offset.shape[0] != n_rows:
                fail("offset", f"has {_rows(offset.shape[0])} but X has {n_rows}",
                     "give one offset per row")
        names = _coef_names(coef_names, n_cols, add_intercept)
        n_coef = n_cols + int(add_intercept)
        prior_mean, prior_prec, prior_cov = prior.resolve(n_coef)
        # Conversions (a copy only when needed), then the passes over the data.
        X = _design_storage(X)
        y = _float_vector("y", y)
        offset = np.zeros(n_rows) if offset is None else _float_vector("offset", offset)
        if check:
            check_finite_matrix("X", X)
            check_finite_matrix("y", y)
            check_finite_matrix("offset", offset)
            self._check_response(y)
        self.X = X
        self.y = y
        self.offset = offset
        self.add_intercept = add_intercept
        self.noise_sd = float(noise_sd)
        self.n_rows = n_rows
        self.n_coef = n_coef
        self.coef_names = names
        self.prior = prior
        self.prior_mean, self.prior_prec, self.prior_cov = prior_mean, prior_prec, prior_cov

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
        Design matrix. A float32 or float64 C-ordered array (a memory map too) is kept as
        given, without a copy; integer, bool, Fortran-ordered or nested-list input is copied
        to float64, C order. A one-dimensional X is one column.
    y : array-like of shape (n_rows,)
        Response.
    noise_sd : float, default=1.0
        Known noise standard deviation: a finite number > 0 (a numpy scalar too).
    prior : GaussianPrior or None, default=None
        Prior on the coefficients, intercept first; None means ``GaussianPrior()`` (mean 0,
        sd 10 for every coefficient).
    add_intercept : bool, default=True
        Add an intercept as coefficient 0 (named "intercept").
    coef_names : sequence of str, optional
        Distinct names of the columns of X, one per column (default x0, x1, ...); with an
        intercept, none may be "intercept".
    check : bool, default=True
        Scan X, y for NaN or inf. False skips these passes over the data (for data already
        checked); the argument checks always run.

    Raises
    ------
    InputError
        If an argument is invalid (``noise_sd`` first, not a finite number > 0): X not a
        two-dimensional numeric array (or ragged), without coefficients, or with fewer than 2
        rows; y not numeric or of another length than X has rows; a non-bool ``add_intercept``
        or ``check``; ``coef_names`` not distinct strings, one per column; ``prior`` not a
        `GaussianPrior` or of the wrong length. With ``check``, also NaN or inf in the data.
        The message names the argument and the fix.
    """

    family = _kernels.LINEAR
    family_name = "linear"

    def __init__(self, X, y, *, noise_sd=1.0, prior=None, add_intercept=True, coef_names=None,
                 check=True):
        noise_sd = _noise_sd(noise_sd)
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, noise_sd=noise_sd,
                         coef_names=coef_names, check=check)


class LogisticRegression(_GLM):
    """Logistic regression, y_i in {0, 1}, P(y_i = 1) = 1 / (1 + exp(-x_i . beta)).

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
        Design matrix. A float32 or float64 C-ordered array (a memory map too) is kept as
        given, without a copy; integer, bool, Fortran-ordered or nested-list input is copied
        to float64, C order. A one-dimensional X is one column.
    y : array-like of shape (n_rows,)
        Labels, each 0 or 1 (bool is fine).
    prior : GaussianPrior or None, default=None
        Prior on the coefficients, intercept first; None means ``GaussianPrior()`` (mean 0,
        sd 10 for every coefficient).
    add_intercept : bool, default=True
        Add an intercept as coefficient 0 (named "intercept").
    coef_names : sequence of str, optional
        Distinct names of the columns of X, one per column (default x0, x1, ...); with an
        intercept, none may be "intercept".
    check : bool, default=True
        Scan X, y for NaN or inf, and y for labels other than 0 and 1. False skips these passes
        over the data (for data already checked); the argument checks always run.

    Raises
    ------
    InputError
        If an argument is invalid: X not a two-dimensional numeric array (or ragged), without
        coefficients, or with fewer than 2 rows; y not numeric or of another length than X has
        rows; a non-bool ``add_intercept`` or ``check``; ``coef_names`` not distinct strings,
        one per column; ``prior`` not a `GaussianPrior` or of the wrong length. With ``check``,
        also NaN or inf in the data or a label other than 0 or 1. The message names the
        argument and the fix.
    """

    family = _kernels.LOGISTIC
    family_name = "logistic"

    def __init__(self, X, y, *, prior=None, add_intercept=True, coef_names=None, check=True):
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, coef_names=coef_names,
                         check=check)

    def _check_response(self, y):
        bad = np.flatnonzero((y != 0) & (y != 1))
        if bad.size:
            fail("y", f"has label {y[bad[0]]:g} in row {bad[0]} ({_rows(bad.size)} outside {{0, 1}})",
                 "logistic regression needs labels 0 or 1")


class PoissonRegression(_GLM):
    """Poisson regression with log link: y_i ~ Poisson(exp(x_i . beta + offset_i)).

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
        Design matrix. A float32 or float64 C-ordered array (a memory map too) is kept as
        given, without a copy; integer, bool, Fortran-ordered or nested-list input is copied
        to float64, C order. A one-dimensional X is one column.
    y : array-like of shape (n_rows,)
        Counts: non-negative integers.
    offset : array-like of shape (n_rows,), optional
        Log exposure added to the linear predictor (default 0).
    prior : GaussianPrior or None, default=None
        Prior on the coefficients, intercept first; None means ``GaussianPrior()`` (mean 0,
        sd 10 for every coefficient).
    add_intercept : bool, default=True
        Add an intercept as coefficient 0 (named "intercept").
    coef_names : sequence of str, optional
        Distinct names of the columns of X, one per column (default x0, x1, ...); with an
        intercept, none may be "intercept".
    check : bool, default=True
        Scan X, y, offset for NaN or inf, and y for values that are not counts. False skips
        these passes over the data (for data already checked); the argument checks always run.

    Raises
    ------
    InputError
        If an argument is invalid: X not a two-dimensional numeric array (or ragged), without
        coefficients, or with fewer than 2 rows; y or offset not numeric or of another length
        than X has rows; a non-bool ``add_intercept`` or ``check``; ``coef_names`` not distinct
        strings, one per column; ``prior`` not a `GaussianPrior` or of the wrong length. With
        ``check``, also NaN or inf in the data or a y that is not a count. The message names
        the argument and the fix.
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
            fail("y", f"has count {y[bad[0]]:g} in row {bad[0]} ({_rows(bad.size)} not a count)",
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
    """X as a two-dimensional numeric array with its shape checked; not yet copied (see
    `_design_storage`)."""
    if isinstance(X, np.ndarray) and X.dtype == object:
        fail("X", "is an object array", "give a numeric array (pickled arrays are not read)")
    X = _read_array("X", X)
    if X.ndim == 1:
        X = X.reshape(-1, 1)
    if X.ndim != 2:
        fail("X", f"must be two-dimensional, got shape {X.shape}", "give an (n_rows, n_features) array")
    if X.dtype not in (np.float32, np.float64) and X.dtype.kind not in "iub":
        fail("X", f"has dtype {X.dtype}", "give a float or integer array")
    return X


def _design_storage(X):
    """float32/float64 C-contiguous X as it is (a memory map stays one); anything else copied."""
    if X.dtype not in (np.float32, np.float64):
        X = X.astype(np.float64)
    if not X.flags.c_contiguous:
        X = np.ascontiguousarray(X)
    return X


def _read_array(field, value):
    """``np.asarray(value)``, with ragged nested lists reported by row."""
    try:
        return np.asarray(value)
    except (ValueError, TypeError) as exc:
        rows = _ragged_rows(value)
        if rows is not None:
            (i, n_i), (j, n_j) = rows
            fail(field, f"is ragged: row {j} has {n_j} but row {i} has {n_i}",
                 "give the same number of values in every row")
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        fail(field, f"cannot be read as an array ({detail})", "give a numeric array")


def _ragged_rows(value):
    """The first row whose length differs from row 0's, as ((0, "n values"), (j, "m values"))."""
    try:
        lengths = [len(row) if isinstance(row, (list, tuple, np.ndarray)) else None
                   for row in value]
    except TypeError:
        return None
    for j, n in enumerate(lengths[1:], 1):
        if n != lengths[0]:
            return (0, _values(lengths[0])), (j, _values(n))
    return None


def _values(n):
    return "a single value" if n is None else ("1 value" if n == 1 else f"{n} values")


def _float_vector(field, a):
    """A one-dimensional array as C-contiguous float64; a non-numeric entry named by row."""
    if a.dtype.kind in "fiub":
        return np.ascontiguousarray(a, dtype=np.float64)
    if a.dtype.kind in "OUS":
        for i, v in enumerate(a):
            try:
                float(v)
            except (TypeError, ValueError):
                fail(field, f"has the non-numeric value {show_value(v)} in row {i}",
                     "give a float or integer array")
        try:
            return np.ascontiguousarray(a, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            fail(field, f"cannot be read as numbers ({str(exc).splitlines()[0]})",
                 "give a float or integer array")
    fail(field, f"has dtype {a.dtype}, not numeric", "give a float or integer array")


def _noise_sd(value):
    fix = "give the known noise sd as a number > 0, e.g. noise_sd=1.0"
    numeric = is_number(value) or (isinstance(value, np.ndarray) and value.ndim == 0
                                   and value.dtype.kind in "fiu")
    if not numeric:
        fail("noise_sd", f"must be a finite number > 0, got {show_value(value)}", fix)
    try:
        value = float(value)
    except OverflowError:
        fail("noise_sd", f"must be a finite number > 0, got {show_value(value)}", fix)
    if not np.isfinite(value):
        fail("noise_sd", f"must be a finite number > 0, got {value}", fix)
    if value <= 0:
        fail("noise_sd", f"must be > 0, got {value}", fix)
    return value


def _coef_names(coef_names, n_cols, add_intercept):
    """The model's coefficient names: "intercept" first when added, then one per column."""
    fix = "give a list of distinct strings, one per column of X"
    if coef_names is None:
        names = [f"x{j}" for j in range(n_cols)]
    else:
        if isinstance(coef_names, (str, bytes)):
            fail("coef_names", f"is the single string {show_value(coef_names)}, not a list of names",
                 fix)
        if isinstance(coef_names, (set, frozenset, dict)):
            fail("coef_names", f"is a {type(coef_names).__name__}, which has no order", fix)
        try:
            names = list(coef_names)
        except TypeError:
            fail("coef_names", f"must be a sequence of strings, got {show_value(coef_names)}", fix)
        if len(names) != n_cols:
            fail("coef_names", f"has {len(names)} {'name' if len(names) == 1 else 'names'} "
                 f"for {n_cols} columns",
                 "give one name per column of X")
        seen = {}
        for i, name in enumerate(names):
            if not isinstance(name, str):
                fail("coef_names", f"has {show_value(name)} at position {i}, not a string",
                     "give every name as a str")
            if not name:
                fail("coef_names", f"has an empty name at position {i}", fix)
            if name in seen:
                fail("coef_names", f"has {name!r} twice (positions {seen[name]} and {i})",
                     "give distinct names")
            seen[name] = i
        names = [str(n) for n in names]
    if add_intercept and "intercept" in names:
        fail("coef_names", f"has 'intercept' at position {names.index('intercept')}, the name "
             "of the added intercept", "rename that column, or set add_intercept=False")
    return (["intercept"] if add_intercept else []) + names


def _rows(n):
    return f"{n} row" if n == 1 else f"{n} rows"


def _coef(beta, n):
    b = np.ascontiguousarray(beta, dtype=np.float64)
    if b.shape != (n,):
        fail("beta", f"has shape {b.shape}, expected ({n},)", "give one value per coefficient")
    return b
