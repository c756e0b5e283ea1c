"""Test designs: the frozen design types, the TOML design file, the check against a bank.

* :mod:`.types` -- the design's frozen classes, which check themselves, and its option enums:
  the contract with the decision kernel;
* :mod:`.toml_file` -- reading and writing the TOML design file;
* :mod:`.bank_fit` -- whether a design can run on a given bank;
* :mod:`.exposure_parameters` -- the Sympson-Hetter exposure parameter file.
"""

from .bank_fit import check_design_against_bank, describe_design, require_design_fits_bank
from .exposure_parameters import read_exposure_parameters
from .toml_file import design_as_dict, design_from_dict, design_to_toml, parse_design, read_design, validate_design
from .types import (
    BLUEPRINT_METHODS,
    CRITERIA,
    EXPOSURE_METHODS,
    EXTREME_PATTERN_METHODS,
    RENAMED_KEYS,
    RENAMED_VALUES,
    SCORING_METHODS,
    AreaRule,
    Blueprint,
    BlueprintMethod,
    ConfidenceRule,
    CutScore,
    Design,
    Exposure,
    ExposureMethod,
    ExtremePatternMethod,
    Opening,
    Reporting,
    ScaleRule,
    Scoring,
    ScoringMethod,
    Selection,
    SelectionCriterion,
    SprtRule,
    Stopping,
)

__all__ = [
    "BLUEPRINT_METHODS", "CRITERIA", "EXPOSURE_METHODS", "EXTREME_PATTERN_METHODS", "SCORING_METHODS",
    "RENAMED_KEYS", "RENAMED_VALUES",
    "AreaRule", "Blueprint", "BlueprintMethod", "ConfidenceRule", "CutScore", "Design", "Exposure",
    "ExposureMethod", "ExtremePatternMethod", "Opening", "Reporting", "ScaleRule", "Scoring", "ScoringMethod",
    "Selection", "SelectionCriterion", "SprtRule", "Stopping",
    "check_design_against_bank", "describe_design", "design_as_dict", "design_from_dict",
    "design_to_toml", "parse_design", "read_design", "read_exposure_parameters",
    "require_design_fits_bank", "validate_design",
]
