"""adaptive_engine: computerized adaptive testing with item response theory.

Library first: load a bank (:func:`adaptive_engine.bank.load_bank`), score response
patterns (:mod:`adaptive_engine.estimation`), design and run adaptive tests
(:mod:`adaptive_engine.design`, :mod:`adaptive_engine.session`), prove designs by
simulation (:mod:`adaptive_engine.simulation`) and maintain banks
(:mod:`adaptive_engine.calibration`).  The ``adaptive-engine`` command is a thin layer
over these.
"""

__version__ = "0.1.0"
