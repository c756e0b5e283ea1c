"""Examinees of a simulated chunk who share kernel rows while their answers agree.

A design that draws nothing at random (:func:`adaptive_engine.kernel.cycle.draws_at_random`)
decides from the answers alone, so examinees who gave the same answers so far are in the
same kernel state, row for row, apart from their stream keys (which such a design never
reads).  A chunk of examinees then keeps one kernel row per history of answers, computed
once, and a history splits into new rows when its examinees answer its pending item
differently: a 30-item test of 10,000 examinees has 2 histories after one answer, about
1,000 after ten and one per examinee after twenty, so the early steps of a large chunk
cost little.  Every result is the same as with one row per examinee, since the kernel
computes each row on its own.

:class:`ChunkRows` is this bookkeeping for both simulation drivers, the one-dimensional
(:func:`adaptive_engine.simulation.engine.run_chunk`) and the multidimensional
(:func:`adaptive_engine.simulation.multidimensional_engine.run_chunk`) one.
"""

from __future__ import annotations

import attrs
import numpy as np

from ..kernel import cycle as kernel
from ..kernel.prepared import TestContext
from ..kernel.state import KernelState


@attrs.define(eq=False)
class ChunkRows:
    """Which kernel row each examinee of a chunk stands at.

    Attributes
    ----------
    node_of : int (n,) or None
        Each examinee's row while rows are shared; None when every examinee has a row of
        its own (examinee i at row i).
    n_rows : int
        Rows of the kernel state in use (the rows after them are blank).
    """

    node_of: np.ndarray | None
    n_rows: int

    @classmethod
    def start(cls, ctx: TestContext, keys) -> tuple[kernel.Step, "ChunkRows"]:
        """Begin the tests of a chunk (stream keys (n,)): the kernel step and the rows.

        Rows are shared when the design draws nothing at random and the chunk has more
        than one examinee.  A shared state is made for the first examinee and grown to
        ``n`` rows, the later ones filled as histories split.
        """
        keys = np.asarray(keys, dtype=np.uint64).reshape(-1)
        n = keys.shape[0]
        if n < 2 or kernel.draws_at_random(ctx):
            return kernel.start(ctx, keys), cls(None, n)
        state, picked = kernel.start(ctx, keys[:1])
        return kernel.Step(state.with_capacity(n), picked), cls(np.zeros(n, dtype=np.int64), 1)

    @property
    def shared(self) -> bool:
        return self.node_of is not None

    def row_of(self, examinees: np.ndarray) -> np.ndarray:
        """The kernel row of each of ``examinees`` (int (R,))."""
        return examinees if self.node_of is None else self.node_of[examinees]

    def of_examinees(self, values: np.ndarray) -> np.ndarray:
        """A per-row array of the state (first axis rows) as one entry per examinee."""
        return values if self.node_of is None else values[self.node_of]

    def in_use(self) -> np.ndarray:
        """The rows in use, ascending."""
        return np.arange(self.n_rows)

    def testing(self, state: KernelState) -> tuple[np.ndarray, np.ndarray]:
        """The examinees still testing (ascending) and their rows, int (R,) each."""
        if self.node_of is None:
            rows = np.flatnonzero(~state.done)
            return rows, rows
        examinees = np.flatnonzero(~state.done[self.node_of])
        return examinees, self.node_of[examinees]

    def split(self, state: KernelState, examinees, at_row, answers) -> tuple[np.ndarray, np.ndarray]:
        """The rows to answer (distinct, ascending) and their answers, histories split.

        ``examinees`` answer ``answers`` (int (R,)) at rows ``at_row``.  The first answer
        of a history (the lowest) keeps its row; every other answer gets a new row, a copy
        of the history's state before the answer (rows ``n_rows`` on).  Each examinee's
        row is updated (:meth:`row_of` gives it afterwards).  With rows not shared, the
        examinees' own rows and answers are returned as they are.
        """
        if self.node_of is None:
            return at_row, answers
        n_rows = self.n_rows
        width = int(answers.max()) + 1
        key = at_row * width + answers
        present = np.bincount(key, minlength=n_rows * width).astype(bool)
        pair = np.flatnonzero(present)  # sorted: by row, then answer
        rank = np.cumsum(present) - 1  # pair index of each present key
        pair_row, pair_answer = pair // width, pair % width
        later = np.flatnonzero(pair_row[1:] == pair_row[:-1]) + 1  # not the first answer of its row
        if later.size == 0:
            self.node_of[examinees] = pair_row[rank[key]]
            return pair_row, pair_answer
        rows = pair_row.copy()
        rows[later] = n_rows + np.arange(later.size)
        state.copy_rows(rows[later], pair_row[later])
        self.n_rows = n_rows + later.size
        self.node_of[examinees] = rows[rank[key]]
        # in ascending order (the kept rows ascend, the new ones come after them): the kernel
        # reads and writes consecutive rows as slices
        kept = np.ones(rows.size, dtype=bool)
        kept[later] = False
        return np.concatenate([rows[kept], rows[later]]), np.concatenate([pair_answer[kept], pair_answer[later]])
