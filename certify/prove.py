"""The proof loop: a proven map of fates by adaptive refinement of dyadic cells.

Each round computes, for the cells that are new, the flow over a horizon (the tube and
the image box), then relabels every leaf by the fixpoints of :mod:`certify.labels`, and
splits the undecided leaves. At the end of every round the labelling is complete and
valid, so an interrupted run still leaves a proof. The time limit is kept within a
round as well: a round (after the first) that is still running when the limit passes is
abandoned, and the proof is the one of the last finished round.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass, field, replace
from functools import cached_property

import numpy as np
import scipy.sparse as sp

from . import interval as iv
from .cells import CellTree, index_dtype
from .executors import DeadlineReached, Runner, open_runner
from .flow import (DeadlinePassed, FlowStart, STOPPED, branch_groups, flow_boxes,
                   frame_count, join_results, truncate_results)
from .fate_grid import FateGrid, fate_grid
from .follow_order import follow_order
from .labels import (CellFacts, Labelling, label_cells, reversed_graph, unit_weights, DOOMED,
                     OUTSIDE, SAFE, UNDECIDED)
from .steps import StepBatch, StepStore
from .taylor import flow_programs
from .trapping import find_regions, in_regions, trapped_cells
from .faces import (analyse_faces, cut_at_invariant_faces, cut_to_window,
                    tube_past_open_faces)
from .image_sets import ImageSetStore
from .time_scale import TIME_KEYS, time_scale
from .volumes import label_fractions
from .evaluate import evaluate_boxes, evaluate_limits, parameter_enclosures

__all__ = ["Method", "Budget", "Proof", "prove", "write_proof", "GROWTH_LIMIT"]

#: A flow stops once its end box is this many times wider than its cell along some axis.
GROWTH_LIMIT = 4.0
#: Most steps whose limits are evaluated at once (:meth:`_Prover._step_verdicts`).
STEP_SLICE = 1 << 16
#: Fewest cells in a piece of a round's batch sent to a worker.
MIN_PIECE = 64
#: Most cells flowed at once: a flow's working arrays take some 12 kB a cell in 4D
#: (a batch of 340,000 cells took 4 GB), its records a few hundred bytes a step.
MAX_PIECE = 16384
#: A followed tube (:meth:`_Prover.extend`) stops once its end box is this many times
#: wider than its cell along some axis, not where it leaves the cell.
FOLLOW_GROWTH_LIMIT = 4.0
#: Cells per piece (and worker) of a followed round that the time limit cuts short: the
#: pieces flowed before the limit are kept, the one it interrupts is lost.
FOLLOW_PIECE = 2048
#: Labellings' worth of time a followed round keeps from the time limit for its own
#: labelling and the last one (more as its wider images add successors, see
#: :meth:`_Prover._flows_in_time`); its decisive passes run only in time its flows leave.
FOLLOW_RESERVE = 2
#: Share of the time a followed round left that a last, partial round may take: its
#: leaves are as many as fit at the last splitting round's seconds per new cell.
TIME_FIT_SHARE = 0.8
#: Most times a labelling drops the successors that image sets miss and labels again
#: (:meth:`_Prover._prune_successors`): leaves decided in one time free others. A
#: labelling costs as much as the first, so it is redone only when the dropped
#: successors free at least the share PRUNE_GAIN of the undecided leaves (a leaf is
#: freed when no successor holds it back from a label any more).
PRUNE_ROUNDS = 3
PRUNE_GAIN = 0.01
#: Most passes that cut followed tubes at a decisive step end (:meth:`_Prover.extend`).
DECISIVE_PASSES = 4
#: Candidate step ends whose successors are looked up at a time (:meth:`_Prover._step_ends`).
STEP_END_BLOCK = 1 << 16
#: Successor pairs of step ends tested at a time (:func:`_any_of`).
PAIR_BLOCK = 1 << 22


@dataclass(frozen=True)
class Method:
    """Numerical method settings (the certificate records them)."""

    order: int = 4
    min_horizon: float = 1.0
    max_horizon: float = 20.0
    step: float = 0.05
    max_step: float = 0.25
    min_step: float = 1e-6
    max_steps: int = 400
    start_depth: int = 3
    #: follow the tubes of the leaves undecided at ``max_depth`` one round longer
    #: (docs/proof-loop.md); None: for models with three or more states
    follow_undecided: bool | None = None
    #: which sets a tube carries (:data:`certify.flow.FRAME_RULES`)
    frames: str = "qr+parallelepiped"
    #: the factor the default lengths of time above were scaled by to suit the model's
    #: rate (:mod:`certify.time_scale`); 1 when the model or the caller gave any of them,
    #: and for models with controls
    time_scale: float = 1.0
    #: how models with ``abs``, ``min`` or ``max`` are stepped: ``"branches"``, at
    #: ``order`` where a step's a-priori box keeps every kink on one side and at order 1
    #: elsewhere; ``"order-1"``, at order 1 everywhere (docs/method.md)
    kinks: str = "branches"


@dataclass(frozen=True)
class Budget:
    """When to stop refining."""

    max_depth: int = 10
    max_cells: int = 400_000
    time_limit: float = 300.0


METHOD_KEYS = {"order", "min_horizon", "max_horizon", "step", "max_step", "start_depth",
               "follow_undecided"}
BUDGET_KEYS = {"max_depth", "max_cells", "time_limit"}


@dataclass
class _Snapshot:
    n_nodes: int
    first_child: np.ndarray
    leaves: np.ndarray
    labelling: Labelling
    facts: CellFacts
    round: int
    steps: tuple


@dataclass
class Proof:
    """A proven map of fates.

    Attributes
    ----------
    model : certify.model.Model
    method : Method
    budget : Budget
    params : list of (float, float)
        Float enclosures of the parameter boxes used.
    tree : CellTree
    leaves : ndarray of int
        Node ids of the leaves, in certificate order.
    labelling : Labelling
    facts : CellFacts
    faces : list of dict
        Per window face: its kind (``limit``, ``inflow``, ``invariant``, ``no-outflow``,
        ``open``) and its
        cover.
    steps : certify.steps.StepStore
        The step records of the leaves' flows (``h`` and ``E``, what the certificate
        stores).
    rounds : int
    seconds : float
    interrupted : bool
    stop_reason : str
    fractions : dict
    fractions_exact : bool
    trapping : certify.trapping.RegionSearch or None
        Trapping regions around stable equilibria (and why some have none).
    """

    model: object
    method: Method
    budget: Budget
    params: list
    tree: CellTree
    leaves: np.ndarray
    labelling: Labelling
    facts: CellFacts
    faces: list
    steps: StepStore
    successors: tuple
    rounds: int
    seconds: float
    interrupted: bool
    stop_reason: str
    fractions: dict = field(default_factory=dict)
    fractions_exact: bool = True
    trapping: object = None

    @property
    def counts(self):
        """Number of leaves per label."""
        return {k: int(np.sum(self.labelling.label == k))
                for k in ("safe", "doomed", "outside", "undecided")}

    @property
    def depth_reached(self):
        """Largest depth among the leaves."""
        return int(self.tree.depth[self.leaves].max())


@dataclass(frozen=True)
class _Stop:
    """Per tube end: whether the tube stops there, and whether only for leaving its cell."""

    stop: np.ndarray
    left_cell: np.ndarray


@dataclass(frozen=True)
class _Tubes:
    """What the flows of a batch of cells need besides the cells.

    Picklable, so that the batches of a round can run in other processes or on other
    machines (:mod:`certify.executors`); the compiled programs are rebuilt there from
    the model, once per process (:func:`certify.taylor.flow_programs` caches them).
    """

    model: object
    method: Method
    params: list
    faces: list
    window_sides: tuple
    regions: object
    #: None: tubes stop where they leave their cells (at GROWTH_LIMIT); a growth limit:
    #: followed tubes (:meth:`_Prover.extend`) that go on there and stop at that limit
    follow: float | None = None
    #: for followed tubes, the fates before their round (:mod:`certify.fate_grid`): a
    #: tube stops at an end box that meets one fate only
    fates: FateGrid | None = None

    @cached_property
    def programs(self):
        """certify.taylor.FlowPrograms: the compiled programs of the model."""
        return flow_programs(self.model, self.method.order, self.method.kinks)

    def __getstate__(self):
        # compiled programs do not pickle: a worker compiles its own
        return {k: v for k, v in self.__dict__.items() if k != "programs"}

    def flow(self, cell_lo, cell_hi, deadline=None, start=None):
        """The flows of the cells ``[cell_lo, cell_hi]`` (a :class:`FlowResult`), from the
        cells or, for the rows of `start` (a :class:`FlowStart`), on from there.

        Each cell's flow depends on that cell alone, so a batch cut into pieces gives
        the same records as the batch whole.
        """
        def should_stop(ids, end_lo, end_hi, t_lo, t_hi):
            return self.stops(cell_lo[ids], cell_hi[ids], end_lo, end_hi, t_lo).stop

        m = self.method
        return flow_boxes(self.programs, cell_lo, cell_hi, self.params,
                          min_horizon=0.0, max_horizon=m.max_horizon,
                          step=m.step, max_step=m.max_step, min_step=m.min_step,
                          max_steps=m.max_steps, should_stop=should_stop, deadline=deadline,
                          frames=m.frames, keep_sets=False, start=start)

    def stops(self, cell_lo, cell_hi, end_lo, end_hi, t_lo):
        """Where a tube from each cell, with the box `end` at time `t_lo`, stops, and why.

        Returns
        -------
        _Stop
            ``stop`` per cell, and ``left_cell``: it stops only because its image left
            the cell (a followed tube, ``follow`` set, would go on there).
        """
        left = np.any((end_hi < cell_lo) | (end_lo > cell_hi), axis=1)
        # an image inside its own cell closes a self-loop: longer flows add nothing
        inside = np.all((end_lo >= cell_lo) & (end_hi <= cell_hi), axis=1)
        _, gh = evaluate_limits(self.programs, end_lo, end_hi, self.params)
        crossed = np.any(gh < 0, axis=1)
        growth_limit = self.follow or GROWTH_LIMIT
        too_wide = np.max((end_hi - end_lo) / (cell_hi - cell_lo), axis=1) > growth_limit
        # an end box beyond an open side would escape: follow the trajectories until
        # they come back into the window or cross a limit out there
        ones = np.ones(len(end_lo), bool)
        away = self.clip(end_lo, end_hi, ones, ones)[2]
        trapped = in_regions(self.regions.regions, end_lo, end_hi)  # R keeps them
        settled = (self.fates.one_fate(end_lo, end_hi) if self.fates is not None
                   else np.zeros(len(end_lo), bool))
        moved = (inside | trapped | settled) if self.follow else (left | inside | trapped)
        moved &= ~away & (t_lo >= self.method.min_horizon)
        return _Stop(stop=moved | crossed | too_wide,
                     left_cell=moved & ~inside & ~trapped & ~settled & ~crossed & ~too_wide)

    def clip(self, lo, hi, ok, tube_open):
        """Cut images to the window; flag images whose outside parts may matter.

        Without a tube box beyond an open face, a trajectory that keeps the limits
        cannot have left the window (harmless faces cannot be crossed within the limits,
        and the tube never reaches past the others): every outside part is harmless.
        Otherwise each part beyond a face must violate a limit on the whole part.
        """
        lo_lo, lo_hi, hi_lo, hi_hi = self.window_sides
        escapes = np.zeros(len(lo), bool)
        check = ok & tube_open
        for face in self.faces:
            k, side = face["axis"], face["side"]
            pokes = check & ((lo[:, k] < lo_hi[k]) if side == "lo" else (hi[:, k] > hi_lo[k]))
            if not pokes.any():
                continue
            slo, shi = lo[pokes].copy(), hi[pokes].copy()
            if side == "lo":
                shi[:, k] = lo_hi[k]
            else:
                slo[:, k] = hi_lo[k]
            _, gh = evaluate_limits(self.programs, slo, shi, self.params)
            escapes[np.flatnonzero(pokes)[~np.any(gh < 0, axis=1)]] = True
        return np.maximum(lo, lo_lo), np.minimum(hi, hi_hi), escapes


def _any_of(query, leaf, flagged, count):
    """Per query number below `count`: whether one of its pairs ``(query, leaf)`` has a
    `flagged` leaf; in blocks of PAIR_BLOCK pairs (counting the flags of hundreds of
    millions of pairs would take 16 bytes a pair)."""
    out = np.zeros(count, bool)
    for first in range(0, len(query), PAIR_BLOCK):
        pairs = slice(first, first + PAIR_BLOCK)
        out[query[pairs][flagged[leaf[pairs]]]] = True
    return out


def _in_pieces(n, most):
    """The rows ``0 .. n - 1`` in the fewest pieces of at most `most` rows, in order (one
    empty piece when `n` is 0)."""
    return np.array_split(np.arange(n), max(-(-n // most), 1))


def _flow_piece(tubes, cell_lo, cell_hi, start):
    """The flows of one piece of a round's batch (a task of a worker)."""
    with np.errstate(all="ignore"):
        return tubes.flow(cell_lo, cell_hi, start=start)


@dataclass(frozen=True)
class _StepEnds:
    """Step ends at which followed tubes could be cut (:meth:`_Prover._step_ends`).

    Per candidate: ``box`` (its flow), ``pos`` (its step within the flow), ``kept``
    (every step up to it keeps the limits), ``doomed_next`` and ``safe_next`` (its box
    meets a leaf labelled doomed, safe); and the pairs ``query`` (candidate), ``leaf``
    (leaf number) of the undecided leaves its box meets.
    """

    box: np.ndarray
    pos: np.ndarray
    kept: np.ndarray
    doomed_next: np.ndarray
    safe_next: np.ndarray
    query: np.ndarray
    leaf: np.ndarray


@dataclass(frozen=True)
class _FirstParts:
    """What followed tubes take over from the tubes they go on from (:meth:`_Prover.extend`):
    per tube where its flow resumes (``start``), the facts of its steps so far
    (``first_unkept``, ``crossing``), and those steps (``steps``, for the drift bound, the
    open faces and the certificate)."""

    start: FlowStart
    first_unkept: np.ndarray
    crossing: np.ndarray
    steps: StepBatch

    def take(self, rows):
        """The first parts of the tubes `rows`."""
        return _FirstParts(start=self.start.take(rows), first_unkept=self.first_unkept[rows],
                           crossing=self.crossing[rows], steps=self.steps.keep(rows))


#: The per-node facts of :class:`_Prover` and their value for a new node. All but
#: ``outside`` are determined by the node's tube (:meth:`_Prover.extend` swaps them);
#: ``left_cell``: the tube stopped only where it left its cell.
_NODE_FACTS = {"outside": False, "flow_ok": False, "kept": False, "escapes": False,
               "left_cell": False, "crossing": np.inf, "horizon_lo": 0.0, "horizon_hi": 0.0,
               "first_unkept": 0.0, "image_lo": np.nan, "image_hi": np.nan}
_TUBE_FACTS = tuple(name for name in _NODE_FACTS if name != "outside")
#: Facts with one value per state.
_BOX_FACTS = ("image_lo", "image_hi")


class _Prover:
    """The facts of a proof's cells, and their labelling.

    With `prune_successors` the leaves that an undecided cell's image sets miss are
    dropped from its successors (:mod:`certify.image_sets`); the checker of plain
    certificates mirrors that, the one of policy maps does not.
    """

    def __init__(self, model, method, budget, progress, runner=None, prune_successors=True):
        self.model = model
        # where the flow batches run (certify.executors.Runner; default: this process)
        self.runner = runner or Runner()
        self.method = method
        self.budget = budget
        self.progress = progress
        self.deadline = None  # set by _prove: a time.monotonic() the flow must not run past
        self.label_seconds = 0.0  # how long the last labelling took
        self.label_pairs = 0  # and how many (leaf, successor) pairs it looked up
        self.followed = None  # (tubes followed, tubes to follow) of the followed round
        self.params = parameter_enclosures(model)
        self.programs = flow_programs(model, method.order, method.kinks)
        self.limits_programs = self.programs
        self.tree = CellTree(model.window)
        self.n = self.tree.n
        self.window_sides = self.tree.window_bounds()
        self.faces = analyse_faces(model, self.programs, self.tree, self.params)
        self.regions = find_regions(model, self.programs, self.params)
        self.tubes = _Tubes(model, method, self.params, self.faces, self.window_sides,
                            self.regions)
        self.steps = StepStore(self.n)
        self.image_sets = ImageSetStore(self.n, frame_count(method.frames)) \
            if prune_successors else None
        follow = method.follow_undecided
        # whether leaves undecided at max_depth get followed tubes (:meth:`extend`)
        self.follows = len(model.states) >= 3 if follow is None else follow
        for name in _NODE_FACTS:
            setattr(self, name, self._new_facts(name, 1))

    def _new_facts(self, name, count):
        fill = _NODE_FACTS[name]
        return np.full((count, self.n) if name in _BOX_FACTS else count, fill)

    def _grow(self):
        extra = len(self.tree) - len(self.outside)
        if extra <= 0:
            return
        for name in _NODE_FACTS:
            setattr(self, name, np.concatenate([getattr(self, name),
                                                self._new_facts(name, extra)]))

    # -- per-cell analysis -------------------------------------------------------------
    def analyse(self, nodes):
        """Compute the facts of new leaves from their tubes."""
        self._grow()
        lo, hi = self.tree.lo[nodes], self.tree.hi[nodes]
        glo, ghi = evaluate_limits(self.programs, lo, hi, self.params)
        outside = np.any(ghi < 0, axis=1)
        self.outside[nodes] = outside
        self.first_unkept[nodes[outside]] = 0.0
        todo = nodes[~outside]
        if len(todo) == 0:
            return
        self.left_cell[nodes[outside]] = False
        cell_lo, cell_hi = self.tree.lo[todo], self.tree.hi[todo]
        # piece by piece: a round's flows joined would hold all its steps at once
        for rows, result in self._flow_pieces(self.tubes, cell_lo, cell_hi, self.deadline):
            self._take_flows(self.tubes, todo[rows], result)

    def _follow(self, nodes, growth_limit, fates):
        """Flow the tubes of `nodes` on from where they end, as tubes that do not stop
        where they leave their cells and stop at `growth_limit` or where their end box
        meets one fate of the grid `fates` (:meth:`extend`), only as many as end before
        the deadline (less the time of FOLLOW_RESERVE labellings).

        Returns
        -------
        taken : ndarray
            The nodes flowed, the first of `nodes`.
        result : FlowResult or None
            Their flows from where the tubes ended (None when not one was flowed).
        first : _FirstParts
            The tubes they went on from.
        """
        first = self._first_parts(nodes)
        taken, result = self._flows_in_time(replace(self.tubes, follow=growth_limit,
                                                    fates=fates), nodes, first)
        return taken, result, first.take(np.arange(len(taken)))

    def _tube_ends(self, nodes):
        """Per node: the end of its tube is stored, so that a longer tube can go on from
        there (:meth:`_put_image_sets`)."""
        if self.image_sets is None:
            return np.zeros(len(nodes), bool)
        return np.isfinite(self.image_sets.take(nodes, ["next_h"])["next_h"])

    def _first_parts(self, nodes):
        """The tubes of `nodes` as first parts of longer ones (:class:`_FirstParts`); each
        node's tube end is stored (:meth:`_tube_ends`)."""
        ends = self.image_sets.take(nodes)
        start = self.steps.offsets(nodes)
        steps = StepBatch(n_steps=np.diff(start), step_start=start[:-1],
                          h=self.steps.gather(nodes, "h", start),
                          E=self.steps.gather(nodes, "E", start))
        return _FirstParts(
            start=FlowStart(m=ends["m"], A=ends["A"], r_lo=ends["r_lo"], r_hi=ends["r_hi"],
                            x_lo=ends["x_lo"], x_hi=ends["x_hi"],
                            t_lo=self.horizon_lo[nodes], t_hi=self.horizon_hi[nodes],
                            h=ends["next_h"], steps=steps.n_steps),
            first_unkept=self.first_unkept[nodes].copy(), crossing=self.crossing[nodes].copy(),
            steps=steps)

    def _take_flows(self, tubes, nodes, result, first=None):
        """The facts, image sets and steps of `nodes` from their flows `result` (on from
        `first`, if given), and whether each tube stopped only where it left its cell."""
        self._record_tubes(nodes, result, first)
        if self.follows:
            ends = tubes.stops(self.tree.lo[nodes], self.tree.hi[nodes], result.image_lo,
                               result.image_hi, result.t_lo)
            self.left_cell[nodes] = ends.left_cell & (result.status == STOPPED)

    def _put_image_sets(self, nodes, result):
        """Keep the sets at the tubes' ends, and where their flows would go on."""
        if self.image_sets is not None:
            self.image_sets.put(nodes, {"m": result.image_m, "A": result.image_A,
                                        "r_lo": result.image_r_lo, "r_hi": result.image_r_hi,
                                        "x_lo": result.image_lo, "x_hi": result.image_hi,
                                        "next_h": result.next_h})

    def _flows(self, tubes, cell_lo, cell_hi, deadline, start=None):
        """The flows of cells, joined (:meth:`_flow_pieces`)."""
        parts = [result for _, result in self._flow_pieces(tubes, cell_lo, cell_hi, deadline,
                                                           start)]
        return parts[0] if len(parts) == 1 else join_results(parts)

    def _flow_pieces(self, tubes, cell_lo, cell_hi, deadline, start=None):
        """Yield ``(rows, flows)`` for the cells in pieces of at most MAX_PIECE, in order,
        flowed on the runner's workers if any (a cell's flow depends on that cell alone);
        here one at a time, on workers all at once (each piece's records let go of once
        taken)."""
        n = len(cell_lo)
        if not self.runner.parallel:
            for rows in _in_pieces(n, MAX_PIECE):
                yield rows, tubes.flow(cell_lo[rows], cell_hi[rows], deadline,
                                       None if start is None else start.take(rows))
            return
        pieces = np.array_split(np.arange(n), max(-(-n // MAX_PIECE), 1,
                                                  min(2 * self.runner.n_workers,
                                                      -(-n // MIN_PIECE))))
        parts = self.runner.in_order(
            _flow_piece, [(tubes, cell_lo[k], cell_hi[k], None if start is None else start.take(k))
                          for k in pieces], deadline)
        try:
            for rows in pieces:
                yield rows, next(parts)
        except DeadlineReached:
            raise DeadlinePassed from None
        finally:
            parts.close()

    def _flows_in_time(self, tubes, nodes, first):
        """Flow and take the tubes of the first `nodes`, on from their `first` parts, in
        pieces of FOLLOW_PIECE cells a worker, while they end before the deadline less
        FOLLOW_RESERVE labellings (the one of these tubes and the last of the round).
        Returns the nodes taken and their flows joined (None when not one piece was).
        Without a deadline, all.

        Longer tubes have wider images, hence more successors, and a labelling's time
        grows about in proportion to them: the reserve is FOLLOW_RESERVE times the last
        labelling's time plus that time in the proportion of the (leaf, successor) pairs
        that the images taken so far add to it. A piece is not started when the last
        one's time would take it past the reserve.
        """
        lo, hi = self.tree.lo[nodes], self.tree.hi[nodes]
        if self.deadline is None:
            result = self._flows(tubes, lo, hi, None, first.start)
            self._take_flows(tubes, nodes, result, first)
            return nodes, result
        parts, taken, added, piece_seconds = [], 0, 0, 0.0
        for k in _in_pieces(len(nodes), FOLLOW_PIECE * self.runner.n_workers):
            reserve = self.label_seconds * (FOLLOW_RESERVE + added / max(self.label_pairs, 1))
            until = self.deadline - reserve
            started = time.monotonic()
            if started + piece_seconds > until:
                break
            piece = first.take(k)
            try:
                part = self._flows(tubes, lo[k], hi[k], until, piece.start)
            except DeadlinePassed:
                break
            before = self._pairs(self.image_lo[nodes[k]], self.image_hi[nodes[k]])
            self._take_flows(tubes, nodes[k], part, piece)
            added += max(self._pairs(part.image_lo, part.image_hi) - before, 0)
            parts.append(part)
            taken += len(k)
            piece_seconds = time.monotonic() - started
        if not parts:
            return nodes[:0], None
        return nodes[:taken], join_results(parts)

    def _pairs(self, image_lo, image_hi):
        """How many (image, leaf) pairs a labelling would look up for these image boxes."""
        usable = np.all(image_lo <= image_hi, axis=1)
        lo, hi = image_lo[usable], image_hi[usable]
        return len(self._leaves_met(lo, hi)[0])

    def _tube_facts(self, todo, result, steps, first=None):
        """The facts of the tubes of `todo`: the flows `result`, on from their `first`
        parts if given; `steps` are all their steps (:meth:`_record_tubes`)."""
        box_of_step = np.repeat(np.arange(len(todo)), result.n_steps)
        # crossed: the rank-0 crossings, a step end box wholly violating one limit
        kept_step, crossed = self._step_verdicts(result)
        t0_lo = result.t0_lo
        unkept_time = np.where(kept_step, np.inf, t0_lo)
        first_unkept = np.full(len(todo), np.inf) if first is None else first.first_unkept.copy()
        np.minimum.at(first_unkept, box_of_step, unkept_time)
        _, t1_hi = iv.add(result.t0_lo, result.t0_hi, result.h, result.h)
        crossing = np.full(len(todo), np.inf) if first is None else first.crossing.copy()
        np.minimum.at(crossing, box_of_step, np.where(crossed, t1_hi, np.inf))
        # a flow that failed after some steps still proves its last end box at the time
        # reached: that box is the image, and the time reached the horizon
        last = result.step_start + result.n_steps - 1
        new = result.n_steps > 0
        if first is None:
            raw_lo, raw_hi = (np.full_like(result.image_lo, np.nan) for _ in range(2))
        else:  # a followed tube without new steps ends where its first part ended
            raw_lo, raw_hi = first.start.x_lo.copy(), first.start.x_hi.copy()
        raw_lo[new], raw_hi[new] = result.end_lo[last[new]], result.end_hi[last[new]]
        ok = steps.n_steps > 0
        # every trajectory moved by the integral of f over its tube: x(T) - x(0) lies in
        # the sum of h f(E) over the steps, which caps images along resting directions
        owner = np.repeat(np.arange(len(todo)), steps.n_steps)
        tube_open = tube_past_open_faces(self.faces, self.window_sides, steps.E[..., 0],
                                         steps.E[..., 1], owner, len(todo))
        dlo, dhi = self._drift(steps, owner, len(todo), tube_open)
        moved_lo, _ = iv.add(self.tree.lo[todo], self.tree.lo[todo], dlo, dhi)
        _, moved_hi = iv.add(self.tree.hi[todo], self.tree.hi[todo], dlo, dhi)
        raw_lo = np.where(ok[:, None], np.fmax(raw_lo, moved_lo), raw_lo)
        raw_hi = np.where(ok[:, None], np.fmin(raw_hi, moved_hi), raw_hi)
        image_lo, image_hi, escapes = self.tubes.clip(raw_lo, raw_hi, ok, tube_open)
        # nothing is known after the time reached by a flow without an image
        first_unkept = np.where(ok, first_unkept, np.minimum(first_unkept, result.t_lo))
        first_unkept = np.where(escapes, np.minimum(first_unkept, result.t_lo), first_unkept)
        self.flow_ok[todo] = ok
        self.kept[todo] = np.isinf(first_unkept)
        self.escapes[todo] = escapes
        self.crossing[todo] = crossing
        self.horizon_lo[todo] = result.t_lo
        self.horizon_hi[todo] = result.t_hi
        self.first_unkept[todo] = first_unkept
        self.image_lo[todo] = image_lo
        self.image_hi[todo] = image_hi

    def _step_verdicts(self, result):
        """Per step of `result`: every limit is kept on the whole step (:meth:`_kept`), and
        some limit is violated on the whole end box; in slices of STEP_SLICE steps (the
        limits' values take some hundreds of bytes a step)."""
        S = len(result.h)
        kept, crossed = np.zeros(S, bool), np.zeros(S, bool)
        for first in range(0, S, STEP_SLICE):
            rows = slice(first, first + STEP_SLICE)
            glo_end, ghi_end = evaluate_limits(self.programs, result.end_lo[rows],
                                               result.end_hi[rows], self.params)
            kept[rows] = np.all(self._kept(result, rows, glo_end), axis=1)
            crossed[rows] = np.any(ghi_end < 0, axis=1)
        return kept, crossed

    def _kept(self, result, rows, glo_end):
        """Per step of the slice `rows` and limit: the limit is kept on the whole step
        (docs/design.md, section 5, rules (a), (b) and (c)); `glo_end` are the limits'
        lower bounds on the end boxes of these steps."""
        glo, _ = evaluate_limits(self.programs, result.x_lo[rows], result.x_hi[rows],
                                 self.params)
        e_lo, e_hi = result.e_lo[rows], result.e_hi[rows]
        rlo, _ = evaluate_limits(self.programs, e_lo, e_hi, self.params, rates=True)
        h = result.h[rows, None]
        dlo = np.minimum(iv.mul(h, h, rlo, rlo)[0], 0.0)
        lower, _ = iv.add(glo, glo, dlo, dlo)
        kept = (lower >= 0) | (rlo >= 0)
        steps = np.flatnonzero(~np.all(kept, axis=1) & np.all((glo >= 0) & (glo_end >= 0), axis=1))
        if len(steps) == 0:
            return kept
        # (c) a solution dips below the lower of its two step ends by at most h^2 M / 8,
        # M an upper bound of the limit's second derivative along it (on the smooth
        # branch that a model with kinks is on the step's tube; none where a kink may lie)
        chi = np.full((len(steps), glo.shape[1]), np.nan)
        for programs, rows in branch_groups(self.programs, e_lo[steps], e_hi[steps],
                                            self.params):
            if programs.limit_curvatures is not None:
                _, chi[rows] = evaluate_boxes(programs.limit_curvatures, e_lo[steps[rows]],
                                              e_hi[steps[rows]], self.params)
        hs = h[steps]
        _, h2 = iv.mul(hs, hs, hs, hs)
        _, dip = iv.mul(h2, h2, chi, chi)
        ends = np.minimum(glo[steps], glo_end[steps])
        kept[steps] |= (ends >= 0) & ((dip <= 0) | (8 * ends >= dip))
        return kept

    def _step_ends(self, result, first, leaves, label, pending):
        """The step ends at which the `pending` flows of `result` (on from their `first`
        parts) could be cut.

        A tube may end at any step end (the checker re-derives everything from the steps
        kept). The candidates are the step ends past ``min_horizon`` whose clipped box
        does not escape; their successors are found among `leaves` as for an image. The
        passes only decide undecided leaves, and a decided leaf keeps its label, so per
        candidate it is enough to keep whether it meets a leaf labelled doomed or safe
        under `label` and which undecided leaves it meets; candidates that meet both a
        doomed and a safe leaf, or a safe leaf after a step not kept, can never be chosen
        and are left out. The steps are taken in blocks of :data:`STEP_END_BLOCK`, so
        that no array of all their boxes or successors is made (on a 4D model at depth
        5, with every pair at once, the passes took over 5 GB).
        """
        S, N = len(result.h), len(result.n_steps)
        box = np.repeat(np.arange(N), result.n_steps)
        pos = np.arange(S) - result.step_start[box]
        kept, _ = self._step_verdicts(result)
        # a first part with a step not kept: no step end after it is kept
        first_bad = np.where(np.isinf(first.first_unkept), S, 0)
        np.minimum.at(first_bad, box[~kept], pos[~kept])
        t1_lo, _ = iv.add(result.t0_lo, result.t0_hi, result.h, result.h)
        candidate = (t1_lo >= self.method.min_horizon) & pending[box]
        number = self.tree.leaf_numbers(leaves)
        doomed, safe, undecided = label == DOOMED, label == SAFE, label == UNDECIDED
        dtype, found = index_dtype(S), 0
        parts = []
        for first in range(0, S, STEP_END_BLOCK):
            rows = first + np.flatnonzero(candidate[first:first + STEP_END_BLOCK])
            ones = np.ones(len(rows), bool)
            lo, hi, escapes = self.tubes.clip(result.end_lo[rows], result.end_hi[rows],
                                              ones, ones)
            usable = ~escapes & np.all(lo <= hi, axis=1)
            rows, lo, hi = rows[usable], lo[usable], hi[usable]
            query, leaf = self._leaves_met(lo, hi)
            leaf = number[leaf]
            doomed_next = _any_of(query, leaf, doomed, len(rows))
            safe_next = _any_of(query, leaf, safe, len(rows))
            rows_kept = pos[rows] < first_bad[box[rows]]
            hopeful = ~(safe_next & (doomed_next | ~rows_kept))
            renumber = found + np.cumsum(hopeful) - 1
            found += int(hopeful.sum())
            pair = undecided[leaf] & hopeful[query]
            parts.append((rows[hopeful], rows_kept[hopeful], doomed_next[hopeful],
                          safe_next[hopeful], renumber[query[pair]].astype(dtype), leaf[pair]))
        if found == 0:
            return None
        rows, rows_kept, doomed_next, safe_next, query, leaf = (
            np.concatenate(column) for column in zip(*parts))
        return _StepEnds(box=box[rows], pos=pos[rows], kept=rows_kept,
                         doomed_next=doomed_next, safe_next=safe_next, query=query,
                         leaf=leaf)

    @staticmethod
    def _decisive_ends(ends, label, n_steps, pending):
        """Per flow, how many steps to keep: up to its first candidate step end whose
        successors are all safe or outside (with every step up to it kept) or all doomed
        or outside under `label`; all of them for flows without one or not `pending`.
        The labels are a guess only: the labelling that follows decides."""
        count = len(ends.box)
        # per leaf first: string compares on the (many) pairs would be slow
        not_safe = ends.doomed_next | _any_of(ends.query, ends.leaf, label != SAFE, count)
        not_doomed = ends.safe_next | _any_of(ends.query, ends.leaf, label != DOOMED, count)
        decisive = ((~not_safe & ends.kept) | ~not_doomed) & pending[ends.box]
        first = np.full(len(n_steps), np.iinfo(np.int64).max)
        np.minimum.at(first, ends.box[decisive], ends.pos[decisive])
        return np.where(first < n_steps, first + 1, n_steps)

    def _drift(self, batch, box_of_step, n_boxes, tube_open):
        """Per box, an enclosure of ``x(T) - x(0)``: the sum over its steps `batch` (a
        :class:`StepBatch`) of ``h f(E)``, for the trajectories that keep the limits up to
        ``T`` (the tube boxes of boxes whose tubes do not reach past an open face,
        `tube_open`, are cut to the window, :func:`certify.faces.cut_to_window`)."""
        lo, hi = np.zeros((n_boxes, self.n)), np.zeros((n_boxes, self.n))
        # boxes whose steps fill about STEP_SLICE rows at a time (a box's steps together:
        # the cut at invariant faces looks at all of them)
        cuts = np.unique(np.append(np.searchsorted(
            batch.step_start, np.arange(0, len(batch.h), STEP_SLICE)), n_boxes))
        for first, last in zip(cuts[:-1], cuts[1:]):
            start = batch.step_start[first]
            counts = batch.n_steps[first:last]
            rows = slice(start, start + counts.sum())
            owner = box_of_step[rows] - first
            elo, ehi = cut_at_invariant_faces(self.faces, self.model.window, batch.E[rows, :, 0],
                                              batch.E[rows, :, 1], owner, last - first)
            elo, ehi = cut_to_window(self.window_sides, elo, ehi, tube_open[box_of_step[rows]])
            flo, fhi = evaluate_boxes(self.programs.field, elo, ehi, self.params)
            h = batch.h[rows, None]
            slo, shi = iv.mul(h, h, flo, fhi)
            # each box's sum in step order
            own_start = batch.step_start[first:last] - start
            for j in range(int(counts.max(initial=0))):
                boxes = np.flatnonzero(counts > j)
                steps, boxes = own_start[boxes] + j, first + boxes
                lo[boxes], hi[boxes] = iv.add(lo[boxes], hi[boxes], slo[steps], shi[steps])
        return lo, hi

    def _leaves_met(self, lo, hi):
        """``(query, leaf)`` pairs of the leaves that the clipped image boxes meet.

        Along the axes where a box meets the exact window in more than a point, a leaf
        must overlap the box's interior (cells that only touch it are not needed to
        cover it, see :meth:`CellTree.leaves_meeting`).
        """
        _, lo_hi, hi_lo, _ = self.window_sides
        return self.tree.leaves_meeting(lo, hi, strict=(lo < hi) & (hi > lo_hi) & (lo < hi_lo))

    def extend(self, nodes, growth_limit, fates=None):
        """Follow the tubes of undecided leaves further; keep the longer tubes that decide.

        A followed tube stops at the growth limit, or at the first end box that meets one
        fate only of the grid `fates` (the labelling before the round,
        :mod:`certify.fate_grid`): all it was followed for.

        Replacing the facts of undecided leaves never undecides another leaf (a decided
        leaf's successors are decided), so the leaves still undecided with their longer
        tubes get their old tubes back, which may now decide them too.

        Only tubes that stopped where they left their cells are followed: the others
        stopped for a reason that a followed tube shares (the same steps again). Under a
        deadline only the tubes flowed in time are followed (:meth:`_flows_in_time`);
        ``self.followed`` records how many of how many.

        Then, up to :data:`DECISIVE_PASSES` times while it decides more leaves, the
        leaves still undecided get their followed tubes cut at a step end whose
        successors all share a fate in the labelling just made (:meth:`_decisive_ends`).

        Returns
        -------
        leaves, facts, labelling
            As :meth:`label`.
        """
        nodes = nodes[self.left_cell[nodes] & self._tube_ends(nodes)]
        leaves, label, back, (todo, full, first) = self._try_tubes(
            nodes, lambda: self._follow(nodes, growth_limit, fates))
        self.followed = (len(todo), len(nodes))
        if full is None:
            return self.label(prune_gain=self._last_gain())
        pending = np.isin(todo, nodes[back])
        # under a deadline: the step ends, a pass and the last labelling cost about three
        # labellings, every further pass and the last one about two
        passes = DECISIVE_PASSES if self._time_left() >= 3 * self.label_seconds else 0
        ends = self._step_ends(full, first, leaves, label, pending) if passes else None
        if ends is None:
            passes = 0
        for _ in range(passes):
            keep = self._decisive_ends(ends, label, full.n_steps, pending)
            cut = np.flatnonzero(keep < full.n_steps)
            if len(cut) == 0:
                break
            chosen = todo[cut]
            _, label, back, _ = self._try_tubes(
                chosen, lambda: self._record_cut_tubes(chosen, full, first, cut, keep[cut]))
            if back.all() or self._time_left() < 2 * self.label_seconds:
                break
            pending[cut[~back]] = False
        return self.label(prune_gain=self._last_gain())

    def _last_gain(self):
        """The share of undecided leaves that pruning must free in the labellings of
        the followed round, the proof's last: any, when the time left holds all their
        rounds twice over (PRUNE_GAIN saves time in the rounds that split leaves)."""
        enough = self._time_left() >= 2 * (PRUNE_ROUNDS + 1) * self.label_seconds
        return 0.0 if enough else PRUNE_GAIN

    def _time_left(self):
        """Seconds to the deadline (inf without one)."""
        return np.inf if self.deadline is None else self.deadline - time.monotonic()

    def _try_tubes(self, nodes, replace_tubes):
        """Give `nodes` new tubes (``replace_tubes()``), label, and give the nodes left
        undecided their old tubes back.

        Returns
        -------
        leaves, label : ndarray
            The leaves and their labels with the new tubes.
        back : ndarray of bool
            Per node: it got its old tube back.
        out
            What ``replace_tubes()`` returned.
        """
        saved = {k: getattr(self, k)[nodes].copy() for k in _TUBE_FACTS}
        saved_sets = self.image_sets.take(nodes) if self.image_sets is not None else None
        refs = self.steps.refs(nodes)
        out = replace_tubes()
        leaves, facts, labelling = self.label(prune_gain=self._last_gain())
        del facts  # its edges are made again later: not held through the next labelling
        number = self.tree.leaf_numbers(leaves)
        back = labelling.label[number[nodes]] == UNDECIDED
        for k in _TUBE_FACTS:
            getattr(self, k)[nodes[back]] = saved[k][back]
        self.steps.set_refs(nodes[back], refs[back])
        if saved_sets is not None:
            self.image_sets.put(nodes[back], {k: v[back] for k, v in saved_sets.items()})
        return leaves, labelling.label, back, out

    def _record_cut_tubes(self, nodes, result, first, boxes, n_steps):
        """The facts, image sets and steps of `nodes` from the flows `boxes` of `result`
        (on from `first`) cut after `n_steps` of their steps, in pieces of MAX_PIECE flows
        (a copy of every cut flow at once would hold most of a followed round's steps
        twice)."""
        for rows in _in_pieces(len(nodes), MAX_PIECE):
            self._record_tubes(nodes[rows],
                               truncate_results(result, n_steps[rows], boxes=boxes[rows]),
                               first.take(boxes[rows]))

    def _record_tubes(self, nodes, result, first=None):
        """The facts, image sets and steps of `nodes` from the flows `result`, on from
        their `first` parts if given (the tubes' steps are theirs, then those of
        `result`)."""
        steps = StepBatch.from_flow(result)
        if first is not None:
            steps = first.steps.followed_by(steps)
        self._tube_facts(nodes, result, steps, first)
        self._put_image_sets(nodes, result)
        self.steps.add(nodes, steps)

    # -- labelling ---------------------------------------------------------------------
    def label(self, prune_gain=PRUNE_GAIN):
        """Label the leaves; successors that image sets miss are dropped while that
        frees the share `prune_gain` of the undecided leaves (:meth:`_prune_successors`).

        Returns
        -------
        leaves : ndarray of int
        facts : CellFacts
        labelling : Labelling
        """
        started = time.monotonic()
        leaves = self.tree.leaves()
        # edges can outnumber the cells a hundredfold: leaf numbers as narrow as they fit
        number = self.tree.leaf_numbers(leaves)
        usable = self.flow_ok[leaves] & ~self.outside[leaves]
        qlo, qhi = self.image_lo[leaves[usable]], self.image_hi[leaves[usable]]
        nonempty = np.all(qlo <= qhi, axis=1)
        query_nodes = np.flatnonzero(usable)[nonempty].astype(number.dtype)
        qlo, qhi = qlo[nonempty], qhi[nonempty]
        q, leaf = self._leaves_met(qlo, qhi)
        self.label_pairs = len(q)
        # edges can be many: each pair array is freed once mapped, not held through the
        # labelling
        src = query_nodes[q]
        del q
        dst = number[leaf]
        del leaf
        trapped, whole = trapped_cells(
            self.regions.regions, self.tree.lo[leaves], self.tree.hi[leaves],
            self.image_lo[leaves], self.image_hi[leaves],
            usable & self.kept[leaves] & ~self.escapes[leaves])
        facts = CellFacts(outside=self.outside[leaves], flow_ok=self.flow_ok[leaves],
                          kept=self.kept[leaves], escapes=self.escapes[leaves],
                          crossing=self.crossing[leaves], horizon_lo=self.horizon_lo[leaves],
                          horizon_hi=self.horizon_hi[leaves],
                          first_unkept=self.first_unkept[leaves], src=src, dst=dst,
                          trapped=trapped, trapped_whole=whole)
        del src, dst  # facts hold them (pruning replaces them there)
        labelling = label_cells(facts)
        if self.image_sets is not None:
            facts, labelling = self._prune_successors(leaves, number, facts, labelling,
                                                      prune_gain)
        self.label_seconds = time.monotonic() - started
        return leaves, facts, labelling

    def _prune_successors(self, leaves, number, facts, labelling, gain):
        """Drop successors that undecided leaves' image sets miss where that may decide
        them, and label again; up to PRUNE_ROUNDS times, while that frees the share
        `gain` of the undecided leaves (and at least one).

        `labelling` is the one with every successor; `number` maps tree nodes to leaf
        numbers (-1 for inner nodes). The other leaves' successors are
        left: their labels hold with all of them, and stay so in later rounds (only
        leaves undecided here are split), so only the sets of these leaves are kept.
        A pair holds its cell back from `safe` when the leaf is neither safe nor
        outside, from `doomed` when it is neither doomed nor outside
        (:meth:`ImageSetStore.misses_that_help`).
        """
        undecided = labelling.label == UNDECIDED
        self.image_sets.keep_only(leaves[undecided])
        usable = facts.flow_ok & ~facts.escapes
        for _ in range(PRUNE_ROUNDS):
            label = labelling.label
            undecided = label == UNDECIDED
            outside = label == OUTSIDE
            hopes = [(undecided & usable & facts.kept, (label != SAFE) & ~outside),
                     (undecided & usable, (label != DOOMED) & ~outside)]
            self._centres_held_back(leaves, number, label, hopes)
            test = np.flatnonzero(np.any([hope[facts.src] for hope, _ in hopes], axis=0))
            holds = np.stack([hope[facts.src[test]] & against[facts.dst[test]]
                              for hope, against in hopes], axis=1)
            test, holds = test[np.any(holds, axis=1)], holds[np.any(holds, axis=1)]
            missed = self.image_sets.misses_that_help(
                leaves[facts.src[test]], leaves[facts.dst[test]], self.tree.lo, self.tree.hi,
                holds)
            # labels change only where a leaf lost every pair holding it back from one;
            # a labelling costs as much as the first: only where enough may change
            held = facts.src[test]
            freed = np.zeros(len(leaves), bool)
            for h, (hope, _) in enumerate(hopes):
                left = np.bincount(held[holds[:, h] & ~missed], minlength=len(leaves))
                freed |= hope & (left == 0)
            tested = np.zeros(len(leaves), bool)
            tested[held] = True
            freed &= tested
            n_freed = np.count_nonzero(freed)
            if n_freed == 0 or n_freed < gain * np.count_nonzero(undecided):
                break
            keep = np.ones(len(facts.src), bool)
            keep[test[missed]] = False
            # in place, and the pairs tested dropped: the caller's facts would hold the
            # edges before pruning through the labelling
            facts.src, facts.dst = facts.src[keep], facts.dst[keep]
            del test, holds, missed, held, keep
            labelling = label_cells(facts)
        return facts, labelling

    def _centres_held_back(self, leaves, number, label, hopes):
        """Clear the hopes ``(hope, against)`` of leaves whose sets' centre ``m`` lies in
        a leaf of a label `against`: a leaf containing ``m`` meets every set, and is a
        successor when ``m`` lies within the open image box."""
        cells = np.flatnonzero(np.any([hope for hope, _ in hopes], axis=0))
        m = self.image_sets.take(leaves[cells], ["m"])["m"]
        within = np.all((self.image_lo[leaves[cells]] < m) & (m < self.image_hi[leaves[cells]]),
                        axis=1)
        cells, m = cells[within], m[within]
        q, leaf = self.tree.leaves_meeting(m, m)
        for hope, against in hopes:
            hope[cells[q[against[number[leaf]]]]] = False


def _settings(model, method, budget, overrides):
    s = dict(model.settings)
    m = {k: s[k] for k in METHOD_KEYS if k in s}
    b = {k: s[k] for k in BUDGET_KEYS if k in s}
    for k, v in overrides.items():
        if v is None:
            continue
        if k in METHOD_KEYS:
            m[k] = v
        elif k in BUDGET_KEYS:
            b[k] = v
        else:
            raise TypeError(f"prove() got an unexpected option {k!r}")
    kinds = {k: type(getattr(Method, k)) for k in METHOD_KEYS} | {"follow_undecided": bool}
    m = {k: kinds[k](v) for k, v in m.items()}
    # a policy's pace is set by its controls' hold times, not by the model's rates
    if method is None and not model.controls and not set(TIME_KEYS) & set(m):
        scale = time_scale(model).scale
        m |= {k: getattr(Method, k) * scale for k in TIME_KEYS} | {"time_scale": scale}
    method = method or Method(**m)
    budget = budget or Budget(**{k: type(getattr(Budget, k))(v) for k, v in b.items()})
    return method, budget


def prove(model, *, method=None, budget=None, progress=None, focus=None, executor="local",
          scheduler=None, workers=None, **options):
    """Prove a map of fates for a model.

    Parameters
    ----------
    model : certify.model.Model
    method : Method, optional
        Defaults come from the model's ``[settings]``, then from :class:`Method`.
    budget : Budget, optional
        Same; or give ``max_depth``, ``max_cells``, ``time_limit`` as keywords.
    progress : callable, optional
        ``progress(round, n_leaves, decided_fraction, seconds)`` after every round; and
        ``progress.starting(round, n_leaves)`` before it, when it has that method.
    focus : (ndarray, ndarray) or callable, optional
        A box ``(lo, hi)``: only undecided cells meeting it, and the undecided cells
        their images can reach, are refined (for claims about a region). A callable
        ``focus(tree, leaves, labelling, facts) -> ndarray of int`` instead names the
        leaves (node ids, any label) to split after each round; refinement stops when
        it names none.
    executor : {"local", "dask"}
        Where the flow batches of each round run: ``local`` in this process (or, with
        `workers`, a process pool of that many processes on this machine); ``dask`` a
        Dask distributed scheduler (`scheduler`), or a ``LocalCluster`` of `workers`
        processes on 127.0.0.1 when None. The certificate does not depend on it.
    scheduler : str, optional
        Address of a running Dask scheduler, such as ``tcp://10.0.0.5:8786``.
    workers : int, optional
    **options
        Method or budget fields by name.

    Returns
    -------
    Proof
        ``interrupted`` is True when a KeyboardInterrupt ended the run; the proof is then
        the one of the last finished round. The same holds when the time limit passes
        during a round after the first (``stop_reason`` says so; the first round always
        finishes, since a proof needs one).

    Raises
    ------
    UsageError
        For a bad choice of executor, scheduler or workers, or an unreachable scheduler.
    """
    method, budget = _settings(model, method, budget, options)
    with open_runner(executor, scheduler, workers) as runner, \
            np.errstate(all="ignore"):  # NaN marks unusable bounds; no warnings needed
        return _prove(model, method, budget, progress, focus, runner)


def _focused(tree, leaves, labelling, facts, focus):
    """Undecided leaves that meet the focus box or are reachable from those that do."""
    import scipy.sparse as sp
    from scipy.sparse.csgraph import breadth_first_order

    lo, hi = np.asarray(focus[0], float), np.asarray(focus[1], float)
    und = labelling.label == UNDECIDED
    meets = und & np.all((tree.lo[leaves] <= hi) & (tree.hi[leaves] >= lo), axis=1)
    L = len(leaves)
    keep = und[facts.src] & und[facts.dst]
    rows = np.concatenate([facts.src[keep], np.full(meets.sum(), L)])
    cols = np.concatenate([facts.dst[keep], np.flatnonzero(meets)])
    g = sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(L + 1, L + 1))
    reached = breadth_first_order(g, L, directed=True, return_predecessors=False)
    mask = np.zeros(L + 1, bool)
    mask[reached] = True
    return leaves[mask[:L] & und]


def _causes_first(tree, leaves, labelling, facts, wanted, spare):
    """The leaves to split this round: where the graph is wrong first.

    An undecided leaf is a *cause* when its own facts fail (no image, a limit not kept,
    an escape), when it lies on a cycle of undecided leaves (recurrence, often an artefact
    of wide images: scipy's strongly connected components), or when one of its successors
    is decided (it sits on a border). The other undecided leaves only wait for their
    undecided successors; they are split once no cause is left below the depth budget,
    or with the causes when these are at least half of the leaves `wanted` and the cell
    budget is `spare` (it could hold every wanted leaf refined to the maximum depth).
    """
    from scipy.sparse.csgraph import connected_components

    if len(wanted) == 0:
        return wanted
    L = len(leaves)
    und = labelling.label == UNDECIDED
    own = facts.own_failure()
    inner = und[facts.src] & und[facts.dst]
    # the cycles of the reversed graph are those of the graph
    g = unit_weights(reversed_graph(L, facts.src, facts.dst, inner))
    _, component = connected_components(g, directed=True, connection="strong")
    del g
    component = component[:L]
    size = np.bincount(component, minlength=L)
    cyclic = size[component] > 1
    cyclic[facts.src[inner & (facts.src == facts.dst)]] = True
    # per leaf first: labels gathered per edge take 36 bytes an edge
    decided = (labelling.label != UNDECIDED) & (labelling.label != OUTSIDE)
    border = facts.has_successor_in(decided)
    cause = und & (own | cyclic | border)
    number = tree.leaf_numbers(leaves)
    first = wanted[cause[number[wanted]]]
    # holding leaves back pays only when most of them wait: a round that splits half
    # of them anyway costs about what one splitting all does, and the leaves held back
    # would need rounds of their own later; a tight cell budget goes to the causes
    if len(first) == 0 or (spare and 2 * len(first) >= len(wanted)):
        return wanted
    return first


def _prove(model, method, budget, progress, focus, runner):
    start = time.monotonic()
    prover = _Prover(model, method, budget, progress, runner)
    tree = prover.tree
    snapshot = None
    interrupted = False
    stop_reason = "nothing left undecided"
    rounds = 0
    deadline = start + budget.time_limit
    follow = prover.follows
    extend = None
    # why the followed round was run before max_depth (then the loop ends after it)
    instead_of_refining = None
    split_in_time = None  # leaves split in the time the followed round left
    last_round = None  # (seconds, new cells) of the last round that split leaves
    try:
        new = tree.split([0]) if method.start_depth > 0 else np.array([0])
        for _ in range(1, method.start_depth):
            new = tree.split(new)
        while True:
            # a proof needs one finished round: only later rounds are abandoned at the deadline
            prover.deadline = None if snapshot is None else deadline
            if hasattr(progress, "starting"):
                progress.starting(rounds + 1, len(tree.leaves()))
            round_start = time.monotonic()
            if extend:
                # a followed round keeps the tubes it flowed in time
                leaves, facts, labelling = prover.extend(
                    new, extend, fate_grid(tree, leaves, labelling.label))
            else:
                prover.analyse(new)
                if snapshot is not None and time.monotonic() >= deadline:
                    raise DeadlinePassed
                leaves, facts, labelling = prover.label()
                last_round = (time.monotonic() - round_start, len(new))
            extend = None
            rounds += 1
            # the steps of split cells are no longer needed (the proof is the leaves')
            prover.steps.forget_all_but(leaves)
            snapshot = _Snapshot(len(tree), tree.first_child.copy(), leaves, labelling, facts,
                                 rounds, prover.steps.snapshot())
            elapsed = time.monotonic() - start
            if progress is not None:
                undecided = labelling.label == UNDECIDED
                frac = tree.volume_fraction(leaves[undecided]).sum()
                progress(rounds, len(leaves), 1.0 - frac, elapsed)
            if focus is None:
                wanted = leaves[labelling.label == UNDECIDED]
            elif callable(focus):
                wanted = np.asarray(focus(tree, leaves, labelling, facts), int)
            else:
                wanted = _focused(tree, leaves, labelling, facts, focus)
            und = wanted[tree.depth[wanted] < budget.max_depth]
            if focus is None:
                # the leaves a refinement of every wanted leaf to max_depth would add
                full = np.sum(2.0 ** (tree.n * (budget.max_depth - tree.depth[und])))
                und = _causes_first(tree, leaves, labelling, facts, und,
                                    full <= budget.max_cells - len(leaves))
            follow_until = budget.time_limit - (FOLLOW_RESERVE + 1) * prover.label_seconds
            if len(wanted) and focus is None and follow and elapsed < follow_until:
                # one more round, at the maximum depth or when the budget cannot hold the
                # next split: the undecided leaves' tubes followed
                short = short_of_budget(tree, und, budget, len(leaves), elapsed, last_round)
                if len(und) == 0 or short:
                    extend, follow, instead_of_refining = FOLLOW_GROWTH_LIMIT, False, short
                    new = follow_order(tree, leaves, labelling, facts, wanted)
                    continue
            if instead_of_refining:
                # the time the followed round left: as many splits as fit in it
                fit = 0 if split_in_time is not None else \
                    time_fit(tree, budget, elapsed, last_round)
                if fit and len(und):
                    new, _ = split_shallowest(tree, und, budget, len(leaves), elapsed, most=fit)
                    if new is not None:
                        split_in_time = len(new) // 2 ** tree.n
                        continue
                then = (f", then {split_in_time} leaves split in the time left"
                        if split_in_time else "")
                stop_reason = (f"{instead_of_refining}; the undecided leaves' tubes were "
                               f"followed instead{_cut_short(prover.followed)}{then}")
                break
            if len(und) == 0:
                if len(wanted):
                    stop_reason = (f"maximum depth {budget.max_depth} reached"
                                   f"{_cut_short(prover.followed)}")
                elif focus is not None:
                    stop_reason = "nothing left to refine for the focus"
                break
            new, out_of_budget = split_shallowest(tree, und, budget, len(leaves), elapsed)
            if out_of_budget:
                stop_reason = out_of_budget
                break
    except (KeyboardInterrupt, DeadlinePassed) as stop:
        # keep the last finished round
        interrupted = isinstance(stop, KeyboardInterrupt)
        if interrupted:
            stop_reason = "interrupted"
        else:
            stop_reason = (f"time limit {budget.time_limit:g} s reached within round {rounds + 1}; "
                           f"the proof is the one of round {rounds}")
        if snapshot is None:
            raise
        tree.first_child = snapshot.first_child
        _truncate(tree, snapshot.n_nodes)
        prover.steps.restore(snapshot.steps)
    leaves, facts, labelling = snapshot.leaves, snapshot.facts, snapshot.labelling
    proof = Proof(model=model, method=method, budget=budget, params=prover.params, tree=tree,
                  leaves=leaves, labelling=labelling, facts=facts, faces=prover.faces,
                  steps=prover.steps,
                  successors=(facts.src, facts.dst), rounds=snapshot.round,
                  seconds=time.monotonic() - start, interrupted=interrupted,
                  stop_reason=stop_reason, trapping=prover.regions)
    proof.fractions, proof.fractions_exact = label_fractions(proof)
    return proof


def _cut_short(followed):
    """The words for a followed round that the time limit cut short ('' otherwise)."""
    if followed is None or followed[0] == followed[1]:
        return ""
    return f" (the time limit cut the followed round short: {followed[0]} of {followed[1]} tubes)"


def short_of_budget(tree, wanted, budget, n_leaves, elapsed, last_round):
    """Why the budget cannot hold splitting the leaves `wanted` (None when it can).

    The cell limit leaves no room for one more split, or the next round, at the last
    splitting round's seconds per new cell, would end past the time limit.

    Parameters
    ----------
    last_round : (float, int) or None
        Seconds and new cells of the last round that split leaves.

    Returns
    -------
    str or None
    """
    if len(wanted) == 0:
        return None
    room = _split_room(tree, budget, n_leaves)
    if room <= 0:
        return f"cell limit {budget.max_cells} reached"
    per_split = _seconds_per_split(tree, last_round)
    if per_split is None:
        return None
    seconds = per_split * min(len(wanted), room)
    if elapsed + seconds > budget.time_limit:
        return (f"the next round (about {seconds:.0f} s) would end past the time limit "
                f"{budget.time_limit:g} s")
    return None


def time_fit(tree, budget, elapsed, last_round):
    """How many leaves can be split in TIME_FIT_SHARE of the time left, at the last
    splitting round's seconds per new cell (0 when unknown)."""
    per_split = _seconds_per_split(tree, last_round)
    if not per_split:
        return 0
    return max(int(TIME_FIT_SHARE * (budget.time_limit - elapsed) / per_split), 0)


def _split_room(tree, budget, n_leaves):
    """How many leaves can be split (each adds 2^n - 1 leaves) within the cell limit."""
    return (budget.max_cells - n_leaves) // (2 ** tree.n - 1)


def _seconds_per_split(tree, last_round):
    """Seconds one split leaf costs (its 2^n new cells) at the last splitting round's
    pace; None when there was no such round."""
    if last_round is None or last_round[1] == 0:
        return None
    return last_round[0] / last_round[1] * 2 ** tree.n


def split_shallowest(tree, wanted, budget, n_leaves, elapsed, most=None):
    """Split the shallowest of the leaves `wanted`, as many as the budget has room for
    (and at most `most`).

    Returns
    -------
    new : ndarray of int or None
        The children made (None when nothing is split).
    reason : str or None
        The stop reason when the time or cell limit is reached (then nothing is split).
    """
    if elapsed >= budget.time_limit:
        return None, f"time limit {budget.time_limit:g} s reached"
    room = _split_room(tree, budget, n_leaves)
    if room <= 0:
        return None, f"cell limit {budget.max_cells} reached"
    if most is not None:
        room = min(room, most)
    wanted = wanted[np.argsort(tree.depth[wanted], kind="stable")][:room]
    return tree.split(wanted), None


def _truncate(tree, n_nodes):
    tree.depth = tree.depth[:n_nodes]
    tree.index = tree.index[:n_nodes]
    tree.first_child = tree.first_child[:n_nodes]
    tree.lo = tree.lo[:n_nodes]
    tree.hi = tree.hi[:n_nodes]


def write_proof(proof, out_dir, *, figures=True):
    """Write ``certificate.json.gz``, ``summary.json`` and (optionally) the figures.

    Parameters
    ----------
    proof : Proof
    out_dir : str or Path
    figures : bool

    Returns
    -------
    dict
        The summary.
    """
    import json
    from pathlib import Path

    from .certificate import certificate_data, write_certificate
    from .report import proof_summary

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    cert_path = out / "certificate.json.gz"
    summary = proof_summary(proof, str(cert_path))
    write_certificate(cert_path, certificate_data(proof, summary))
    (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    if figures:
        from .plots import save_figures
        save_figures(proof, out)
    return summary
