"""Test designs: frozen objects that cannot be invalid.

Sections: ``opening``, ``scoring``, ``selection``, ``exposure``, ``blueprint``, ``stopping``,
``reporting``.  The classes below are the contract between a design and the decision
kernel: every field the kernel reads is here, with its default, its type, its range and
the rules between fields.

Validity belongs to the type.  Every class checks all its keys when it is made -- by the
TOML reader, by code (``Stopping(min_items=10, max_items=3)``) or by ``attrs.evolve`` --
and then the rules between its keys; :class:`Design` adds the rules between sections (a
cut on the ability grid, blueprint minimums within ``max_items``, ...).  Every problem is
collected and raised together as one :class:`~adaptive_engine.errors.DesignError`, located
at the key as the design file spells it (``[stopping] min_items``).

Options are string-valued enums (:class:`ScoringMethod`, :class:`ExtremePatternMethod`,
:class:`SelectionCriterion`, :class:`ExposureMethod`, :class:`BlueprintMethod`): a field
given the text ``"eap"`` holds ``ScoringMethod.EAP``, which equals ``"eap"`` and prints,
writes to TOML and to JSON as ``eap``; an unknown text is refused at its key, so the
kernel never meets an option it does not know.

How a key is declared and checked (kinds, ranges, the validating base class
:class:`~adaptive_engine.design.keys.Checked`) is in :mod:`adaptive_engine.design.keys`.
The TOML reader and writer live in :mod:`adaptive_engine.design.toml_file`, the check
against a bank in :mod:`adaptive_engine.design.bank_fit`; the package
:mod:`adaptive_engine.design` exports them all.
"""

from __future__ import annotations

import enum
import warnings

import attrs

from ..errors import DeprecatedDesignKey, DesignError, Problem
from .exposure_parameters import parameter_problems
from .keys import (
    REQUIRED,
    Checked,
    Key,
    above_at_most,
    between,
    each,
    key,
    keys_of,
    magnitude_between,
    number_problem,
    open_interval,
    share_check,
    toml_key,
    toml_string,
    value_kind,
    within,
)

__all__ = [
    "AreaRule", "Blueprint", "BlueprintMethod", "Checked", "ConfidenceRule", "CutScore", "Design", "Exposure",
    "ExposureMethod", "ExtremePatternMethod", "Key", "Opening", "Reporting", "ScaleRule", "Scoring", "ScoringMethod",
    "Selection", "SelectionCriterion", "SprtRule", "Stopping", "design_problems", "key", "keys_of",
    "number_problem", "numbered_cut_problem", "toml_key", "toml_string", "value_kind",
    "BLUEPRINT_METHODS", "CRITERIA", "EXPOSURE_METHODS", "EXTREME_PATTERN_METHODS", "SCORING_METHODS",
    "RENAMED_KEYS", "RENAMED_VALUES", "GRID_LIMIT", "MAX_CONFIDENCE", "MAX_COUNT", "MAX_DECIMALS",
    "MAX_GRID_POINTS", "MAX_SCALE_BOUND", "MAX_SCALE_INTERCEPT", "MAX_TEST_LENGTH", "MAX_TIME_LIMIT",
    "MIN_GRID_POINTS", "PRIOR_SD_RANGE", "SCALE_SLOPE_RANGE", "MULTIDIMENSIONAL_CRITERIA",
    "GRID_POINTS_PER_DIMENSION_RANGE", "MAX_MULTIDIMENSIONAL_GRID", "covariance_problem",
    "EAP_POINTS_PER_DIMENSION_RANGE",
]

# ----------------------------------------------------------------------------------------
# options


class ScoringMethod(enum.StrEnum):
    """Ability estimators (interim and final)."""

    MLE = "mle"
    MAP = "map"
    EAP = "eap"
    WLE = "wle"


class ExtremePatternMethod(enum.StrEnum):
    """The interim estimate of MLE and WLE while the answer pattern is extreme.

    While every scored answer is in the lowest category (or every one in the highest), MLE
    and WLE have no finite value: ``eap`` or ``map`` with the design's prior stands in, or
    ``fixed_step`` moves the previous estimate by ``[scoring] fixed_step`` towards the
    answers.
    """

    EAP = "eap"
    MAP = "map"
    FIXED_STEP = "fixed_step"


class SelectionCriterion(enum.StrEnum):
    """How the next item is chosen among the eligible ones."""

    MAX_FISHER_INFORMATION = "max_fisher_information"
    POSTERIOR_WEIGHTED_INFORMATION = "posterior_weighted_information"
    KULLBACK_LEIBLER = "kullback_leibler"
    A_STRATIFIED = "a_stratified"
    RANDOM = "random"
    #: Multidimensional: the largest determinant of the posterior information after the
    #: item (Segall 1996).
    D_OPTIMALITY = "d_optimality"
    #: Multidimensional: the smallest trace of the posterior covariance after the item.
    A_OPTIMALITY = "a_optimality"
    #: Multidimensional: the largest information in the direction of ``[reporting]
    #: composite_weights`` (one composite of the dimensions).
    MAX_COMPOSITE_INFORMATION = "max_composite_information"


class KlWeighting(enum.StrEnum):
    """How the Kullback-Leibler criterion of an ability vector weighs the divergence over
    the abilities it is taken against (``[selection] kl_weighting``; the vector kernel only)."""

    #: By the posterior on the ability grid (Veldkamp & van der Linden 2002): the vector
    #: kernel's criterion when the key is left out.
    POSTERIOR = "posterior"
    #: Integrated over the box theta_d +- kl_interval / sqrt(n) on every dimension, by the
    #: product of the one-dimensional criterion's quadrature on each axis (the KL index over
    #: a region, Wang, Chang & Boughton 2011, from memory): at K = 1 the one-dimensional
    #: criterion (Chang & Ying 1996).
    INTERVAL = "interval"


#: Criteria that exist only for an ability of several dimensions (K = 1 included).
MULTIDIMENSIONAL_CRITERIA = frozenset({SelectionCriterion.D_OPTIMALITY, SelectionCriterion.A_OPTIMALITY,
                                       SelectionCriterion.MAX_COMPOSITE_INFORMATION})


class ExposureMethod(enum.StrEnum):
    """Exposure control."""

    NONE = "none"
    RANDOMESQUE = "randomesque"
    SYMPSON_HETTER = "sympson_hetter"
    PROGRESSIVE = "progressive"


class BlueprintMethod(enum.StrEnum):
    """How content rules steer selection (both keep every area within its bounds)."""

    #: The next item comes from the open area furthest below its target share
    #: (Kingsbury & Zara 1989); formerly spelled ``constrained``.
    MOST_BEHIND_AREA = "most_behind_area"
    #: Each item's value is weighted by its area's priority (Cheng & Chang 2009).
    MAX_PRIORITY_INDEX = "max_priority_index"


# the option values as tuples (the allowed values of each option key, in order)
SCORING_METHODS = tuple(m.value for m in ScoringMethod)
EXTREME_PATTERN_METHODS = tuple(m.value for m in ExtremePatternMethod)
CRITERIA = tuple(m.value for m in SelectionCriterion)
EXPOSURE_METHODS = tuple(m.value for m in ExposureMethod)
BLUEPRINT_METHODS = tuple(m.value for m in BlueprintMethod)

#: Renamed design keys: (section path, old key) -> new key.  The old spellings are read
#: for one release with a :class:`~adaptive_engine.errors.DeprecatedDesignKey` warning.
RENAMED_KEYS: dict[tuple[str, str], str] = {
    ("opening", "first_items_from_top"): "first_item_candidates",
    ("scoring", "until_mixed"): "extreme_pattern_method",
    ("exposure", "parameters"): "parameters_file",
}
#: Renamed option values: (section path, key, old value) -> new value (read the same way).
RENAMED_VALUES: dict[tuple[str, str, str], str] = {
    ("blueprint", "method", "constrained"): BlueprintMethod.MOST_BEHIND_AREA.value,
}

# ----------------------------------------------------------------------------------------
# ranges

#: Bounds that keep the quadrature grid usable: fewer than 21 points cannot resolve a
#: posterior of SD 0.3 on a 12-logit range; more than 2,001 only cost memory (the kernel
#: holds a bank x grid table and a batch x grid posterior).
MIN_GRID_POINTS = 21
MAX_GRID_POINTS = 2001
#: The ability scale the design may use: the grid (and with it every theta the design
#: names, the prior mean and the estimates) lies within +-GRID_LIMIT logits.  Abilities
#: beyond +-6 are rare, beyond +-20 meaningless, and the arithmetic stays far from overflow.
GRID_LIMIT = 20.0
#: Prior SD: from a very informative prior to one that is flat on any grid.
PRIOR_SD_RANGE = (0.01, 100.0)
#: Points per dimension of a multidimensional ability grid (the grid has points ** K).
GRID_POINTS_PER_DIMENSION_RANGE = (5, 201)
#: Gauss-Hermite nodes per dimension of the EAP of K = 4 to 6 (no grid there).
EAP_POINTS_PER_DIMENSION_RANGE = (2, 12)
#: Most points of a multidimensional ability grid: the kernel holds a bank x grid table
#: and a batch x grid posterior.
MAX_MULTIDIMENSIONAL_GRID = 40_000
#: Longest test (scored items) and most items a count option may name.
MAX_TEST_LENGTH = 1000
MAX_COUNT = 1000
MAX_DECIMALS = 10
#: Reported scale: |slope| in this range, |intercept| and |min|, |max| at most these, so
#: that every scaled score and interval end is an ordinary decimal number.
SCALE_SLOPE_RANGE = (1e-4, 1e4)
MAX_SCALE_INTERCEPT = 1e6
MAX_SCALE_BOUND = 1e7
#: Interval levels: above 0.9999 the normal quantile runs towards infinity in double
#: precision (0.5 + 0.5 * level rounds to 1).
MAX_CONFIDENCE = 0.9999
#: Seconds: 116 days is longer than any sitting.
MAX_TIME_LIMIT = 1e7


def _old_blueprint_method(value):
    """``[blueprint] method`` in its current spelling (``constrained`` is read with a warning)."""
    if isinstance(value, str) and not isinstance(value, BlueprintMethod):
        new = RENAMED_VALUES.get(("blueprint", "method", value))
        if new is not None:
            # stack: this function, the converter, the class's __init__, the caller
            warnings.warn(f'[blueprint] method: "{value}" is now spelled "{new}"; the old value is read until '
                          "the next release", DeprecatedDesignKey, stacklevel=4)
            return new
    return value


# ----------------------------------------------------------------------------------------
# the sections


@attrs.frozen(kw_only=True)
class Opening(Checked):
    """How a test starts.

    ``theta`` is the fixed starting ability; when ``random_theta`` is set (lo, hi) the
    starting ability is drawn uniformly from it instead (for an ability vector, each
    dimension's on its own).  The first item is drawn at random
    among the ``first_item_candidates`` most informative items at the starting ability
    (only the first item: later items follow the exposure method).
    """

    theta: float = key(0.0, "number", within(GRID_LIMIT))
    random_theta: tuple[float, float] | None = key(None, "interval")
    first_item_candidates: int = key(1, "whole", between(1, MAX_COUNT))

    def where(self) -> str:
        return "[opening]"


@attrs.frozen(kw_only=True)
class Scoring(Checked):
    """Interim ability estimation after each answer.

    ``prior_mean``/``prior_sd``: the normal prior (MAP, EAP; examinee-specific values may be
    given at session start).  While the answer pattern is extreme (every answer in the
    lowest category, or every one in the highest) MLE and WLE have no finite value:
    ``extreme_pattern_method`` says what is used then -- ``eap`` or ``map`` with the prior,
    or ``fixed_step`` (previous estimate +- ``fixed_step``).
    ``grid_min``, ``grid_max``, ``grid_points``: the quadrature grid of the posterior.

    A multidimensional ability (a bank of K dimensions) has a multivariate normal prior:
    ``prior_mean`` is then one number per dimension (or one number for all) and
    ``prior_covariance`` a K x K symmetric positive definite matrix (default:
    ``prior_sd ** 2`` times the identity, N(0, I) with the defaults).  Its grid is the
    product of ``grid_points_per_dimension`` points on ``[grid_min, grid_max]`` per
    dimension (default: ``grid_points`` for K = 1, 41 for K = 2, 17 for K = 3).  A session
    may bring its own mean vector and covariance matrix.
    K = 4 to 6 keep no grid: their EAP is an adaptive Gauss-Hermite quadrature around the
    MAP with ``eap_points_per_dimension`` nodes per dimension (default: 5 for K = 4, 4 for
    K = 5, 3 for K = 6).
    """

    method: ScoringMethod = key(ScoringMethod.EAP, "option", option=ScoringMethod)
    prior_mean: float | tuple = key(0.0, "number_or_vector", each(within(GRID_LIMIT)))
    prior_sd: float = key(1.0, "number", between(*PRIOR_SD_RANGE))
    prior_covariance: tuple | None = key(None, "matrix")
    extreme_pattern_method: ExtremePatternMethod = key(ExtremePatternMethod.EAP, "option",
                                                       option=ExtremePatternMethod)
    fixed_step: float = key(0.7, "number", between(0.01, 5.0))
    grid_min: float = key(-6.0, "number", within(GRID_LIMIT))
    grid_max: float = key(6.0, "number", within(GRID_LIMIT))
    grid_points: int = key(121, "whole", between(MIN_GRID_POINTS, MAX_GRID_POINTS))
    grid_points_per_dimension: int | None = key(None, "whole", between(*GRID_POINTS_PER_DIMENSION_RANGE))
    eap_points_per_dimension: int | None = key(None, "whole", between(*EAP_POINTS_PER_DIMENSION_RANGE))

    def where(self) -> str:
        return "[scoring]"

    def on_grid(self, value: float) -> bool:
        return self.grid_min <= value <= self.grid_max

    def rules(self) -> list[Problem]:
        lo, hi = self.grid_min, self.grid_max
        if not lo < hi:
            return [Problem("[scoring] grid_max", f"must be above grid_min ({lo!r}), got {hi!r}")]
        means = self.prior_mean if isinstance(self.prior_mean, tuple) else (self.prior_mean,)
        for j, mean in enumerate(means, start=1):
            if not self.on_grid(mean):
                entry = f"entry {j} " if isinstance(self.prior_mean, tuple) else ""
                return [Problem("[scoring] prior_mean",
                                f"{entry}prior mean {mean!r} lies outside the ability grid [{lo!r}, {hi!r}]")]
        if self.prior_covariance is not None:
            problem = covariance_problem(self.prior_covariance)
            if problem:
                return [Problem("[scoring] prior_covariance", problem)]
            k = len(self.prior_covariance)
            if isinstance(self.prior_mean, tuple) and len(self.prior_mean) != k:
                return [Problem("[scoring] prior_covariance",
                                f"a {k} x {k} matrix, but prior_mean has {len(self.prior_mean)} entries: "
                                "both need one entry per ability dimension")]
        return []


@attrs.frozen(kw_only=True)
class Selection(Checked):
    """Next-item criterion.

    ``kl_interval``: half-width multiplier of the Kullback-Leibler interval,
    theta +- kl_interval / sqrt(n answered) (Chang & Ying 1996).
    ``strata``: number of a-strata for ``a_stratified`` (Chang & Ying 1999); with
    ``b_blocking`` the strata are formed within blocks of b (Chang, Qian & Ying 2001).
    ``kl_weighting`` (``kullback_leibler`` on the vector kernel only; see
    :class:`KlWeighting`): left out, the vector kernel weighs the divergence by the grid
    posterior (``posterior``); ``interval`` integrates it over the box of ``kl_interval``.
    """

    criterion: SelectionCriterion = key(SelectionCriterion.MAX_FISHER_INFORMATION, "option",
                                        option=SelectionCriterion)
    kl_interval: float = key(3.0, "number", between(0.01, 10.0))
    strata: int = key(4, "whole", between(1, MAX_COUNT))
    b_blocking: bool = key(True, "flag")
    kl_weighting: KlWeighting | None = key(None, "option", option=KlWeighting)

    def where(self) -> str:
        return "[selection]"

    def rules(self) -> list[Problem]:
        if self.kl_weighting is not None and self.criterion is not SelectionCriterion.KULLBACK_LEIBLER:
            return [Problem("[selection] kl_weighting",
                            f"weighs the Kullback-Leibler criterion, but the criterion is {self.criterion.value}: "
                            "leave the key out, or use criterion = \"kullback_leibler\"")]
        return []

    @property
    def kl_over_interval(self) -> bool:
        """Kullback-Leibler selection of an ability vector integrated over the box of
        ``kl_interval`` (``kl_weighting = "interval"``): reads no grid posterior."""
        return self.criterion is SelectionCriterion.KULLBACK_LEIBLER and self.kl_weighting is KlWeighting.INTERVAL

    @property
    def kl_over_posterior(self) -> bool:
        """Kullback-Leibler selection weighted by the grid posterior (the vector kernel's
        ``kullback_leibler`` unless ``kl_weighting = "interval"``)."""
        return self.criterion is SelectionCriterion.KULLBACK_LEIBLER and self.kl_weighting is not KlWeighting.INTERVAL


@attrs.frozen(kw_only=True)
class Exposure(Checked):
    """Exposure control.

    ``randomesque``: at random among the ``candidates`` best items (Kingsbury & Zara 1989).
    ``sympson_hetter``: per-item exposure parameters read from the CSV file
    ``parameters_file`` (columns ``item_id,exposure_parameter``; path relative to the
    design file), or per item and ability stratum for the conditional method of Stocking &
    Lewis (1998) (columns ``item_id,theta_from,theta_to,exposure_parameter``; see
    :mod:`adaptive_engine.design.exposure_parameters`).
    ``progressive``: weight of the random part falls as the test goes on (Revuelta &
    Ponsoda 1998); ``acceleration`` is the power of the position/length ratio.
    """

    method: ExposureMethod = key(ExposureMethod.NONE, "option", option=ExposureMethod)
    candidates: int = key(5, "whole", between(1, MAX_COUNT))
    parameters_file: str | None = key(None, "text")
    acceleration: float = key(1.0, "number", between(0.01, 100.0))

    def where(self) -> str:
        return "[exposure]"


@attrs.frozen(kw_only=True)
class AreaRule(Checked):
    """Count rules for one content area: min/max item counts, or a target share."""

    name: str = key(REQUIRED, "text")
    min: int = key(0, "whole", between(0, MAX_TEST_LENGTH))
    max: int | None = key(None, "whole", between(0, MAX_TEST_LENGTH))
    share: float | None = key(None, "number", share_check)

    def where(self) -> str:
        return f"[blueprint.areas.{toml_key(self.name)}]" if isinstance(self.name, str) else "[blueprint.areas]"

    def rules(self) -> list[Problem]:
        where = self.where()
        if self.share is not None and (self.min != 0 or self.max is not None):
            return [Problem(f"{where} share", "give either a share or min/max counts, not both")]
        if self.max is not None and self.max < self.min:
            return [Problem(f"{where} max", f"max ({self.max}) is below min ({self.min})")]
        return []


@attrs.frozen(kw_only=True)
class Blueprint(Checked):
    """Content constraints.

    ``areas``: rules per content area (empty: no content balancing).
    ``method``: ``most_behind_area`` (Kingsbury & Zara 1989) or ``max_priority_index``
    (Cheng & Chang 2009).
    ``enemies``: never give two items of one enemy group; ``item_sets``: once a set is
    entered its items are given together.  Both are off unless the design turns them on,
    so that a design without a blueprint means plain selection among the items not yet
    given.
    ``pretest_positions``: 1-based positions at which a pretest item is seeded (given, not
    scored).  ``shadow_test``: assemble a shadow test (van der Linden & Reese 1998) at each
    step with scipy.optimize.milp and give its best free item.
    """

    areas: tuple[AreaRule, ...] = key((), "parts", part=AreaRule)
    method: BlueprintMethod = key(BlueprintMethod.MOST_BEHIND_AREA, "option", option=BlueprintMethod,
                                  before=_old_blueprint_method)
    enemies: bool = key(False, "flag")
    item_sets: bool = key(False, "flag")
    pretest_positions: tuple[int, ...] = key((), "positions")
    shadow_test: bool = key(False, "flag")

    def where(self) -> str:
        return "[blueprint]"

    def rules(self) -> list[Problem]:
        problems = []
        names = [rule.name for rule in self.areas]
        for rule in self.areas:
            if names.count(rule.name) > 1:
                problems.append(Problem(rule.where(), f"area {rule.name!r} has more than one rule"))
                break
        total_share = sum(rule.share or 0.0 for rule in self.areas)
        if total_share > 1 + 1e-9:
            problems.append(Problem("[blueprint.areas]", f"the area shares add up to {total_share:g}, more than 1"))
        return problems


@attrs.frozen(kw_only=True)
class SprtRule(Checked):
    """Wald's SPRT against ``cut`` with indifference region cut +- ``indifference``."""

    cut: float = key(REQUIRED, "number", within(GRID_LIMIT))
    indifference: float = key(0.2, "number", between(0.01, 5.0))
    alpha: float = key(0.05, "number", open_interval(0, 0.5))
    beta: float = key(0.05, "number", open_interval(0, 0.5))

    def where(self) -> str:
        return "[stopping.sprt]"


@attrs.frozen(kw_only=True)
class ConfidenceRule(Checked):
    """Stop once the ``confidence`` interval around theta excludes ``cut`` (Kingsbury & Weiss 1983)."""

    cut: float = key(REQUIRED, "number", within(GRID_LIMIT))
    confidence: float = key(0.95, "number", above_at_most(0, MAX_CONFIDENCE))

    def where(self) -> str:
        return "[stopping.confidence_interval]"


@attrs.frozen(kw_only=True)
class Stopping(Checked):
    """When to stop: any rule that fires stops the test, never before ``min_items``.

    Counts are of scored (operational) items; pretest items come on top.
    ``se``: stop once SE <= se.  ``se_reduction``: stop once the best remaining item would
    reduce the SE by less than this (Choi, Grady & Dodd 2011).  ``min_information``: stop
    once no eligible item has information above this at the estimate.  ``time_limit``:
    seconds, as reported by the app.

    A multidimensional ability stops on ``se`` once the SE of every dimension is at or
    below it, or on ``se_per_dimension`` (one target per dimension) once each is reached;
    ``confidence_interval`` then classifies the composite ``[reporting]
    composite_weights``.
    """

    min_items: int = key(1, "whole", between(1, MAX_TEST_LENGTH))
    max_items: int = key(30, "whole", between(1, MAX_TEST_LENGTH))
    se: float | None = key(None, "number", between(0.001, 10.0))
    se_per_dimension: tuple | None = key(None, "vector", each(between(0.001, 10.0)))
    sprt: SprtRule | None = key(None, "part", part=SprtRule)
    confidence_interval: ConfidenceRule | None = key(None, "part", part=ConfidenceRule)
    se_reduction: float | None = key(None, "number", between(1e-6, 10.0))
    min_information: float | None = key(None, "number", between(1e-6, 1e4))
    time_limit: float | None = key(None, "number", above_at_most(0, MAX_TIME_LIMIT))

    def where(self) -> str:
        return "[stopping]"

    def rules(self) -> list[Problem]:
        if self.min_items > self.max_items:
            return [Problem("[stopping] min_items",
                            f"min_items ({self.min_items}) exceeds max_items ({self.max_items})")]
        if self.se is not None and self.se_per_dimension is not None:
            return [Problem("[stopping] se_per_dimension",
                            "give either se (one target for every dimension) or se_per_dimension, not both")]
        return []


@attrs.frozen(kw_only=True)
class CutScore(Checked):
    """A named cut on the theta scale; at or above it means the ``above`` label."""

    name: str = key(REQUIRED, "text")
    theta: float = key(REQUIRED, "number", within(GRID_LIMIT))
    above: str = key("pass", "text")
    below: str = key("fail", "text")

    def where(self) -> str:
        return "[[reporting.cut_scores]]"


@attrs.frozen(kw_only=True)
class ScaleRule(Checked):
    """Reported score = round(intercept + slope * theta, decimals), clipped to [min, max]."""

    slope: float = key(1.0, "number", magnitude_between(*SCALE_SLOPE_RANGE))
    intercept: float = key(0.0, "number", within(MAX_SCALE_INTERCEPT))
    decimals: int = key(2, "whole", between(0, MAX_DECIMALS))
    min: float | None = key(None, "number", within(MAX_SCALE_BOUND))
    max: float | None = key(None, "number", within(MAX_SCALE_BOUND))

    def where(self) -> str:
        return "[reporting.scale]"

    def rules(self) -> list[Problem]:
        if self.min is not None and self.max is not None and not self.min < self.max:
            return [Problem("[reporting.scale] max", f"must be above min ({self.min!r}), got {self.max!r}")]
        return []


@attrs.frozen(kw_only=True)
class Reporting(Checked):
    """Final result: ``final_method`` (None: the interim method), interval, scale, cuts, fit.

    ``composite_weights`` (one weight per ability dimension) define the composite
    ``w . theta`` of a multidimensional ability: reported with its SE ``sqrt(w' S w)``,
    classified by the cut scores, aimed at by ``max_composite_information``.
    """

    final_method: ScoringMethod | None = key(None, "option", option=ScoringMethod)
    confidence: float = key(0.95, "number", above_at_most(0, MAX_CONFIDENCE))
    scale: ScaleRule = key(ScaleRule(), "part", part=ScaleRule)
    cut_scores: tuple[CutScore, ...] = key((), "parts", part=CutScore)
    person_fit_threshold: float = key(-1.645, "number", within(10.0))
    #: whether examinees may know which items are pretest items (unscored): the interactive
    #: ``session try`` then marks them.  Presentation only: no decision depends on it.
    announce_pretest_items: bool = key(False, "flag")
    composite_weights: tuple | None = key(None, "vector", each(within(1e3)))

    def where(self) -> str:
        return "[reporting]"

    def rules(self) -> list[Problem]:
        names = [c.name for c in self.cut_scores]
        problems = [Problem(f"[[reporting.cut_scores]] #{i} name", f"cut score name {name!r} repeats")
                    for i, name in enumerate(names, start=1) if names.index(name) != i - 1]
        if self.composite_weights is not None and not any(w != 0 for w in self.composite_weights):
            problems.append(Problem("[reporting] composite_weights", "must include a weight other than 0"))
        return problems


def covariance_problem(matrix) -> str | None:
    """Why a square matrix (tuple of rows) is not a covariance matrix: symmetric and
    positive definite, with variances in the prior SD range squared (None when it is)."""
    import numpy as np

    m = np.asarray(matrix, dtype=float)
    k = m.shape[0]
    for i in range(k):
        for j in range(i + 1, k):
            if m[i, j] != m[j, i]:
                return (f"must be symmetric: row {i + 1}, entry {j + 1} is {m[i, j]!r} but row {j + 1}, "
                        f"entry {i + 1} is {m[j, i]!r}")
    lo, hi = PRIOR_SD_RANGE
    for i in range(k):
        if not lo * lo <= m[i, i] <= hi * hi:
            return (f"variance {i + 1} (row {i + 1}, entry {i + 1}) must lie in [{lo * lo:g}, {hi * hi:g}], "
                    f"got {m[i, i]!r}")
    try:
        np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        return ("must be positive definite (a covariance matrix: every correlation implied must leave the "
                "matrix invertible), got " + repr([list(r) for r in matrix]))
    if np.linalg.cond(m) > 1e10:
        return "is nearly singular (condition number above 1e10): the dimensions would be one"
    return None


def _strata(value) -> tuple:
    try:
        return tuple(float(x) for x in value)
    except (TypeError, ValueError, OverflowError):
        return value


@attrs.frozen(kw_only=True)
class Design(Checked):
    """A whole adaptive test design (frozen; use ``attrs.evolve`` for changes).

    Made valid or not at all: each section checks itself, and the design checks the rules
    between sections (see :meth:`rules`).
    """

    opening: Opening = key(Opening(), "part", part=Opening)
    scoring: Scoring = key(Scoring(), "part", part=Scoring)
    selection: Selection = key(Selection(), "part", part=Selection)
    exposure: Exposure = key(Exposure(), "part", part=Exposure)
    blueprint: Blueprint = key(Blueprint(), "part", part=Blueprint)
    stopping: Stopping = key(Stopping(), "part", part=Stopping)
    reporting: Reporting = key(Reporting(), "part", part=Reporting)
    source: str = ""
    #: Sympson-Hetter exposure parameters keyed by item id, loaded from
    #: ``exposure.parameters_file`` when the design is read (None otherwise): a float per
    #: item, or, conditional on ability, a tuple with one float per stratum (low to high).
    exposure_parameters: dict | None = attrs.field(default=None, eq=False)
    #: Interior cut points of the ability strata of conditional exposure parameters,
    #: ascending; empty for unconditional ones.  Loaded from the parameter file with them.
    exposure_strata: tuple = attrs.field(default=(), eq=False, converter=_strata)

    @property
    def final_method(self) -> ScoringMethod:
        return self.reporting.final_method or self.scoring.method

    def where(self) -> str:
        return "design"

    def stated_dimensions(self) -> dict[str, int]:
        """The keys that give one entry per ability dimension: location -> their length."""
        sc, st, rp = self.scoring, self.stopping, self.reporting
        out = {}
        if isinstance(sc.prior_mean, tuple):
            out["[scoring] prior_mean"] = len(sc.prior_mean)
        if sc.prior_covariance is not None:
            out["[scoring] prior_covariance"] = len(sc.prior_covariance)
        if st.se_per_dimension is not None:
            out["[stopping] se_per_dimension"] = len(st.se_per_dimension)
        if rp.composite_weights is not None:
            out["[reporting] composite_weights"] = len(rp.composite_weights)
        return out

    @property
    def asks_multidimensional(self) -> bool:
        """True when the design itself asks for the multidimensional kernel (a vector or
        matrix key, or a multidimensional criterion); a bank of K > 1 dimensions always
        runs there."""
        return bool(self.stated_dimensions()) or self.selection.criterion in MULTIDIMENSIONAL_CRITERIA

    def _dimension_problems(self) -> list[Problem]:
        stated = self.stated_dimensions()
        problems = []
        if len(set(stated.values())) > 1:
            first, k = next(iter(stated.items()))
            problems += [Problem(where, f"{n} entries, but {first} has {k}: every key with one entry per "
                                        "ability dimension needs the same number")
                         for where, n in stated.items() if n != k]
        if self.selection.criterion is SelectionCriterion.MAX_COMPOSITE_INFORMATION \
                and self.reporting.composite_weights is None:
            problems.append(Problem("[selection] criterion",
                                    "max_composite_information aims at the composite of [reporting] "
                                    "composite_weights; give them"))
        return problems

    def key_problems(self) -> list[Problem]:
        out = []
        for name, spec in keys_of(type(self)).items():
            message = spec.problem(getattr(self, name))
            if message:
                out.append(Problem(name, message))
        cuts = self.exposure_strata
        if not isinstance(cuts, tuple) or any(number_problem(c) for c in cuts) \
                or any(b <= a for a, b in zip(cuts, cuts[1:])):
            out.append(Problem("exposure_strata", f"must be finite and strictly ascending, got {cuts!r}"))
        params = self.exposure_parameters
        if params is not None and not isinstance(params, dict):
            out.append(Problem("exposure_parameters", f"expected a dict of item id to parameter(s), got {params!r}"))
        return out

    def rules(self) -> list[Problem]:
        """The rules between sections (each section is valid on its own)."""
        problems: list[Problem] = []
        sc, st, bp, rp = self.scoring, self.stopping, self.blueprint, self.reporting
        lo, hi = sc.grid_min, sc.grid_max

        def on_grid(value, where, what):
            if not sc.on_grid(value):
                problems.append(Problem(where, f"{what} {value!r} lies outside the ability grid [{lo!r}, {hi!r}]"))

        if self.opening.random_theta is None:
            on_grid(self.opening.theta, "[opening] theta", "starting theta")
        else:
            for end in self.opening.random_theta:
                on_grid(end, "[opening] random_theta", "starting range end")
        if st.sprt is not None:
            on_grid(st.sprt.cut - st.sprt.indifference, "[stopping.sprt] cut", "lower end of the indifference region")
            on_grid(st.sprt.cut + st.sprt.indifference, "[stopping.sprt] cut", "upper end of the indifference region")
        if st.confidence_interval is not None:
            on_grid(st.confidence_interval.cut, "[stopping.confidence_interval] cut", "cut")
        for i, cut in enumerate(rp.cut_scores, start=1):
            on_grid(cut.theta, f"[[reporting.cut_scores]] #{i} theta", f"cut score {cut.name!r}")
        problems += _blueprint_within_length(bp, st)
        problems += self._dimension_problems()
        ex = self.exposure
        if ex.method is ExposureMethod.SYMPSON_HETTER and self.exposure_parameters is None:
            problems.append(Problem("[exposure] parameters_file",
                                    "method sympson_hetter needs a parameters CSV (item_id,exposure_parameter), "
                                    "or exposure_parameters given with a design made in code"))
        if self.exposure_parameters is not None:
            problems += parameter_problems(self.exposure_parameters, self.exposure_strata,
                                           where="exposure_parameters, item")[:20]
        return problems

    def problems(self) -> list[Problem]:
        """Every problem of the design: its sections and their parts, then the rules
        between sections (empty for any design that could be made)."""
        return design_problems(self)

    def __attrs_post_init__(self) -> None:
        # the sections checked themselves when they were made: only the design's own keys
        # and the rules between sections are left
        problems = self.key_problems() or self.rules()
        if problems:
            raise DesignError(problems)


def _blueprint_within_length(bp: Blueprint, st: Stopping) -> list[Problem]:
    problems = []
    for rule in bp.areas:
        if rule.min > st.max_items:
            problems.append(Problem(f"{rule.where()} min",
                                    f"min ({rule.min}) exceeds the test length max_items ({st.max_items})"))
    total_min = sum(rule.min for rule in bp.areas)
    if total_min > st.max_items:
        problems.append(Problem("[blueprint.areas]",
                                f"the area minimums add up to {total_min}, more than max_items ({st.max_items})"))
    for rank, position in enumerate(sorted(bp.pretest_positions), start=1):
        # the test ends right after its last scored item, so a pretest slot must come
        # before the max_items-th scored item
        if position - rank >= st.max_items:
            problems.append(Problem("[blueprint] pretest_positions",
                                    f"position {position} can never be reached: the test ends after "
                                    f"{st.max_items} scored items plus {rank - 1} earlier pretest item(s)"))
    return problems


def _parts(design: Design):
    """Every checked object of a design, sections first, then their parts."""
    yield from (design.opening, design.scoring, design.selection, design.exposure, design.blueprint,
                design.stopping, design.reporting)
    yield from design.blueprint.areas
    for rule in (design.stopping.sprt, design.stopping.confidence_interval):
        if rule is not None:
            yield rule
    yield design.reporting.scale


def design_problems(design: Design) -> list[Problem]:
    """Every problem of ``design``, checked again from scratch.

    A design that was made normally has none (it checked itself); this is the check the
    gate (:func:`adaptive_engine.design.bank_fit.check_design_against_bank`) repeats, so
    that nothing slipped past the constructors (``object.__setattr__`` on a frozen object)
    reaches the kernel.
    """
    problems = design.key_problems()
    if problems:
        return problems
    for part in _parts(design):
        problems += part.problems()
    for i, cut in enumerate(design.reporting.cut_scores, start=1):
        problems += [numbered_cut_problem(p, i) for p in cut.problems()]
    return problems or design.rules()


def numbered_cut_problem(problem: Problem, number: int) -> Problem:
    """A problem of a cut score located at its place: ``[[reporting.cut_scores]] #2 theta``."""
    return Problem(problem.location.replace("]]", f"]] #{number}", 1), problem.message)
