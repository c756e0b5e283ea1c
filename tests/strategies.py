"""Shared hypothesis strategies for item parameters, item banks and abilities.

Other test modules import from here, so the names below are part of the test suite's
shared vocabulary:

* :func:`thetas` -- ability values in [-10, 10] (or a chosen range).
* :func:`dichotomous_items`, :func:`graded_items`, :func:`partial_credit_items`,
  :func:`any_items` -- one item's parameters as a plain record (the JSON item format).
* :func:`item_parameters` -- :class:`adaptive_engine.irt.models.ItemParameters` for n items.
* :func:`item_banks` -- small valid :class:`adaptive_engine.bank.ItemBank` objects.
* :func:`slope_vectors`, :func:`multidimensional_items`, :func:`multidimensional_parameters`,
  :func:`multidimensional_banks` -- the same for the M2PL, M3PL and MGRM (K dimensions).

Parameter ranges are those of calibrated operational banks (common practice):
a in [0.2, 3], b in [-3, 3], c in [0, 0.35], d in [0.8, 1], ordered thresholds.
"""

from __future__ import annotations

import numpy as np
from hypothesis import strategies as st

from adaptive_engine.bank import ItemBank, bank_from_records
from adaptive_engine.irt import models

A_RANGE = (0.2, 3.0)
B_RANGE = (-3.0, 3.0)
C_RANGE = (0.0, 0.35)
D_RANGE = (0.8, 1.0)
THETA_RANGE = (-10.0, 10.0)
AREAS = ("area_one", "area_two", "area_three")


def _floats(lo: float, hi: float):
    return st.floats(min_value=lo, max_value=hi, allow_nan=False, allow_infinity=False)


def thetas(lo: float = THETA_RANGE[0], hi: float = THETA_RANGE[1]):
    """Finite ability values in ``[lo, hi]``."""
    return _floats(lo, hi)


def discriminations():
    return _floats(*A_RANGE)


def difficulties():
    return _floats(*B_RANGE)


@st.composite
def dichotomous_items(draw, *, model: str | None = None):
    """One dichotomous item record (1PL, 2PL, 3PL or 4PL)."""
    model = model or draw(st.sampled_from(("1PL", "2PL", "3PL", "4PL")))
    rec = {"model": model, "a": 1.0 if model == "1PL" else draw(discriminations()),
           "b": draw(difficulties()), "c": 0.0, "d": 1.0}
    if model in ("3PL", "4PL"):
        rec["c"] = draw(_floats(*C_RANGE))
    if model == "4PL":
        rec["d"] = draw(_floats(*D_RANGE))
    return rec


@st.composite
def ordered_thresholds(draw, *, min_k: int = 1, max_k: int = 4, min_gap: float = 0.05):
    """Strictly increasing thresholds b1 < ... < bK inside ``B_RANGE`` (plus gaps)."""
    k = draw(st.integers(min_value=min_k, max_value=max_k))
    start = draw(_floats(B_RANGE[0], 0.0))
    gaps = draw(st.lists(_floats(min_gap, 1.5), min_size=k - 1, max_size=k - 1))
    return list(start + np.concatenate([[0.0], np.cumsum(gaps)]))


@st.composite
def graded_items(draw, *, max_k: int = 4):
    """One GRM item record (ordered thresholds)."""
    return {"model": "GRM", "a": draw(discriminations()),
            "thresholds": draw(ordered_thresholds(max_k=max_k))}


@st.composite
def partial_credit_items(draw, *, max_k: int = 4):
    """One GPCM item record; steps need not be ordered (reversals are legal in the GPCM)."""
    k = draw(st.integers(min_value=1, max_value=max_k))
    steps = draw(st.lists(difficulties(), min_size=k, max_size=k))
    return {"model": "GPCM", "a": draw(discriminations()), "thresholds": steps}


def any_items(*, max_k: int = 4):
    """One item record of any of the six models."""
    return st.one_of(dichotomous_items(), graded_items(max_k=max_k),
                     partial_credit_items(max_k=max_k))


def records_to_parameters(records, *, scaling: float = 1.0) -> models.ItemParameters:
    """Turn item records into :class:`~adaptive_engine.irt.models.ItemParameters` (n items)."""
    k_max = max((len(r.get("thresholds", ())) for r in records), default=0)
    thr = np.full((len(records), k_max), np.nan)
    family, ncat = [], []
    for i, r in enumerate(records):
        t = r.get("thresholds", ())
        thr[i, : len(t)] = t
        family.append(models.MODEL_FAMILY[r["model"]])
        ncat.append(len(t) + 1 if t else 2)
    return models.ItemParameters(
        family=family, a=[r["a"] for r in records],
        b=[r.get("b", np.nan) for r in records], c=[r.get("c", 0.0) for r in records],
        d=[r.get("d", 1.0) for r in records], thresholds=thr, n_categories=ncat,
        scaling=scaling,
    )


def item_parameters(*, min_items: int = 1, max_items: int = 6, items=None,
                    scalings=st.sampled_from((1.0, 1.702))):
    """:class:`~adaptive_engine.irt.models.ItemParameters` for 1..``max_items`` items."""
    items = items if items is not None else any_items()
    return st.builds(
        lambda recs, D: records_to_parameters(recs, scaling=D),
        st.lists(items, min_size=min_items, max_size=max_items), scalings,
    )


@st.composite
def item_banks(draw, *, min_items: int = 1, max_items: int = 8, items=None) -> ItemBank:
    """A small valid :class:`~adaptive_engine.bank.ItemBank` with areas, sets and enemies."""
    items = items if items is not None else any_items()
    recs = draw(st.lists(items, min_size=min_items, max_size=max_items))
    out = []
    for i, rec in enumerate(recs):
        rec = dict(rec, item_id=f"item-{i:03d}",
                   area=draw(st.sampled_from(AREAS)),
                   item_set=draw(st.sampled_from(("", "", "set-a", "set-b"))),
                   enemy_group=draw(st.sampled_from(("", "", "", "e1", "e2", "e1;e2"))),
                   status=draw(st.sampled_from(("operational", "operational", "pretest"))),
                   label=draw(st.sampled_from(("", "A plain label", "Comma, quote \" and é"))))
        if rec["model"] in ("1PL",):
            rec.pop("a")
        out.append(rec)
    scaling = draw(st.sampled_from((1.0, 1.702)))
    return bank_from_records(out, scaling=scaling, name="generated")


# ----------------------------------------------------------------------------------------
# multidimensional items (M2PL, M3PL, MGRM) and banks of them

#: Slopes of multidimensional items: 0 (the item does not measure a dimension) or in this range.
SLOPE_RANGE = (0.2, 2.5)
INTERCEPT_RANGE = (-4.0, 4.0)


@st.composite
def slope_vectors(draw, k: int):
    """A slope vector of length ``k``: entries 0 or in ``SLOPE_RANGE``, at least one positive."""
    slopes = draw(st.lists(st.just(0.0) | _floats(*SLOPE_RANGE), min_size=k, max_size=k))
    if not any(slopes):
        slopes[draw(st.integers(0, k - 1))] = draw(_floats(*SLOPE_RANGE))
    return slopes


@st.composite
def multidimensional_items(draw, *, k: int, model: str | None = None, max_m: int = 4):
    """One M2PL, M3PL or MGRM item record (the JSON item format) with ``k`` slopes."""
    model = model or draw(st.sampled_from(("M2PL", "M3PL", "MGRM")))
    rec = {"model": model, "slopes": draw(slope_vectors(k))}
    if model == "MGRM":
        m = draw(st.integers(1, max_m))
        start = draw(_floats(-1.0, INTERCEPT_RANGE[1]))
        gaps = draw(st.lists(_floats(0.05, 1.5), min_size=m - 1, max_size=m - 1))
        rec["intercepts"] = list(start - np.concatenate([[0.0], np.cumsum(gaps)]))
    else:
        rec["intercept"] = draw(_floats(*INTERCEPT_RANGE))
    if model == "M3PL":
        rec["c"] = draw(_floats(*C_RANGE))
    return rec


def records_to_multidimensional_parameters(records, *, scaling: float = 1.0):
    """Turn multidimensional item records into
    :class:`~adaptive_engine.irt.multidimensional.MultidimensionalParameters`."""
    from adaptive_engine.irt.multidimensional import MultidimensionalParameters

    lists = [r["intercepts"] if "intercepts" in r else [r["intercept"]] for r in records]
    intercepts = np.full((len(records), max(len(x) for x in lists)), np.nan)
    for i, x in enumerate(lists):
        intercepts[i, : len(x)] = x
    return MultidimensionalParameters(slopes=[r["slopes"] for r in records], intercepts=intercepts,
                                      c=[r.get("c", 0.0) for r in records], scaling=scaling)


def multidimensional_parameters(*, k: int, min_items: int = 1, max_items: int = 6, model: str | None = None,
                                scalings=st.sampled_from((1.0, 1.702))):
    """``MultidimensionalParameters`` of 1..``max_items`` items with ``k`` dimensions."""
    return st.builds(lambda recs, D: records_to_multidimensional_parameters(recs, scaling=D),
                     st.lists(multidimensional_items(k=k, model=model), min_size=min_items, max_size=max_items),
                     scalings)


@st.composite
def multidimensional_banks(draw, *, k: int | None = None, min_items: int = 1, max_items: int = 8) -> ItemBank:
    """A small valid bank of M2PL/M3PL/MGRM items (K = 1..3), dimension names now and then."""
    k = k if k is not None else draw(st.integers(1, 3))
    recs = draw(st.lists(multidimensional_items(k=k), min_size=min_items, max_size=max_items))
    out = [dict(rec, item_id=f"item-{i:03d}", area=draw(st.sampled_from(AREAS)),
                item_set=draw(st.sampled_from(("", "", "set-a"))),
                enemy_group=draw(st.sampled_from(("", "", "e1", "e1;e2"))),
                status=draw(st.sampled_from(("operational", "operational", "pretest"))),
                label=draw(st.sampled_from(("", "A plain label", "Comma, quote \" and é"))))
           for i, rec in enumerate(recs)]
    names = draw(st.none() | st.just([f"skill_{j}" for j in range(1, k + 1)]))
    return bank_from_records(out, scaling=draw(st.sampled_from((1.0, 1.702))), name="generated_mirt",
                             dimensions=names)


# ----------------------------------------------------------------------------------------
# runnable banks and designs: everything within the ranges design check accepts
# (adaptive_engine.design.toml_file: GRID_LIMIT, PRIOR_SD_RANGE, ... ; docs/designs.md)


@st.composite
def steep_items(draw):
    """A steep item far from the middle of the scale: probabilities that underflow."""
    a = draw(_floats(5.0, 50.0))
    if draw(st.booleans()):
        return {"model": "2PL", "a": a, "b": draw(_floats(-20.0, 20.0))}
    k = draw(st.integers(1, 4))
    return {"model": "GPCM", "a": a, "thresholds": draw(st.lists(_floats(-20.0, 20.0), min_size=k, max_size=k))}


@st.composite
def runnable_banks(draw, *, min_items: int = 10, max_items: int = 24) -> ItemBank:
    """A bank a test can run on: every area holds operational items, a few pretest items,
    optional enemy pairs and one item set, and now and then a steep far item."""
    n = draw(st.integers(min_items, max_items))
    items = st.one_of(any_items(), any_items(), any_items(), steep_items())
    recs = draw(st.lists(items, min_size=n, max_size=n))
    n_pretest = draw(st.integers(0, 2))
    set_start = draw(st.none() | st.integers(0, n - n_pretest - 3))
    out = []
    for i, rec in enumerate(recs):
        rec = dict(rec, item_id=f"item-{i:03d}", area=AREAS[i % len(AREAS)])
        if rec["model"] == "1PL":
            rec.pop("a")
        if i >= n - n_pretest:
            rec["status"] = "pretest"
        elif set_start is not None and set_start <= i < set_start + 3:
            rec["item_set"] = "case-study"
            rec["area"] = AREAS[0]
        elif i % 7 in (3, 4):
            rec["enemy_group"] = f"enemies-{i // 7}"
        out.append(rec)
    return bank_from_records(out, scaling=draw(st.sampled_from((1.0, 1.702))), name="runnable")


def _edge_or(draw, lo: float, hi: float):
    """A value in [lo, hi], the ends themselves often (they are where arithmetic breaks)."""
    return draw(st.sampled_from((lo, hi)) | _floats(lo, hi))


@st.composite
def runnable_designs(draw, bank: ItemBank):
    """A :class:`~adaptive_engine.design.Design` within the validated ranges, made to fit
    ``bank`` by its counts (callers still run ``check_design_against_bank``)."""
    from adaptive_engine import design as d
    from adaptive_engine.design import toml_file as df

    limit = df.GRID_LIMIT
    lo = draw(_floats(-limit, limit - 1.0))
    hi = draw(_floats(lo + 1.0, limit)) if draw(st.booleans()) else min(limit, lo + 12.0)
    on_grid = _floats(lo, hi)
    operational = [i for i, s in enumerate(bank.status) if s == "operational"]
    n_op = len(operational)
    n_pretest = bank.n_items - n_op
    max_items = draw(st.integers(1, max(1, n_op // 2)))
    min_items = draw(st.integers(1, max_items))
    method = draw(st.sampled_from(d.SCORING_METHODS))
    scoring = d.Scoring(method=method, prior_mean=draw(on_grid), prior_sd=_edge_or(draw, *df.PRIOR_SD_RANGE),
                        extreme_pattern_method=draw(st.sampled_from(d.EXTREME_PATTERN_METHODS)),
                        fixed_step=_edge_or(draw, 0.01, 5.0),
                        grid_min=lo, grid_max=hi,
                        grid_points=draw(st.sampled_from((df.MIN_GRID_POINTS, df.MAX_GRID_POINTS))
                                         | st.integers(df.MIN_GRID_POINTS, df.MAX_GRID_POINTS)))
    random_start = draw(st.booleans())
    start_lo = draw(_floats(lo, hi - 0.5))
    opening = d.Opening(theta=0.0 if random_start else draw(on_grid),
                        random_theta=(start_lo, draw(_floats(start_lo + 0.1, hi))) if random_start else None,
                        first_item_candidates=draw(st.integers(1, min(n_op, 5))))
    exposure_method = draw(st.sampled_from(d.EXPOSURE_METHODS))
    params = None
    if exposure_method == "sympson_hetter":
        params = {bank.item_ids[i]: draw(_floats(0.2, 1.0)) for i in operational}
    exposure = d.Exposure(method=exposure_method, candidates=draw(st.integers(1, n_op)),
                          parameters_file="generated.csv" if params else None,
                          acceleration=_edge_or(draw, 0.01, 100.0))
    # the one-dimensional criteria (the multidimensional ones need a bank of M2PL/M3PL/MGRM items)
    from adaptive_engine.design.types import MULTIDIMENSIONAL_CRITERIA

    criterion = draw(st.sampled_from([c for c in d.CRITERIA if c not in MULTIDIMENSIONAL_CRITERIA]))
    selection = d.Selection(criterion=criterion, kl_interval=_edge_or(draw, 0.01, 10.0),
                            strata=draw(st.integers(1, min(4, n_op))), b_blocking=draw(st.booleans()))
    areas = ()
    if draw(st.booleans()):
        names = sorted(set(bank.areas))
        # a design whose area minimums add up to more than max_items cannot be made
        most = 1 if len(names) <= max_items else 0
        areas = tuple(d.AreaRule(name=a, min=draw(st.integers(0, most)),
                                 max=draw(st.none() | st.integers(1, max_items))) for a in names)
    positions = tuple(sorted(draw(st.lists(st.integers(1, max_items), unique=True, max_size=min(2, n_pretest)))))
    blueprint = d.Blueprint(areas=areas, method=draw(st.sampled_from(d.BLUEPRINT_METHODS)),
                            enemies=draw(st.booleans()), item_sets=draw(st.booleans()),
                            pretest_positions=positions, shadow_test=draw(st.booleans()) and not params)
    sprt = ci = None
    if draw(st.booleans()):
        ind = draw(_floats(0.01, min(5.0, (hi - lo) / 2 - 1e-6)))
        cut = draw(_floats(lo + ind, hi - ind))
        # lo + ind - ind need not give lo back in floating point (a tiny lo): such a region
        # would stick out of the grid, which the design refuses
        if lo <= cut - ind and cut + ind <= hi:
            sprt = d.SprtRule(cut=cut, indifference=ind,
                              alpha=_edge_or(draw, 1e-6, 0.49), beta=_edge_or(draw, 1e-6, 0.49))
    if draw(st.booleans()):
        ci = d.ConfidenceRule(cut=draw(on_grid), confidence=_edge_or(draw, 1e-6, df.MAX_CONFIDENCE))
    stopping = d.Stopping(
        min_items=min_items, max_items=max_items,
        se=draw(st.none() | st.sampled_from((0.001, 10.0)) | _floats(0.001, 10.0)),
        sprt=sprt, confidence_interval=ci,
        se_reduction=draw(st.none() | st.sampled_from((1e-6, 10.0))),
        min_information=draw(st.none() | st.sampled_from((1e-6, 1e4)) | _floats(1e-6, 2.0)),
        time_limit=draw(st.none() | st.sampled_from((1e-9, df.MAX_TIME_LIMIT))))
    low, high = df.SCALE_SLOPE_RANGE
    scale_min = draw(st.none() | _floats(-df.MAX_SCALE_BOUND, df.MAX_SCALE_BOUND - 1))
    scale = d.ScaleRule(slope=_edge_or(draw, low, high) * draw(st.sampled_from((1, -1))),
                        intercept=_edge_or(draw, -df.MAX_SCALE_INTERCEPT, df.MAX_SCALE_INTERCEPT),
                        decimals=draw(st.integers(0, df.MAX_DECIMALS)), min=scale_min,
                        max=draw(st.none() | _floats((scale_min if scale_min is not None else -df.MAX_SCALE_BOUND) + 1,
                                                     df.MAX_SCALE_BOUND)))
    cuts = tuple(d.CutScore(name=f"cut-{i}", theta=draw(on_grid)) for i in range(draw(st.integers(0, 2))))
    reporting = d.Reporting(final_method=draw(st.none() | st.sampled_from(d.SCORING_METHODS)),
                            confidence=_edge_or(draw, 1e-6, df.MAX_CONFIDENCE), scale=scale, cut_scores=cuts,
                            person_fit_threshold=_edge_or(draw, -10.0, 10.0))
    return d.Design(opening=opening, scoring=scoring, selection=selection, exposure=exposure,
                    blueprint=blueprint, stopping=stopping, reporting=reporting, source="generated",
                    exposure_parameters=params)


def mixed_model_bank(slopes, rng) -> ItemBank:
    """Test input: a bank of M2PL, M3PL and MGRM items in turn (MGRM with 2 to 4 intercepts)
    on the given slopes (n, K); lower asymptotes and intercepts drawn from ``rng``."""
    slopes = np.asarray(slopes, dtype=float)
    n = slopes.shape[0]
    models = np.array(["M2PL", "M3PL", "MGRM"])[np.arange(n) % 3]
    intercepts = np.full((n, 4), np.nan)
    c = np.where(models == "M3PL", rng.uniform(0.05, 0.3, n), 0.0)
    for i in range(n):
        m = 2 + i % 3 if models[i] == "MGRM" else 1
        intercepts[i, :m] = np.sort(rng.normal(0, 1.2, m))[::-1] if m > 1 else rng.normal(0, 1.2)
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=list(models), slopes=slopes,
                    intercepts=intercepts, c=c, area=["g"] * n, item_set=[""] * n, enemy_groups=[()] * n,
                    status=["operational"] * n, label=[""] * n)
