"""The decision kernel: everything that decides what happens in a test, written once as
functions over a batch of examinees (first axis = examinee).

* :mod:`.prepared` -- the fixed facts of a (design, bank) pair and the ranked tables;
* :mod:`.state` -- the batch state;
* :mod:`.cycle` -- the start / answer / finish cycle;
* :mod:`.eligibility`, :mod:`.selection`, :mod:`.shadow` -- which items may be given and which
  one is, with exposure control, blueprint rules and shadow tests;
* :mod:`.stopping` -- the stopping rules;
* :mod:`.final_report` -- the final report;
* :mod:`.random_streams` -- counter-based random streams, so no state is shared between
  examinees.

The live session (:mod:`adaptive_engine.live`) runs it on a batch of one, the simulation
(:mod:`adaptive_engine.simulation`) on thousands.
"""

from .cycle import FinalEstimates, answer, final_estimates, finish, rebuild, start
from .final_report import final_reports
from .prepared import TestContext, build_context
from .random_streams import examinee_seeds, stream_key
from .state import KernelState
from .stopping import stop_reasons

__all__ = [
    "FinalEstimates", "KernelState", "TestContext", "answer", "build_context", "examinee_seeds",
    "final_estimates", "final_reports", "finish", "rebuild", "start",
    "stop_reasons", "stream_key",
]
