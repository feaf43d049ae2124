"""Which faces of the analysis window an image may cross harmlessly.

A face is

* ``limit`` when every point of it violates some limit: a trajectory that leaves the
  window through it has already crossed a limit;
* ``inflow`` when at every point of it that satisfies the limits the flow points
  strictly into the window: a trajectory that stays within the limits cannot leave
  through it (at the first exit time the outward rate would have to be >= 0);
* ``invariant`` when the face's hyperplane ``x_k = b`` is invariant: the normal
  component ``f_k`` vanishes identically on it (a symbolic identity in the other states
  and the parameters, decided by :func:`zero_on_hyperplane`), and ``f`` is Lipschitz on
  a slab around the face (every Jacobian entry has a finite enclosure). By uniqueness,
  a solution that meets the face stays on the hyperplane near that time, in both
  directions: no trajectory leaves the window through it. Lines of rest states (no infected people, no biomass) are such faces;
* ``no-outflow`` when neither of the above holds but at every point of the face that is
  not proven to violate a limit the flow points into the window or along the face
  (the inward component of ``f`` is ``>= 0``), and ``f`` is Lipschitz on the slab
  around the face. The floor ``x_k = 0`` of a compartment that only receives inflow
  there (``f_k >= 0``) is such a face. A trajectory that keeps the limits cannot leave
  the window through it (see :func:`analyse_faces`);
* ``open`` otherwise.

Parts of image boxes beyond a ``limit``, ``inflow`` or ``invariant`` face are harmless
for both the safe and the doomed proofs (docs/design.md, section 5). Each verdict rests on a
cover of the face (or of the slab) by boxes, each proven; the face cover is stored in
the certificate.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import sympy

from .evaluate import evaluate_boxes
from .interval import enclose_fraction
from .program import compile_program
from .taylor import fixed_parameters

__all__ = ["analyse_faces", "window_sides", "cut_at_invariant_faces", "zero_on_hyperplane",
           "tube_past_open_faces", "cut_to_window", "HARMLESS", "FACE_DEPTH", "SLAB_MARGIN"]

HARMLESS = ("limit", "inflow", "invariant", "no-outflow")
FACE_DEPTH = 6
#: Half-width of the slab around an invariant face, and its overhang past the face's
#: edges, as a fraction of each window side.
SLAB_MARGIN = Fraction(1, 1024)
LIMIT, INFLOW, LIPSCHITZ, NO_OUTFLOW = 1, 2, 3, 4


def _bisect_until_proven(lo, hi, axes, depth, prove_pieces):
    """Bisect a box along `axes` until `prove_pieces` proves every piece.

    `prove_pieces(lo, hi)` returns a reason code per piece (0: not proven).
    Returns ``(lo, hi, reason)`` of the proven pieces, or None.
    """
    pieces_lo, pieces_hi, reasons = [], [], []
    lo, hi = lo[None], hi[None]
    for level in range(depth + 1):
        reason = prove_pieces(lo, hi)
        done = reason > 0
        pieces_lo.append(lo[done])
        pieces_hi.append(hi[done])
        reasons.append(reason[done])
        lo, hi = lo[~done], hi[~done]
        if len(lo) == 0:
            return np.concatenate(pieces_lo), np.concatenate(pieces_hi), np.concatenate(reasons)
        if level == depth or not axes:
            return None
        for j in axes:
            mid = 0.5 * (lo[:, j] + hi[:, j])
            left_hi, right_lo = hi.copy(), lo.copy()
            left_hi[:, j] = mid
            right_lo[:, j] = mid
            lo, hi = np.concatenate([lo, right_lo]), np.concatenate([left_hi, hi])
    return None


def zero_on_hyperplane(expression, symbol, value):
    """True when `expression` is proven to be 0 once `symbol` is replaced by `value`.

    Two decision rules, no heuristic simplification: a rational function (no floats) is
    0 exactly when ``cancel(together(e))`` is 0; any other expression only when it is a
    structural zero (:func:`_structural_zero`). A 0 holds for every real value of the
    other states and of the parameters, which is what the invariance argument needs;
    False only means "not shown".
    """
    e = expression.xreplace({symbol: value})
    if e.is_rational_function() and not e.has(sympy.Float):
        return sympy.cancel(sympy.together(e)) == 0
    return _structural_zero(e)


def _structural_zero(e):
    """``e`` is the number 0, a sum of structural zeros, or a product with one as factor."""
    if e.is_Add:
        return all(_structural_zero(term) for term in e.args)
    if e.is_Mul:
        return any(_structural_zero(factor) for factor in e.args)
    return bool(e.is_Number and e == 0)


def _lipschitz_near(model, jacobian, k, b, params, depth):
    """Prove that every Jacobian entry is finite on the slab around the face ``x_k = b``."""
    lo, hi = np.empty(len(model.window)), np.empty(len(model.window))
    for j, (a, c) in enumerate(model.window):
        margin = SLAB_MARGIN * (c - a)
        low, high = (b - margin, b + margin) if j == k else (a - margin, c + margin)
        lo[j], hi[j] = enclose_fraction(low)[0], enclose_fraction(high)[1]

    def finite(plo, phi):
        jlo, jhi = evaluate_boxes(jacobian, plo, phi, params)
        return np.where(np.all(np.isfinite(jlo) & np.isfinite(jhi), axis=1), LIPSCHITZ, 0)

    others = [j for j in range(len(lo)) if j != k]
    return _bisect_until_proven(lo, hi, others, depth, finite) is not None


def _invariant_faces(model, params, depth):
    """The ``(axis, side)`` pairs whose faces are ``invariant`` (see the module notes)."""
    if model.uses_kinks:
        return set()
    field = _fixed_field(model)
    states = model.state_symbols
    candidates = [(k, side, value) for k, (a, c) in enumerate(model.window)
                  for side, value in (("lo", a), ("hi", c))
                  if zero_on_hyperplane(field[k], states[k], sympy.Rational(value))]
    if not candidates:
        return set()
    jacobian = _field_jacobian(model)
    return {(k, side) for k, side, value in candidates
            if _lipschitz_near(model, jacobian, k, value, params, depth)}


def analyse_faces(model, programs, tree, params, depth=FACE_DEPTH):
    """Classify the ``2 n`` faces of the window.

    Parameters
    ----------
    model : certify.model.Model
    programs : certify.taylor.FlowPrograms
    tree : certify.cells.CellTree
        Gives the float enclosure of the window and of its sides.
    params : list of (float, float)
    depth : int
        Bisection depth per face axis.

    Returns
    -------
    list of dict
        ``{"axis": k, "side": "lo"|"hi", "kind": "limit"|"inflow"|"invariant"|
        "no-outflow"|"open", "lo": ndarray, "hi": ndarray, "reason": ndarray}`` (the
        cover; empty when ``invariant`` or ``open``).

    Notes
    -----
    Why a trajectory ``x`` that keeps the limits cannot leave through a ``no-outflow``
    face: let ``t*`` be the last time up to which ``x`` lies in the window ``W`` and
    ``y(t)`` the point of ``W`` nearest to ``x(t)`` (each coordinate clamped to its
    range). Let ``D(t)`` be the sum of the distances by which ``x(t)`` lies beyond the
    faces. Beyond an open face the tube reaches (the cell escapes, nothing to show);
    beyond a ``limit`` or ``inflow`` face ``x`` is not near ``t*`` (``x(t*)`` keeps the
    limits, and the inward rate is positive there). Beyond a ``no-outflow`` face
    ``x_k = b``, ``y(t)`` lies on the face near ``x(t*)``, so in a piece of the cover that
    holds ``x(t*)``, none of which violates a limit everywhere; there the inward rate is
    ``>= 0`` and, ``L`` a Lipschitz constant of ``f`` on the slab, the distance beyond
    the face grows at most at rate ``L |x - y| <= L D``. The same holds beyond an
    ``invariant`` face (``f_k`` is 0 on its whole hyperplane). So ``D' <= n L D`` with
    ``D(t*) = 0``, and ``D`` stays 0 (Gronwall): ``x`` does not leave at ``t*``.
    """
    lo_lo, lo_hi, hi_lo, hi_hi = tree.window_bounds()
    wlo, whi = tree.lo[0], tree.hi[0]
    n = len(wlo)
    invariant = None
    faces = []
    for k in range(n):
        for side in ("lo", "hi"):
            lo, hi = wlo.copy(), whi.copy()
            if side == "lo":
                lo[k], hi[k] = lo_lo[k], lo_hi[k]
            else:
                lo[k], hi[k] = hi_lo[k], hi_hi[k]

            def harmless(plo, phi, weak=False):
                _, ghi = evaluate_boxes(programs.limits, plo, phi, params)
                flo, fhi = evaluate_boxes(programs.field, plo, phi, params)
                inward_lo = flo[:, k] if side == "lo" else -fhi[:, k]
                limit = np.any(ghi < 0, axis=1)
                inward = np.where(inward_lo > 0, INFLOW,
                                  np.where(weak & (inward_lo >= 0), NO_OUTFLOW, 0))
                return np.where(limit, LIMIT, inward)

            others = [j for j in range(n) if j != k]
            cover = _bisect_until_proven(lo, hi, others, depth, harmless)
            empty = np.zeros((0, n))
            if cover is not None:
                plo, phi, reason = cover
                kind = "limit" if np.all(reason == LIMIT) else "inflow"
                faces.append({"axis": k, "side": side, "kind": kind, "lo": plo, "hi": phi,
                              "reason": reason})
                continue
            if invariant is None:
                invariant = _invariant_faces(model, params, depth)
            if (k, side) not in invariant:
                cover = _no_outflow_cover(model, params, k, side, lo, hi, others, depth,
                                          lambda plo, phi: harmless(plo, phi, weak=True))
                if cover is not None:
                    plo, phi, reason = cover
                    faces.append({"axis": k, "side": side, "kind": "no-outflow", "lo": plo,
                                  "hi": phi, "reason": reason})
                    continue
            kind = "invariant" if (k, side) in invariant else "open"
            faces.append({"axis": k, "side": side, "kind": kind, "lo": empty, "hi": empty,
                          "reason": np.zeros(0, int)})
    return faces


def _no_outflow_cover(model, params, k, side, lo, hi, others, depth, prove_pieces):
    """The cover of a ``no-outflow`` face, or None (see :func:`analyse_faces`)."""
    if model.uses_kinks:
        return None
    cover = _bisect_until_proven(lo, hi, others, depth, prove_pieces)
    if cover is None:
        return None
    value = model.window[k][0 if side == "lo" else 1]
    return cover if _lipschitz_near(model, _field_jacobian(model), k, value, params,
                                    depth) else None


def _fixed_field(model):
    """The right-hand sides with the parameters given as numbers substituted."""
    fixed = dict(fixed_parameters(model))
    return [e.xreplace(fixed) for e in model.equations]


def _field_jacobian(model):
    """The compiled Jacobian of :func:`_fixed_field` in the states and parameters."""
    states = model.state_symbols
    return compile_program(list(sympy.Matrix(_fixed_field(model)).jacobian(states)),
                           tuple(states) + tuple(model.parameter_symbols))


def window_sides(model):
    """The kind of each side of a model's window, as ``certify prove`` classifies it.

    Parameters
    ----------
    model : certify.model.Model

    Returns
    -------
    list of dict
        ``{"state": name, "side": "lo"|"hi", "value": Fraction, "kind": ...}``, two per
        state in state order. Trajectories may leave the window only at ``open`` sides.
    """
    from .cells import CellTree
    from .evaluate import parameter_enclosures
    from .taylor import flow_programs

    programs = flow_programs(model, 1)
    faces = analyse_faces(model, programs, CellTree(model.window), parameter_enclosures(model))
    return [{"state": model.states[f["axis"]].name, "side": f["side"],
             "value": model.window[f["axis"]][0 if f["side"] == "lo" else 1],
             "kind": f["kind"]} for f in faces]


def cut_at_invariant_faces(faces, window, e_lo, e_hi, owner, n_owners):
    """Tube boxes cut at the invariant faces wherever no trajectory can be beyond them.

    A trajectory from a cell can reach the far side of an invariant face ``x_k = b``
    only through a point of the hyperplane with no neighbourhood where ``f`` is known
    to be Lipschitz, that is, off the open cross-section of the slab (every other side
    overhanging by :data:`SLAB_MARGIN`). When every tube box of a cell that reaches the
    hyperplane lies strictly within that cross-section, the cell's trajectories stay on
    the window's side of the face throughout, so the part of each tube box beyond the
    face holds none of them.

    Parameters
    ----------
    faces : list of dict
        From :func:`analyse_faces`.
    window : sequence of (Fraction, Fraction)
    e_lo, e_hi : ndarray, shape (S, n)
        Tube boxes.
    owner : ndarray of int, shape (S,)
        Cell of each tube box.
    n_owners : int

    Returns
    -------
    lo, hi : ndarray, shape (S, n)
    """
    lo, hi = e_lo.copy(), e_hi.copy()
    for face in faces:
        if face["kind"] != "invariant":
            continue
        k, side = face["axis"], face["side"]
        inside = np.ones(len(lo), bool)
        for j, (a, c) in enumerate(window):
            if j != k:
                margin = SLAB_MARGIN * (c - a)
                inside &= (e_lo[:, j] > enclose_fraction(a - margin)[1]) & \
                          (e_hi[:, j] < enclose_fraction(c + margin)[0])
        b_lo, b_hi = enclose_fraction(window[k][0] if side == "lo" else window[k][1])
        reaches = e_lo[:, k] <= b_hi if side == "lo" else e_hi[:, k] >= b_lo
        unsure = np.bincount(owner, weights=reaches & ~inside, minlength=n_owners) > 0
        cut = ~unsure[owner]
        if side == "lo":
            lo[cut, k] = np.maximum(lo[cut, k], b_lo)
        else:
            hi[cut, k] = np.minimum(hi[cut, k], b_hi)
    return lo, hi


def tube_past_open_faces(faces, window_bounds, e_lo, e_hi, owner, n_owners):
    """Per cell: does one of its tube boxes reach beyond an open face of the window?

    Parameters
    ----------
    faces : list of dict
        From :func:`analyse_faces`.
    window_bounds : tuple of ndarray
        ``lo_lo, lo_hi, hi_lo, hi_hi`` of :meth:`certify.cells.CellTree.window_bounds`.
    e_lo, e_hi : ndarray, shape (S, n)
        Tube boxes.
    owner : ndarray of int, shape (S,)
        Cell of each tube box.
    n_owners : int

    Returns
    -------
    ndarray of bool, shape (n_owners,)
    """
    _, lo_hi, hi_lo, _ = window_bounds
    past = np.zeros(len(e_lo), bool)
    for face in faces:
        if face["kind"] in HARMLESS:
            continue
        k = face["axis"]
        past |= e_lo[:, k] < lo_hi[k] if face["side"] == "lo" else e_hi[:, k] > hi_lo[k]
    return np.bincount(owner, weights=past, minlength=n_owners) > 0


def cut_to_window(window_bounds, e_lo, e_hi, escaping):
    """Tube boxes cut to the window, but those of cells whose tubes reach past an open face.

    A cell's trajectories that keep the limits up to its horizon stay in the window all
    along when no tube box of the cell reaches past an open face (:func:`analyse_faces`,
    notes), and only those matter where the tube boxes bound how far a cell moved (an
    image holds the trajectories still within the limits). A box that the window would
    empty is left as it is.

    Parameters
    ----------
    window_bounds : tuple of ndarray
        ``lo_lo, lo_hi, hi_lo, hi_hi`` of :meth:`certify.cells.CellTree.window_bounds`.
    e_lo, e_hi : ndarray, shape (S, n)
        Tube boxes.
    escaping : ndarray of bool, shape (S,)
        Per tube box: its cell's tube reaches past an open face
        (:func:`tube_past_open_faces`).

    Returns
    -------
    lo, hi : ndarray, shape (S, n)
    """
    lo_lo, _, _, hi_hi = window_bounds
    lo, hi = np.maximum(e_lo, lo_lo), np.minimum(e_hi, hi_hi)
    cut = ~escaping & np.all(lo <= hi, axis=1)
    return np.where(cut[:, None], lo, e_lo), np.where(cut[:, None], hi, e_hi)
