"""The shared base of the regression models: storage, checks, pickling, full-data passes."""

import numpy as np

from .._arrays import row_blocks
from .._validation import check_finite_matrix, check_flag, fail
from ..data import is_table_object, load_data, table_matrix
from . import _kernels, _passes
from ._fingerprint import fingerprint
from ._inputs import (as_design, check_coef_names, coef_vector, design_storage, float_vector,
                      read_array, rows_text)
from ._mapped import MappedArray, ZeroOffset, mapped_source
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
        if is_table_object(X):   # a DataFrame keeps its column names
            X, table_names = table_matrix(X)
            coef_names = table_names if coef_names is None else coef_names
        X = as_design(X)
        n_rows, n_cols = X.shape
        if n_cols == 0 and not add_intercept:
            fail("X", "has 0 columns and add_intercept=False, so the model has no coefficients",
                 "give at least one column of X, or set add_intercept=True")
        y = read_array("y", y)
        if y.ndim != 1:
            y = y.reshape(-1) if y.ndim == 2 and 1 in y.shape else y
        if y.ndim != 1:
            fail("y", f"must be one-dimensional, got shape {y.shape}", "give one response per row")
        if y.shape[0] != n_rows:
            fail("y", f"has {rows_text(y.shape[0])} but X has {n_rows}",
                 "give X and y with the same number of rows")
        if n_rows < 2:
            fail("X", f"has {rows_text(n_rows)}", "give at least 2 rows")
        if offset is not None:
            offset = read_array("offset", offset).reshape(-1)
            if offset.shape[0] != n_rows:
                fail("offset", f"has {rows_text(offset.shape[0])} but X has {n_rows}",
                     "give one offset per row")
        names = check_coef_names(coef_names, n_cols, add_intercept)
        n_coef = n_cols + int(add_intercept)
        prior_mean, prior_prec, prior_cov = prior.resolve(n_coef)
        # Conversions (a copy only when needed), then the passes over the data.
        X = design_storage(X)
        y = float_vector("y", y)
        offset = np.zeros(n_rows) if offset is None else float_vector("offset", offset)
        if check:
            check_finite_matrix("X", X, names[int(add_intercept):])
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

    def fingerprint(self):
        """Everything that defines this model's posterior, as a JSON-ready dict: family and
        its options, intercept, coefficient names, prior mean and covariance, and a digest
        of X, y and the offset (shape, dtype, CRC-32 of the values; one pass over the data).

        Two models with equal fingerprints have the same posterior; a checkpoint records it
        so that a resume on a changed problem is refused, naming the items that differ.
        """
        return fingerprint(self)

    def __repr__(self):
        return (f"{type(self).__name__}(n_rows={self.n_rows}, n_coef={self.n_coef}, "
                f"intercept={self.add_intercept}, prior={self.prior!r})")

    def __getstate__(self):
        # A memory-mapped array travels as its file, not its bytes: workers of a sweep or a
        # calibration (local processes, or a Dask cluster on shared storage) map it again.
        state = self.__dict__.copy()
        for name in ("X", "y", "offset"):
            source = mapped_source(state[name])
            if source is not None:
                state[name] = MappedArray(*source)
        if isinstance(state["offset"], np.ndarray) and not np.any(state["offset"]):
            state["offset"] = ZeroOffset(state["offset"].shape[0])
        return state

    def __setstate__(self, state):
        for name in ("X", "y", "offset"):
            if isinstance(state[name], (MappedArray, ZeroOffset)):
                state[name] = state[name].open()
        self.__dict__.update(state)

    @property
    def glm_data(self):
        """The data as every GLM kernel takes it: ``GLMData(family, X, y, offset, noise_sd,
        intercept)``, built from the arrays the model keeps (no copy)."""
        return _kernels.GLMData(self.family, self.X, self.y, self.offset, self.noise_sd,
                                int(self.add_intercept))

    @property
    def prior_arrays(self):
        """The prior as the kernels take it: ``PriorArrays(mean, precision)``."""
        return _kernels.PriorArrays(self.prior_mean, self.prior_prec)

    def log_likelihood(self, beta):
        """Full-data log-likelihood sum_i l_i(beta)."""
        return _kernels.full_loglik(self.glm_data, coef_vector(beta, self.n_coef), True, 0,
                                    self.n_rows)

    def log_likelihood_grad(self, beta):
        """Full-data log-likelihood and its gradient, in one pass over the rows (parallel over
        rows on tall data)."""
        return _passes.loglik_grad(self.glm_data, beta)

    def log_likelihood_hessian(self, beta):
        """Full-data log-likelihood Hessian sum_i f''(eta_i) x_i x_i^T (parallel over rows on
        tall data)."""
        return _passes.hessian(self.glm_data, beta)

    def log_prior(self, beta):
        """Log prior density up to its normalising constant."""
        r = coef_vector(beta, self.n_coef) - self.prior_mean
        return -0.5 * r @ self.prior_prec @ r

    def log_posterior(self, beta):
        """Unnormalised log posterior density."""
        return self.log_likelihood(beta) + self.log_prior(beta)

    def pointwise_log_likelihood(self, beta, rows):
        """l_i(beta) for each index in ``rows``."""
        idx = np.ascontiguousarray(rows, dtype=np.int64)
        out = np.empty(idx.shape[0])
        _kernels.batch_loglik(self.glm_data, coef_vector(beta, self.n_coef), idx, out)
        return out

    # -- what the family decides ------------------------------------------------------------

    #: Keyword options of the constructor that belong to the family (``noise_sd``, ``offset``).
    family_options = ()
    #: The posterior under a Gaussian prior is Gaussian and known in closed form
    #: (`tallchain.conjugate_posterior`).
    closed_form_posterior = False

    @property
    def feature_names(self):
        """The names of the columns of X (the coefficient names without the intercept)."""
        return self.coef_names[int(self.add_intercept):]

    def linear_predictor(self, coef, *, with_offset=True):
        """eta_i = x_i . beta (+ intercept) (+ offset_i) for every row, in row blocks, so a
        memory-mapped X is never read whole.

        Parameters
        ----------
        coef : array-like of shape (n_coef,)
        with_offset : bool, default=True

        Returns
        -------
        ndarray of shape (n_rows,)
        """
        beta = coef_vector(coef, self.n_coef)
        k = int(self.add_intercept)
        eta = np.empty(self.n_rows)
        for start, xb in row_blocks(self.X):
            stop = start + xb.shape[0]
            eta[start:stop] = xb @ beta[k:] + (beta[0] if k else 0.0)
            if with_offset:
                eta[start:stop] += self.offset[start:stop]
        return eta

    def simulate(self, coef, rng=None):
        """A response drawn from the model at ``coef``, one value per row of X.

        Parameters
        ----------
        coef : array-like of shape (n_coef,)
        rng : int or numpy.random.Generator, optional

        Returns
        -------
        ndarray of shape (n_rows,)
        """
        return self._draw_response(self.linear_predictor(coef), np.random.default_rng(rng))

    def with_response(self, y, *, prior=None, family=None, **options):
        """The same design (X, intercept, column names) with another response.

        X is not copied or scanned again; ``y`` is checked (finite values, and what the family
        needs, such as labels 0 and 1).

        Parameters
        ----------
        y : array-like of shape (n_rows,)
        prior : GaussianPrior, optional
            Default: this model's prior.
        family : model class, optional
            Another family on the same design (default: this model's). The family's own
            options (noise sd, offset) carry over only to the same family.
        **options
            Family options of the new model (``noise_sd=``, ``offset=``).

        Returns
        -------
        LinearRegression, LogisticRegression or PoissonRegression
        """
        cls = type(self) if family is None else family
        kw = {name: getattr(self, name) for name in self.family_options
              if name in cls.family_options}
        kw.update(options)
        new = cls(self.X, y, prior=self.prior if prior is None else prior,
                  add_intercept=self.add_intercept, coef_names=self.feature_names, check=False,
                  **kw)
        check_finite_matrix("y", new.y)
        new._check_response(new.y)
        return new

    @classmethod
    def from_formula(cls, formula, table, *, offset=None, missing="drop", cache_dir=None,
                     **options):
        """The model of a Wilkinson formula (Wilkinson & Rogers 1973) on a table.

        The table is read in batches and encoded by ``formulaic`` (categorical variables by
        treatment coding against their first level, sorted unless a pandas categorical gives
        the order; ``C(x, contr.treatment("b"))`` sets another); the formula decides the
        intercept (``- 1`` removes it) and the coefficient names. A file's encoded matrix is
        kept memory-mapped in the cache folder (see `tallchain.data.load_table`).

        Parameters
        ----------
        formula : str
            ``"response ~ terms"``, e.g. ``"late ~ hour + log(distance) + C(carrier)"``.
        table : path-like or table
            A ``.parquet``/``.csv`` file, or a pandas/polars DataFrame or pyarrow Table.
        offset : str, optional
            The offset column (Poisson).
        missing : {"drop", "error"}, default="drop"
            Drop incomplete rows (counted per column, with a `DataWarning`) or refuse them.
        cache_dir : path-like, optional
            Default: ``.tallchain-cache`` beside a table file.
        **options
            The family's keyword arguments (``prior``, ``noise_sd``, ...).

        Returns
        -------
        model
            With ``encoding`` (`tallchain.data.Encoding`: how new rows are encoded, see
            `tallchain.data.encode_new_rows`) and ``table_report`` (rows read, used, missing).
        """
        dataset = load_data(table=table, formula=formula, offset=offset, missing=missing,
                            cache_dir=cache_dir)
        if dataset.offset is not None:
            options["offset"] = dataset.offset
        model = cls(dataset.X, dataset.y, add_intercept=dataset.add_intercept,
                    coef_names=dataset.feature_names, **options)
        model.encoding, model.table_report = dataset.encoding, dataset.table_report
        return model

    def check_mode(self, mode, information):
        """Raise `ModeNotFoundError` when the mode found is not a proper posterior mode for
        this family (``information`` is the negative log-likelihood Hessian there); return the
        full-data passes the check spent. The default accepts every mode, with no pass."""
        return 0

    #: The family's `Response` class (mean response, simulation, ratio name).
    response_class = None

    @property
    def response(self):
        """The family's response given the linear predictor (a `tallchain.models.Response`):
        its mean, a simulated observation, the ratio exp(coefficient) means, and the record a
        run folder keeps for predictions."""
        return self.response_class()

    def record(self):
        """What a prediction needs of the model besides the draws: the response's record
        (family and options), ``add_intercept`` and ``feature_names``."""
        return {**self.response.record(), "add_intercept": self.add_intercept,
                "feature_names": list(self.feature_names)}

    def _draw_response(self, eta, rng):
        return self.response.draw(eta, rng)
