"""The decision kernel: everything that decides what happens in a test, written once as
functions over a batch of examinees (first axis = examinee).

* :mod:`.prepared` -- the fixed facts of a (design, bank) pair and the ranked tables;
* :mod:`.state` -- the batch state;
* :mod:`.cycle` -- the start / answer / finish cycle;
* :mod:`.eligibility`, :mod:`.selection`, :mod:`.shadow` -- which items may be given and which
  one is, with exposure control, blueprint rules and shadow tests (:mod:`.multidimensional_shadow`
  for an ability vector);
* :mod:`.stopping` -- the stopping rules;
* :mod:`.final_report` -- the final report;
* :mod:`.random_streams` -- counter-based random streams, so no state is shared between
  examinees.

The live session (:mod:`adaptive_engine.live`) runs it on a batch of one, the simulation
(:mod:`adaptive_engine.simulation`) on thousands.
"""

from ..lazy_names import lazy_namespace

# Public names are loaded from their modules on first use: importing one module of
# the package does not import the others (a short command-line call stays quick).
_LAZY = {
    "FinalEstimates": "cycle",
    "answer": "cycle",
    "final_estimates": "cycle",
    "finish": "cycle",
    "rebuild": "cycle",
    "start": "cycle",
    "final_reports": "final_report",
    "TestContext": "prepared",
    "build_context": "prepared",
    "examinee_seeds": "random_streams",
    "stream_key": "random_streams",
    "KernelState": "state",
    "stop_reasons": "stopping",
}

__all__ = [
    "FinalEstimates", "KernelState", "TestContext", "answer", "build_context", "examinee_seeds",
    "final_estimates", "final_reports", "finish", "rebuild", "start",
    "stop_reasons", "stream_key",
]


__getattr__, __dir__ = lazy_namespace(__name__, _LAZY, globals())
