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
    k = int(np.count_nonzero(keep))
    rows = np.empty(k + len(starts), dst.dtype)
    cols = np.empty(k + len(starts), src.dtype)
    np.compress(keep, dst, out=rows[:k])
    np.compress(keep, src, out=cols[:k])
    rows[k:], cols[k:] = n_nodes, starts
    return sp.csr_matrix((np.ones(len(rows), bool), (rows, cols)),
                         shape=(n_nodes + 1, n_nodes + 1))


def unit_weights(graph):
    """`graph` with weight 1.0 on every edge (scipy.sparse.csgraph works on float64
    weights; made here so that it does not copy the index arrays too)."""
    return sp.csr_matrix((np.ones(graph.nnz), graph.indices, graph.indptr), shape=graph.shape)


def _reachable(n_nodes, src, dst, keep, targets):
    """Nodes that reach a target along the edges `keep` (BFS on the reversed graph)."""
    if not targets.any():
        return np.zeros(n_nodes, bool)
    g = unit_weights(reversed_graph(n_nodes, src, dst, keep, np.flatnonzero(targets)))
    order = breadth_first_order(g, n_nodes, directed=True, return_predecessors=False)
    out = np.zeros(n_nodes + 1, bool)
    out[order] = True
    return out[:n_nodes]


def _safe(facts, L):
    trapped = np.zeros(L, bool) if facts.trapped is None else facts.trapped >= 0
    candidate = (~facts.outside & facts.flow_ok & facts.kept & ~facts.escapes) | trapped
    keep_edge = ~facts.outside[facts.dst] & ~trapped[facts.src]
    targets = ~candidate & ~facts.outside
    bad = _reachable(L, facts.src, facts.dst, keep_edge, targets)
    return candidate & ~bad


def _doomed(facts, L, safe):
    rank = np.full(L, -1)
    upper = np.full(L, np.inf)
    zero = facts.outside | np.isfinite(facts.crossing)
    zero &= ~safe
    rank[zero] = 0
    upper[zero] = np.where(facts.outside[zero], 0.0, facts.crossing[zero])
    eligible = facts.flow_ok & ~facts.escapes & ~safe & ~zero
    out_degree = np.bincount(facts.src, minlength=L)
    # only the structure is used: one byte an edge
    reverse = sp.csr_matrix((np.ones(len(facts.src), bool), (facts.dst, facts.src)), shape=(L, L))
    remaining = out_degree - np.bincount(facts.src[zero[facts.dst]], minlength=L)
    # a cell whose whole image lies where it is harmless has crossed by its horizon
    new = eligible & (remaining == 0)
    r = 0
    while new.any():
        r += 1
        rank[new] = r
        cells = np.flatnonzero(new)
        succ_max = np.zeros(L)
        edge = new[facts.src]
        np.maximum.at(succ_max, facts.src[edge], upper[facts.dst[edge]])
        _, up = iv.add(facts.horizon_hi[cells], facts.horizon_hi[cells],
                       succ_max[cells], succ_max[cells])
        upper[cells] = up
        preds = reverse[cells].indices
        np.subtract.at(remaining, preds, 1)
        new = eligible & (rank < 0) & (remaining == 0)
    return rank, upper


def _survival(facts, L, label):
    """Lower bounds L_c = min(first_unkept_c, T_c + min_d L_d) over non-outside successors."""
    source = np.where(facts.outside, 0.0, facts.first_unkept)
    finite = np.isfinite(source)
    super_node = L
    g = reversed_graph(L, facts.src, facts.dst, ~facts.outside[facts.dst], np.flatnonzero(finite))
    if g.nnz == 0:
        return np.where(finite, source, np.inf)
    # an edge d -> c weighs T_c, one from the super node source_c + 1 (shifted by 1 so
    # that zero weights survive the sparse format)
    w = facts.horizon_lo[g.indices]
    first = g.indptr[super_node]
    w[first:] = source[g.indices[first:]] + 1.0
    g = sp.csr_matrix((w, g.indices, g.indptr), shape=g.shape)
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
    safe = _safe(facts, L)
    rank, upper = _doomed(facts, L, safe)
    label = np.full(L, UNDECIDED, dtype=object)
    label[safe] = SAFE
    label[rank >= 0] = DOOMED
    label[facts.outside] = OUTSIDE
    label = label.astype(str)
    survival = _survival(facts, L, label)
    return Labelling(label=label, rank=rank, crossing_upper=upper, survival_lower=survival)
