"""Why an exposure target is out of reach: the rules that give items without a lottery.

Sympson-Hetter exposure control (Sympson & Hetter 1985) can only hold back an item when the
item goes through its lottery.  Some administrations never do:

* **the first item**: a design that draws the first item at random among the top
  ``first_item_candidates`` items at the starting ability gives it without a lottery (the
  random draw is the exposure control of the opening), so each of those candidates goes
  to about 1 / candidates of the examinees before any parameter can act;
* **item sets**: once a set is entered its other members follow without a lottery, so
  every member is given as often as the set is entered;
* **forced picks**: when every candidate of a step is rejected by its lottery, or the item
  is the only eligible one (a content area that must still be filled, enemy groups that
  rule out the others), it is given all the same.

Besides these, the **blueprint** puts a floor under the exposure of a small content area:
``min`` items of an area with ``n`` items per test give its items a mean exposure rate of
at least ``min / n`` -- higher when enemy groups allow only one of several items per test
(:func:`area_floor`).  And a rate estimated from ``N`` simulated examinees has a binomial
standard error of ``sqrt(r (1 - r) / N)``, so the largest of many rates lies a few standard
errors above the true largest one: a run can miss a tight tolerance by noise alone.

:func:`opening_and_area_limits` states the limits the design and bank set before any
simulation; :func:`diagnose` explains, item by item, why the items of the last iteration
of a calibration stayed above the target, and what would let the calibration converge.
"""

from __future__ import annotations

import math

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.types import Design

#: A lottery-free part of an item's exposure is named as a cause when it is at least this
#: share of what the item is given beyond nothing (smaller parts are noise beside the rest).
_NOTABLE_SHARE = 0.25


def first_item_candidates(design: Design) -> int:
    """How many items the opening draws the first item from (1: the best one, by its lottery)."""
    return int(design.opening.first_item_candidates)


def first_item_skips_lottery(design: Design) -> bool:
    """True when the first item is drawn at random among several, without a Sympson-Hetter lottery."""
    return first_item_candidates(design) > 1


def area_floor(n_items: int, minimum: int, group_sizes=()) -> float:
    """Smallest possible largest exposure rate among an area's items, given its minimum.

    Every examinee takes at least ``minimum`` of the area's items; an enemy group counts
    as one slot however many items it holds (at most one of them per test).  With exposure
    rates r_i <= t the expected number of area items per test is at most
    sum over slots of min(1, size x t), which must reach ``minimum``; the floor is the
    smallest such t (a relaxation: no schedule of tests does better).

    Parameters
    ----------
    n_items : int
        Operational items of the area outside any enemy group.
    minimum : int
        The area's minimum per test.
    group_sizes : sequence of int
        Items of the area in each enemy group (when the design keeps enemies apart).

    Returns
    -------
    float
        The floor in [0, 1]; ``inf`` when even t = 1 cannot reach the minimum.
    """
    sizes = np.concatenate([np.ones(int(n_items)), np.asarray(group_sizes, dtype=float)])
    if minimum <= 0:
        return 0.0
    if sizes.size == 0 or np.minimum(1.0, sizes).sum() < minimum - 1e-12:
        return math.inf
    # f(t) = sum min(1, s t) is increasing and piecewise linear with kinks at 1 / s
    kinks = np.unique(np.concatenate([[0.0, 1.0], 1.0 / sizes]))
    for lo, hi in zip(kinks[:-1], kinks[1:]):
        f_hi = np.minimum(1.0, sizes * hi).sum()
        if f_hi >= minimum - 1e-12:
            f_lo = np.minimum(1.0, sizes * lo).sum()
            slope = (f_hi - f_lo) / (hi - lo)
            return float(lo + (minimum - f_lo) / slope) if slope > 0 else float(hi)
    return 1.0


def area_floors(design: Design, bank: ItemBank) -> dict:
    """Area name -> (floor, operational items, minimum) for the blueprint's areas with a minimum."""
    out = {}
    operational = np.asarray(bank.status) == "operational"
    areas = np.asarray(bank.area)
    for rule in design.blueprint.areas:
        if rule.min <= 0:
            continue
        rows = np.flatnonzero(operational & (areas == rule.name))
        if not rows.size:
            continue
        groups: dict = {}
        single = 0
        for i in rows:
            g = bank.enemy_groups[i] if design.blueprint.enemies else ()
            if g:
                groups[g[0]] = groups.get(g[0], 0) + 1
            else:
                single += 1
        out[rule.name] = (area_floor(single, rule.min, list(groups.values())), int(rows.size), int(rule.min))
    return out


def opening_and_area_limits(design: Design, bank: ItemBank, target: float) -> list[str]:
    """Plain-words limits the design and bank set on ``target`` before any simulation.

    Returns
    -------
    list of str
        One sentence per limit that the target cannot get below (empty: none known).
    """
    notes = []
    k_first = first_item_candidates(design)
    if first_item_skips_lottery(design) and design.opening.random_theta is None and 1.0 / k_first > target:
        notes.append(
            f"the first item is drawn without a lottery among the {k_first} most informative items at the "
            f"starting ability, so each of them goes to about 1/{k_first} = {1 / k_first:.2f} of the examinees, "
            f"above the target {target:g}; draw the first item among at least {math.ceil(1 / target)} items "
            "([opening] first_item_candidates)")
    for name, (floor, n, minimum) in area_floors(design, bank).items():
        if floor > target:
            need = math.ceil(minimum / target)
            notes.append(
                f"area {name!r} has {n} operational items and a minimum of {minimum} per test"
                + (", with enemy groups allowing one item of a group per test" if design.blueprint.enemies else "")
                + f": its items cannot all stay below {floor:.2f}; give the area at least {need} items "
                f"or a minimum of at most {max(0, math.floor(target * n))}")
    return notes


@attrs.frozen(kw_only=True)
class ItemDiagnosis:
    """Why one item stayed above the target in the last iteration.

    Attributes
    ----------
    item_id, area, item_set : str
    exposure_rate : float
        Its exposure rate (in its worst true-ability stratum, when conditional).
    parameter : float
        Its exposure parameter in the last iteration (the largest over strata, when
        conditional).
    first_item, set_follow_on, forced : float
        Shares of the examinees who got it without a lottery: as the first item, as a
        follow-on member of its item set, or in a step where no candidate passed its
        lottery or it was the only eligible item (estimated).
    causes : tuple of str
        Plain-words reasons (most important first; empty when none is known).
    """

    item_id: str
    area: str
    item_set: str
    exposure_rate: float
    parameter: float
    first_item: float
    set_follow_on: float
    forced: float
    causes: tuple = ()


@attrs.frozen(kw_only=True)
class ExposureDiagnosis:
    """Why a calibration did not reach its target, and what would let it.

    Attributes
    ----------
    target, tolerance : float
    items : tuple of ItemDiagnosis
        The items above ``target + tolerance`` in the last iteration, most exposed first.
    limits : tuple of str
        Limits the design and bank set (:func:`opening_and_area_limits`).
    remedies : tuple of str
        What would let the calibration converge, most useful first.
    """

    target: float
    tolerance: float
    items: tuple
    limits: tuple = ()
    remedies: tuple = ()

    def lines(self, *, max_items: int = 12) -> list[str]:
        """The diagnosis as lines for a person (at most ``max_items`` items listed)."""
        out = [f"{len(self.items)} item(s) stay above the target {self.target:g} + tolerance {self.tolerance:g}:"]
        for d in self.items[:max_items]:
            where = d.area + (f", set {d.item_set}" if d.item_set else "")
            reason = "; ".join(d.causes) if d.causes else "no cause known"
            out.append(f"  {d.item_id} ({where}): exposure {d.exposure_rate:.3f}, parameter {d.parameter:.3f} "
                       f"-- {reason}")
        if len(self.items) > max_items:
            out.append(f"  ... and {len(self.items) - max_items} more")
        for note in self.limits:
            out.append(f"limit: {note}")
        if self.remedies:
            out.append("what would let it converge:")
            out += [f"  - {r}" for r in self.remedies]
        return out


class LotteryFreeCounts:
    """``on_chunk`` collector: administrations that bypassed the lottery, per true stratum.

    Counts, per item and stratum of true ability, the first items the opening drew without
    a lottery (``first``; every first item with ``count_first=True``) and the follow-on
    members of item sets (``follow``: given because their set was under way).  Arrays
    are (S, n_items).
    """

    def __init__(self, design: Design, bank: ItemBank, strata=(), *, count_first: bool | None = None):
        self.cuts = np.asarray(strata, dtype=float)
        s = self.cuts.size + 1
        self.first = np.zeros((s, bank.n_items), dtype=np.int64)
        self.follow = np.zeros((s, bank.n_items), dtype=np.int64)
        self.first_free = first_item_skips_lottery(design) if count_first is None else bool(count_first)
        self.sets = bool(design.blueprint.item_sets)
        names = {name: k for k, name in enumerate(dict.fromkeys(x for x in bank.item_set if x))}
        self.set_code = np.array([names.get(x, -1) if x else -1 for x in bank.item_set], dtype=np.int64)

    def __call__(self, chunk) -> None:
        items = chunk.items
        stratum = np.searchsorted(self.cuts, chunk.true_theta, side="right")
        if self.first_free and items.shape[1]:
            got = items[:, 0] >= 0
            np.add.at(self.first, (stratum[got], items[got, 0]), 1)
        if self.sets and items.shape[1] > 1:
            code = np.where(items >= 0, self.set_code[np.maximum(items, 0)], -1)
            # a set, once entered, is given in one run of positions: a member whose
            # predecessor is of the same set came without a lottery
            follow = (code[:, 1:] >= 0) & (code[:, 1:] == code[:, :-1])
            rows, cols = np.nonzero(follow)
            np.add.at(self.follow, (stratum[rows], items[rows, cols + 1]), 1)


def _still_falling(history: list, tolerance: float) -> bool:
    """The largest rate fell by more than the tolerance over the last three iterations."""
    rates = [h["max_exposure"] for h in history]
    return len(rates) >= 2 and rates[-1] < rates[max(0, len(rates) - 4)] - tolerance


def diagnose(design: Design, bank: ItemBank, *, target: float, tolerance: float, history: list,
             given, selected, parameters, counts: LotteryFreeCounts, size, next_parameters=None,
             max_items_listed: int = 50) -> ExposureDiagnosis:
    """Explain the items left above ``target + tolerance`` by the last calibration iteration.

    Parameters
    ----------
    given, selected : float (S, n_items)
        Exposure and selection rates of the last iteration per true-ability stratum (S = 1
        when unconditional): shares of the stratum's examinees.
    parameters : float (S, n_items)
        Exposure parameters used in that iteration (per stratum of the estimate).
    next_parameters : float (S, n_items), optional
        The parameters the calibration's last step made of them (an item whose parameter
        was still coming down needs more iterations rather than another explanation).
    counts : LotteryFreeCounts
        The lottery-free administrations of that iteration.
    size : int (S,)
        Examinees per true-ability stratum.
    """
    given = np.atleast_2d(np.asarray(given, dtype=float))
    selected = np.atleast_2d(np.asarray(selected, dtype=float))
    k = np.atleast_2d(np.asarray(parameters, dtype=float))
    k_next = k if next_parameters is None else np.atleast_2d(np.asarray(next_parameters, dtype=float))
    size = np.maximum(np.asarray(size, dtype=float).reshape(-1), 1)
    first = counts.first / size[:, None]
    follow = counts.follow / size[:, None]
    operational = np.asarray(bank.status) == "operational"
    limits = opening_and_area_limits(design, bank, target)
    floors = area_floors(design, bank)
    worst_stratum = np.argmax(np.where(operational[None, :], given, -np.inf), axis=0)
    cols = np.arange(bank.n_items)
    rate = given[worst_stratum, cols]
    over = np.flatnonzero(operational & (rate > target + tolerance))
    over = over[np.argsort(-rate[over], kind="stable")]
    remedies: list = []
    k_first = first_item_candidates(design)
    items = []
    noise_only = 0
    moving = 0
    for i in over[:max_items_listed]:
        s = worst_stratum[i]
        r, f, fo = rate[i], first[s, i], follow[s, i]
        # with one parameter per item the lottery gives about k x (selections that went to a
        # lottery); what the item got beyond that came without one
        k_i = float(k.max(axis=0)[i])  # the largest: a forced share is claimed only when sure
        lottery_sel = max(0.0, selected[s, i] - f - fo)
        forced = max(0.0, r - f - fo - k_i * lottery_sel)
        excess = r - target
        causes = []
        if f > 0 and (f >= target or f >= _NOTABLE_SHARE * r):
            causes.append(f"the opening gives it as the first item, without a lottery, to {f:.3f} of the examinees "
                          f"(the first item is drawn among {k_first})")
            if f >= target:
                _add(remedies, f"draw the first item among at least {math.ceil(1 / target)} items "
                               "([opening] first_item_candidates), or among 1 so that its lottery applies")
        if fo > 0 and fo >= _NOTABLE_SHARE * r:
            name = str(bank.item_set[i])
            members = np.flatnonzero(np.asarray(bank.item_set) == name)
            opened = float(first[s, members].sum())  # the set entered as the test's first item
            cause = (f"it follows the first item of its set {name!r} without a lottery ({fo:.3f} of the "
                     "examinees): a set's members are given as often as the set is entered")
            if opened > 0 and opened >= _NOTABLE_SHARE * fo:
                entries = ", ".join(str(bank.item_ids[m]) for m in members if first[s, m] > 0)
                cause += f", and the opening enters it through {entries} for {opened:.3f} of the examinees"
                if opened >= target:
                    _add(remedies, f"keep item set {name!r} out of the opening: draw the first item among more "
                                   "items, or start at another ability")
            causes.append(cause)
        area = str(bank.area[i])
        if area in floors and floors[area][0] > target:
            floor, n, minimum = floors[area]
            causes.append(f"the blueprint minimum of area {area!r} ({minimum} of its {n} items per test"
                          + (", one per enemy group" if design.blueprint.enemies else "")
                          + f") keeps its items at {floor:.2f} or more on average")
            _add(remedies, f"more items in area {area!r} (at least {math.ceil(minimum / target)}) or a lower minimum "
                           f"(at most {max(0, math.floor(target * n))})")
        # the lottery's share is binomial: claim a forced part only beyond three of its SDs
        forced_sd = math.sqrt(lottery_sel * k_i * (1 - k_i) / size[s])
        if forced > 0.01 + 3 * forced_sd and forced >= _NOTABLE_SHARE * excess and k_i < 1:
            causes.append(f"about {forced:.3f} of the examinees got it although its lottery did not let it through: "
                          "it was the only eligible item of an area that had to be filled, or every candidate of "
                          "that step was rejected"
                          + (" (enemy groups and item sets narrow the choice)"
                             if design.blueprint.enemies or design.blueprint.item_sets else ""))
            _add(remedies, f"a lower minimum or more items in area {area!r}")
        se = math.sqrt(max(target * (1 - target), 1e-12) / size[s])
        drop = float((k[:, i] - k_next[:, i]).max())  # the largest fall over the strata
        if not causes:
            noise = excess <= tolerance + 3 * se
            if not noise and drop > 0.05:
                moving += 1
                causes.append(f"its parameter was still coming down ({k[0, i]:.3f} to {k_next[0, i]:.3f} in the "
                              "last step)" if k.shape[0] == 1 else
                              f"its parameters were still coming down (by up to {drop:.3f} in the last step)")
            elif noise:
                noise_only += 1
                causes.append(f"within simulation noise: a rate from {int(size[s])} examinees has a standard error "
                              f"of about {se:.3f}")
            elif k_i <= 1e-9:
                causes.append("its parameter is already 0: it is given only outside the lottery")
        in_set = str(bank.item_set[i]) if design.blueprint.item_sets else ""
        items.append(ItemDiagnosis(item_id=str(bank.item_ids[i]), area=area, item_set=in_set,
                                   exposure_rate=float(r), parameter=k_i, first_item=float(f),
                                   set_follow_on=float(fo), forced=float(forced), causes=tuple(causes)))
    if noise_only:
        se = math.sqrt(target * (1 - target) / float(size.min()))
        _add(remedies, f"more --examinees (the largest of many rates from {int(size.min())} examinees lies a few "
                       f"standard errors of {se:.3f} above the target) or a larger --tolerance "
                       f"(e.g. {max(tolerance, round(3 * se, 2)):g})")
    if moving or _still_falling(history, tolerance):
        _add(remedies, "more --iterations: " + ("parameters were still coming down" if moving
                                                 else "the largest rate was still falling"))
    if limits and not remedies:
        remedies.append("remove the limits named above")
    if any(not d.causes for d in items):
        _add(remedies, "a higher --target")
    return ExposureDiagnosis(target=float(target), tolerance=float(tolerance), items=tuple(items),
                             limits=tuple(limits), remedies=tuple(remedies))


def _add(out: list, text: str) -> None:
    if text not in out:
        out.append(text)
