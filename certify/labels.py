"""The labels as fixpoints on the transition graph (docs/design.md, section 5).

All functions work on leaves numbered ``0..L-1`` and on edges ``src -> dst`` between
them (the successors: leaves meeting a cell's image box).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import breadth_first_order, dijkstra

from . import interval as iv

__all__ = ["CellFacts", "Labelling", "label_cells", "reversed_graph", "unit_weights"]

SAFE, DOOMED, OUTSIDE, UNDECIDED = "safe", "doomed", "outside", "undecided"
#: Edges copied at a time by :func:`_compress_into`.
COMPRESS_BLOCK = 1 << 22


@dataclass
class CellFacts:
    """What the flow proved about each leaf.

    Attributes
    ----------
    outside : ndarray of bool, shape (L,)
        Some limit is violated on the whole cell.
    flow_ok : ndarray of bool
        The image box is known (the flow did not fail).
    kept : ndarray of bool
        Every limit is kept on every step (docs/design.md, section 5, rules (a)/(b)).
    escapes : ndarray of bool
        Part of the image lies outside the window where it is not known to be harmless.
    crossing : ndarray of float
        Upper bound of a proven crossing time at rank 0 (a step end box wholly violating
        one limit); ``inf`` if none.
    horizon_lo, horizon_hi : ndarray of float
        Enclosure of the horizon ``T_c``.
    first_unkept : ndarray of float
        Lower bound of the start of the first step that is not kept, or of the time where
        the knowledge ends (flow failure, escape: the horizon); ``inf`` if all is kept.
    src, dst : ndarray of int
        Edges.
    trapped : ndarray of int, optional
        The trapping region (:mod:`certify.trapping`) holding the cell or the image of
        its kept tube, -1 for none: such a cell is safe whatever its successors are.
    trapped_whole : ndarray of bool, optional
        The cell itself lies in its trapping region.
    """

    outside: np.ndarray
    flow_ok: np.ndarray
    kept: np.ndarray
    escapes: np.ndarray
    crossing: np.ndarray
    horizon_lo: np.ndarray
    horizon_hi: np.ndarray
    first_unkept: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    trapped: np.ndarray | None = None
    trapped_whole: np.ndarray | None = None

    def own_failure(self):
        """Per leaf: its own facts fail (no image, a limit not kept, or an escape)."""
        return ~self.flow_ok | ~self.kept | self.escapes

    def has_successor_in(self, among):
        """Per leaf: some successor of it is one of the leaves `among` (a mask by
        position)."""
        has = np.zeros(len(self.outside), bool)
        has[self.src[among[self.dst]]] = True
        return has


@dataclass
class Labelling:
    """Labels with their proven bounds.

    Attributes
    ----------
    label : ndarray of str, shape (L,)
    rank : ndarray of int
        Doomed rank (-1 where not doomed).
    crossing_upper : ndarray
        Proven upper bound of the first crossing time (``inf`` if none).
    survival_lower : ndarray
        Proven lower bound of the first crossing time (``inf`` for safe, 0 for outside).
    """

    label: np.ndarray
    rank: np.ndarray
    crossing_upper: np.ndarray
    survival_lower: np.ndarray


def reversed_graph(n_nodes, src, dst, keep, starts=()):
    """The edges ``dst -> src`` kept by the mask `keep` and edges from a super node
    ``n_nodes`` to the nodes `starts`, as a CSR matrix of shape ``(n_nodes + 1,) * 2``
    with boolean data (one byte an edge: the caller gives the weights it needs).

    Edge lists can hold a hundred edges a cell: they are copied once, in their (narrow)
    index type, and freed once the matrix is made.
    """
    return _reversed_graph(n_nodes, src, dst, keep, [starts])


def _reversed_graph(n_nodes, src, dst, keep, starts):
    """:func:`reversed_graph` with one super node per list in `starts`: node
    ``n_nodes + j`` has edges to the nodes ``starts[j]``."""
    k = int(np.count_nonzero(keep))
    first = k + np.cumsum([0] + [len(s) for s in starts])
    rows = np.empty(first[-1], dst.dtype)
    cols = np.empty(first[-1], src.dtype)
    _compress_into(keep, dst, rows)
    _compress_into(keep, src, cols)
    for j, nodes in enumerate(starts):
        rows[first[j]:first[j + 1]], cols[first[j]:first[j + 1]] = n_nodes + j, nodes
    size = n_nodes + len(starts)
    return sp.csr_matrix((np.ones(len(rows), bool), (rows, cols)), shape=(size, size))


def _compress_into(keep, values, out):
    """``values[keep]`` written to the start of `out`, a block at a time (as fast as a
    boolean index, without a second copy of the whole list; ``np.compress`` with ``out``
    took ten times as long)."""
    done = 0
    for first in range(0, len(values), COMPRESS_BLOCK):
        part = values[first:first + COMPRESS_BLOCK][keep[first:first + COMPRESS_BLOCK]]
        out[done:done + len(part)] = part
        done += len(part)


def unit_weights(graph):
    """`graph` with weight 1.0 on every edge (scipy.sparse.csgraph works on float64
    weights; made here so that it does not copy the index arrays too)."""
    return sp.csr_matrix((np.ones(graph.nnz), graph.indices, graph.indptr), shape=graph.shape)


def _reachable(n_nodes, src, dst, keep, targets):
    """Nodes that reach a target along the edges `keep` (BFS on the reversed graph)."""
    if not targets.any():
        return np.zeros(n_nodes, bool)
    graph = reversed_graph(n_nodes, src, dst, keep, np.flatnonzero(targets))
    return _reached(graph, n_nodes, n_nodes)


def _reached(graph, start, n_nodes):
    """The nodes below `n_nodes` that a BFS from the node `start` of `graph` reaches."""
    order = breadth_first_order(unit_weights(graph), start, directed=True,
                                return_predecessors=False)
    out = np.zeros(graph.shape[0], bool)
    out[order] = True
    return out[:n_nodes]


def _doomed(facts, L, safe, reverse):
    """Doomed ranks and crossing bounds; `reverse` holds, per leaf that is not outside,
    its predecessors in its row."""
    rank = np.full(L, -1)
    upper = np.full(L, np.inf)
    zero = facts.outside | np.isfinite(facts.crossing)
    zero &= ~safe
    rank[zero] = 0
    upper[zero] = np.where(facts.outside[zero], 0.0, facts.crossing[zero])
    eligible = facts.flow_ok & ~facts.escapes & ~safe & ~zero
    src, dst = facts.src, facts.dst
    if np.any(src[1:] < src[:-1]):  # the prover's edges come sorted by source
        order = np.argsort(src, kind="stable")
        src, dst = src[order], dst[order]
    start = np.searchsorted(src, np.arange(L + 1))
    out_degree = np.diff(start)
    remaining = out_degree - np.bincount(src[zero[dst]], minlength=L)
    # a cell whose whole image lies where it is harmless has crossed by its horizon
    new = eligible & (remaining == 0)
    r = 0
    while new.any():
        r += 1
        rank[new] = r
        cells = np.flatnonzero(new)
        # the largest bound among each cell's successors (0 for none), from its edges
        counts = out_degree[cells]
        ends = np.cumsum(counts)
        edges = np.arange(ends[-1]) + np.repeat(start[cells] - (ends - counts), counts)
        succ_max = np.zeros(len(cells))
        some = counts > 0
        if edges.size:
            succ_max[some] = np.maximum(0.0, np.maximum.reduceat(upper[dst[edges]],
                                                                 (ends - counts)[some]))
        _, up = iv.add(facts.horizon_hi[cells], facts.horizon_hi[cells], succ_max, succ_max)
        upper[cells] = up
        remaining -= np.bincount(reverse[cells].indices, minlength=L)[:L]
        new = eligible & (rank < 0) & (remaining == 0)
    return rank, upper


def _survival(facts, L, label, graph, source):
    """Lower bounds L_c = min(first_unkept_c, T_c + min_d L_d) over non-outside successors.

    `graph` (:func:`_graph`) has the edges into leaves that are not outside, reversed,
    and a super node ``L + 1`` with edges to the leaves where `source` (the bound from a
    leaf's own facts) is finite.
    """
    finite = np.isfinite(source)
    super_node = L + 1
    if graph.indptr[L] == 0 and not finite.any():
        return np.where(finite, source, np.inf)
    # an edge d -> c weighs T_c, one from the super node source_c + 1 (shifted by 1 so
    # that zero weights survive the sparse format)
    w = facts.horizon_lo[graph.indices]
    first = graph.indptr[super_node]
    w[first:] = source[graph.indices[first:]] + 1.0
    g = sp.csr_matrix((w, graph.indices, graph.indptr), shape=graph.shape)
    dist = dijkstra(g, directed=True, indices=super_node)[:L] - 1.0
    # float sums may round up: scale down so every bound stays a lower bound
    dist = np.where(np.isfinite(dist),
                    np.maximum(iv.round_down(np.maximum(dist, 0.0) * (1 - 1e-9)), 0.0), np.inf)
    dist = np.minimum(dist, source)
    dist[label == SAFE] = np.inf
    dist[facts.outside] = 0.0
    return dist


def label_cells(facts):
    """Compute the labels and bounds of docs/design.md, section 5.

    Parameters
    ----------
    facts : CellFacts

    Returns
    -------
    Labelling
    """
    L = len(facts.outside)
    trapped = np.zeros(L, bool) if facts.trapped is None else facts.trapped >= 0
    # safe: the candidates that reach no target along edges into leaves that are not
    # outside and out of leaves that are not trapped
    candidate = (~facts.outside & facts.flow_ok & facts.kept & ~facts.escapes) | trapped
    targets = ~candidate & ~facts.outside
    safe = None
    if trapped.any():
        # a graph of its own, freed before the shared one below is made
        safe = candidate & ~_reachable(L, facts.src, facts.dst,
                                       ~facts.outside[facts.dst] & ~trapped[facts.src], targets)
        targets[:] = False
    source = np.where(facts.outside, 0.0, facts.first_unkept)
    # one matrix of the edges into leaves that are not outside, reversed, serves the
    # three fixpoints (edge lists can hold a hundred edges a cell): super node L leads
    # to the safe test's targets, L + 1 to the leaves whose survival bound starts finite
    graph = _reversed_graph(L, facts.src, facts.dst, ~facts.outside[facts.dst],
                            [np.flatnonzero(targets), np.flatnonzero(np.isfinite(source))])
    if safe is None:
        safe = candidate & ~_reached(graph, L, L)
    rank, upper = _doomed(facts, L, safe, graph)
    label = np.full(L, UNDECIDED, dtype=object)
    label[safe] = SAFE
    label[rank >= 0] = DOOMED
    label[facts.outside] = OUTSIDE
    label = label.astype(str)
    survival = _survival(facts, L, label, graph, source)
    return Labelling(label=label, rank=rank, crossing_upper=upper, survival_lower=survival)
