"""Regression families: linear (noise sd known or sampled), logistic, binomial with trials,
Poisson and negative-binomial (NB2) GLMs."""

import warnings

import numpy as np
from scipy import special

from .._arrays import symmetrized
from .._validation import check_finite_matrix, fail, first_bad_row_value
from ..exceptions import DataWarning, ModeNotFoundError
from . import _kernels
from ._glm import _GLM
from ._inputs import check_median_prior, check_noise_sd, float_vector, read_array, rows_text
from ._response import (BernoulliResponse, BinomialResponse, NegativeBinomialResponse,
                        NormalResponse, PoissonResponse)

#: The default priors' sds of log sigma (see `LinearRegression`) and of log alpha (see
#: `NegativeBinomialRegression`).
DEFAULT_NOISE_LOG_SD = 2.0
DEFAULT_DISPERSION_LOG_SD = 2.5


class LinearRegression(_GLM):
    """Linear regression with Gaussian noise: y_i ~ Normal(x_i . beta, sigma^2).

    The noise sd sigma is sampled with the coefficients unless it is given (``noise_sd``). It is
    sampled as log sigma, the last parameter after the coefficients (named "log_noise_sd" in
    `coef_names`; results report it as "noise_sd", on its natural scale), with the prior
    ``noise_sd_prior``. With a known noise sd and a Gaussian prior the posterior is Gaussian
    and known exactly (`tallchain.conjugate_posterior`).

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
        Design matrix. A float32 or float64 C-ordered array (a memory map too) is kept as
        given, without a copy; integer, bool, Fortran-ordered or nested-list input is copied
        to float64, C order. A one-dimensional X is one column.
    y : array-like of shape (n_rows,)
        Response.
    noise_sd : float or None, default=None
        Known noise standard deviation: a finite number > 0 (a numpy scalar too). None
        (default): the noise sd is unknown and sampled.
    noise_sd_prior : (median, log_sd) or None, default=None
        Prior of a sampled noise sd: log-normal, log sigma ~ Normal(log median, log_sd^2).
        None: median = the sd of y (the noise sd of a model with an intercept is at most
        about that) and log_sd = 2, weakly informative: 95% of the prior mass lies between
        median / 50 and median x 50. Only with ``noise_sd`` None.
    prior : GaussianPrior or None, default=None
        Prior on the coefficients, intercept first; None means ``GaussianPrior()`` (mean 0,
        sd 10 for every coefficient).
    add_intercept : bool, default=True
        Add an intercept as coefficient 0 (named "intercept").
    coef_names : sequence of str, optional
        Distinct names of the columns of X, one per column (default x0, x1, ...); with an
        intercept, none may be "intercept".
    weights : array-like of shape (n_rows,), optional
        Frequency weights (every family takes them): row i counts as weights[i] rows, the
        same posterior as the data with each row repeated that many times. Finite and >= 0.
    check : bool, default=True
        Scan X, y for NaN or inf. False skips these passes over the data (for data already
        checked); the argument checks always run.

    Raises
    ------
    InputError
        If an argument is invalid (``noise_sd`` first, not a finite number > 0, or
        ``noise_sd_prior`` not a (median > 0, log_sd > 0) pair, or given with ``noise_sd``;
        a sampled noise sd without ``noise_sd_prior`` on a constant y): X not a
        two-dimensional numeric array (or ragged), without coefficients, or with fewer than 2
        rows; y not numeric or of another length than X has rows; a non-bool ``add_intercept``
        or ``check``; ``coef_names`` not distinct strings, one per column; ``prior`` not a
        `GaussianPrior` or of the wrong length. With ``check``, also NaN or inf in the data.
        The message names the argument and the fix.
    """

    family = _kernels.LINEAR
    family_name = "linear"
    family_options = ("noise_sd", "noise_sd_prior")
    family_prior_option = "noise_sd_prior"

    def __init__(self, X, y, *, noise_sd=None, noise_sd_prior=None, prior=None,
                 add_intercept=True, coef_names=None, weights=None, check=True):
        if noise_sd is not None:
            noise_sd = check_noise_sd(noise_sd)
            if noise_sd_prior is not None:
                fail("noise_sd_prior", "is given but the noise sd is known (noise_sd="
                     f"{noise_sd:g})", "leave noise_sd out to sample it, or drop noise_sd_prior")
        else:
            noise_sd_prior = check_median_prior("noise_sd_prior", noise_sd_prior)
        self.noise_sd_prior = noise_sd_prior
        self.family_param_names = () if noise_sd is not None else ("log_noise_sd",)
        self.family_natural_names = () if noise_sd is not None else ("noise_sd",)
        #: The posterior is Gaussian and known exactly only with a known noise sd.
        self.closed_form_posterior = noise_sd is not None
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, noise_sd=noise_sd,
                         coef_names=coef_names, weights=weights, check=check)

    @property
    def response(self):
        """The response given the linear predictor: `NormalResponse` with this noise sd
        (None when the noise sd is sampled: each draw's own then)."""
        return NormalResponse(self.noise_sd)

    def _default_family_prior(self):
        w = None if self.weights is None else self.weights
        mean = np.average(self.y, weights=w)
        median = float(np.sqrt(np.average((self.y - mean) ** 2, weights=w)))
        if not median > 0:
            fail("y", "is constant, so the default prior of the noise sd (median = the sd of y) "
                 "is undefined", "give noise_sd_prior=(median, log_sd) or noise_sd")
        return median, DEFAULT_NOISE_LOG_SD


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
    weights : array-like of shape (n_rows,), optional
        Frequency weights: row i counts as weights[i] rows (finite, >= 0).
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

    def __init__(self, X, y, *, prior=None, add_intercept=True, coef_names=None, weights=None,
                 check=True):
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, coef_names=coef_names,
                         weights=weights, check=check)

    response_class = BernoulliResponse

    def check_mode(self, mode, information):
        """Raise when logistic data are (quasi-)separated and the prior is too weak to hold
        the mode.

        Separation shows as a likelihood that flattens along some direction v as |beta| grows:
        the data curvature v' I(mode) v collapses (here: below 1e-6 of its value at the prior
        mean, where every row still contributes), while the prior along v is far wider than
        the distance the optimiser travelled. With an informative prior the posterior is proper
        and the mode is kept: sampling then works, and no error is raised.
        """
        info0 = symmetrized(-self.log_likelihood_hessian(self.prior_mean))
        evals, evecs = np.linalg.eigh(info0)
        for lam0, v in zip(evals, evecs.T):
            # A direction without information even at the prior mean is collinearity (e.g. a
            # constant column beside the intercept), not separation: the prior decides it.
            if lam0 <= 1e-8 * evals[-1]:
                continue
            collapsed = v @ information @ v < 1e-6 * lam0
            prior_var = v @ self.prior_cov @ v
            travelled = (v @ (mode - self.prior_mean)) ** 2
            if collapsed and prior_var > 100.0 * travelled:
                raise ModeNotFoundError(
                    "mode finding: the logistic likelihood keeps rising along a direction of "
                    "the coefficients (complete or quasi-complete separation): the maximum "
                    "likelihood estimate does not exist and the flat prior cannot hold the "
                    "posterior; use an informative prior (e.g. prior_sd = 2.5 on standardised "
                    "features) or drop the separating column")
        return 1   # the Hessian at the prior mean

    def _check_response(self, y):
        bad = np.flatnonzero((y != 0) & (y != 1))
        if bad.size:
            fail("y", f"has label {y[bad[0]]:g} in row {bad[0]} ({rows_text(bad.size)} outside {{0, 1}})",
                 "logistic regression needs labels 0 or 1")
        events = int(np.count_nonzero(y))
        if events in (0, y.shape[0]):
            label, side = (0, "no events") if events == 0 else (1, "no non-events")
            warnings.warn(f"y: has {side} (every label is {label}): the likelihood keeps "
                          "rising as the intercept goes to "
                          f"{'-' if label == 0 else '+'}infinity, so the prior's tail alone "
                          "sets it; check the response column, or give the intercept a prior "
                          "that says what you know", DataWarning, stacklevel=4)


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
    weights : array-like of shape (n_rows,), optional
        Frequency weights: row i counts as weights[i] rows (finite, >= 0).
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
    family_options = ("offset",)

    def __init__(self, X, y, *, offset=None, prior=None, add_intercept=True, coef_names=None,
                 weights=None, check=True):
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, offset=offset,
                         coef_names=coef_names, weights=weights, check=check)

    response_class = PoissonResponse

    def _check_response(self, y):
        _check_counts(y, "Poisson regression")


def _check_counts(y, what):
    bad = np.flatnonzero((y < 0) | (y != np.floor(y)))
    if bad.size:
        fail("y", f"has count {y[bad[0]]:g} in row {bad[0]} ({rows_text(bad.size)} not a count)",
             f"{what} needs non-negative integer counts")


class NegativeBinomialRegression(_GLM):
    """Negative-binomial (NB2) regression with log link and its dispersion sampled.

    y_i ~ NB with mean mu_i = exp(x_i . beta + offset_i) and variance mu_i + alpha mu_i^2
    (Cameron & Trivedi 2013, Regression Analysis of Count Data, 2nd ed., section 3.3): counts
    more variable than Poisson. The dispersion alpha is sampled as log alpha, the last
    parameter after the coefficients ("log_dispersion" in `coef_names`; results report
    "dispersion", alpha itself), with the prior ``dispersion_prior``.

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
        Design matrix, kept as given when float32/float64 C-ordered (see `PoissonRegression`).
    y : array-like of shape (n_rows,)
        Counts: non-negative integers.
    offset : array-like of shape (n_rows,), optional
        Log exposure added to the linear predictor (default 0).
    dispersion_prior : (median, log_sd) or None, default=None
        Log-normal prior of alpha: log alpha ~ Normal(log median, log_sd^2). None: median 1,
        log_sd 2.5, weakly informative (95% of the prior mass between alpha = 0.007, nearly
        Poisson, and 134).
    prior : GaussianPrior or None, default=None
        Prior on the coefficients, intercept first; None means ``GaussianPrior()``.
    add_intercept : bool, default=True
    coef_names : sequence of str, optional
    weights : array-like of shape (n_rows,), optional
        Frequency weights: row i counts as weights[i] rows (finite, >= 0).
    check : bool, default=True
        Scan X, y, offset for NaN or inf, and y for values that are not counts.

    Raises
    ------
    InputError
        As `PoissonRegression`, and when ``dispersion_prior`` is not a (median > 0,
        log_sd > 0) pair.
    """

    family = _kernels.NEG_BINOMIAL
    family_name = "negative-binomial"
    family_options = ("offset", "dispersion_prior")
    family_prior_option = "dispersion_prior"
    family_param_names = ("log_dispersion",)
    family_natural_names = ("dispersion",)

    def __init__(self, X, y, *, offset=None, dispersion_prior=None, prior=None,
                 add_intercept=True, coef_names=None, weights=None, check=True):
        self.dispersion_prior = check_median_prior("dispersion_prior", dispersion_prior)
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, offset=offset,
                         coef_names=coef_names, weights=weights, check=check)

    response_class = NegativeBinomialResponse

    def _default_family_prior(self):
        return 1.0, DEFAULT_DISPERSION_LOG_SD

    def _check_response(self, y):
        _check_counts(y, "negative-binomial regression")


class BinomialRegression(_GLM):
    """Binomial regression with logit link: successes y_i out of m_i trials,
    y_i ~ Binomial(m_i, 1 / (1 + exp(-x_i . beta))).

    The same posterior as logistic regression on the data expanded to m_i rows of 0/1 labels
    (y_i ones), in one row per group.

    Parameters
    ----------
    X : array-like of shape (n_rows, n_features)
        Design matrix, kept as given when float32/float64 C-ordered (see `LogisticRegression`).
    y : array-like of shape (n_rows,)
        Successes: integers from 0 to the row's trials.
    trials : array-like of shape (n_rows,)
        Trials per row: integers >= 1 (required).
    prior : GaussianPrior or None, default=None
    add_intercept : bool, default=True
    coef_names : sequence of str, optional
    weights : array-like of shape (n_rows,), optional
        Frequency weights: row i counts as weights[i] rows (finite, >= 0).
    check : bool, default=True
        Scan X, y, trials for NaN or inf, trials for integers >= 1 and y for integers from 0
        to the row's trials.

    Raises
    ------
    InputError
        As `LogisticRegression`; also ``trials`` missing, of another length than X has rows,
        or not integers >= 1, and successes outside [0, trials].
    """

    family = _kernels.BINOMIAL
    family_name = "binomial"
    family_options = ("trials",)
    required_options = ("trials",)

    def __init__(self, X, y, *, trials=None, prior=None, add_intercept=True, coef_names=None,
                 weights=None, check=True):
        if trials is None:
            fail("trials", "is missing", "give the number of trials of every row, "
                 "e.g. BinomialRegression(X, successes, trials=n)")
        self.trials = float_vector("trials", read_array("trials", trials).reshape(-1))
        if check:
            check_finite_matrix("trials", self.trials)
            bad = first_bad_row_value("trials", self.trials)
            if bad is not None:
                fail("trials", f"has {self.trials[bad[0]]:g} in row {bad[0]}", bad[1])
        super().__init__(X, y, prior=prior, add_intercept=add_intercept, coef_names=coef_names,
                         weights=weights, check=check)
        if self.trials.shape[0] != self.n_rows:
            fail("trials", f"has {rows_text(self.trials.shape[0])} but X has {self.n_rows}",
                 "give one number of trials per row")

    response_class = BinomialResponse

    def _draw_response(self, eta, rng, theta):
        # the rows' own trials, which a Response for new rows does not know
        return rng.binomial(self.trials.astype(np.int64), special.expit(eta)).astype(float)

    def _check_response(self, y):
        m = self.trials
        if m.shape[0] != y.shape[0]:
            return   # reported by __init__ with the row counts
        bad = np.flatnonzero((y < 0) | (y > m) | (y != np.floor(y)))
        if bad.size:
            fail("y", f"has {y[bad[0]]:g} successes in row {bad[0]} of {m[bad[0]]:g} trials "
                 f"({rows_text(bad.size)} outside 0..trials)",
                 "binomial regression needs whole numbers of successes from 0 to the trials")


FAMILIES = {"linear": LinearRegression, "logistic": LogisticRegression,
            "poisson": PoissonRegression, "negative-binomial": NegativeBinomialRegression,
            "binomial": BinomialRegression}
