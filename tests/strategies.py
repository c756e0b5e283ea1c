"""Shared hypothesis strategies for item parameters, item banks and abilities.

Other test modules import from here, so the names below are part of the test suite's
shared vocabulary:

* :func:`thetas` -- ability values in [-10, 10] (or a chosen range).
* :func:`dichotomous_items`, :func:`graded_items`, :func:`partial_credit_items`,
  :func:`any_items` -- one item's parameters as a plain record (the JSON item format).
* :func:`item_parameters` -- :class:`adaptive_engine.irt.models.ItemParameters` for n items.
* :func:`item_banks` -- small valid :class:`adaptive_engine.bank.ItemBank` objects.

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
