"""Test designs: the frozen design types, the TOML design file, the check against a bank.

* :mod:`.types` -- the design's frozen classes, which check themselves, and its option enums:
  the contract with the decision kernel;
* :mod:`.toml_file` -- reading and writing the TOML design file;
* :mod:`.bank_fit` -- whether a design can run on a given bank;
* :mod:`.exposure_parameters` -- the Sympson-Hetter exposure parameter file.
"""

from ..lazy_names import lazy_namespace

# Public names are loaded from their modules on first use: importing one module of
# the package does not import the others (a short command-line call stays quick).
_LAZY = {
    "check_design_against_bank": "bank_fit",
    "describe_design": "bank_fit",
    "require_design_fits_bank": "bank_fit",
    "read_exposure_parameters": "exposure_parameters",
    "design_as_dict": "toml_file",
    "design_from_dict": "toml_file",
    "design_to_toml": "toml_file",
    "parse_design": "toml_file",
    "read_design": "toml_file",
    "validate_design": "toml_file",
    "BLUEPRINT_METHODS": "types",
    "CRITERIA": "types",
    "EXPOSURE_METHODS": "types",
    "EXTREME_PATTERN_METHODS": "types",
    "RENAMED_KEYS": "types",
    "RENAMED_VALUES": "types",
    "SCORING_METHODS": "types",
    "AreaRule": "types",
    "Blueprint": "types",
    "BlueprintMethod": "types",
    "ConfidenceRule": "types",
    "CutScore": "types",
    "Design": "types",
    "Exposure": "types",
    "ExposureMethod": "types",
    "ExtremePatternMethod": "types",
    "KlWeighting": "types",
    "Opening": "types",
    "Reporting": "types",
    "ScaleRule": "types",
    "Scoring": "types",
    "ScoringMethod": "types",
    "Selection": "types",
    "SelectionCriterion": "types",
    "SprtRule": "types",
    "Stopping": "types",
}

__all__ = [
    "BLUEPRINT_METHODS", "CRITERIA", "EXPOSURE_METHODS", "EXTREME_PATTERN_METHODS", "SCORING_METHODS",
    "RENAMED_KEYS", "RENAMED_VALUES",
    "AreaRule", "Blueprint", "BlueprintMethod", "ConfidenceRule", "CutScore", "Design", "Exposure",
    "ExposureMethod", "ExtremePatternMethod", "KlWeighting", "Opening", "Reporting", "ScaleRule", "Scoring",
    "ScoringMethod", "Selection", "SelectionCriterion", "SprtRule", "Stopping",
    "check_design_against_bank", "describe_design", "design_as_dict", "design_from_dict",
    "design_to_toml", "parse_design", "read_design", "read_exposure_parameters",
    "require_design_fits_bank", "validate_design",
]


__getattr__, __dir__ = lazy_namespace(__name__, _LAZY, globals())
