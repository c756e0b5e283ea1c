"""Prior densities on item parameters for Bayesian modal estimation (Mislevy 1986).

Each item parameter may carry a prior: log-normal on the slope ``a``, normal on the
difficulty ``b`` (and on every GRM/GPCM threshold), beta on the lower asymptote ``c`` and on
the upper asymptote ``d``.  The M-step maximises ``log L + log prior`` in an unconstrained
parameterisation (``u = log a``, ``b``, ``logit c``, ``logit d``); a change of variables
moves no maximum, so no Jacobian term is added and the mode is the mode of the prior as
written on the natural parameter.

Priors are on by default for 3PL and 4PL items only (where the asymptotes are weakly
identified without them) and can be set per parameter with a short text of our own syntax::

    a=lognormal:0,0.5    b=normal:0,2    c=beta:5,17    d=beta:20,2    c=none
"""

from __future__ import annotations

import math

import attrs
import numpy as np

from ..errors import CalibrationError

PARAMETERS = ("a", "b", "c", "d")
_FAMILY_FOR = {"a": "lognormal", "b": "normal", "c": "beta", "d": "beta"}


def _positive(instance, attribute, value):
    if not (math.isfinite(value) and value > 0):
        raise CalibrationError(f"{attribute.name} must be a positive number, got {value}",
                               location="prior")


@attrs.frozen(kw_only=True)
class ParameterPrior:
    """One prior density.

    Attributes
    ----------
    kind : {"lognormal", "normal", "beta"}
    first, second : float
        ``lognormal``: mean and SD of ``log a``; ``normal``: mean and SD;
        ``beta``: the two shape parameters (alpha, beta), both > 0.
    """

    kind: str = attrs.field(validator=attrs.validators.in_(("lognormal", "normal", "beta")))
    first: float = attrs.field(converter=float)
    second: float = attrs.field(converter=float, validator=_positive)

    @first.validator
    def _check_first(self, attribute, value):
        if not math.isfinite(value) or (self.kind == "beta" and value <= 0):
            raise CalibrationError(f"first prior parameter must be {'positive' if self.kind == 'beta' else 'finite'}, "
                                   f"got {value}", location="prior")

    def describe(self) -> str:
        return f"{self.kind}:{self.first:g},{self.second:g}"

    def terms(self, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Log density, gradient and second derivative in the unconstrained parameter.

        Parameters
        ----------
        eta : array, any shape
            ``log a`` for lognormal, ``b`` for normal, ``logit`` of c or d for beta.
        """
        if self.kind == "lognormal":
            # log p(a) = -log a - (log a - m)^2 / (2 s^2), written in u = log a
            z = (eta - self.first) / self.second
            return -eta - 0.5 * z**2, -1.0 - z / self.second, np.full_like(eta, -1.0 / self.second**2)
        if self.kind == "normal":
            z = (eta - self.first) / self.second
            return -0.5 * z**2, -z / self.second, np.full_like(eta, -1.0 / self.second**2)
        alpha, beta = self.first, self.second
        p = 1.0 / (1.0 + np.exp(-eta))
        log_p = -np.logaddexp(0.0, -eta)
        log_q = -np.logaddexp(0.0, eta)
        value = (alpha - 1.0) * log_p + (beta - 1.0) * log_q
        grad = (alpha - 1.0) * (1.0 - p) - (beta - 1.0) * p
        hess = -(alpha + beta - 2.0) * p * (1.0 - p)
        return value, grad, hess


#: Defaults for 3PL/4PL items.  The prior forms are those of Bayes modal estimation
#: (Mislevy 1986, Psychometrika 51, 177-195; Swaminathan & Gifford 1986, Psychometrika 51,
#: 589-601, for the beta prior on c); the values are common practice: a log-normal slope
#: prior centred at a = 1, a wide normal on b, and beta(5, 17) on c (mode 0.2, the weight
#: of about 20 prior observations, for four-option items).  The d prior is our own
#: choice, with its mode at 0.95 because upper asymptotes sit close to 1 in practice.
DEFAULT_PRIORS = {
    "a": ParameterPrior(kind="lognormal", first=0.0, second=0.5),
    "b": ParameterPrior(kind="normal", first=0.0, second=2.0),
    "c": ParameterPrior(kind="beta", first=5.0, second=17.0),
    "d": ParameterPrior(kind="beta", first=20.0, second=2.0),
}
MODELS_WITH_DEFAULT_PRIORS = ("3PL", "4PL")
#: parameters each model estimates (b stands for the thresholds of GRM/GPCM items)
ESTIMATED = {"1PL": ("a", "b"), "2PL": ("a", "b"), "3PL": ("a", "b", "c"), "4PL": ("a", "b", "c", "d"),
             "GRM": ("a", "b"), "GPCM": ("a", "b")}


@attrs.frozen(kw_only=True)
class PriorChoice:
    """Which priors to use, per parameter.

    Attributes
    ----------
    overrides : dict parameter -> ParameterPrior or None
        User settings; ``None`` switches that parameter's prior off.
    use_defaults : bool
        Whether 3PL/4PL items get :data:`DEFAULT_PRIORS` for parameters not overridden.
    """

    overrides: dict = attrs.field(factory=dict)
    use_defaults: bool = True

    def for_model(self, model: str) -> dict:
        """Priors (parameter -> ParameterPrior) that apply to items of ``model``."""
        out = {}
        for name in PARAMETERS:
            if name in self.overrides:
                prior = self.overrides[name]
            elif self.use_defaults and model in MODELS_WITH_DEFAULT_PRIORS:
                prior = DEFAULT_PRIORS[name]
            else:
                prior = None
            if prior is not None:
                out[name] = prior
        return out

    def describe(self) -> dict:
        """Priors in force per model, only on parameters the model estimates."""
        return {m: {k: p.describe() for k, p in self.for_model(m).items() if k in ESTIMATED[m]}
                for m in ESTIMATED}


def parse_prior(text: str) -> tuple[str, ParameterPrior | None]:
    """Parse ``PARAM=KIND:FIRST,SECOND`` (or ``PARAM=none``).

    Raises
    ------
    CalibrationError
        Naming the offending text.
    """
    where = f"prior {text}"
    name, sep, spec = text.partition("=")
    name = name.strip()
    if not sep or name not in PARAMETERS:
        raise CalibrationError("expected PARAM=KIND:FIRST,SECOND with PARAM one of a, b, c, d",
                               location=where)
    spec = spec.strip()
    if spec.lower() == "none":
        return name, None
    kind, sep, numbers = spec.partition(":")
    kind = kind.strip().lower()
    if kind != _FAMILY_FOR[name]:
        raise CalibrationError(f"parameter {name} takes a {_FAMILY_FOR[name]} prior, not {kind!r}",
                               location=where)
    parts = numbers.split(",")
    try:
        first, second = (float(x) for x in parts)
    except ValueError:
        raise CalibrationError("expected two numbers after the colon, e.g. lognormal:0,0.5",
                               location=where) from None
    try:
        return name, ParameterPrior(kind=kind, first=first, second=second)
    except CalibrationError as exc:
        raise CalibrationError(exc.problems[0].message, location=where) from None


def prior_choice_from_texts(texts, *, use_defaults: bool = True) -> PriorChoice:
    """Build a :class:`PriorChoice` from ``--prior`` texts."""
    overrides = {}
    for text in texts:
        name, prior = parse_prior(text)
        overrides[name] = prior
    return PriorChoice(overrides=overrides, use_defaults=use_defaults)
