"""Item response theory, the bottom layer: nothing here knows about banks, designs or tests.

* :mod:`.models` -- response functions of the 1PL-4PL, graded and generalized partial
  credit models, their derivatives and Fisher information;
* :mod:`.multidimensional` -- the compensatory M2PL, M3PL and multidimensional graded
  models in slope-intercept form: probabilities, derivatives, the information matrix,
  information in a direction, MDISC and MDIFF;
* :mod:`.posterior` -- the ability posterior on a grid (normal prior, weights, mean and SD);
* :mod:`.estimation` -- MLE, MAP, EAP and WLE scoring of response patterns;
* :mod:`.multidimensional_estimation` -- MAP, EAP and MLE of ability vectors (K dimensions)
  under a multivariate normal prior;
* :mod:`.person_fit` -- the lz and lz* person-fit statistics;
* :mod:`.curves` -- item and test information, standard error and expected-score curves.
"""

from .curves import expected_score_curve, item_information, standard_error_curve, test_information
from .estimation import METHODS, AbilityEstimates, estimate, score_responses
from .models import ItemParameters
from .multidimensional import MultidimensionalParameters
from .person_fit import PersonFit
from .posterior import DEFAULT_GRID, normal_log_prior, posterior_mean_sd, posterior_weights

__all__ = [
    "DEFAULT_GRID", "METHODS", "AbilityEstimates", "ItemParameters", "MultidimensionalParameters", "PersonFit",
    "estimate",
    "expected_score_curve", "item_information", "normal_log_prior",
    "posterior_mean_sd", "posterior_weights", "score_responses", "standard_error_curve",
    "test_information",
]
