"""What each family says about its response: the mean given the linear predictor, a draw of a
new observation, the ratio exp(coefficient) means, and the record a run folder keeps."""

import numpy as np
from scipy import special

from .._validation import fail
from ._inputs import check_noise_sd


class Response:
    """The response distribution of a family, given the linear predictor eta.

    Subclasses set ``family_name`` and ``ratio_name`` and define `inverse_link` and `sample`.
    Everything that works with predictions or reports (``tallchain predict``, the summary's
    ratio columns) asks this object, so a new family plugs in by adding one.
    """

    family_name = None
    #: What exp(coefficient) is for this family ("odds ratio", "rate ratio"), or None when
    #: exp of a coefficient has no such reading (the identity link).
    ratio_name = None

    def mean(self, eta):
        """E[y | eta], elementwise: the inverse link."""
        return self.inverse_link(np.asarray(eta, dtype=float))

    def draw(self, eta, rng, extra=None):
        """One new observation y ~ p(y | eta) for every element of ``eta`` (any shape).

        ``extra``: the draws of the family's parameters beyond the coefficients (a noise sd,
        a dispersion), shape (n_draws, k), for eta of shape (rows, n_draws); the families
        here have none and ignore it.
        """
        return self.sample(self.mean(eta), rng)

    def inverse_link(self, eta):
        raise NotImplementedError

    def sample(self, mu, rng):
        """One observation for every element of the mean response ``mu``."""
        raise NotImplementedError

    def options(self):
        """The family's options a prediction needs, as JSON-ready values."""
        return {}

    def record(self):
        """``{"family": name, **options}``: what `response_from_record` rebuilds this from."""
        return {"family": self.family_name, **self.options()}

    def __eq__(self, other):
        return type(self) is type(other) and self.options() == other.options()

    def __repr__(self):
        opts = ", ".join(f"{k}={v!r}" for k, v in self.options().items())
        return f"{type(self).__name__}({opts})"


def _family_parameter(extra, name):
    """The first family parameter of ``extra`` (natural scale), broadcastable against eta of
    shape (rows, n_draws) when extra has shape (n_draws, k), or (rows,) when it has (k,)."""
    extra = None if extra is None else np.asarray(extra, dtype=float)
    if extra is None or extra.shape[-1] < 1:
        fail("draws", f"hold no {name} for a family that samples it",
             "predict from the draws of the run that sampled it")
    return extra[..., 0]


class NormalResponse(Response):
    """y ~ Normal(eta, noise_sd^2): identity link; the noise sd known, or sampled (None: each
    posterior draw's own, passed to `draw` as ``extra``)."""

    family_name = "linear"

    def __init__(self, noise_sd=1.0):
        self.noise_sd = None if noise_sd is None else check_noise_sd(noise_sd)

    def inverse_link(self, eta):
        return eta

    def draw(self, eta, rng, extra=None):
        sd = self.noise_sd if self.noise_sd is not None else _family_parameter(extra, "noise sd")
        mu = self.mean(eta)
        return mu + sd * rng.standard_normal(mu.shape)

    def options(self):
        return {"noise_sd": self.noise_sd}


class BernoulliResponse(Response):
    """y ~ Bernoulli(expit(eta)): the logit link; exp(coefficient) is an odds ratio."""

    family_name = "logistic"
    ratio_name = "odds ratio"

    def inverse_link(self, eta):
        return special.expit(eta)

    def sample(self, mu, rng):
        return (rng.random(mu.shape) < mu).astype(float)


class PoissonResponse(Response):
    """y ~ Poisson(exp(eta)): the log link; exp(coefficient) is a rate ratio."""

    family_name = "poisson"
    ratio_name = "rate ratio"

    def inverse_link(self, eta):
        return np.exp(eta)

    def sample(self, mu, rng):
        # exp(30) ~ 1e13 counts: far beyond any data, and within the sampler's float range
        # (min(exp(eta), exp(30)) is exp(min(eta, 30)), exp being monotone).
        return rng.poisson(np.minimum(mu, np.exp(30.0))).astype(float)


class NegativeBinomialResponse(Response):
    """NB2: y ~ Poisson(mu g), g ~ Gamma(shape 1/alpha, scale alpha), mu = exp(eta), so that
    Var y = mu + alpha mu^2 (Cameron & Trivedi, Regression Analysis of Count Data, 2013);
    the dispersion alpha is each posterior draw's own (``extra``). exp(coefficient) is a
    rate ratio."""

    family_name = "negative-binomial"
    ratio_name = "rate ratio"

    def inverse_link(self, eta):
        return np.exp(eta)

    def draw(self, eta, rng, extra=None):
        r = 1.0 / _family_parameter(extra, "dispersion")
        mu = np.exp(np.minimum(np.asarray(eta, dtype=float), 30.0))   # as PoissonResponse
        return rng.poisson(mu * rng.gamma(r, 1.0 / r, size=mu.shape)).astype(float)


class BinomialResponse(Response):
    """Successes out of each row's trials, y ~ Binomial(m, expit(eta)); the mean response
    here is the probability of success of one trial. exp(coefficient) is an odds ratio."""

    family_name = "binomial"
    ratio_name = "odds ratio"

    def inverse_link(self, eta):
        return special.expit(eta)

    def draw(self, eta, rng, extra=None):
        fail("predict", "new binomial observations need each new row's trials, which "
             "predictions do not take yet", "use the mean response (the probability of "
             "success) of result.summary or fit the rows as logistic 0/1 data")


RESPONSES = {cls.family_name: cls for cls in (NormalResponse, BernoulliResponse, PoissonResponse,
                                              NegativeBinomialResponse, BinomialResponse)}


#: The keys of a model's record (``model.record()``) that describe the design, not the
#: response; `response_from_record` passes over them.
DESIGN_KEYS = ("add_intercept", "feature_names")


def response_from_record(record, field="run.json"):
    """The `Response` a record of `Response.record` (or of ``model.record()``) describes.

    Raises
    ------
    InputError
        An unknown family or options that family does not take, naming ``field``.
    """
    if not isinstance(record, dict) or record.get("family") not in RESPONSES:
        family = record.get("family") if isinstance(record, dict) else record
        fail(field, f"names no known model family ({family!r})",
             f"use a run folder written by tallchain run (families: {', '.join(RESPONSES)})")
    options = {k: v for k, v in record.items() if k not in ("family", *DESIGN_KEYS)}
    try:
        return RESPONSES[record["family"]](**options)
    except TypeError:
        fail(field, f"has options {sorted(options)} the family {record['family']!r} does not take",
             "use a run folder written by this version of tallchain run")
