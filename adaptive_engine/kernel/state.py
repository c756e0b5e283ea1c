"""The per-examinee state of adaptive tests in progress, for a batch of examinees.

All arrays have the examinee on the first axis.  The live driver keeps a batch of one and
persists it (:meth:`KernelState.to_dict` / :meth:`KernelState.from_dict`); the simulation
driver keeps thousands.
"""

from __future__ import annotations

import attrs
import numpy as np

from .prepared import TestContext

#: The attribute names of each state class, in order (read on every copy of a state).
_FIELD_NAMES: dict = {}


@attrs.define(eq=False)
class KernelState:
    """Where each examinee of a batch stands.

    Attributes
    ----------
    keys : uint64 (B,)
        Random stream keys (:mod:`adaptive_engine.kernel.random_streams`).
    prior_mean, prior_sd : float (B,)
    log_post : float (B, G)
        Posterior of theta on the context's grid (scored answers only), in the context's
        ``posterior_form``: the density times a factor that keeps the row's sum between
        2^-100 and 1 (``"scaled"``) or the log density (``"log"``, decision rules versions 1
        and 2).
    items, responses : int (B, L)
        Every item given, in order, and its answer; -1 padding (L = scored + pretest slots).
    scored : bool (B, L)
        False for pretest items.
    n_given, n_scored, n_pretest : int (B,)
    used : bool (B, n_items)
        Items given (or withheld by Sympson-Hetter for the rest of the test).
    used_bits : uint8 (B, ceil(n_items / 8))
        ``used`` packed eight items to a byte (item i is bit ``i % 8`` of byte ``i // 8``):
        the short list's eligibility reads it, an eighth of the memory of ``used``.  Both
        are written together, by :meth:`mark_used` only.
    area_counts : int (B, A)
        Scored items given per content area.
    blocked_groups : bool (B, E + 1)
        Enemy groups already represented (last column: "no group", never blocked).
    current_set : int (B,)
        Item set in progress, -1 if none.
    theta, se : float (B,)
        Interim estimate.
    pending : int (B,)
        Item awaiting an answer, -1 if none.
    pending_value, pending_eligible : (B,)
        Criterion value of the pending item and size of the eligible set it came from.
    done : bool (B,)
    stop_reason : object (B,)
        ``""`` while the test goes on.
    elapsed : float (B,)
        Seconds reported by the app (NaN when never reported).
    """

    keys: np.ndarray
    prior_mean: np.ndarray
    prior_sd: np.ndarray
    log_post: np.ndarray
    items: np.ndarray
    responses: np.ndarray
    scored: np.ndarray
    n_given: np.ndarray
    n_scored: np.ndarray
    n_pretest: np.ndarray
    used: np.ndarray
    used_bits: np.ndarray
    area_counts: np.ndarray
    blocked_groups: np.ndarray
    current_set: np.ndarray
    theta: np.ndarray
    se: np.ndarray
    pending: np.ndarray
    pending_value: np.ndarray
    pending_eligible: np.ndarray
    done: np.ndarray
    stop_reason: np.ndarray
    elapsed: np.ndarray

    @property
    def size(self) -> int:
        return int(self.keys.shape[0])

    @classmethod
    def empty(cls, ctx: TestContext, keys, prior_mean, prior_sd) -> "KernelState":
        keys = np.asarray(keys, dtype=np.uint64).reshape(-1)
        b = keys.shape[0]
        length = ctx.max_length
        return cls(
            keys=keys,
            prior_mean=np.broadcast_to(np.asarray(prior_mean, dtype=float), (b,)).copy(),
            prior_sd=np.broadcast_to(np.asarray(prior_sd, dtype=float), (b,)).copy(),
            log_post=np.zeros((b, ctx.grid.size)),
            items=np.full((b, length), -1, dtype=np.int64),
            responses=np.full((b, length), -1, dtype=np.int64),
            scored=np.zeros((b, length), dtype=bool),
            n_given=np.zeros(b, dtype=np.int64),
            n_scored=np.zeros(b, dtype=np.int64),
            n_pretest=np.zeros(b, dtype=np.int64),
            used=np.zeros((b, ctx.n_items), dtype=bool),
            used_bits=np.zeros((b, (ctx.n_items + 7) // 8), dtype=np.uint8),
            area_counts=np.zeros((b, ctx.n_areas), dtype=np.int64),
            blocked_groups=np.zeros((b, ctx.n_groups + 1), dtype=bool),
            current_set=np.full(b, -1, dtype=np.int64),
            theta=np.zeros(b),
            se=np.zeros(b),
            pending=np.full(b, -1, dtype=np.int64),
            pending_value=np.full(b, np.nan),
            pending_eligible=np.zeros(b, dtype=np.int64),
            done=np.zeros(b, dtype=bool),
            stop_reason=np.full(b, "", dtype=object),
            elapsed=np.full(b, np.nan),
        )

    def copy(self) -> "KernelState":
        """An independent copy (every array copied), of the same class (the multidimensional
        state adds fields of its own)."""
        cls = type(self)
        names = _FIELD_NAMES.get(cls)
        if names is None:
            names = _FIELD_NAMES[cls] = tuple(f.name for f in attrs.fields(cls))
        return cls(**{name: getattr(self, name).copy() for name in names})

    def with_capacity(self, capacity: int) -> "KernelState":
        """A state of ``capacity`` rows (at least this one's) that begins with this state's
        rows; the rows after them are blank, to be filled by :meth:`copy_rows` before use."""
        cls = type(self)
        fields = {}
        for f in attrs.fields(cls):
            value = getattr(self, f.name)
            if value is not None:
                grown = np.empty((capacity,) + value.shape[1:], dtype=value.dtype)
                grown[: value.shape[0]] = value
                value = grown
            fields[f.name] = value
        return cls(**fields)

    def copy_rows(self, to, source) -> None:
        """Make rows ``to`` copies of rows ``source`` (int arrays (R,)), every field."""
        to = np.asarray(to, dtype=np.int64)
        if to.size and to[-1] - to[0] == to.size - 1 and bool(np.all(to[1:] > to[:-1])):
            to = slice(int(to[0]), int(to[0]) + to.size)  # consecutive rows (new ones): a slice, no scatter
        for f in attrs.fields(type(self)):
            value = getattr(self, f.name)
            if value is not None:
                value[to] = value.take(source, axis=0)

    def mark_used(self, rows, items, *, distinct_rows: bool = False) -> None:
        """Mark ``items`` (R,) used by ``rows`` (R,): in ``used`` and in ``used_bits`` (or one
        item of one row, both given as ints).

        A row may come more than once (several items withheld for one examinee), unless
        the caller says ``distinct_rows`` (then one flat update sets the bits).
        """
        used, packed = self.used, self.used_bits
        if isinstance(rows, int) and isinstance(items, int):  # one examinee, one item (a live answer)
            used[rows, items] = True
            packed[rows, items >> 3] |= np.uint8(1 << (items & 7))
            return
        rows = np.asarray(rows, dtype=np.int64)
        items = np.asarray(items, dtype=np.int64)
        if rows.size == 0:
            return
        if used.flags.c_contiguous:
            used.reshape(-1)[rows * used.shape[1] + items] = True
        else:
            used[rows, items] = True
        bits = np.left_shift(np.uint8(1), (items & 7).astype(np.uint8))
        if distinct_rows and packed.flags.c_contiguous:
            packed.reshape(-1)[rows * packed.shape[1] + (items >> 3)] |= bits
        else:
            np.bitwise_or.at(packed, (rows, items >> 3), bits)

    def scored_items(self, rows=None) -> tuple[np.ndarray, np.ndarray]:
        """Scored items and responses, (R, L) with -1 where pretest or not given."""
        rows = slice(None) if rows is None else rows
        items = np.where(self.scored[rows], self.items[rows], -1)
        resp = np.where(self.scored[rows], self.responses[rows], -1)
        return items, resp

    # -- persistence of a single examinee --------------------------------------------
    def to_dict(self, row: int = 0) -> dict:
        """JSON-ready snapshot of one examinee (ability persisted as a list)."""
        n = int(self.n_given[row])
        return {
            "key": int(self.keys[row]),
            "prior": [float(self.prior_mean[row]), float(self.prior_sd[row])],
            # tolist: Python ints and bools, as int() and bool() of each element give them
            "items": self.items[row, :n].tolist(),
            "responses": self.responses[row, :n].tolist(),
            "scored": self.scored[row, :n].tolist(),
            "theta": [float(self.theta[row])],
            "se": float(self.se[row]),
            "pending": int(self.pending[row]),
            "done": bool(self.done[row]),
            "stop_reason": str(self.stop_reason[row]),
            "elapsed": None if np.isnan(self.elapsed[row]) else float(self.elapsed[row]),
        }
