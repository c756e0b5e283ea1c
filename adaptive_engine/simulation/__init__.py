"""The simulation driver and the studies built on it.

* :mod:`.engine` -- simulated examinees through the kernel, in chunks, optionally in parallel
  (:class:`Execution`: how a run is carried out);
* :mod:`.population` -- the simulated population (:class:`Population`, ability specifications);
* :mod:`.metrics` -- precision, exposure, classification and content summaries;
* :mod:`.study` -- a simulation study written to files;
* :mod:`.html_report` -- the HTML report of a study or a tuning run;
* :mod:`.tuning` -- trying variations of a design;
* :mod:`.multidimensional_tuning` -- the same for a design with an ability vector;
* :mod:`.exposure_tuning` -- fitting Sympson-Hetter exposure parameters by iterated simulation.
"""

from ..errors import SimulationError
from .engine import Execution, SimulationResult, perturbed_bank, simulate
from .exposure_tuning import ExposureCalibration, calibrate_sympson_hetter, with_parameters
from .metrics import summarize
from .multidimensional_tuning import tune_multidimensional
from .population import AbilitySpec, Population, examinee_count, parse_ability_spec
from .study import Study, run_study
from .tuning import Variation, parse_variation, tune

__all__ = [
    "AbilitySpec", "Execution", "ExposureCalibration", "Population", "SimulationError", "SimulationResult",
    "Study", "Variation", "calibrate_sympson_hetter", "examinee_count", "parse_ability_spec",
    "parse_variation", "perturbed_bank", "run_study", "simulate", "summarize", "tune",
    "tune_multidimensional", "with_parameters",
]
