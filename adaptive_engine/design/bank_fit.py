"""Does a design fit a bank?  And what does a design mean, in plain words?

:func:`check_design_against_bank` lists every reason a bank cannot deliver a design
(blueprint areas missing or too small, too few usable items for the test length once enemy
groups and item sets are taken into account, pretest slots without pretest items, exposure
parameters for unknown items, ...); :func:`require_design_fits_bank` raises them as one
:class:`~adaptive_engine.errors.DesignError`.  :func:`describe_design` gives one line per
section for people.

:func:`design_warnings` lists what runs but deserves a look -- a bank area the blueprint
does not mention (often a typo in the bank, such as ``source_waters``), a blueprint area
with few items for its minimum.  Warnings are returned as a list of
:class:`~adaptive_engine.errors.Problem` (never through Python's ``warnings`` module), so
a caller decides where they go: the command line prints each as one
``warning: LOCATION: message`` line on stderr (``design check``, ``simulate``,
``session start``), the simulation report shows them.
"""

from __future__ import annotations

import difflib
import math
from collections import Counter

import numpy as np

from ..bank.item_bank import ItemBank
from ..errors import DesignError, Problem
from ..irt import models
from .keys import toml_key
from .types import (
    BlueprintMethod,
    Design,
    ExposureMethod,
    ExtremePatternMethod,
    ScoringMethod,
    SelectionCriterion,
    design_problems,
)


def usable_item_count(bank: ItemBank, mask: np.ndarray, *, enemies: bool, item_sets: bool,
                      max_items: int) -> int:
    """How many items of ``mask`` one examinee can be given at most.

    Parameters
    ----------
    bank : ItemBank
    mask : bool array, shape (n,)
        The items considered (e.g. the operational items of one area).
    enemies : bool
        At most one item per enemy group.  Items are taken greedily, those in fewest groups
        first; with one group per item (the usual case) this count is exact, otherwise it
        is a count that can certainly be reached.
    item_sets : bool
        Sets are given whole, so items of a set larger than ``max_items`` are unusable.
    max_items : int
        The test length.

    Returns
    -------
    int
    """
    index = np.flatnonzero(mask)
    if item_sets:
        sizes = Counter(str(s) for s in bank.item_set if s)
        index = [i for i in index if not bank.item_set[i] or sizes[str(bank.item_set[i])] <= max_items]
    if not enemies:
        return len(index)
    used: set[str] = set()
    count = 0
    for i in sorted(index, key=lambda i: len(bank.enemy_groups[i])):
        groups = bank.enemy_groups[i]
        if used.isdisjoint(groups):
            used.update(groups)
            count += 1
    return count


def check_design_against_bank(design: Design, bank: ItemBank) -> list[Problem]:
    """Every reason ``bank`` cannot deliver ``design`` (empty list: it fits).

    Parameters
    ----------
    design : Design
    bank : ItemBank

    Returns
    -------
    list of Problem
        Located at the design key concerned (``"[blueprint.areas.x] min"``).
    """
    # the design checked itself when it was made; checking again costs little and keeps
    # anything slipped past the constructors from the checks below and from the kernel
    problems = design_problems(design)
    if problems:
        return problems
    if runs_multidimensional(design, bank):
        problems += multidimensional_problems(design, bank)
    elif design.selection.kl_weighting is not None:
        problems.append(Problem("[selection] kl_weighting",
                        "weighs the Kullback-Leibler criterion of an ability vector, but this design runs on the "
                        "one-dimensional kernel, whose kullback_leibler always integrates over theta +- "
                        "kl_interval / sqrt(n): leave the key out (a vector key such as prior_covariance = "
                        "[[1.0]] sends a design to the vector kernel)"))
    problems += eap_quadrature_problems(design, bank.n_dimensions)
    if problems:
        return problems
    st, bp, sel, ex = design.stopping, design.blueprint, design.selection, design.exposure
    operational = np.asarray(bank.status == "operational")
    n_operational = int(operational.sum())
    if bp.item_sets:
        # items of a set that no area maximum lets in can never be given
        operational = operational & ~_sets_beyond_area_maximums(design, bank, problems)
    count = dict(enemies=bp.enemies, item_sets=bp.item_sets, max_items=st.max_items)
    usable = usable_item_count(bank, operational, **count)
    rules_note = _rules_note(bp)
    if usable < st.max_items:
        problems.append(Problem("[stopping] max_items",
                                f"the bank can give one examinee at most {usable} operational items"
                                f"{rules_note}, fewer than max_items ({st.max_items})"))
    if bp.item_sets:
        sizes = Counter(str(s) for s, ok in zip(bank.item_set, operational) if s and ok)
        for name, size in sorted(sizes.items()):
            if size > st.max_items:
                problems.append(Problem("[blueprint] item_sets",
                                        f"item set {name!r} has {size} items, more than max_items "
                                        f"({st.max_items}): it can never be given whole"))
    problems += _area_problems(design, bank, operational, count, rules_note)
    if bp.areas:
        problems += _length_problems(design, bank, operational)
    if bp.pretest_positions:
        n_pretest = int(np.sum(bank.status == "pretest"))
        if n_pretest < len(bp.pretest_positions):
            problems.append(Problem("[blueprint] pretest_positions",
                                    f"{len(bp.pretest_positions)} pretest position(s) but the bank holds "
                                    f"{n_pretest} pretest item(s)"))
    if ex.method is ExposureMethod.SYMPSON_HETTER:
        # the values and their number per item were checked with the design
        unknown = sorted(set(design.exposure_parameters) - set(bank.index_of))
        if unknown:
            shown = ", ".join(unknown[:10]) + (f" and {len(unknown) - 10} more" if len(unknown) > 10 else "")
            problems.append(Problem("[exposure] parameters_file", f"items not in the bank: {shown}"))
    if ex.method is ExposureMethod.RANDOMESQUE and ex.candidates > n_operational:
        problems.append(Problem("[exposure] candidates",
                                f"{ex.candidates} candidates but the bank has {n_operational} operational items"))
    if design.opening.first_item_candidates > n_operational:
        problems.append(Problem("[opening] first_item_candidates",
                                f"{design.opening.first_item_candidates} but the bank has "
                                f"{n_operational} operational items"))
    if sel.criterion is SelectionCriterion.A_STRATIFIED:
        problems += _stratification_problems(design, bank, operational)
    return problems


def _sets_beyond_area_maximums(design, bank, problems) -> np.ndarray:
    """bool (n,): items of sets holding more items of an area than its ``max``; each such set
    is added to ``problems``."""
    caps = {r.name: r.max for r in design.blueprint.areas if r.max is not None}
    lost = np.zeros(bank.n_items, dtype=bool)
    if not caps:
        return lost
    members: dict[str, list[int]] = {}
    for i, (s, status) in enumerate(zip(bank.item_set, bank.status)):
        if s and status == "operational":
            members.setdefault(str(s), []).append(i)
    for name, rows in sorted(members.items()):
        counts = Counter(str(bank.area[i]) for i in rows)
        over = [(a, k) for a, k in sorted(counts.items()) if a in caps and k > caps[a]]
        if over:
            lost[rows] = True
            area, k = over[0]
            problems.append(Problem("[blueprint] item_sets",
                                    f"item set {name!r} has {k} items of area {area!r}, more than its max "
                                    f"({caps[area]}): it can never be given whole"))
    return lost


def _length_problems(design, bank, operational) -> list[Problem]:
    """min_items out of reach when every area the bank uses is capped by a ``max``."""
    st = design.stopping
    caps = {r.name: r.max for r in design.blueprint.areas}
    used = {str(a) for a, ok in zip(bank.area, operational) if ok}
    if not used or any(caps.get(a) is None for a in used):
        return []
    reachable = sum(min(caps[a], int(np.sum(operational & (np.asarray(bank.area) == a)))) for a in used)
    if reachable < st.min_items:
        return [Problem("[stopping] min_items",
                        f"the area maximums let a test reach at most {reachable} scored items, fewer than "
                        f"min_items ({st.min_items})")]
    return []


def _rules_note(bp) -> str:
    rules = [r for r, on in (("one item per enemy group", bp.enemies), ("item sets given whole", bp.item_sets))
             if on]
    return f" ({', '.join(rules)})" if rules else ""


def _area_problems(design, bank, operational, count, rules_note) -> list[Problem]:
    problems = []
    max_items = design.stopping.max_items
    for rule in design.blueprint.areas:
        where = rule.where()
        if rule.name not in bank.areas:
            problems.append(Problem(where, f"area {rule.name!r} is not in the bank; "
                                           f"bank areas: {', '.join(bank.areas)}"))
            continue
        in_area = operational & np.asarray(bank.area == rule.name)
        usable = usable_item_count(bank, in_area, **count)
        if rule.min > usable:
            problems.append(Problem(f"{where} min", f"min {rule.min} but the area has only {usable} usable "
                                                    f"operational item(s){rules_note}"))
        if rule.share is not None:
            needed = math.ceil(rule.share * max_items - 1e-9)
            if needed > usable:
                problems.append(Problem(f"{where} share",
                                        f"share {rule.share:g} of {max_items} items needs {needed} items but the "
                                        f"area has only {usable} usable operational item(s){rules_note}"))
    return problems


def _stratification_problems(design, bank, operational) -> list[Problem]:
    problems = []
    strata = design.selection.strata
    n_operational = int(operational.sum())
    if strata > n_operational:
        problems.append(Problem("[selection] strata",
                                f"{strata} strata but the bank has {n_operational} operational items"))
    a = np.asarray(bank.a)[operational]
    if strata > 1 and a.size and np.ptp(a) == 0:
        problems.append(Problem("[selection] strata",
                                "every operational item has the same discrimination a: there is nothing to stratify"))
    if design.selection.b_blocking:
        # polytomous items are blocked on the mean of their thresholds
        difficulty = _difficulty(bank)[operational]
        if not np.all(np.isfinite(difficulty)):
            problems.append(Problem("[selection] b_blocking", "some operational items have no finite difficulty"))
    return problems


def _difficulty(bank: ItemBank) -> np.ndarray:
    """b for dichotomous items, the mean threshold for polytomous ones, shape (n,)."""
    out = np.array(bank.b, dtype=float)
    poly = bank.family != models.DICHOTOMOUS
    if np.any(poly):
        with np.errstate(invalid="ignore"):
            out[poly] = np.nanmean(bank.thresholds[poly], axis=1)
    return out


#: A blueprint area is flagged as small when its minimum alone gives its items a mean
#: exposure rate above this (min / items): an item seen by more than one examinee in four
#: (the cap often used for operational banks; the simulation's default exposure target).
SMALL_AREA_EXPOSURE = 0.25


def design_warnings(design: Design, bank: ItemBank) -> list[Problem]:
    """What lets ``design`` run on ``bank`` but deserves a look (empty list: nothing).

    * a bank area with operational items that the blueprint does not mention, when the
      blueprint has area rules (the closest blueprint area is suggested: often a typo);
    * a blueprint area whose operational items are few for its minimum: each examinee
      takes ``min`` of its ``n`` items, so they are given to ``min / n`` of the examinees
      on average, more than :data:`SMALL_AREA_EXPOSURE`; or an area without operational
      items.

    Returns
    -------
    list of Problem
        Located at ``bank area 'NAME'`` or ``[blueprint.areas.NAME]``.
    """
    rules = design.blueprint.areas
    if not rules:
        return []
    out = []
    operational = np.asarray(bank.status) == "operational"
    areas = np.asarray(bank.area)
    named = [r.name for r in rules]
    for area in bank.areas:
        if area in named:
            continue
        rows = np.flatnonzero(operational & (areas == area))
        if not rows.size:
            continue
        shown = ", ".join(str(bank.item_ids[i]) for i in rows[:3]) + (" ..." if rows.size > 3 else "")
        close = difflib.get_close_matches(str(area), named, n=1, cutoff=0.75)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        out.append(Problem(f"bank area {area!r}",
                           f"{rows.size} operational item(s) ({shown}) in an area the blueprint does not "
                           f"mention, so no area rule applies to them{hint}"))
    for rule in rules:
        where = f"[blueprint.areas.{toml_key(rule.name)}]"
        n = int(np.sum(operational & (areas == rule.name)))
        if rule.name in bank.areas and n == 0:
            out.append(Problem(where, "the area has no operational items (only pretest ones)"))
        elif n and rule.min / n > SMALL_AREA_EXPOSURE:
            out.append(Problem(f"{where} min",
                               f"min {rule.min} of only {n} operational item(s): each examinee takes {rule.min} of "
                               f"them, so they are given to {rule.min / n:.0%} of the examinees on average "
                               f"(more than {SMALL_AREA_EXPOSURE:.0%}); add items to the area or lower its minimum"))
    return out


#: Largest K whose posterior the multidimensional kernel keeps on a product grid of
#: ``points ** K`` points (EAP, MLE, Kullback-Leibler, se_reduction need it).
MAX_GRID_DIMENSIONS = 3
#: Largest K the multidimensional kernel runs.  Above :data:`MAX_GRID_DIMENSIONS` it keeps
#: no grid: estimates by MAP (Newton with the prior's precision, the covariance from the
#: information), MLE (projected Fisher scoring from the MAP) or EAP (adaptive Gauss-Hermite
#: quadrature around the MAP), criteria from the estimate (docs/designs.md, "Ability
#: vectors of more than three dimensions").
MAX_KERNEL_DIMENSIONS = 6
#: Largest K of Kullback-Leibler selection over a box (``[selection] kl_weighting =
#: "interval"``), integrated on 11^K product points per item and pick: 14 641 at K = 4
#: (about half a second a pick on 200 items, measured), ten times that per dimension beyond.
MAX_KL_BOX_DIMENSIONS = 4
#: Default points per dimension of the multidimensional grid, by K (K = 1: grid_points).
DEFAULT_POINTS_PER_DIMENSION = {2: 41, 3: 17}
#: Default Gauss-Hermite nodes per dimension of the EAP without a grid, by K
#: (``[scoring] eap_points_per_dimension``; q ** K = 625, 1,024 and 729 nodes per examinee).
DEFAULT_EAP_POINTS_PER_DIMENSION = {4: 5, 5: 4, 6: 3}
#: At most this many Gauss-Hermite nodes per examinee (q ** K).
MAX_EAP_NODES = 4096
#: At most this many for an EAP after every answer (``[scoring] method = "eap"``): the
#: defaults' 1,024 nodes already cost 13 to 19 times the MAP's time at 30 items
#: (benchmarks/bench_multidimensional_high_k.py; 4,096 nodes about 100 times), more would
#: make the interim estimate the whole cost of a test.
MAX_INTERIM_EAP_NODES = 1024


def runs_multidimensional(design: Design, bank: ItemBank) -> bool:
    """Whether the pair runs on the multidimensional kernel: a bank of K > 1 dimensions, or
    a design that asks for it (vector keys, a multidimensional criterion)."""
    return bank.n_dimensions > 1 or design.asks_multidimensional


def multidimensional_grid_points(design: Design, k: int) -> int:
    """Points per dimension of the multidimensional grid for K = ``k``."""
    sc = design.scoring
    if sc.grid_points_per_dimension is not None:
        return sc.grid_points_per_dimension
    return sc.grid_points if k == 1 else DEFAULT_POINTS_PER_DIMENSION.get(k, 9)


def multidimensional_problems(design: Design, bank: ItemBank) -> list[Problem]:
    """Why the multidimensional kernel cannot run ``design`` on ``bank`` (empty: it can).

    The options that have no meaning for an ability vector are refused at their keys, the
    keys with one entry per dimension must have K entries (K = the bank's dimensions).
    """
    from .types import MAX_MULTIDIMENSIONAL_GRID

    k = bank.n_dimensions
    names = ", ".join(bank.dimension_names)
    out = []
    where_bank = f"bank {bank.name}".strip()
    if k > MAX_KERNEL_DIMENSIONS:
        return [Problem(where_bank, f"the bank has {k} ability dimensions ({names}); adaptive tests run on "
                                    f"banks of at most {MAX_KERNEL_DIMENSIONS} (above {MAX_GRID_DIMENSIONS} "
                                    "dimensions the kernel keeps no grid; its Newton steps and D-optimal "
                                    f"quadratic forms grow as K^3 and K^2; score a {k}-dimensional test with "
                                    "`score`, or split the bank)")]
    if not bank.uses_multidimensional_models:
        return [Problem(where_bank, "the design asks for the multidimensional kernel (vector keys or a "
                                    "multidimensional criterion), which needs a bank of M2PL, M3PL or MGRM items "
                                    "(a one-dimensional bank written as K = 1 of them will do)")]
    for where, n in design.stated_dimensions().items():
        if n != k:
            out.append(Problem(where, f"{n} entries, but the bank has K = {k} ability dimension"
                                      f"{'s' if k != 1 else ''} ({names}): give one entry per dimension"))
    sc, sel, ex, st, rp = (design.scoring, design.selection, design.exposure, design.stopping,
                           design.reporting)
    many = f"with an ability of {k} dimensions ({names})"
    if k > MAX_GRID_DIMENSIONS:
        return out + _gridless_problems(design, k, many)
    points = multidimensional_grid_points(design, k)
    if points ** k > MAX_MULTIDIMENSIONAL_GRID:
        out.append(Problem("[scoring] grid_points_per_dimension" if sc.grid_points_per_dimension is not None
                           else "[scoring] grid_points",
                           f"{points} points per dimension make a grid of {points ** k} points for K = {k}; "
                           f"at most {MAX_MULTIDIMENSIONAL_GRID}"))
    one_dimensional = {
        SelectionCriterion.MAX_FISHER_INFORMATION: "d_optimality (its counterpart for an ability vector)",
        SelectionCriterion.POSTERIOR_WEIGHTED_INFORMATION: "d_optimality or kullback_leibler",
        SelectionCriterion.A_STRATIFIED: "d_optimality",
    }
    if k > 1 and sel.criterion in one_dimensional:
        out.append(Problem("[selection] criterion", f"{sel.criterion.value} ranks items by a one-dimensional "
                                                    f"quantity and is not available {many}; use "
                                                    f"{one_dimensional[sel.criterion]}"))
    if k == 1 and sel.criterion in (SelectionCriterion.POSTERIOR_WEIGHTED_INFORMATION,
                                    SelectionCriterion.A_STRATIFIED):
        out.append(Problem("[selection] criterion", f"{sel.criterion.value} runs on the one-dimensional kernel; "
                                                    "leave out the vector keys and multidimensional criteria"))
    if ex.method is ExposureMethod.SYMPSON_HETTER and design.exposure_strata and rp.composite_weights is None:
        # strata of an ability vector cut its composite (kernel/selection.py, exposure_stratum)
        out.append(Problem("[exposure] parameters_file", "exposure parameters conditional on ability strata "
                                                         f"cut one scale: {many} they cut the composite of "
                                                         "[reporting] composite_weights; give them"))
    if design.blueprint.shadow_test and sel.criterion is SelectionCriterion.RANDOM:
        # the shadow test of an ability vector maximises the criterion, linearised
        # (kernel/multidimensional_shadow.py): a random criterion has no value to sum
        out.append(Problem("[selection] criterion", f"a shadow test {many} is assembled to maximise the "
                                                    "criterion; random gives it nothing to maximise: use "
                                                    "d_optimality, a_optimality, kullback_leibler or "
                                                    "max_composite_information with [blueprint] shadow_test"))
    if st.sprt is not None and rp.composite_weights is None:
        # the SPRT of an ability vector classifies the composite (kernel/multidimensional_stopping.py)
        out.append(Problem("[stopping.sprt]", f"{many} the likelihood ratio test classifies the composite of "
                                              "[reporting] composite_weights (its cut is on the composite's "
                                              "scale); give them"))
    if st.confidence_interval is not None and rp.composite_weights is None and k > 1:
        out.append(Problem("[stopping.confidence_interval]",
                           f"{many} the interval classifies the composite of [reporting] composite_weights; "
                           "give them"))
    if rp.cut_scores and rp.composite_weights is None and k > 1:
        out.append(Problem("[[reporting.cut_scores]]",
                           f"{many} cut scores classify the composite of [reporting] composite_weights; "
                           "give them"))
    return out


def _gridless_problems(design: Design, k: int, many: str) -> list[Problem]:
    """What a design cannot ask of the kernel for K = ``k`` > :data:`MAX_GRID_DIMENSIONS`,
    where it keeps no posterior grid: everything that reads the grid posterior."""
    sc, sel, st = design.scoring, design.selection, design.stopping
    why = (f"needs the posterior on a grid of points ** K, which the kernel keeps for K <= {MAX_GRID_DIMENSIONS} "
           f"only")
    # the scoring methods eap, map, mle and wle all run without a grid: MAP by Newton with
    # the prior's precision, MLE by projected Fisher scoring from the MAP, WLE by steps on
    # Firth's modified score from the MAP, EAP by adaptive Gauss-Hermite quadrature around
    # the MAP (kernel/multidimensional_quadrature.py)
    out = []
    if sc.grid_points_per_dimension is not None:
        out.append(Problem("[scoring] grid_points_per_dimension",
                           f"{many} the kernel keeps no grid (it scores on the box grid_min..grid_max by MAP, "
                           "MLE, WLE, or EAP by a quadrature around the MAP sized by eap_points_per_dimension); "
                           "leave the key out"))
    if sel.kl_over_posterior:
        box = (", or [selection] kl_weighting = \"interval\" (KL integrated over a box, no grid)"
               if k <= MAX_KL_BOX_DIMENSIONS else "")
        out.append(Problem("[selection] criterion", f"kullback_leibler weights the grid posterior and {why}; "
                                                    f"{many} use d_optimality, a_optimality or "
                                                    f"max_composite_information{box}"))
    elif sel.kl_over_interval and k > MAX_KL_BOX_DIMENSIONS:
        out.append(Problem("[selection] kl_weighting",
                           f"the Kullback-Leibler box is integrated on 11^K product points, {11 ** k:,} per item "
                           f"and pick for K = {k} (seconds a pick on a bank of a few hundred items); it runs for "
                           f"K <= {MAX_KL_BOX_DIMENSIONS}: {many} use d_optimality, a_optimality or "
                           "max_composite_information"))
    if st.se_reduction is not None:
        out.append(Problem("[stopping] se_reduction", f"the predicted SE reduction {why}; {many} stop on se or "
                                                      "se_per_dimension, min_information, length or time"))
    return out


def eap_quadrature_problems(design: Design, k: int) -> list[Problem]:
    """Problems of ``[scoring] eap_points_per_dimension`` for a bank of K = ``k``: the key
    sizes the EAP quadrature of K = 4 to 6 (no grid there) and nothing else."""
    q = design.scoring.eap_points_per_dimension
    if q is None:
        return []
    where = "[scoring] eap_points_per_dimension"
    if not MAX_GRID_DIMENSIONS < k <= MAX_KERNEL_DIMENSIONS:
        return [Problem(where, f"sizes the EAP quadrature of banks of K = {MAX_GRID_DIMENSIONS + 1} to "
                               f"{MAX_KERNEL_DIMENSIONS} dimensions, which keep no grid; with K = {k} the "
                               "posterior is on the grid (grid_points, grid_points_per_dimension): leave the key out")]
    if ScoringMethod.EAP not in (design.scoring.method, design.final_method):
        return [Problem(where, "only an EAP estimate reads it ([scoring] method or [reporting] final_method = "
                               "\"eap\"): leave the key out")]
    if q ** k > MAX_EAP_NODES:
        return [Problem(where, f"{q} nodes per dimension make {q ** k} nodes per examinee for K = {k}; "
                               f"at most {MAX_EAP_NODES}")]
    if design.scoring.method is ScoringMethod.EAP and q ** k > MAX_INTERIM_EAP_NODES:
        return [Problem(where, f"{q} nodes per dimension make {q ** k} nodes per examinee for K = {k}; an EAP "
                               f"after every answer ([scoring] method = \"eap\") takes at most "
                               f"{MAX_INTERIM_EAP_NODES} (more costs far more than the test's other work: "
                               "about 100 times the MAP's time at 4,096 nodes); take fewer, or score the "
                               "interim estimate by map and the final one by eap ([reporting] final_method)")]
    return []


def require_design_fits_bank(design: Design, bank: ItemBank) -> None:
    """Raise :class:`DesignError` listing every problem of :func:`check_design_against_bank`."""
    problems = check_design_against_bank(design, bank)
    if problems:
        raise DesignError(problems)


# ----------------------------------------------------------------------------------------
# plain words

_CRITERION_WORDS = {
    SelectionCriterion.MAX_FISHER_INFORMATION: "the item with the most Fisher information at the current estimate",
    SelectionCriterion.POSTERIOR_WEIGHTED_INFORMATION:
        "the item with the most Fisher information averaged over the posterior",
    SelectionCriterion.KULLBACK_LEIBLER:
        "the item with the most Kullback-Leibler information over theta +- {kl_interval:g}/sqrt(n)",
    SelectionCriterion.A_STRATIFIED: "within {strata} a-strata taken from low to high a ({blocking}), "
                                     "the item whose b is closest to the estimate",
    SelectionCriterion.RANDOM: "an eligible item at random",
    SelectionCriterion.D_OPTIMALITY: "the item that makes the determinant of the posterior information largest",
    SelectionCriterion.A_OPTIMALITY: "the item that makes the trace of the posterior covariance smallest",
    SelectionCriterion.MAX_COMPOSITE_INFORMATION:
        "the item with the most Fisher information in the direction of the composite weights",
}


def _number_text(value) -> str:
    """A number as ``:g`` prints it, a vector as a list of them."""
    if isinstance(value, tuple):
        return "[" + ", ".join(f"{v:g}" for v in value) + "]"
    return f"{value:g}"


def describe_design(design: Design) -> list[str]:
    """One plain-words line per section.

    Returns
    -------
    list of str
    """
    op, sc, sel, ex, bp, st = (design.opening, design.scoring, design.selection, design.exposure,
                               design.blueprint, design.stopping)
    if op.random_theta is None:
        start = f"start at theta {op.theta:g}"
    else:
        start = f"start at a theta drawn uniformly from [{op.random_theta[0]:g}, {op.random_theta[1]:g}]"
        if design.asks_multidimensional:
            start += " on each dimension"
    lines = [f"opening: {start}; {_first_item_words(design)}"]
    if isinstance(sc.prior_mean, tuple) or sc.prior_covariance is not None:
        mean = (_number_text(sc.prior_mean) if isinstance(sc.prior_mean, tuple)
                else f"{sc.prior_mean:g} on every dimension")
        cov = ("covariance " + str([list(r) for r in sc.prior_covariance]) if sc.prior_covariance is not None
               else f"covariance {sc.prior_sd:g}^2 I")
        prior = f"multivariate normal prior, mean {mean}, {cov}"
    else:
        prior = f"N({sc.prior_mean:g}, {sc.prior_sd:g}^2) prior"
    scoring = f"scoring: {sc.method.upper()}"
    if sc.method in (ScoringMethod.MAP, ScoringMethod.EAP):
        scoring += f" with a {prior}"
    else:
        fallback = (f"previous estimate +- {sc.fixed_step:g}"
                    if sc.extreme_pattern_method is ExtremePatternMethod.FIXED_STEP
                    else f"{sc.extreme_pattern_method.upper()} with a {prior}")
        if design.asks_multidimensional:
            scoring += (f"; {fallback} where no MLE exists (every answer in the lowest or every one in the highest "
                        "category, the likelihood rising towards the grid's edge, a dimension without information)")
        else:
            scoring += f"; {fallback} while every answer is in the lowest or every one in the highest category"
    if design.asks_multidimensional:
        points = (f"{sc.grid_points_per_dimension} points per dimension" if sc.grid_points_per_dimension is not None
                  else "41 points per dimension for K = 2, 17 for K = 3, grid_points for K = 1; no grid for "
                       f"K = {MAX_GRID_DIMENSIONS + 1} to {MAX_KERNEL_DIMENSIONS}, where EAP is a Gauss-Hermite "
                       "quadrature around the MAP")
        if sc.eap_points_per_dimension is not None:
            points += f"; {sc.eap_points_per_dimension} Gauss-Hermite nodes per dimension for the EAP without a grid"
        lines.append(scoring + f"; grid {sc.grid_min:g}..{sc.grid_max:g} on every dimension ({points})")
    else:
        lines.append(scoring + f"; grid {sc.grid_min:g}..{sc.grid_max:g} ({sc.grid_points} points)")
    words = _CRITERION_WORDS[sel.criterion].format(
        kl_interval=sel.kl_interval, strata=sel.strata,
        blocking="b-blocked" if sel.b_blocking else "no b-blocking")
    if sel.kl_over_interval:
        words += " on every ability dimension (the box of the product rule)"
    elif sel.kl_weighting is not None:
        words = "the item with the most Kullback-Leibler information weighted by the posterior on the ability grid"
    lines.append(f"selection: {words}")
    exposure = {
        ExposureMethod.NONE: "no exposure control",
        ExposureMethod.RANDOMESQUE: f"randomesque: at random among the {ex.candidates} best items",
        ExposureMethod.SYMPSON_HETTER: f"Sympson-Hetter with per-item parameters from {ex.parameters_file or 'code'}"
                          + (f" ({len(design.exposure_parameters)} items)" if design.exposure_parameters else "")
                          + (f", conditional on the {'composite of the ' if design.asks_multidimensional else ''}"
                             f"interim ability estimate in {len(design.exposure_strata) + 1} "
                             f"strata cut at {', '.join(f'{c:g}' for c in design.exposure_strata)}"
                             if design.exposure_strata else ""),
        ExposureMethod.PROGRESSIVE: "progressive: a random part that fades as the test goes on "
                                    f"(acceleration {ex.acceleration:g})",
    }[ex.method]
    lines.append(f"exposure: {exposure}")
    lines.append("blueprint: " + _blueprint_words(bp))
    lines.append("stopping: " + _stopping_words(st, vector=design.asks_multidimensional))
    words = _reporting_words(design)
    if design.reporting.composite_weights is not None:
        words += (f"; composite {_number_text(design.reporting.composite_weights)} . theta reported with its SE "
                  "(cut scores classify it)")
    lines.append("reporting: " + words)
    return lines


def _first_item_words(design: Design) -> str:
    """What the kernel does for the first item (``kernel/selection.py``), in plain words.

    The first pick runs through the same steps as every later one, with nothing answered
    yet: a pretest slot at position 1 comes first; a shadow test overrides criterion and
    exposure; ``random`` and the progressive method (whose random part is everything
    before the first scored answer) draw at random; otherwise the criterion ranks the items
    at the start -- posterior-weighted information over the prior, whatever the starting
    theta -- and the opening's candidate count (position 1 only), else the exposure
    method, chooses among the best.
    """
    k_first = design.opening.first_item_candidates
    if 1 in design.blueprint.pretest_positions:
        # the candidate count belongs to position 1, which the pretest item takes
        note = f" (the {k_first} top candidates apply to position 1 only)" if k_first > 1 else ""
        return ("first item: a random pretest item (position 1 is a pretest slot); "
                f"first scored item: {_first_choice(design, 1)}{note}")
    return f"first item: {_first_choice(design, k_first)}"


def _first_choice(design: Design, k_first: int) -> str:
    op, sc, sel, ex, bp = design.opening, design.scoring, design.selection, design.exposure, design.blueprint
    where = "there" if op.random_theta is None else "at the drawn start"
    if bp.shadow_test:
        if design.asks_multidimensional:
            # kernel/multidimensional_shadow.py: the criterion linearised is the objective
            first = (f"the free item best by {sel.criterion.value} of a shadow test assembled at the start "
                     "(its objective: the criterion's first-order change per item)")
        else:
            first = "the most informative free item of a shadow test assembled at the start"
        return first + (f" ({k_first} top candidates do not apply: the shadow test decides)" if k_first > 1 else "")
    if sel.criterion == "random" or ex.method == "progressive":
        why = "the criterion is random" if sel.criterion == "random" else "the progressive method starts fully random"
        first = f"an eligible item drawn at random ({why})"
    else:
        ranked_by = {
            "max_fisher_information": f"Fisher information {where}",
            "posterior_weighted_information": (f"Fisher information averaged over the N({_number_text(sc.prior_mean)}, "
                                               f"{sc.prior_sd:g}^2) prior (the starting theta does not enter)"),
            "kullback_leibler": f"Kullback-Leibler information over +- {sel.kl_interval:g} around the start",
            "a_stratified": "closeness of b to the start, within the lowest-a stratum",
            "d_optimality": f"the determinant of the prior precision plus the item's information {where}",
            "a_optimality": f"the trace of the posterior covariance after the item {where}",
            "max_composite_information": f"information in the composite's direction {where}",
        }[sel.criterion]
        if bp.areas and bp.method == "max_priority_index":
            ranked_by += " weighted by the area priorities"
        if k_first > 1:
            first = f"a random one of the {k_first} best items by {ranked_by}"
        elif ex.method == "randomesque":
            first = f"a random one of the {ex.candidates} best items by {ranked_by}"
        elif ex.method == "sympson_hetter":
            first = f"the best item by {ranked_by} that passes its exposure lottery"
        else:
            first = f"the best item by {ranked_by}"
    if bp.areas and bp.method == BlueprintMethod.MOST_BEHIND_AREA:
        first += ", from the content area with the largest target share"
    return first


def _blueprint_words(bp) -> str:
    parts = []
    if bp.areas:
        rules = []
        for r in bp.areas:
            if r.share is not None:
                rules.append(f"{r.name} {r.share:.0%}")
            elif r.max is not None:
                rules.append(f"{r.name} {r.min}-{r.max}")
            else:
                rules.append(f"{r.name} >= {r.min}")
        how = {BlueprintMethod.MOST_BEHIND_AREA: "the area most behind its target share first",
               BlueprintMethod.MAX_PRIORITY_INDEX: "maximum priority index"}[bp.method]
        parts.append(f"{how}: " + ", ".join(rules))
    else:
        parts.append("no content balancing")
    parts.append("one item per enemy group" if bp.enemies else "enemy groups ignored")
    parts.append("item sets given together" if bp.item_sets else "item sets ignored")
    if bp.pretest_positions:
        parts.append("pretest items at positions " + ", ".join(str(p) for p in bp.pretest_positions))
    if bp.shadow_test:
        parts.append("shadow test assembled at each step")
    return "; ".join(parts)


def _stopping_words(st, *, vector: bool = False) -> str:
    rules = [f"after {st.max_items} scored items"]
    if st.se is not None:
        rules.append(f"once SE <= {st.se:g}" + (" on every dimension" if vector else ""))
    if st.se_per_dimension is not None:
        rules.append("once the SE of each dimension is at most its target "
                     + _number_text(st.se_per_dimension))
    if st.sprt is not None:
        s = st.sprt
        rules.append(f"once the SPRT {'of the composite ' if vector else ''}at cut {s.cut:g} +- "
                     f"{s.indifference:g} decides (alpha {s.alpha:g}, beta {s.beta:g}"
                     + ("; the two points nearest the estimate along the composite weights)" if vector else ")"))
    if st.confidence_interval is not None:
        ci = st.confidence_interval
        rules.append(f"once the {ci.confidence:.0%} interval excludes the cut {ci.cut:g}")
    if st.se_reduction is not None:
        rules.append(f"once the next item would reduce the SE by less than {st.se_reduction:g}"
                     + (" on every dimension" if vector else ""))
    if st.min_information is not None:
        rules.append(f"once no eligible item has information above {st.min_information:g}"
                     + (" on any dimension" if vector else ""))
    if st.time_limit is not None:
        rules.append(f"after {st.time_limit:g} seconds")
    return f"stop {' or '.join(rules)}; never before {st.min_items} items"


def _reporting_words(design) -> str:
    rp = design.reporting
    s = rp.scale
    score = f"final {design.final_method.upper()} with a {rp.confidence:.0%} interval"
    if (s.slope, s.intercept) != (1.0, 0.0):
        score += f"; scaled score {s.intercept:g} + {s.slope:g} x theta"
        if s.min is not None or s.max is not None:
            score += f" within [{'' if s.min is None else f'{s.min:g}'}, {'' if s.max is None else f'{s.max:g}'}]"
    for cut in rp.cut_scores:
        score += f"; cut {cut.name!r} at theta {cut.theta:g} ({cut.above} at or above, {cut.below} below)"
    return score + f"; person fit flagged below {rp.person_fit_threshold:g}"


def check_bank_file(design_path, bank_path=None, *, warnings: list | None = None) -> list[str]:
    """Read a design file (and a bank file), check them, return the plain-words summary.

    ``warnings``: a list that receives the :func:`design_warnings` of the pair (when a bank
    is given).

    Raises
    ------
    DesignError, BankError
        Listing every problem.
    """
    from ..bank.item_bank import load_bank
    from .toml_file import read_design

    design = read_design(design_path)
    header = f"design {design.source}: valid"
    if bank_path is not None:
        bank = load_bank(bank_path)
        require_design_fits_bank(design, bank)
        if warnings is not None:
            warnings.extend(design_warnings(design, bank))
        n_pretest = int(np.sum(bank.status == "pretest"))
        header += f"; fits bank {bank.name or bank_path} ({len(bank)} items, {n_pretest} pretest)"
    return [header] + describe_design(design)
