"""Bank maintenance: calibrate items from responses, check item fit, link scales, and
calibrate pretest items seeded in live sessions.

* :func:`calibrate_responses` -- MML-EM (Bock & Aitkin 1981) with Bayesian modal priors
  (Mislevy 1986), sparse data, mixed models, a common slope;
* :func:`calibrate_multidimensional_responses` -- confirmatory MML-EM for a K-dimensional
  template (M2PL, M3PL, MGRM; K <= 3), latent correlations (also reached through
  :func:`calibrate_responses` with such a template);
* :func:`estimate_at_known_abilities` -- the M-step alone, for abilities taken as known;
* :mod:`.item_fit` -- S-X2 (Orlando & Thissen 2000), a grouped posterior chi-square for
  sparse data, infit/outfit for Rasch items;
* :mod:`.linking` -- mean/mean, mean/sigma, Haebara and Stocking-Lord transformations;
* :mod:`.pretest` -- fixed-parameter calibration of pretest items from the session store.
"""

from .data import CalibrationData, prepare_data
from .em import (
    CalibrationResult,
    CalibrationSettings,
    calibrate_data,
    calibrate_responses,
    estimate_at_known_abilities,
)
from .multidimensional_em import MultidimensionalCalibrationResult, calibrate_multidimensional_responses
from .priors import DEFAULT_PRIORS, ParameterPrior, PriorChoice, parse_prior, prior_choice_from_texts

__all__ = [
    "CalibrationData", "prepare_data", "CalibrationResult", "CalibrationSettings",
    "calibrate_data", "calibrate_responses", "estimate_at_known_abilities", "DEFAULT_PRIORS",
    "ParameterPrior", "PriorChoice", "parse_prior", "prior_choice_from_texts",
    "MultidimensionalCalibrationResult", "calibrate_multidimensional_responses",
]
