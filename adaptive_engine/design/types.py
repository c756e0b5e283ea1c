"""Test designs: the TOML design file validated into frozen objects.

Sections: ``opening``, ``scoring``, ``selection``, ``exposure``, ``blueprint``, ``stopping``,
``reporting``.  The classes below are the contract between the design file and the decision
kernel: every field the kernel reads is here, with its default.

The reader, writer and validation with located errors live in
:mod:`adaptive_engine.design.toml_file` (``read_design``, ``parse_design``, ``design_to_toml``,
``design_as_dict``, ``validate_design``), the check against a bank in
:mod:`adaptive_engine.design.bank_fit` (``check_design_against_bank``); the package
:mod:`adaptive_engine.design` exports them all.
"""

from __future__ import annotations

import attrs

SCORING_METHODS = ("mle", "map", "eap", "wle")
UNTIL_MIXED = ("eap", "map", "fixed_step")
CRITERIA = (
    "max_fisher_information",
    "posterior_weighted_information",
    "kullback_leibler",
    "a_stratified",
    "random",
)
EXPOSURE_METHODS = ("none", "randomesque", "sympson_hetter", "progressive")
BLUEPRINT_METHODS = ("constrained", "max_priority_index")


@attrs.frozen(kw_only=True)
class Opening:
    """How a test starts.

    ``theta`` is the fixed starting ability; when ``random_theta`` is set (lo, hi) the
    starting ability is drawn uniformly from it instead.  The first item is drawn at random
    among the ``first_items_from_top`` most informative items at the starting ability.
    """

    theta: float = 0.0
    random_theta: tuple[float, float] | None = None
    first_items_from_top: int = 1


@attrs.frozen(kw_only=True)
class Scoring:
    """Interim ability estimation after each answer.

    ``prior_mean``/``prior_sd``: the normal prior (MAP, EAP; examinee-specific values may be
    given at session start).  While a pattern is not yet mixed (all lowest or all highest
    categories) MLE and WLE have no finite value: ``until_mixed`` says what is used then --
    ``eap`` or ``map`` with the prior, or ``fixed_step`` (previous estimate +- ``fixed_step``).
    ``grid_min``, ``grid_max``, ``grid_points``: the quadrature grid of the posterior.
    """

    method: str = "eap"
    prior_mean: float = 0.0
    prior_sd: float = 1.0
    until_mixed: str = "eap"
    fixed_step: float = 0.7
    grid_min: float = -6.0
    grid_max: float = 6.0
    grid_points: int = 121


@attrs.frozen(kw_only=True)
class Selection:
    """Next-item criterion.

    ``kl_interval``: half-width multiplier of the Kullback-Leibler interval,
    theta +- kl_interval / sqrt(n answered) (Chang & Ying 1996).
    ``strata``: number of a-strata for ``a_stratified`` (Chang & Ying 1999); with
    ``b_blocking`` the strata are formed within blocks of b (Chang, Qian & Ying 2001).
    """

    criterion: str = "max_fisher_information"
    kl_interval: float = 3.0
    strata: int = 4
    b_blocking: bool = True


@attrs.frozen(kw_only=True)
class Exposure:
    """Exposure control.

    ``randomesque``: at random among the ``candidates`` best items (Kingsbury & Zara 1989).
    ``sympson_hetter``: per-item exposure parameters read from the CSV file ``parameters``
    (columns ``item_id,exposure_parameter``; path relative to the design file), or per item
    and ability stratum for the conditional method of Stocking & Lewis (1998) (columns
    ``item_id,theta_from,theta_to,exposure_parameter``; see
    :mod:`adaptive_engine.design.exposure_parameters`).
    ``progressive``: weight of the random part falls as the test goes on (Revuelta &
    Ponsoda 1998); ``acceleration`` is the power of the position/length ratio.
    """

    method: str = "none"
    candidates: int = 5
    parameters: str | None = None
    acceleration: float = 1.0


@attrs.frozen(kw_only=True)
class AreaRule:
    """Count rules for one content area: min/max item counts, or a target share."""

    name: str
    min: int = 0
    max: int | None = None
    share: float | None = None


@attrs.frozen(kw_only=True)
class Blueprint:
    """Content constraints.

    ``areas``: rules per content area (empty: no content balancing).
    ``method``: ``constrained`` (Kingsbury & Zara 1989) or ``max_priority_index``
    (Cheng & Chang 2009).
    ``enemies``: never give two items of one enemy group; ``item_sets``: once a set is
    entered its items are given together.  Both are off unless the design turns them on,
    so that a design without a blueprint means plain selection among the items not yet
    given.
    ``pretest_positions``: 1-based positions at which a pretest item is seeded (given, not
    scored).  ``shadow_test``: assemble a shadow test (van der Linden & Reese 1998) at each
    step with scipy.optimize.milp and give its best free item.
    """

    areas: tuple[AreaRule, ...] = ()
    method: str = "constrained"
    enemies: bool = False
    item_sets: bool = False
    pretest_positions: tuple[int, ...] = ()
    shadow_test: bool = False


@attrs.frozen(kw_only=True)
class SprtRule:
    """Wald's SPRT against ``cut`` with indifference region cut +- ``indifference``."""

    cut: float
    indifference: float = 0.2
    alpha: float = 0.05
    beta: float = 0.05


@attrs.frozen(kw_only=True)
class ConfidenceRule:
    """Stop once the ``confidence`` interval around theta excludes ``cut`` (Kingsbury & Weiss 1983)."""

    cut: float
    confidence: float = 0.95


@attrs.frozen(kw_only=True)
class Stopping:
    """When to stop: any rule that fires stops the test, never before ``min_items``.

    Counts are of scored (operational) items; pretest items come on top.
    ``se``: stop once SE <= se.  ``se_reduction``: stop once the best remaining item would
    reduce the SE by less than this (Choi, Grady & Dodd 2011).  ``min_information``: stop
    once no eligible item has information above this at the estimate.  ``time_limit``:
    seconds, as reported by the app.
    """

    min_items: int = 1
    max_items: int = 30
    se: float | None = None
    sprt: SprtRule | None = None
    confidence_interval: ConfidenceRule | None = None
    se_reduction: float | None = None
    min_information: float | None = None
    time_limit: float | None = None


@attrs.frozen(kw_only=True)
class CutScore:
    """A named cut on the theta scale; at or above it means the ``above`` label."""

    name: str
    theta: float
    above: str = "pass"
    below: str = "fail"


@attrs.frozen(kw_only=True)
class ScaleRule:
    """Reported score = round(intercept + slope * theta, decimals), clipped to [min, max]."""

    slope: float = 1.0
    intercept: float = 0.0
    decimals: int = 2
    min: float | None = None
    max: float | None = None


@attrs.frozen(kw_only=True)
class Reporting:
    """Final result: ``final_method`` (None: the interim method), interval, scale, cuts, fit."""

    final_method: str | None = None
    confidence: float = 0.95
    scale: ScaleRule = ScaleRule()
    cut_scores: tuple[CutScore, ...] = ()
    person_fit_threshold: float = -1.645


@attrs.frozen(kw_only=True)
class Design:
    """A whole adaptive test design (frozen; use ``attrs.evolve`` for changes)."""

    opening: Opening = Opening()
    scoring: Scoring = Scoring()
    selection: Selection = Selection()
    exposure: Exposure = Exposure()
    blueprint: Blueprint = Blueprint()
    stopping: Stopping = Stopping()
    reporting: Reporting = Reporting()
    source: str = ""
    #: Sympson-Hetter exposure parameters keyed by item id, loaded from
    #: ``exposure.parameters`` when the design is read (None otherwise): a float per item,
    #: or, conditional on ability, a tuple with one float per stratum (low to high).
    exposure_parameters: dict | None = attrs.field(default=None, eq=False)
    #: Interior cut points of the ability strata of conditional exposure parameters,
    #: ascending; empty for unconditional ones.  Loaded from the parameter file with them.
    exposure_strata: tuple = attrs.field(default=(), eq=False, converter=lambda v: tuple(float(x) for x in v),
                                         validator=lambda _self, _attr, value: _check_cuts(value))

    @property
    def final_method(self) -> str:
        return self.reporting.final_method or self.scoring.method


def _check_cuts(cuts: tuple) -> None:
    import math

    values = [float(c) for c in cuts]
    if not all(math.isfinite(v) for v in values) or any(b <= a for a, b in zip(values, values[1:])):
        raise ValueError(f"exposure_strata must be finite and strictly ascending, got {cuts!r}")

