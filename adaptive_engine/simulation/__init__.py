"""The simulation driver and the studies built on it.

* :mod:`.engine` -- simulated examinees through the kernel, in chunks, optionally in parallel
  (:class:`Execution`: how a run is carried out); :mod:`.multidimensional_engine` the same
  for an ability vector; :mod:`.shared_histories` lets both compute the early steps of a
  chunk once per history of answers when the design draws nothing at random;
* :mod:`.population` -- the simulated population (:class:`Population`, ability specifications);
* :mod:`.metrics` -- precision, exposure, classification and content summaries;
* :mod:`.study` -- a simulation study written to files;
* :mod:`.html_report` -- the HTML report of a study or a tuning run;
* :mod:`.tuning` -- trying variations of a design;
* :mod:`.multidimensional_tuning` -- the same for a design with an ability vector;
* :mod:`.exposure_tuning` -- fitting Sympson-Hetter exposure parameters by iterated simulation.
"""

from ..errors import SimulationError
from ..lazy_names import lazy_namespace

# Public names are loaded from their modules on first use: `simulate` does not import the
# tuning, exposure-tuning or multidimensional modules (and what they import) unless asked.
_LAZY = {
    "Execution": "engine", "SimulationResult": "engine", "perturbed_bank": "engine", "simulate": "engine",
    "ExposureCalibration": "exposure_tuning", "calibrate_sympson_hetter": "exposure_tuning",
    "with_parameters": "exposure_tuning",
    "summarize": "metrics",
    "tune_multidimensional": "multidimensional_tuning",
    "AbilitySpec": "population", "Population": "population", "examinee_count": "population",
    "parse_ability_spec": "population",
    "Study": "study", "run_study": "study",
    "Variation": "tuning", "parse_variation": "tuning", "tune": "tuning",
}

__all__ = [
    "AbilitySpec", "Execution", "ExposureCalibration", "Population", "SimulationError", "SimulationResult",
    "Study", "Variation", "calibrate_sympson_hetter", "examinee_count", "parse_ability_spec",
    "parse_variation", "perturbed_bank", "run_study", "simulate", "summarize", "tune",
    "tune_multidimensional", "with_parameters",
]

__getattr__, __dir__ = lazy_namespace(__name__, _LAZY, globals())
