"""Item response theory, the bottom layer: nothing here knows about banks, designs or tests.

* :mod:`.models` -- response functions of the 1PL-4PL, graded and generalized partial
  credit models, their derivatives and Fisher information;
* :mod:`.multidimensional` -- the compensatory M2PL, M3PL and multidimensional graded
  models in slope-intercept form: probabilities, derivatives, the information matrix,
  information in a direction, MDISC and MDIFF;
* :mod:`.posterior` -- the ability posterior on a grid (normal prior, weights, mean and SD);
* :mod:`.estimation` -- MLE, MAP, EAP and WLE scoring of response patterns;
* :mod:`.multidimensional_estimation` -- MAP, EAP, MLE and WLE of ability vectors (K
  dimensions) under a multivariate normal prior;
* :mod:`.small_matrices` -- K x K inverses, determinants and Cholesky factors of a batch,
  elementwise;
* :mod:`.person_fit` -- the lz and lz* person-fit statistics;
* :mod:`.curves` -- item and test information, standard error and expected-score curves.
"""

from ..lazy_names import lazy_namespace

# Public names are loaded from their modules on first use: importing one module of
# the package does not import the others (a short command-line call stays quick).
_LAZY = {
    "expected_score_curve": "curves",
    "item_information": "curves",
    "standard_error_curve": "curves",
    "test_information": "curves",
    "METHODS": "estimation",
    "AbilityEstimates": "estimation",
    "estimate": "estimation",
    "score_responses": "estimation",
    "ItemParameters": "models",
    "MultidimensionalParameters": "multidimensional",
    "PersonFit": "person_fit",
    "DEFAULT_GRID": "posterior",
    "normal_log_prior": "posterior",
    "posterior_mean_sd": "posterior",
    "posterior_weights": "posterior",
}

__all__ = [
    "DEFAULT_GRID", "METHODS", "AbilityEstimates", "ItemParameters", "MultidimensionalParameters", "PersonFit",
    "estimate",
    "expected_score_curve", "item_information", "normal_log_prior",
    "posterior_mean_sd", "posterior_weights", "score_responses", "standard_error_curve",
    "test_information",
]


__getattr__, __dir__ = lazy_namespace(__name__, _LAZY, globals())
