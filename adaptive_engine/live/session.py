"""The live session controller: the decision kernel on a batch of one, persisted every step.

Every request is answered from the store (:mod:`adaptive_engine.live.store`), so any process
can serve any session: the session row says which design and bank it runs and under which
version of the decision rules, the event log holds its answers, and the rule set's
``rebuild`` replays them into the exact kernel state (the kernel is a pure function of the
rules, design, bank, seed and answers).  Replaying on every request would be slow, so a
process keeps

* one :class:`~adaptive_engine.kernel.prepared.TestContext` per ``(rules version,
  design_id, bank_id)`` and
* the in-memory kernel state of the sessions it served, tagged with the sequence number of
  the last event it reflects; before use the tag is compared with the session row read
  under the write lock, and a state another process has moved on is rebuilt.

A session keeps the decision rules it started under for life
(:mod:`adaptive_engine.kernel.decision_rules`).  It is served by that rule set while this
engine has it installed; otherwise an answer is refused with a
:class:`~adaptive_engine.errors.SessionError` naming both versions, and the session stays
readable (:func:`show_session`, :func:`session_result`, :func:`pending_item`,
:func:`list_sessions`).

Each answer is one transaction: the answer and next-item (or finished) events, the session
row and the exposure count of the new item are written together or not at all.  Bad
requests raise :class:`~adaptive_engine.errors.SessionError` and write nothing.

Replies to the app are plain dicts that never carry item parameters: item id, content area,
label, number of categories, the interim estimate, whether the test is done and, once it
is, the final report.
"""

from __future__ import annotations

import json
import math
import os
import re
import threading
import uuid
from collections import OrderedDict
from typing import Callable, NamedTuple

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.types import Design
from ..errors import SessionError
from ..jsonable import plain
from ..kernel import decision_rules
from ..kernel.decision_rules import RuleSet, current_rule_set, installed_versions, rule_set
from ..kernel.prepared import TestContext, context_grid, selects_within_areas
from ..kernel.random_streams import stream_key
from ..kernel.state import KernelState
from .store import (
    ConflictError,
    InvalidValueError,
    SessionStore,
    bank_content,
    check_text,
    design_content,
    now_text,
    shown,
    to_json,
)

_ROW0 = np.zeros(1, dtype=np.int64)
_MAX_SEED = 1 << 63
#: An integer written in ASCII digits ('\d' would also take '١' or '１' as digits).
_INTEGER_TEXT = re.compile(r"[+-]?[0-9]+", re.ASCII)
#: Blanks allowed around a response sent as text.
_BLANKS = " \t\r\n"
#: Responses beyond this size are outside the categories of every item; they are compared
#: at this size (an integer of 5,000 digits cannot even be printed by Python).
_RESPONSE_CLIP = 10**18


class ProcessCache:
    """Per-process caches of test contexts and of the kernel states of sessions served.

    Safe to share between threads (a server's request threads): every access holds a lock.
    A cached kernel state is never changed in place while it is cached: an answer works on
    a copy and caches the copy once its transaction has committed.

    Parameters
    ----------
    max_contexts, max_states : int
        Least recently used entries beyond these are dropped.
    """

    def __init__(self, *, max_contexts: int = 8, max_states: int = 4096):
        self.max_contexts = max_contexts
        self.max_states = max_states
        self._contexts: OrderedDict = OrderedDict()
        self._states: OrderedDict = OrderedDict()
        self._lock = threading.RLock()

    def context(self, store: SessionStore, design_id: str, bank_id: str, *, rules: RuleSet,
                design: Design | None = None, bank: ItemBank | None = None,
                table_folder=None) -> TestContext:
        """The context of a stored (design, bank) pair under ``rules``, built on first use.

        A process that has not built it yet takes the bank and its tables from the
        store's table folder (``table_folder``, else ``store.table_folder``) when another
        process left them there, and leaves them there when it had to build them
        (:mod:`adaptive_engine.live.table_cache`).
        """
        key = (rules.version, design_id, bank_id)
        with self._lock:
            ctx = self._contexts.get(key)
            if ctx is None:
                if design is None:
                    design = store.load_design(design_id)
                folder = table_folder if table_folder is not None else getattr(store, "table_folder", None)
                by_area = selects_within_areas(design)
                kept = None
                if folder is not None:
                    from .table_cache import load_prepared_bank

                    kept = load_prepared_bank(folder, bank_id, context_grid(design), by_area=by_area)
                if kept is not None:
                    bank = kept
                elif bank is None:
                    bank = store.load_bank(bank_id)
                ctx = rules.build_context(design, bank)
                if folder is not None and kept is None and not getattr(store, "read_only", False):
                    from .table_cache import save_prepared_bank

                    save_prepared_bank(folder, bank_id, bank, ctx.grid, by_area=by_area)
                self._contexts[key] = ctx
                while len(self._contexts) > self.max_contexts:
                    self._contexts.popitem(last=False)
            else:
                self._contexts.move_to_end(key)
            return ctx

    def has_context(self, design_id: str, bank_id: str, *, rules: RuleSet) -> bool:
        with self._lock:
            return (rules.version, design_id, bank_id) in self._contexts

    def state(self, store: SessionStore, session_id: str, seq: int) -> KernelState | None:
        """The cached state if it reflects exactly the events up to ``seq``, else None."""
        with self._lock:
            hit = self._states.get((store.key, session_id))
            if hit is None or hit[0] != seq:
                return None
            self._states.move_to_end((store.key, session_id))
            return hit[1]

    def latest(self, store: SessionStore, session_id: str) -> tuple[int, KernelState] | None:
        """``(seq, state)`` cached for the session, however old (None when none is)."""
        with self._lock:
            return self._states.get((store.key, session_id))

    def keep(self, store: SessionStore, session_id: str, seq: int, state: KernelState) -> None:
        with self._lock:
            self._states[(store.key, session_id)] = (seq, state)
            self._states.move_to_end((store.key, session_id))
            while len(self._states) > self.max_states:
                self._states.popitem(last=False)

    def drop(self, store: SessionStore, session_id: str) -> None:
        with self._lock:
            self._states.pop((store.key, session_id), None)

    def clear(self) -> None:
        with self._lock:
            self._contexts.clear()
            self._states.clear()


#: The cache used when a function is not given one.
PROCESS_CACHE = ProcessCache()


def clear_process_cache() -> None:
    """Forget every cached context and session state of this process."""
    PROCESS_CACHE.clear()


# ----------------------------------------------------------------------------------------
# checking what the app sends


def _response_value(response, where: str) -> tuple[int, str]:
    """The category the app sent, and how messages show it.

    Accepted: a Python ``int`` or a numpy integer, or text of ASCII digits with an optional
    sign and blanks around it.  Refused: booleans, floats (even ``1.0``), digits of other
    scripts (``'١'``, ``'１'``) and anything else.  A value too large for any item is
    compared as +-10**18, so the refusal can still name the item's range.
    """
    if isinstance(response, (int, np.integer)) and not isinstance(response, (bool, np.bool_)):
        value = int(response)
        text = shown(value)
    elif isinstance(response, str) and _INTEGER_TEXT.fullmatch(response.strip(_BLANKS)):
        text = response.strip(_BLANKS)
        digits = text.lstrip("+-").lstrip("0")
        # int() refuses text above 4300 digits; a category never has more than a few
        value = int(text) if len(digits) <= 18 else (-1 if text[0] == "-" else 1) * _RESPONSE_CLIP
        text = shown(text, limit=24)
    else:
        what = f"'{shown(response)}'" if isinstance(response, str) else shown(response)
        raise InvalidValueError(f"the response must be an integer category (an int, or text of ASCII digits), "
                                f"got {what}", location=where, field="response")
    return max(-_RESPONSE_CLIP, min(_RESPONSE_CLIP, value)), text


def _finite_number(value, what: str, *, location: str, field: str) -> float:
    """``value`` as a float if it is a finite real number (not a bool, not text)."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        what_it_is = f"'{shown(value)}'" if isinstance(value, str) else shown(value)
        raise InvalidValueError(f"{what} must be a number, got {what_it_is}", location=location, field=field)
    try:
        number = float(value)
    except OverflowError:  # a Python int beyond the float range
        number = math.inf
    if not math.isfinite(number):
        raise InvalidValueError(f"{what} must be a finite number, got {shown(value)}", location=location,
                                field=field)
    return number


def _elapsed_value(elapsed, where: str) -> float | None:
    if elapsed is None:
        return None
    value = _finite_number(elapsed, "elapsed (seconds)", location=where, field="elapsed")
    if value < 0:
        raise InvalidValueError(f"elapsed must be a number of seconds >= 0, got {shown(elapsed)}", location=where,
                                field="elapsed")
    return value


def _seed_value(seed) -> int:
    if seed is None:
        # an unseeded session still gets one explicit, stored seed
        return int.from_bytes(os.urandom(8), "little") % _MAX_SEED
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)):
        raise InvalidValueError(f"the seed must be an integer, got {shown(seed)}", location="seed", field="seed")
    if not 0 <= int(seed) < _MAX_SEED:
        raise InvalidValueError(f"the seed must lie in [0, 2**63), got {shown(int(seed))}", location="seed",
                                field="seed")
    return int(seed)


def _prior_values(design: Design, prior_mean, prior_sd) -> tuple[float, float]:
    """The examinee-specific prior, checked against the design's ability grid.

    The mean must lie on the grid [grid_min, grid_max]: the posterior lives on the grid,
    and a prior centred far off it has no mass there (every estimate would be NaN).  The
    SD must lie between one grid step and the grid's width: below one step the prior puts
    all its mass on the nearest grid point (and underflows to zero everywhere for tiny
    values); above the width it is flat on the grid already, so a larger value only
    signals a mistake (a variance for an SD, another scale's units).
    """
    sc = design.scoring
    lo, hi = float(sc.grid_min), float(sc.grid_max)
    width = hi - lo
    step = width / (sc.grid_points - 1)
    mean, sd = float(sc.prior_mean), float(sc.prior_sd)
    if prior_mean is not None:
        mean = _finite_number(prior_mean, "the prior mean", location="prior_mean", field="prior_mean")
        if not lo <= mean <= hi:
            raise InvalidValueError(f"the prior mean must lie on the design's ability grid [{lo:g}, {hi:g}], "
                                    f"got {shown(prior_mean)}", location="prior_mean", field="prior_mean")
    if prior_sd is not None:
        sd = _finite_number(prior_sd, "the prior SD", location="prior_sd", field="prior_sd")
        # a relative margin so that an SD of exactly one step or the width passes
        if not step * (1 - 1e-9) <= sd <= width * (1 + 1e-9):
            raise InvalidValueError(f"the prior SD must lie between one step of the design's ability grid "
                                    f"({step:g}) and the grid's width ({width:g}), got {shown(prior_sd)}",
                                    location="prior_sd", field="prior_sd")
    return mean, sd


def _vector_prior_values(design: Design, k: int, prior_mean, prior_sd, prior_covariance):
    """An ability vector's examinee-specific prior, checked: ``(mean (K,) or None,
    covariance (K, K) or None)``, None where the design's applies.

    The mean: K finite numbers on the design's ability grid.  The covariance: K rows of K
    finite numbers, symmetric and positive definite (the design key's rules,
    :func:`adaptive_engine.design.types.covariance_problem`), each dimension's SD between
    one grid step and the grid's width (as the one-dimensional SD, :func:`_prior_values`).
    ``prior_sd`` has no meaning here (the covariance holds the spread).
    """
    from ..design.bank_fit import multidimensional_grid_points
    from ..design.types import covariance_problem

    sc = design.scoring
    lo, hi = float(sc.grid_min), float(sc.grid_max)
    width = hi - lo
    if prior_sd is not None:
        raise InvalidValueError(f"a design with an ability vector of K = {k} dimensions takes the prior's spread "
                                f"as prior_covariance (a {k} x {k} matrix), not prior_sd",
                                location="prior_sd", field="prior_sd")
    mean = cov = None
    if prior_mean is not None:
        entries = _vector_entries(prior_mean, k, "prior_mean", f"the prior mean needs K = {k} numbers "
                                                               "(one per dimension)")
        mean = np.array([_finite_number(x, f"entry {j + 1} of the prior mean", location="prior_mean",
                                        field="prior_mean") for j, x in enumerate(entries)])
        for j, m in enumerate(mean):
            if not lo <= m <= hi:
                raise InvalidValueError(f"entry {j + 1} of the prior mean must lie on the design's ability grid "
                                        f"[{lo:g}, {hi:g}], got {m:g}", location="prior_mean", field="prior_mean")
    if prior_covariance is not None:
        what = f"the prior covariance must be a {k} x {k} matrix (K = {k} rows of {k} numbers)"
        rows = _vector_entries(prior_covariance, k, "prior_covariance", what)
        cov = np.array([[_finite_number(x, f"row {i + 1}, entry {j + 1} of the prior covariance",
                                        location="prior_covariance", field="prior_covariance")
                         for j, x in enumerate(_vector_entries(r, k, "prior_covariance", what))]
                        for i, r in enumerate(rows)])
        problem = covariance_problem(tuple(tuple(r) for r in cov))
        if problem is not None:
            raise InvalidValueError(f"the prior covariance {problem}", location="prior_covariance",
                                    field="prior_covariance")
        step = width / (multidimensional_grid_points(design, k) - 1)
        for j, v in enumerate(np.diagonal(cov)):
            sd = math.sqrt(v)
            if not step * (1 - 1e-9) <= sd <= width * (1 + 1e-9):
                raise InvalidValueError(f"the prior SD of dimension {j + 1} (the square root of row {j + 1}, entry "
                                        f"{j + 1} of the prior covariance) must lie between one step of the "
                                        f"design's ability grid ({step:g}) and the grid's width ({width:g}), "
                                        f"got {sd:g}", location="prior_covariance", field="prior_covariance")
    return mean, cov


def _vector_entries(value, k: int, field: str, what: str) -> list:
    """The K entries of a list, tuple or numpy vector ``value`` (text and scalars refused)."""
    if isinstance(value, np.ndarray):
        value = list(value)
    if not isinstance(value, (list, tuple)):
        raise InvalidValueError(f"{what}, got {shown(value)}", location=field, field=field)
    if len(value) != k:
        raise InvalidValueError(f"{what}, got {len(value)}", location=field, field=field)
    return list(value)


def _stored_vector_prior(ctx: TestContext, row: dict) -> tuple:
    """An ability vector session's own prior as stored with it: ``(mean (K,), covariance
    (K, K))`` from the state snapshot of the session row (it holds the prior the session
    started from, written exactly: JSON keeps every float), or ``(None, None)`` where it is
    the design's (every session of an ability vector started before examinee-specific
    priors had the design's)."""
    tab = ctx.multidimensional
    stored = json.loads(row["state"]).get("prior")
    if stored is None:
        return None, None
    mean = np.array(stored[0], dtype=float)
    cov = np.array(stored[1], dtype=float)
    same_mean = mean.shape == tab.prior_mean.shape and bool(np.all(mean == tab.prior_mean))
    same_cov = cov.shape == tab.prior_covariance.shape and bool(np.all(cov == tab.prior_covariance))
    return (None if same_mean else mean), (None if same_cov else cov)


# ----------------------------------------------------------------------------------------
# replies and events


def item_view(bank: ItemBank, row: int) -> dict | None:
    """What the app may know of an item: id, area, label and number of categories."""
    if row < 0:
        return None
    return {"item_id": str(bank.item_ids[row]), "area": str(bank.area[row]),
            "label": str(bank.label[row]), "n_categories": int(bank.n_categories[row])}


def _ability(value):
    """A float for a one-dimensional ability, a list of floats for an ability vector."""
    v = np.asarray(value, dtype=float)
    return float(v) if v.ndim == 0 else [float(x) for x in v]


def _event_number(value):
    """The event table's theta / se column: a number, or None for an ability vector (the
    vector is in the event's reply and the session's state)."""
    if value is None:
        return None
    v = np.asarray(value, dtype=float)
    return float(v) if v.ndim == 0 else None


def _snapshot_theta(snapshot: dict):
    """The ability of a state snapshot: a number (one dimension) or a list."""
    theta = snapshot["theta"]
    return theta[0] if not isinstance(snapshot["se"], list) else theta


def _reply(session_id: str, ctx: TestContext, state: KernelState, result: dict | None) -> dict:
    view = item_view(ctx.bank, int(state.pending[0]))
    reply = {
        "session_id": session_id,
        "item_id": None if view is None else view["item_id"],
        "item": view,
        "theta": _ability(state.theta[0]),
        "se": _ability(state.se[0]),
        "items_given": int(state.n_given[0]),
        "done": bool(state.done[0]),
    }
    if state.done[0]:
        reply["stop_reason"] = str(state.stop_reason[0])
        reply["result"] = result
    theta, se = reply["theta"], reply["se"]
    if type(theta) is float and type(se) is float and math.isfinite(theta) and math.isfinite(se):
        # every other value is plain already (text, int, bool, None, the item view's text
        # and ints, a result made plain): plain() would return an equal reply
        return reply
    return plain(reply)


def _rng_state(state: KernelState) -> str:
    # to_json({"key": ..., "position": ...}) of two integers, written directly
    return f'{{"key":{int(state.keys[0])},"position":{int(state.n_given[0])}}}'


#: ``json.dumps(value, separators=(",", ":"), allow_nan=False)`` with one encoder made once
#: (``json.dumps`` builds a new encoder on every call with arguments of its own).
_COMPACT_JSON = json.JSONEncoder(separators=(",", ":"), allow_nan=False).encode


def _json_text(value) -> str:
    """:func:`~adaptive_engine.live.store.to_json` of a value this module built: dicts with
    text keys, lists and built-in scalars (a reply, a state snapshot, a final report made
    plain).  ``json.dumps`` writes such a value as ``to_json`` does without the ``plain``
    pass over it; a value holding anything else (a NaN, which ``to_json`` writes as null; a
    numpy value) goes through ``to_json`` itself."""
    try:
        return _COMPACT_JSON(value)
    except (TypeError, ValueError):
        return to_json(value)


def _next_events(rules: RuleSet, ctx: TestContext, state: KernelState, picked, seq: int,
                 now: str) -> tuple[list[dict], dict | None]:
    """The item_given or finished event that follows a start or an answer."""
    item = int(state.pending[0])
    if item >= 0:
        value = float(picked.value[0])
        return [{
            "kind": "item_given", "seq": seq, "item_id": str(ctx.bank.item_ids[item]),
            "scored": int(ctx.operational[item]), "theta": _event_number(state.theta[0]),
            "se": _event_number(state.se[0]), "criterion": value if math.isfinite(value) else None,
            "eligible": int(picked.eligible[0]) if picked.eligible[0] >= 0 else None,
            "rng_state": _rng_state(state), "created_at": now,
        }], None
    result = plain(rules.finish(ctx, state, _ROW0)[0])
    return [{
        "kind": "finished", "seq": seq, "theta": _event_number(result.get("theta")),
        "se": _event_number(result.get("se")),
        "rng_state": _rng_state(state), "created_at": now,
    }], result


def _session_changes(ctx: TestContext, state: KernelState, seq: int, now: str, result: dict | None) -> dict:
    snapshot = state.to_dict(0)
    snapshot["pending_item_id"] = None if state.pending[0] < 0 else str(ctx.bank.item_ids[state.pending[0]])
    return {
        "status": "finished" if state.done[0] else "active",
        "updated_at": now, "state": _json_text(snapshot),
        "result": None if result is None else _json_text(result),
        "last_seq": seq, "n_given": int(state.n_given[0]),
        "pending_item": snapshot["pending_item_id"],
    }


# ----------------------------------------------------------------------------------------
# the requests


@attrs.frozen(eq=False)
class PreparedStart:
    """A start request that passed every check, with its first step computed.

    Build with :func:`prepare_start` (needs no store), then write it with
    :func:`commit_start`.  Nothing about it can be refused any more except by the store
    itself (a session id already taken, a file that is not a store).
    """

    design: Design
    bank: ItemBank
    ctx: TestContext
    state: KernelState
    row: dict
    events: list
    result: dict | None
    rules: RuleSet


def prepare_start(design: Design, bank: ItemBank, *, examinee: str | None = None, seed: int | None = None,
                  prior_mean=None, prior_sd: float | None = None, prior_covariance=None,
                  session_id: str | None = None, cache: ProcessCache | None = None,
                  table_folder=None) -> PreparedStart:
    """Check a start request and compute the session's first step, touching no store.

    Takes the options of :func:`start_session`.  A caller that may have to create the
    store (the command line) calls this first, so that a refused request creates nothing.
    ``table_folder``: the store's folder of prepared banks (``SessionStore.table_folder``),
    to take the bank's tables from or leave them in; None: build in this process only.

    Raises
    ------
    SessionError
        A bad examinee id, session id, seed, prior mean, SD or covariance (``location``
        names the parameter).
    DesignError
        The design does not fit the bank.
    """
    cache = PROCESS_CACHE if cache is None else cache
    if examinee is not None:
        check_text(examinee, "the examinee id", location="examinee")
    if session_id is not None:
        check_text(session_id, "the session id", location="session_id")
        if not session_id.strip():
            raise InvalidValueError("a session id must be non-empty text", location="session_id", field="session_id")
    seed = _seed_value(seed)
    from ..design.bank_fit import runs_multidimensional

    vector_prior = {}
    if runs_multidimensional(design, bank):
        # an ability vector starts from the design's multivariate normal prior or the
        # examinee's own; the prior columns of the session row keep its first dimension,
        # the state snapshot the whole (the replay reads it there: _stored_vector_prior)
        from ..kernel.multidimensional_state import prior_of

        k = bank.n_dimensions
        own_mean, own_cov = _vector_prior_values(design, k, prior_mean, prior_sd, prior_covariance)
        design_mean, design_cov = prior_of(design, k)
        first_mean = design_mean if own_mean is None else own_mean
        first_cov = design_cov if own_cov is None else own_cov
        mean, sd = float(first_mean[0]), float(np.sqrt(first_cov[0, 0]))
        if own_mean is not None:
            vector_prior["prior_mean"] = own_mean
        if own_cov is not None:
            vector_prior["prior_covariance"] = own_cov
    else:
        if prior_covariance is not None:
            raise InvalidValueError("a prior covariance is for a design with an ability vector; this design has "
                                    "one ability: give its spread as prior_sd", location="prior_covariance",
                                    field="prior_covariance")
        mean, sd = _prior_values(design, prior_mean, prior_sd)
    bank_id = bank_content(bank)[0]
    design_id = design_content(design)[0]
    # a new session starts under the current rules and keeps them for life
    rules = current_rule_set()
    if not cache.has_context(design_id, bank_id, rules=rules):
        from ..design.bank_fit import require_design_fits_bank

        require_design_fits_bank(design, bank)
    # the context is built from the objects given: no store is read
    ctx = cache.context(None, design_id, bank_id, rules=rules, design=design, bank=bank, table_folder=table_folder)
    key = np.array([stream_key(seed)], dtype=np.uint64)
    if vector_prior:
        state, picked = rules.start(ctx, key, **vector_prior, count_eligible=True)
    else:
        state, picked = rules.start(ctx, key, prior_mean=mean, prior_sd=sd, count_eligible=True)
    session_id = session_id or uuid.uuid4().hex
    now = now_text()
    events, result = _next_events(rules, ctx, state, picked, 1, now)
    row = {"session_id": session_id, "examinee": examinee, "bank_id": bank_id, "design_id": design_id,
           "seed": seed, "created_at": now, "prior_mean": mean, "prior_sd": sd,
           "decision_rules_version": rules.version, **_session_changes(ctx, state, 1, now, result)}
    return PreparedStart(design=design, bank=bank, ctx=ctx, state=state, row=row,
                         events=[dict(e, session_id=session_id) for e in events], result=result, rules=rules)


def commit_start(store: SessionStore, prepared: PreparedStart, *, cache: ProcessCache | None = None) -> dict:
    """Write a prepared start to ``store`` (one transaction) and return its reply.

    Returns
    -------
    dict
        As :func:`start_session`.
    """
    cache = PROCESS_CACHE if cache is None else cache
    row, state = prepared.row, prepared.state
    with store.writing():
        store.put_bank(prepared.bank)
        store.put_design(prepared.design)
        store.insert_session(row)
        store.append_events(prepared.events)
        if state.pending[0] >= 0:
            store.count_exposure(row["bank_id"], row["pending_item"])
    cache.keep(store, row["session_id"], 1, state)
    return _reply(row["session_id"], prepared.ctx, state, prepared.result)


def start_session(store: SessionStore, design: Design, bank: ItemBank, *, examinee: str | None = None,
                  seed: int | None = None, prior_mean=None, prior_sd: float | None = None,
                  prior_covariance=None, session_id: str | None = None,
                  cache: ProcessCache | None = None) -> dict:
    """Start a session of ``design`` on ``bank`` and return the first item.

    Parameters
    ----------
    store : SessionStore
    design, bank : Design, ItemBank
        Stored in the store (once per content) so the session never needs the files again.
    examinee : str, optional
        The app's id of the examinee (not interpreted; valid Unicode text).
    seed : int in [0, 2**63), optional
        Fixes every random decision of the test; a fresh one is drawn and stored if absent.
        ``randomness.examinee_seeds(S, N)[i]`` reproduces simulated examinee i of a run
        with seed S.
    prior_mean, prior_sd : float, optional
        An examinee-specific prior (returning examinees); default: the design's.  The mean
        must lie on the design's ability grid [grid_min, grid_max], the SD between one grid
        step and the grid's width (defaults: [-6, 6], 0.1 .. 12).  For a design with an
        ability vector of K dimensions ``prior_mean`` is a list of K numbers (each on the
        grid) and ``prior_sd`` is refused: the spread is ``prior_covariance``.
    prior_covariance : list of K lists of K numbers, optional
        An ability vector's examinee-specific prior covariance (default: the design's):
        symmetric, positive definite, each dimension's SD between one grid step and the
        grid's width.  Stored with the session (its state), so that it resumes from the
        same prior.
    session_id : str, optional
        Default: a random UUID (hex).

    Returns
    -------
    dict
        ``session_id``, ``item_id`` (None if no item is eligible), ``item`` (id, area,
        label, n_categories), ``theta``, ``se``, ``items_given``, ``done`` (and ``result``
        when done).

    Raises
    ------
    SessionError, DesignError
        As :func:`prepare_start`, or the session id is taken.  Nothing is written then.
    """
    prepared = prepare_start(design, bank, examinee=examinee, seed=seed, prior_mean=prior_mean,
                             prior_sd=prior_sd, prior_covariance=prior_covariance, session_id=session_id,
                             cache=cache, table_folder=store.table_folder)
    return commit_start(store, prepared, cache=cache)


def submit_answer(store: SessionStore, session_id: str, item_id: str, response, *,
                  elapsed: float | None = None, cache: ProcessCache | None = None) -> dict:
    """Record the answer to the pending item and return the next item (or the result).

    Parameters
    ----------
    session_id, item_id : str
        Valid Unicode text (no lone surrogates).
    response : int, numpy integer, or str
        The category observed, 0 .. n_categories - 1: an ``int`` or numpy integer (not a
        bool, not a float such as ``1.0``), or text of ASCII digits (``"1"``, ``" 2 "``;
        not ``"١"`` or ``"１"``).
    elapsed : float, optional
        Seconds the examinee has spent so far (used by a time-limit stopping rule): a
        finite number >= 0.

    Returns
    -------
    dict
        As :func:`start_session`.  Sending the same answer to the same item again returns
        the reply of the first time and records nothing.

    Raises
    ------
    SessionError
        Unknown session; the item is not the pending one; the response is not an integer
        category of the item; the item was answered before with another response; the
        session has finished.  Nothing is written then.
    """
    cache = PROCESS_CACHE if cache is None else cache
    check_text(session_id, "the session id", location="session_id")
    check_text(item_id, "the item id", location="item_id")
    where = f"session {shown(session_id)} item {shown(item_id)}"
    value = _response_value(response, where)
    elapsed = _elapsed_value(elapsed, f"{where} elapsed")
    row = store.session_row(session_id)
    # None when this engine lacks the session's rules: only a resent answer gets a reply then
    rules = rule_set(row["decision_rules_version"])
    # the context may take a while to build: do it before taking the write lock
    ctx = None if rules is None else cache.context(store, row["design_id"], row["bank_id"], rules=rules)
    if rules is not None:
        reply = _answer_before_lock(store, rules, ctx, row, item_id, value, elapsed, cache)
        if reply is not None:
            return reply
    mutated = [False]
    try:
        with store.writing():
            # locked until the transaction ends: answers to one session run one at a time
            row = store.session_row(session_id, lock=True)
            return _answer_locked(store, rules, ctx, row, item_id, value, elapsed, cache, mutated)
    except BaseException:
        if mutated[0]:
            cache.drop(store, session_id)
        raise


def _answer_before_lock(store, rules, ctx, row, item_id, response, elapsed, cache) -> dict | None:
    """The common answer, decided before the write lock is taken; None when it does not apply.

    Applies when the row read without a lock shows the item pending in an active session
    and this process holds the session's state at the row's last event (the usual case: the
    session's previous step ran here).  The next step is computed on a copy of that state;
    the write transaction then holds only the writes, after checking that the session's
    row has not moved on (same last event, status and pending item) since it was read.
    When it has (another request answered the session meanwhile), nothing is written and
    None is returned: the caller answers under the lock, where every check runs on the
    locked row.  The transaction writes what an answer under the lock writes; the check
    is the conditional update of the row (:meth:`SessionStore.answer_writes`).
    """
    value, value_text = response
    session_id = row["session_id"]
    if row["status"] != "active" or row["pending_item"] != item_id:
        return None  # a resent answer, a finished session, another item: the locked path says which
    seq = int(row["last_seq"])
    cached = cache.state(store, session_id, seq)
    if cached is None:
        return None
    index = ctx.bank.index_of.get(item_id)
    if index is None or not 0 <= value < int(ctx.bank.n_categories[index]):
        return None  # refused under the lock, with its message
    state = cached.copy()  # the cached state stays as it is until the answer is committed
    answered = _answer_step(rules, ctx, state, session_id, item_id, value, elapsed, seq)
    # every statement's text and parameters are made before the lock, which is held for the
    # statements alone
    writes = store.answer_writes(session_id, seq, item_id, answered.changes, answered.events,
                                 (row["bank_id"], answered.reply["item_id"]) if state.pending[0] >= 0 else None)
    try:
        with store.writing():
            # the session row changes only if it is still as read (same last event, active,
            # the same item pending): the check is the update
            if not store.write_answer(writes):
                raise _MovedOn
    except _MovedOn:
        return None  # the session moved on since it was read: nothing written
    cache.keep(store, session_id, seq + 2, state)
    return answered.reply


class _MovedOn(Exception):
    """The session changed between the read and the write of an answer decided before the lock."""


class _Answered(NamedTuple):
    """What an answer writes: events, the session row's changes, the reply."""

    events: list
    changes: dict
    reply: dict


def _answer_step(rules, ctx, state, session_id, item_id, value, elapsed, seq) -> _Answered:
    """Answer ``state`` (changed in place) and make what the answer writes."""
    picked = rules.answer(ctx, state, _ROW0, np.array([value]),
                          elapsed=None if elapsed is None else np.array([elapsed]), count_eligible=True)
    now = now_text()
    events, result = _next_events(rules, ctx, state, picked, seq + 2, now)
    reply = _reply(session_id, ctx, state, result)
    given = state.n_given[0] - 1
    answer_event = {
        "kind": "answer", "seq": seq + 1, "item_id": item_id, "response": value,
        "scored": int(state.scored[0, given]), "theta": _event_number(state.theta[0]),
        "se": _event_number(state.se[0]),
        "rng_state": _rng_state(state), "elapsed": elapsed, "created_at": now, "reply": _json_text(reply),
    }
    return _Answered(events=[dict(e, session_id=session_id) for e in [answer_event, *events]],
                     changes=_session_changes(ctx, state, seq + 2, now, result), reply=reply)


def _write_answer(store, row, state, answered: _Answered) -> None:
    """The writes of an answer (inside the write transaction)."""
    store.append_events(answered.events)
    store.update_session(row["session_id"], answered.changes)
    if state.pending[0] >= 0:
        store.count_exposure(row["bank_id"], answered.reply["item_id"])


def _answer_locked(store, rules, ctx, row, item_id, response, elapsed, cache, mutated) -> dict:
    value, value_text = response
    session_id = row["session_id"]
    where = f"session {shown(session_id)}"
    item = shown(item_id)
    if row["status"] != "active" or row["pending_item"] != item_id:
        earlier = store.answer_event(session_id, item_id)
        if earlier is not None:
            if earlier["response"] == value:
                return json.loads(earlier["reply"])
            raise ConflictError(f"already answered with {earlier['response']}; "
                                f"a different answer ({value_text}) is refused", location=f"{where} item {item}",
                                field="response")
        if row["status"] != "active":
            raise ConflictError("the session has finished; it takes no more answers", location=where)
        raise ConflictError(f"not the pending item (pending: {row['pending_item']})",
                            location=f"{where} item {item}", field="item_id")
    if rules is None:
        raise rules_not_installed(row)
    bank = ctx.bank
    index = bank.index_of[item_id]
    n_cat = int(bank.n_categories[index])
    if not 0 <= value < n_cat:
        raise InvalidValueError(f"response {value_text} is outside the categories 0..{n_cat - 1}",
                                location=f"{where} item {item}", field="response")
    # a copy: a state in the cache is never changed in place, so that an answer decided
    # before the lock (which copies it without the lock) never sees one half-answered
    state = session_state(store, ctx, row, cache=cache, rules=rules).copy()
    mutated[0] = True
    seq = int(row["last_seq"])
    answered = _answer_step(rules, ctx, state, session_id, item_id, value, elapsed, seq)
    _write_answer(store, row, state, answered)
    cache.keep(store, session_id, seq + 2, state)
    return answered.reply


def rules_not_installed(row: dict) -> SessionError:
    """The refusal of a session whose decision rules this engine cannot run."""
    session_id = shown(row["session_id"])
    version = row["decision_rules_version"]
    installed = ", ".join(str(v) for v in installed_versions())
    return ConflictError(
        f"the session started under decision rules version {shown(version)}, which this engine "
        f"cannot run (it runs version {decision_rules.DECISION_RULES_VERSION}; installed: {installed}); "
        f"the session can still be read (show, result) but not continued here", location=f"session {session_id}")


def session_rules(row: dict) -> RuleSet:
    """The installed rule set of a stored session; SessionError when this engine lacks it."""
    rules = rule_set(row["decision_rules_version"])
    if rules is None:
        raise rules_not_installed(row)
    return rules


def session_state(store: SessionStore, ctx: TestContext, row: dict, *,
                  cache: ProcessCache | None = None, rules: RuleSet | None = None) -> KernelState:
    """The kernel state of a stored session: cached if up to date, else replayed from the log.

    A cached state that other processes have moved on since (a session answered on several
    servers in turn) is brought up to date by answering it the answers it lacks, in order,
    as :func:`~adaptive_engine.kernel.cycle.rebuild` would from the start: the same steps
    from the same state give the same state.  Without a cached state, or when the log does
    not continue it, the whole log is replayed.

    ``rules`` (default: the session's own, :func:`session_rules`) must be the rule set
    ``ctx`` was built under.
    """
    cache = PROCESS_CACHE if cache is None else cache
    rules = session_rules(row) if rules is None else rules
    session_id = row["session_id"]
    state = cache.state(store, session_id, int(row["last_seq"]))
    if state is not None:
        return state
    bank = ctx.bank
    answers = store.answers(session_id)
    unknown = [iid for iid, _, _ in answers if iid not in bank.index_of]
    if unknown:
        raise SessionError(f"the log names item {unknown[0]} that the session's bank lacks",
                           location=f"session {shown(session_id)}")
    hit = cache.latest(store, session_id)
    state = None
    if hit is not None and hit[0] < int(row["last_seq"]):
        cache.drop(store, session_id)  # changed in place below: never reused half-way
        state = _caught_up(rules, ctx, hit[1], answers)
    if state is None:
        try:
            mean, sd, own = float(row["prior_mean"]), float(row["prior_sd"]), {}
            if ctx.multidimensional is not None:
                own_mean, own_cov = _stored_vector_prior(ctx, row)
                mean = mean if own_mean is None else own_mean
                own = {} if own_cov is None else {"prior_covariance": own_cov}
            state, _ = rules.rebuild(ctx, int(stream_key(int(row["seed"]))), mean, sd,
                                      [bank.index_of[i] for i, _, _ in answers],
                                      [int(r) for _, r, _ in answers], elapsed=[e for _, _, e in answers], **own)
        except ValueError as exc:
            raise SessionError(f"the stored answers do not replay: {exc}",
                               location=f"session {shown(session_id)}") from None
    pending = None if state.pending[0] < 0 else str(bank.item_ids[state.pending[0]])
    if pending != row["pending_item"]:
        raise SessionError(f"the stored answers replay to pending item {pending}, the session row says "
                           f"{row['pending_item']}", location=f"session {shown(session_id)}")
    cache.keep(store, session_id, int(row["last_seq"]), state)
    return state


def _caught_up(rules: RuleSet, ctx: TestContext, state: KernelState, answers: list) -> KernelState | None:
    """``state`` answered the logged answers it lacks; None when the log does not continue it."""
    done = int(state.n_given[0])
    if done > len(answers) or state.done[0]:
        return None
    try:
        for item_id, response, elapsed in answers[done:]:
            if state.done[0] or int(state.pending[0]) != ctx.bank.index_of[item_id]:
                return None
            rules.answer(ctx, state, _ROW0, np.array([int(response)]),
                         elapsed=None if elapsed is None else np.array([elapsed], dtype=float))
    except ValueError:
        return None
    return state


def pending_item(store: SessionStore, session_id: str, *, cache: ProcessCache | None = None) -> dict:
    """The item the session waits for: ``session_id``, ``item_id``, ``item``, ``items_given``, ``done``."""
    row = store.session_row(session_id)
    return {"session_id": session_id, "item_id": row["pending_item"], "item": _pending_view(store, row, cache),
            "items_given": int(row["n_given"]), "done": row["status"] == "finished"}


def _pending_view(store: SessionStore, row: dict, cache: ProcessCache | None) -> dict | None:
    cache = PROCESS_CACHE if cache is None else cache
    if row["pending_item"] is None:
        return None
    rules = rule_set(row["decision_rules_version"])
    if rules is not None:
        ctx = cache.context(store, row["design_id"], row["bank_id"], rules=rules)
        bank = ctx.bank
    else:  # readable all the same: the view needs the bank only
        bank = store.load_bank(row["bank_id"])
    return item_view(bank, bank.index_of[row["pending_item"]])


def session_status(store: SessionStore, session_id: str, *, cache: ProcessCache | None = None) -> dict:
    """What a page reload needs: :func:`pending_item` plus the status, estimate and release.

    Returns
    -------
    dict
        ``session_id``, ``status``, ``release`` (``"name@version"`` or None), ``item_id``,
        ``item``, ``items_given``, ``theta``, ``se``, ``done``.
    """
    row = store.session_row(session_id)
    snapshot = json.loads(row["state"])
    return plain({"session_id": session_id, "status": row["status"], "release": release_label(row),
                  "item_id": row["pending_item"], "item": _pending_view(store, row, cache),
                  "items_given": int(row["n_given"]), "theta": _snapshot_theta(snapshot), "se": snapshot["se"],
                  "done": row["status"] == "finished"})


def session_result(store: SessionStore, session_id: str) -> dict:
    """The final report of a finished session (SessionError while it is still active)."""
    row = store.session_row(session_id)
    if row["status"] != "finished":
        raise ConflictError("the session is still active: no result yet", location=f"session {shown(session_id)}")
    return json.loads(row["result"])


def _event_estimate(event: dict) -> dict:
    """The estimate after an answer event: its columns, or for an ability vector (columns
    empty) the vectors of the event's reply."""
    if event["theta"] is None and event.get("reply"):
        reply = json.loads(event["reply"])
        if isinstance(reply.get("theta"), list):
            return {"theta": reply["theta"], "se": reply["se"]}
    return {"theta": event["theta"], "se": event["se"]}


def show_session(store: SessionStore, session_id: str, *, include_seed: bool = False) -> dict:
    """The session as the log tells it: answers with the estimate after each, and the result.

    Parameters
    ----------
    include_seed : bool
        Add the session's ``seed``.  Off by default: seed and bank together predict every
        random choice of the test (randomesque draws, pretest picks), so the seed is for
        whoever replays a session, not for everyone who may look at it.
    """
    row = store.session_row(session_id)
    snapshot = json.loads(row["state"])
    administered = [
        {"item_id": e["item_id"], "response": e["response"], "scored": bool(e["scored"]),
         **_event_estimate(e), "elapsed": e["elapsed"]}
        for e in store.events(session_id) if e["kind"] == "answer"
    ]
    out = {"session_id": session_id, "examinee": row["examinee"], "status": row["status"],
           "created_at": row["created_at"], "updated_at": row["updated_at"],
           "release": release_label(row), "decision_rules_version": row["decision_rules_version"],
           "design_fingerprint": row["design_id"], "bank_fingerprint": row["bank_id"],
           "administered": administered, "pending_item": row["pending_item"],
           "theta": _snapshot_theta(snapshot), "se": snapshot["se"]}
    prior = _session_prior(row, snapshot)
    if prior is not None:
        out["prior"] = prior
    if include_seed:
        out["seed"] = row["seed"]
    if row["status"] == "finished":
        out["stop_reason"] = snapshot["stop_reason"]
        out["result"] = json.loads(row["result"])
    return out


def _session_prior(row: dict, snapshot: dict) -> dict | None:
    """The prior the session started from (the design's or the examinee's own): ``mean`` and
    ``sd`` of one ability (the session row's columns), ``mean`` (K) and ``covariance`` (K x K)
    of an ability vector (the state snapshot, which holds it whole); None for a session of an
    ability vector started before the snapshot held its prior (it had the design's)."""
    if isinstance(snapshot["se"], list):
        stored = snapshot.get("prior")
        return None if stored is None else {"mean": stored[0], "covariance": stored[1]}
    return {"mean": row["prior_mean"], "sd": row["prior_sd"]}


def release_label(row: dict) -> str | None:
    """``"name@version"`` of the release a stored session started against (None: no release)."""
    if row.get("release_name") is None:
        return None
    return f"{row['release_name']}@{row['release_version']}"


def list_sessions(store: SessionStore, *, status: str | None = None, release: str | None = None,
                  limit: int | None = None, offset: int = 0) -> list[dict]:
    """One summary per session (oldest first).

    Parameters
    ----------
    status : ``"active"`` or ``"finished"``, optional
    release : str, optional
        Only the sessions of a release: ``name`` (any version) or ``name@version``.
    limit, offset : int, optional
        A page of the list (default: all of it).
    """
    out = []
    for row in store.sessions(status=status, release=release, limit=limit, offset=offset):
        snapshot = json.loads(row["state"])
        out.append({"session_id": row["session_id"], "examinee": row["examinee"], "status": row["status"],
                    "release": release_label(row), "decision_rules_version": row["decision_rules_version"],
                    "items_given": row["n_given"], "pending_item": row["pending_item"],
                    "theta": _snapshot_theta(snapshot), "se": snapshot["se"],
                    "created_at": row["created_at"], "updated_at": row["updated_at"]})
    return out


def exposure_rates(store: SessionStore, bank: ItemBank) -> dict:
    """Items' exposure rates over all sessions of ``bank`` in the store.

    Returns
    -------
    dict
        ``sessions_started`` and ``rates`` (item id -> count / sessions_started, given
        items only).
    """
    started, counts = store.exposure(bank_content(bank)[0])
    return {"sessions_started": started,
            "rates": {iid: (n / started if started else 0.0) for iid, n in sorted(counts.items())}}


def try_session(design: Design, bank: ItemBank, *, ask: Callable[[dict, int], str],
                tell: Callable[[str], None], seed: int | None = None,
                progress: Callable[[dict], None] | None = None) -> dict:
    """Take a test interactively on a scratch in-memory store; returns the final report.

    Parameters
    ----------
    ask : callable (item view, position) -> str
        Shows the item and returns what the person typed.
    tell : callable (message) -> None
        Shows why an answer was refused (the item is then asked again).  The message is
        the problem alone, without the scratch session's id.
    progress : callable (reply) -> None, optional
        Called with every reply before its item is asked (``theta``, ``se``,
        ``items_given``: the running estimate).
    """
    from .store import open_store

    with open_store(":memory:") as store:
        cache = ProcessCache()
        reply = start_session(store, design, bank, seed=seed, cache=cache)
        while not reply["done"]:
            item = reply["item"]
            if progress is not None:
                progress(reply)
            typed = ask(item, reply["items_given"] + 1)
            try:
                reply = submit_answer(store, reply["session_id"], item["item_id"], typed, cache=cache)
            except SessionError as exc:
                tell("; ".join(problem.message for problem in exc.problems))
        return reply["result"]
