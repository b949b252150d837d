"""The shared base of the regression models: storage, checks, pickling, full-data passes."""

import numpy as np

from .._validation import check_finite_matrix, check_flag, fail, first_bad_row_value
from ..data import design_blocks, is_csr_design, is_table_object, load_data, table_matrix
from . import _kernels, _passes
from ._fingerprint import fingerprint
from ._inputs import (as_design, check_coef_names, coef_vector, design_storage, float_vector,
                      read_array, rows_text)
from ._mapped import MappedArray, MappedCSR, ZeroOffset, mapped_source
from ._prior import GaussianPrior


class _GLM:
    """Shared storage and validation; the family is fixed by the subclass.

    The design matrix is kept as given (float32 or float64, C-contiguous, possibly a memory
    map): it is never copied whole. An intercept is handled inside the kernels, not by a
    column of ones.
    """

    family = None
    family_name = None
    #: Names of the family parameters sampled after the coefficients, on the sampler's scale
    #: (``("log_noise_sd",)`` for a linear model with unknown noise sd); set per instance.
    family_param_names = ()
    #: Their names on the natural scale, as results report them (exp of the sampled log).
    family_natural_names = ()
    #: The constructor option holding the family parameter's prior (median, log_sd).
    family_prior_option = None
    #: Trials per row (binomial regression), else None.
    trials = None
    #: Constructor options without a default (a binomial model's ``trials``).
    required_options = ()

    def __init__(self, X, y, *, prior=None, add_intercept=True, offset=None, noise_sd=1.0,
                 coef_names=None, weights=None, check=True):
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
        if weights is not None:
            weights = read_array("weights", weights).reshape(-1)
            if weights.shape[0] != n_rows:
                fail("weights", f"has {rows_text(weights.shape[0])} but X has {n_rows}",
                     "give one frequency weight per row")
        names = check_coef_names(coef_names, n_cols, add_intercept)
        n_beta = n_cols + int(add_intercept)
        prior_mean, prior_prec, prior_cov = prior.resolve(n_beta)
        # Conversions (a copy only when needed), then the passes over the data.
        X = design_storage(X)
        y = float_vector("y", y)
        offset = np.zeros(n_rows) if offset is None else float_vector("offset", offset)
        if weights is not None:
            weights = float_vector("weights", weights)
            check_finite_matrix("weights", weights)
            bad = first_bad_row_value("weights", weights)
            if bad is not None:
                fail("weights", f"has {weights[bad[0]]:g} in row {bad[0]}", bad[1])
        self.weights = weights
        if check:
            check_finite_matrix("X", X, names[int(add_intercept):])
            check_finite_matrix("y", y)
            check_finite_matrix("offset", offset)
            self._check_response(y)
        self.X = X
        self.y = y
        self.offset = offset
        self.add_intercept = add_intercept
        self.noise_sd = None if noise_sd is None else float(noise_sd)
        self.n_rows = n_rows
        self.n_beta = n_beta
        # The parameter vector theta = (coefficients, family parameters), priors independent.
        fam_mean, fam_sd = self._family_prior()
        self.n_coef = n_beta + len(fam_mean)
        self.coef_names = names + list(self.family_param_names)
        self.prior = prior
        self.prior_mean = np.concatenate([prior_mean, fam_mean])
        self.prior_prec = _block_diagonal(prior_prec, 1.0 / np.square(fam_sd))
        self.prior_cov = _block_diagonal(prior_cov, np.square(fam_sd))

    def _family_prior(self):
        """Gaussian prior (means, sds) of the family parameters on the sampler's (log) scale,
        from the (median, log_sd) in ``family_prior_option`` or the family's default (stored
        back, so that `with_response` keeps it). Called once y is stored."""
        if not self.family_param_names:
            return np.zeros(0), np.zeros(0)
        value = getattr(self, self.family_prior_option)
        if value is None:
            value = self._default_family_prior()
            setattr(self, self.family_prior_option, value)
        median, log_sd = value
        return np.array([np.log(median)]), np.array([log_sd])

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
        if is_csr_design(state["X"]):
            state["X"] = MappedCSR.of(state["X"])
        for name in ("X", "y", "offset"):
            if isinstance(state[name], MappedCSR):
                continue
            source = mapped_source(state[name])
            if source is not None:
                state[name] = MappedArray(*source)
        if isinstance(state["offset"], np.ndarray) and not np.any(state["offset"]):
            state["offset"] = ZeroOffset(state["offset"].shape[0])
        return state

    def __setstate__(self, state):
        for name in ("X", "y", "offset"):
            if isinstance(state[name], (MappedArray, MappedCSR, ZeroOffset)):
                state[name] = state[name].open()
        self.__dict__.update(state)

    @property
    def glm_data(self):
        """The data as every GLM kernel takes it: ``GLMData(family, X, y, offset, noise_sd,
        intercept)``, built from the arrays the model keeps (read-only views, no copy; a sparse
        design as its `CSRArrays`)."""
        X = self.X.kernel_form() if is_csr_design(self.X) else self.X
        view = _kernels.kernel_view
        return _kernels.GLMData(self.family, view(X), view(self.y), view(self.offset),
                                1.0 if self.noise_sd is None else self.noise_sd,
                                int(self.add_intercept), len(self.family_param_names),
                                _kernels.NO_TRIALS if self.trials is None else view(self.trials),
                                _kernels.NO_WEIGHTS if self.weights is None
                                else view(self.weights))

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
        return self.coef_names[int(self.add_intercept):self.n_beta]

    def linear_predictor(self, coef, *, with_offset=True):
        """eta_i = x_i . beta (+ intercept) (+ offset_i) for every row, in row blocks, so a
        memory-mapped X is never read whole (a sparse X by its non-zeros).

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
        for start, xb in design_blocks(self.X):
            stop = start + xb.shape[0]
            eta[start:stop] = xb @ beta[k:self.n_beta] + (beta[0] if k else 0.0)
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
        return self._draw_response(self.linear_predictor(coef), np.random.default_rng(rng),
                                   coef_vector(coef, self.n_coef))

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
        LinearRegression, LogisticRegression, PoissonRegression or NegativeBinomialRegression
        """
        cls = type(self) if family is None else family
        kw = {name: getattr(self, name) for name in self.family_options
              if name in cls.family_options}
        kw.update(options)
        if kw.get("noise_sd") is not None:   # a known noise sd has no prior
            kw.pop("noise_sd_prior", None)
        new = cls(self.X, y, prior=self.prior if prior is None else prior,
                  add_intercept=self.add_intercept, coef_names=self.feature_names,
                  weights=self.weights, check=False, **kw)
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

    def with_theta_prior(self, mean, cov):
        """The same model under a Gaussian prior N(mean, cov) on theta, kept as the model's
        prior blocks can hold it: the coefficients' block as a `GaussianPrior`, each family
        parameter with its own mean and variance (correlations between the blocks dropped).
        For calibration against a Laplace approximation."""
        mean, cov = np.asarray(mean, dtype=float), np.asarray(cov, dtype=float)
        nb = self.n_beta
        prior = GaussianPrior(mean=mean[:nb], cov=cov[:nb, :nb])
        return self.with_response(self.y, prior=prior,
                                  **self._family_prior_options(mean[nb:], np.diag(cov)[nb:]))

    def _family_prior_options(self, means, variances):
        """Constructor options that set the family parameters' Gaussian prior on the sampler's
        scale."""
        if not self.family_param_names:
            return {}
        return {self.family_prior_option: (float(np.exp(means[0])), float(np.sqrt(variances[0])))}

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

    def _draw_response(self, eta, rng, theta):
        """One response per row given eta and the parameter vector theta (sampler's scale):
        the family's `Response` with the family parameters on their natural scale."""
        return self.response.draw(eta, rng, self.natural_scale(theta)[self.n_beta:])

    def natural_scale(self, draws):
        """Draws of theta (..., n_coef) with the family parameters on their natural scale
        (``exp`` of the sampled log); a copy. See `output_names`."""
        out = np.array(draws, dtype=float)
        out[..., self.n_beta:] = np.exp(out[..., self.n_beta:])
        return out

    @property
    def output_names(self):
        """The names of `natural_scale`'s columns."""
        return list(self.coef_names[:self.n_beta]) + list(self.family_natural_names)


def _block_diagonal(a, diag):
    """[[a, 0], [0, diag(diag)]] (a itself when diag is empty)."""
    if len(diag) == 0:
        return a
    n, k = a.shape[0], len(diag)
    out = np.zeros((n + k, n + k))
    out[:n, :n] = a
    out[n:, n:] = np.diag(diag)
    return out
