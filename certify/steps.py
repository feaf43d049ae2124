"""The step records a proof keeps for its certificate, stored compactly.

A :class:`certify.flow.FlowResult` holds, per step, everything the prover's analysis
needs (the boxes at the start and end of each step, the start times, the set's
coordinates ``r``, the frames ``m``, ``A``). Once a round's facts are drawn from it,
the certificate needs only, per step, ``h`` and the a-priori box ``E``
(docs/certificate-format.md: the checker chooses its own frames and starts from the
cell itself). :class:`StepStore` keeps just these, one batch per round, and forgets the
steps of cells that were split, so that memory grows with the cells kept rather than
with every cell ever analysed. Values are copied, never recomputed: the certificate is
the same bit for bit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["StepBatch", "StepStore", "STEP_KEYS"]

#: Per-step arrays kept, with the certificate's key for each.
STEP_KEYS = ("h", "E")

#: A batch is compacted once less than this share of its steps belongs to kept cells.
COMPACT_BELOW = 0.75


@dataclass
class StepBatch:
    """The steps of one batch of cells: box ``b`` owns ``step_start[b]`` and on.

    Attributes
    ----------
    n_steps, step_start : ndarray of int, shape (N,)
    h : ndarray, shape (S,)
    E : ndarray, shape (S, n, 2)
    """

    n_steps: np.ndarray
    step_start: np.ndarray
    h: np.ndarray
    E: np.ndarray

    @classmethod
    def from_flow(cls, result):
        """Keep of a :class:`certify.flow.FlowResult` what the certificate needs."""
        return cls(n_steps=result.n_steps, step_start=result.step_start,
                   h=result.h, E=np.stack([result.e_lo, result.e_hi], -1))

    @property
    def size(self):
        """Number of steps held."""
        return len(self.h)

    def rows(self, boxes):
        """Step rows of `boxes`, box after box in step order."""
        return _runs(self.step_start[boxes], self.n_steps[boxes])

    def followed_by(self, other):
        """The steps of each box of this batch, then those of the same box in `other`."""
        n_steps = self.n_steps + other.n_steps
        step_start = np.cumsum(n_steps) - n_steps
        boxes = np.arange(len(n_steps))
        mine = _runs(step_start, self.n_steps)
        theirs = _runs(step_start + self.n_steps, other.n_steps)
        joined = {}
        for key in STEP_KEYS:
            values = getattr(self, key)[self.rows(boxes)]
            joined[key] = np.empty((int(n_steps.sum()),) + values.shape[1:], values.dtype)
            joined[key][mine] = values
            joined[key][theirs] = getattr(other, key)[other.rows(boxes)]
        return StepBatch(n_steps=n_steps, step_start=step_start, **joined)

    def keep(self, boxes):
        """A batch of only `boxes`: box ``i`` of it is ``boxes[i]`` of this one."""
        rows = self.rows(boxes)
        k = self.n_steps[boxes]
        return StepBatch(n_steps=k, step_start=np.cumsum(k) - k,
                         **{key: getattr(self, key)[rows] for key in STEP_KEYS})


def _runs(first, count):
    """The integers ``first[i], ..., first[i] + count[i] - 1``, run after run."""
    within = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
    return np.repeat(first, count) + within


class StepStore:
    """The step records of the analysed cells, one batch per round.

    Parameters
    ----------
    n : int
        Dimension of the state space.
    """

    def __init__(self, n):
        self.n = n
        self.batches: list[StepBatch] = []
        self.ref = np.full((0, 2), -1)   # (batch, box in batch) per node, -1 where none

    def add(self, nodes, batch):
        """Keep the steps of the cells `nodes` (a :class:`StepBatch`, box order)."""
        top = int(nodes.max(initial=-1)) + 1
        if top > len(self.ref):
            self.ref = np.concatenate([self.ref, np.full((top - len(self.ref), 2), -1)])
        self.batches.append(batch)
        self.ref[nodes] = np.stack([np.full(len(nodes), len(self.batches) - 1),
                                    np.arange(len(nodes))], 1)

    def forget_all_but(self, nodes):
        """Drop the steps of every cell not in `nodes`; compact batches left sparse."""
        keep = np.zeros(len(self.ref), bool)
        keep[nodes[nodes < len(self.ref)]] = True
        self.ref[~keep] = -1
        for b, batch in enumerate(self.batches):
            mine = np.flatnonzero(self.ref[:, 0] == b)
            used = int(batch.n_steps[self.ref[mine, 1]].sum())
            if used < COMPACT_BELOW * batch.size:
                self.batches[b] = batch.keep(self.ref[mine, 1])
                self.ref[mine, 1] = np.arange(len(mine))

    def snapshot(self):
        """What :meth:`restore` needs to undo later additions and replacements."""
        return len(self.batches), self.ref.copy()

    def restore(self, snapshot):
        """Forget the batches and cells added (or steps replaced) since `snapshot`."""
        n_batches, ref = snapshot
        del self.batches[n_batches:]
        self.ref = ref

    def refs(self, nodes):
        """Where the steps of `nodes` are kept (for :meth:`set_refs`)."""
        return self._ref(nodes)

    def set_refs(self, nodes, refs):
        """Give `nodes` back the steps that :meth:`refs` named (still held)."""
        self.ref[nodes] = refs

    def offsets(self, nodes):
        """Per node the offset of its steps in :meth:`gather`'s arrays.

        Returns
        -------
        start : ndarray of int, shape (N + 1,)
            Node ``i`` owns rows ``start[i]:start[i + 1]``.
        """
        ref = self._ref(nodes)
        counts = np.zeros(len(nodes), int)
        for b, batch in enumerate(self.batches):
            sel = np.flatnonzero(ref[:, 0] == b)
            counts[sel] = batch.n_steps[ref[sel, 1]]
        return np.concatenate([[0], np.cumsum(counts)])

    def gather(self, nodes, key, start=None):
        """One per-step array (``h`` or ``E``) of `nodes`, node after node.

        `start` is ``offsets(nodes)`` when the caller has it already.
        """
        ref = self._ref(nodes)
        start = self.offsets(nodes) if start is None else start
        shape = {"h": (), "E": (self.n, 2)}[key]
        out = np.zeros((int(start[-1]),) + shape)
        for b, batch in enumerate(self.batches):
            sel = np.flatnonzero(ref[:, 0] == b)
            if len(sel) == 0:
                continue
            boxes = ref[sel, 1]
            out[_runs(start[sel], batch.n_steps[boxes])] = getattr(batch, key)[batch.rows(boxes)]
        return out

    def _ref(self, nodes):
        ref = np.full((len(nodes), 2), -1)
        inside = nodes < len(self.ref)
        ref[inside] = self.ref[nodes[inside]]
        return ref
