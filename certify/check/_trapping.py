"""The checker's side of trapping regions: re-verify each region, then the cells using it.

A region is ``R = {x in B : V(x) <= level}`` with ``V(x) = (x - c)^T P (x - c)``, stored
with exact rationals, and a cover of ``B`` by dyadic sub-boxes, each with a class
(docs/certificate-format.md, "Trapping regions"). The checker verifies, with its own
arithmetic and nothing of the proof code:

1. the sub-boxes tile ``B`` exactly (:func:`tiling_problem`: their volumes add up to
   ``B``'s and a k-d descent puts each alone in its own node);
2. every sub-box touching the boundary of ``B`` is ``above``;
3. ``above``: ``V > level`` on the sub-box; ``below``: ``V < level``; both with interval
   arithmetic on ``sum_i P_ii d_i^2 + sum_{i<j} 2 P_ij d_i d_j``, ``d = x - c`` (arb
   balls, then exact rationals where the balls do not decide);
4. every sub-box that is not ``above`` keeps every limit (``g >= 0``), and every
   ``shell`` sub-box has ``W = dV/dt = sum_i w_i f_i < 0`` with ``w_i = sum_j 2 P_ij d_j``,
   for every parameter value in the boxes: the natural interval extension or the
   mean-value form ``W(m) + sum_k (dW/dx_k)(X) (X_k - m_k)`` at the exact midpoint ``m``
   (``dW/dx_k = sum_i 2 P_ki f_i + sum_i w_i df_i/dx_k``) must be negative (arb balls,
   then exact endpoints, then the sub-box halved along every axis).

Then ``R`` is forward invariant and inside the limits (docs/proof-loop.md, "Trapping
regions"). A cell claiming a region is safe when the cell lies in ``R``, or when its
recomputed tube keeps the limits and its recomputed image lies in ``R`` (inside ``B`` and
``V <= level`` on it, exact).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from ._arith import ARITHMETICS, evaluate
from ._cells import exact_cells

__all__ = ["CheckRegion", "read_regions", "verify_region", "in_region", "tiling_problem"]

ABOVE, BELOW, SHELL = 0, 1, 2


@dataclass(frozen=True)
class CheckRegion:
    """A region as stored (exact numbers; nothing verified yet)."""

    centre: tuple
    matrix: tuple
    level: object
    box: tuple
    depth: np.ndarray
    index: np.ndarray
    kind: np.ndarray


def read_regions(rd, data, cells, n, L):
    """Read ``regions`` and the cells' ``trapped``/``trapped_whole`` (optional keys).

    Parameters
    ----------
    rd : certify.check._read._Reader
    data, cells : dict
        The certificate and its ``cells`` object.
    n, L : int
        States and cells.

    Returns
    -------
    regions : list of CheckRegion
    trapped : ndarray of int, shape (L,)
    whole : ndarray of bool, shape (L,)
    """
    raw = data.get("regions", [])
    if not isinstance(raw, list):
        rd.fail("regions", "expected a list")
    regions = []
    for k, obj in enumerate(raw):
        where = f"regions[{k}]"
        centre = rd.get(obj, "centre", f"{where}.centre", list)
        matrix = rd.get(obj, "matrix", f"{where}.matrix", list)
        box = rd.get(obj, "box", f"{where}.box", list)
        if len(centre) != n or len(matrix) != n or len(box) != n \
                or not all(isinstance(row, list) and len(row) == n for row in matrix) \
                or not all(isinstance(side, list) and len(side) == 2 for side in box):
            rd.fail(where, f"centre, matrix and box must have {n} rows")
        c = tuple(rd.fraction(x, f"{where}.centre") for x in centre)
        P = tuple(tuple(rd.fraction(x, f"{where}.matrix") for x in row) for row in matrix)
        if any(P[i][j] != P[j][i] for i in range(n) for j in range(n)):
            rd.fail(f"{where}.matrix", "the matrix is not symmetric")
        B = tuple((rd.fraction(a, f"{where}.box"), rd.fraction(b, f"{where}.box"))
                  for a, b in box)
        if not all(a < b for a, b in B):
            rd.fail(f"{where}.box", "lo must be below hi")
        level = rd.fraction(rd.get(obj, "level", f"{where}.level"), f"{where}.level")
        index = rd.array(obj, "cover_index", f"{where}.cover_index", "i", (None, n))
        k_boxes = len(index)
        if "cover_depths" in obj:
            depth = rd.array(obj, "cover_depths", f"{where}.cover_depths", "i", (k_boxes, n))
        else:  # one depth per sub-box, for every axis (the first format)
            depth = rd.array(obj, "cover_depth", f"{where}.cover_depth", "i", (k_boxes,))
            depth = np.repeat(depth[:, None], n, axis=1)
        kind = rd.array(obj, "cover_class", f"{where}.cover_class", "i", (k_boxes,))
        if k_boxes == 0 or np.any(depth < 0) or np.any(depth > 62) or np.any(index < 0) \
                or np.any(index >= (np.int64(1) << depth)):
            rd.fail(f"{where}.cover_index", "an index lies outside its depth's range")
        if np.any((kind < ABOVE) | (kind > SHELL)):
            rd.fail(f"{where}.cover_class", "classes are 0 (above), 1 (below), 2 (shell)")
        regions.append(CheckRegion(c, P, level, B, depth, index, kind))
    if "trapped" in cells:
        trapped = rd.array(cells, "trapped", "cells.trapped", "i", (L,))
        whole = rd.get(cells, "trapped_whole", "cells.trapped_whole", list)
        if len(whole) != L or not all(isinstance(x, bool) for x in whole):
            rd.fail("cells.trapped_whole", f"expected {L} booleans")
    else:
        trapped, whole = np.full(L, -1), [False] * L
    if np.any(trapped < -1) or np.any(trapped >= len(regions)):
        rd.fail("cells.trapped", "expected -1 or a region number")
    return regions, trapped, np.array(whole, bool)


def _v_range(region, lo, hi):
    """Exact interval of the stored form of ``V`` on one box of Fractions."""
    c, P = region.centre, region.matrix
    n = len(c)
    d = [(lo[i] - c[i], hi[i] - c[i]) for i in range(n)]
    acc_lo = acc_hi = 0
    for i in range(n):
        a, b = d[i]
        sq_hi = max(a * a, b * b)
        sq_lo = 0 if a <= 0 <= b else min(a * a, b * b)
        p = P[i][i]
        acc_lo += min(p * sq_lo, p * sq_hi)
        acc_hi += max(p * sq_lo, p * sq_hi)
        for j in range(i + 1, n):
            e, f = d[j]
            prods = (a * e, a * f, b * e, b * f)
            q = 2 * P[i][j]
            acc_lo += min(q * min(prods), q * max(prods))
            acc_hi += max(q * min(prods), q * max(prods))
    return acc_lo, acc_hi


def _classes_in_balls(region, lo, hi):
    """Per sub-box: arb balls prove its class ``above`` or ``below`` (False for ``shell``).

    The same form of ``V`` as :func:`_v_range`, with ``d_i^2`` as an even power; the
    sub-boxes where the balls do not decide are left to the exact rationals.
    """
    ar = ARITHMETICS["ball"]()
    ar.enter()
    n, count = len(region.centre), len(lo)
    c, P = region.centre, region.matrix
    d = [ar.sub(ar.rationals(lo[:, i], hi[:, i]), ar.rational(c[i], c[i])) for i in range(n)]
    level = region.level
    v = ar.rational(-level, -level)
    for i in range(n):
        v = ar.add(v, ar.mul(ar.rational(P[i][i], P[i][i]), ar.pow_int(d[i], 2)))
        for j in range(i + 1, n):
            q = 2 * P[i][j]
            v = ar.add(v, ar.mul(ar.rational(q, q), ar.mul(d[i], d[j])))
    finite = np.broadcast_to(ar.finite(v), (count,))
    above = np.array([bool(x > 0) for x in np.broadcast_to(ar.lower(v), (count,))])
    below = np.array([bool(x < 0) for x in np.broadcast_to(ar.upper(v), (count,))])
    return finite & np.where(region.kind == ABOVE, above, (region.kind == BELOW) & below)


def in_region(region, lo, hi):
    """Exact test that a box of Fractions lies in ``R`` (inside ``B``, ``V <= level``)."""
    if any(x < a or y > b for x, y, (a, b) in zip(lo, hi, region.box)):
        return False
    return _v_range(region, lo, hi)[1] <= region.level


def tiling_problem(depth, index):
    """Why dyadic boxes do not tile the unit box, or None when they do.

    Box ``k`` is, along axis ``i``, the ``index[k, i]``-th of ``2^depth[k, i]`` equal parts.
    A descent keeps every box in a node (a dyadic box containing it; all start in the
    whole box). A box that equals its node and is alone in it is done; a node holding
    more boxes is halved along the first axis along which all of them are finer than it,
    each box going to the half containing it. Nodes present at one time have disjoint
    interiors, so the boxes do not overlap; with volumes adding up to the whole, they
    cover it. Covers made by halving along one axis at a time always pass.

    Parameters
    ----------
    depth, index : ndarray of int, shape (k, n)
        ``0 <= index < 2^depth``.

    Returns
    -------
    str or None
    """
    k, n = depth.shape
    sums = [int(s) for s in depth.sum(axis=1)]
    top = max(sums)
    if sum(1 << (top - s) for s in sums) != 1 << top:
        return "the sub-boxes' volumes do not add up to the box's"
    node_depth = np.zeros((k, n), np.int64)
    node_index = np.zeros((k, n), np.int64)
    active = np.arange(k)
    while len(active):
        d, nd = depth[active], node_depth[active]
        _, group, size = np.unique(np.concatenate([nd, node_index[active]], axis=1), axis=0,
                                   return_inverse=True, return_counts=True)
        group = group.reshape(-1)
        equal = np.all(d == nd, axis=1)
        if np.any(equal & (size[group] > 1)):
            return f"sub-box {int(active[np.flatnonzero(equal & (size[group] > 1))[0]])} " \
                   "overlaps another"
        active, d, nd, group = active[~equal], d[~equal], nd[~equal], group[~equal]
        if len(active) == 0:
            break
        finer = np.ones((len(size), n), bool)
        np.logical_and.at(finer, group, d > nd)
        if not np.all(finer.any(axis=1)[group]):
            return "the sub-boxes are not the leaves of halvings along one axis at a time"
        axis = np.argmax(finer, axis=1)[group]
        rows = active
        bit = (index[rows, axis] >> (depth[rows, axis] - node_depth[rows, axis] - 1)) & 1
        node_depth[rows, axis] += 1
        node_index[rows, axis] = 2 * node_index[rows, axis] + bit
    return None


def _edge(region):
    top = (np.int64(1) << region.depth) - 1
    return np.any((region.index == 0) | (region.index == top), axis=1)


def _proven(programs, params, region, lo, hi, shell, arithmetic):
    """Per sub-box: the limits hold (and ``dV/dt < 0`` where `shell`), in one arithmetic."""
    ar = ARITHMETICS[arithmetic]()
    ar.enter()
    n = programs.n
    X = [ar.rationals(lo[:, i], hi[:, i]) for i in range(n)]
    inputs = X + [ar.rational(a, b) for a, b in params]
    ok = np.ones(len(lo), bool)
    for g in evaluate(programs.limits, ar, inputs):
        low = ar.lower(g)
        ok &= ar.finite(g) & np.array([bool(v >= 0) for v in np.broadcast_to(low, (len(lo),))])
    if not shell.any():
        return ok
    f = evaluate(programs.field, ar, inputs)
    d = [ar.sub(X[i], ar.rational(region.centre[i], region.centre[i])) for i in range(n)]
    rate, w = _rate(ar, region, d, f)
    up = _upper_list(ar, rate, len(lo))
    jacobian = programs.field_jacobian
    if jacobian is not None:
        # mean-value form at the exact midpoint m: W(m) + sum_k (dW/dx_k)(X) (X_k - m_k)
        mid = (lo + hi) / 2
        M = [ar.rationals(mid[:, i], mid[:, i]) for i in range(n)]
        point = M + [ar.rational(a, b) for a, b in params]
        dm = [ar.sub(M[i], ar.rational(region.centre[i], region.centre[i])) for i in range(n)]
        mv, _ = _rate(ar, region, dm, evaluate(programs.field, ar, point))
        J = evaluate(jacobian, ar, inputs)
        for k in range(n):
            g = None
            for i in range(n):
                q = 2 * region.matrix[k][i]
                term = ar.add(ar.mul(ar.rational(q, q), f[i]), ar.mul(w[i], J[i * n + k]))
                g = term if g is None else ar.add(g, term)
            mv = ar.add(mv, ar.mul(g, ar.sub(X[k], M[k])))
        other = _upper_list(ar, mv, len(lo))
        up = [a if b is None or (a is not None and a < b) else b for a, b in zip(up, other)]
    negative = np.array([u is not None and bool(u < 0) for u in up])
    return ok & (~shell | negative)


def _rate(ar, region, d, f):
    """``sum_i w_i f_i`` and the ``w_i = sum_j (2 P_ij) d_j``."""
    n = len(d)
    rate, w = None, []
    for i in range(n):
        wi = None
        for j in range(n):
            q = 2 * region.matrix[i][j]
            term = ar.mul(ar.rational(q, q), d[j])
            wi = term if wi is None else ar.add(wi, term)
        w.append(wi)
        term = ar.mul(wi, f[i])
        rate = term if rate is None else ar.add(rate, term)
    return rate, w


def _upper_list(ar, a, count):
    """Per row, the exact upper bound of an interval, or None where it is not usable."""
    finite = np.broadcast_to(ar.finite(a), (count,))
    up = np.broadcast_to(ar.upper(a), (count,))
    return [u if ok else None for u, ok in zip(up, finite)]


def _halves(lo, hi):
    """Each box halved along every axis: children lo, hi and their parent's row."""
    n = lo.shape[1]
    mid = (lo + hi) / 2
    out_lo, out_hi, parent = [], [], []
    for r in range(len(lo)):
        for bits in itertools.product((0, 1), repeat=n):
            out_lo.append([mid[r, i] if b else lo[r, i] for i, b in enumerate(bits)])
            out_hi.append([hi[r, i] if b else mid[r, i] for i, b in enumerate(bits)])
            parent.append(r)
    return (np.array(out_lo, dtype=object).reshape(-1, n),
            np.array(out_hi, dtype=object).reshape(-1, n), np.array(parent))


def verify_region(region, programs, params):
    """Problems with a region's claims (empty when it is proven).

    Parameters
    ----------
    region : CheckRegion
    programs : certify.check._programs.CheckPrograms
    params : sequence of (Fraction, Fraction)

    Returns
    -------
    list of str
    """
    n = len(region.centre)
    problem = tiling_problem(region.depth, region.index)
    if problem:
        return [f"its cover does not tile its box: {problem}"]
    edge = _edge(region)
    if np.any(edge & (region.kind != ABOVE)):
        k = int(np.flatnonzero(edge & (region.kind != ABOVE))[0])
        return [f"cover box {k} touches the boundary of the box but is not 'above'"]
    lo, hi = exact_cells(region.box, region.depth, region.index)
    for k in np.flatnonzero((region.kind != SHELL) & ~_classes_in_balls(region, lo, hi)):
        v_lo, v_hi = _v_range(region, lo[k], hi[k])
        kind = region.kind[k]
        if (kind == ABOVE and not v_lo > region.level) or \
                (kind == BELOW and not v_hi < region.level):
            name = "above" if kind == ABOVE else "below"
            return [f"cover box {k} is not proven '{name}' the level"]
    todo = np.flatnonzero(region.kind != ABOVE)
    for arithmetic in ("ball", "endpoint"):
        if len(todo) == 0:
            return []
        ok = _proven(programs, params, region, lo[todo], hi[todo],
                     region.kind[todo] == SHELL, arithmetic)
        todo = todo[~ok]
    if len(todo) == 0:
        return []
    # last resort: halve the remaining sub-boxes (their halves cover them)
    clo, chi, parent = _halves(lo[todo], hi[todo])
    ok = _proven(programs, params, region, clo, chi, region.kind[todo][parent] == SHELL,
                 "endpoint")
    failed = np.unique(parent[~ok])
    if len(failed):
        k = int(todo[failed[0]])
        return [f"cover box {k}: the limits or (for a shell box) dV/dt < 0 are not proven"]
    return []
