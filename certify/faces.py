"""Which faces of the analysis window an image may cross harmlessly.

A face is

* ``limit`` when every point of it violates some limit: a trajectory that leaves the
  window through it has already crossed a limit;
* ``inflow`` when at every point of it that satisfies the limits the flow points
  strictly into the window: a trajectory that stays within the limits cannot leave
  through it (at the first exit time the outward rate would have to be >= 0);
* ``open`` otherwise.

Parts of image boxes beyond a ``limit`` or ``inflow`` face are harmless for both the
safe and the doomed proofs (DESIGN.md section 5). Each verdict rests on a cover of the
face by boxes, each proven to violate a limit or to have strictly inward flow; the cover
is stored in the certificate.
"""

from __future__ import annotations

import numpy as np

from .evaluate import evaluate_boxes

__all__ = ["analyse_faces", "HARMLESS", "FACE_DEPTH"]

HARMLESS = ("limit", "inflow")
FACE_DEPTH = 6
LIMIT, INFLOW = 1, 2


def _cover_face(programs, lo, hi, k, side, params, depth):
    """Bisect the face box until every piece is proven; returns pieces or None."""
    others = [j for j in range(len(lo)) if j != k]
    pieces_lo, pieces_hi, reasons = [], [], []
    lo, hi = lo[None], hi[None]
    for level in range(depth + 1):
        _, ghi = evaluate_boxes(programs.limits, lo, hi, params)
        flo, fhi = evaluate_boxes(programs.field, lo, hi, params)
        inward_lo = flo[:, k] if side == "lo" else -fhi[:, k]
        limit = np.any(ghi < 0, axis=1)
        inflow = ~limit & (inward_lo > 0)
        done = limit | inflow
        pieces_lo.append(lo[done])
        pieces_hi.append(hi[done])
        reasons.append(np.where(limit[done], LIMIT, INFLOW))
        lo, hi = lo[~done], hi[~done]
        if len(lo) == 0:
            return np.concatenate(pieces_lo), np.concatenate(pieces_hi), np.concatenate(reasons)
        if level == depth or not others:
            return None
        for j in others:
            mid = 0.5 * (lo[:, j] + hi[:, j])
            left_hi, right_lo = hi.copy(), lo.copy()
            left_hi[:, j] = mid
            right_lo[:, j] = mid
            lo, hi = np.concatenate([lo, right_lo]), np.concatenate([left_hi, hi])
    return None


def analyse_faces(programs, tree, params, depth=FACE_DEPTH):
    """Classify the ``2 n`` faces of the window.

    Parameters
    ----------
    programs : certify.taylor.FlowPrograms
    tree : certify.cells.CellTree
        Gives the float enclosure of the window and of its sides.
    params : list of (float, float)
    depth : int
        Bisection depth per face axis.

    Returns
    -------
    list of dict
        ``{"axis": k, "side": "lo"|"hi", "kind": "limit"|"inflow"|"open",
        "lo": ndarray, "hi": ndarray, "reason": ndarray}`` (the cover; empty when open).
    """
    lo_lo, lo_hi, hi_lo, hi_hi = tree.window_bounds()
    wlo, whi = tree.lo[0], tree.hi[0]
    n = len(wlo)
    faces = []
    for k in range(n):
        for side in ("lo", "hi"):
            lo, hi = wlo.copy(), whi.copy()
            if side == "lo":
                lo[k], hi[k] = lo_lo[k], lo_hi[k]
            else:
                lo[k], hi[k] = hi_lo[k], hi_hi[k]
            cover = _cover_face(programs, lo, hi, k, side, params, depth)
            if cover is None:
                empty = np.zeros((0, n))
                faces.append({"axis": k, "side": side, "kind": "open", "lo": empty,
                              "hi": empty, "reason": np.zeros(0, int)})
                continue
            plo, phi, reason = cover
            kind = "limit" if np.all(reason == LIMIT) else "inflow"
            faces.append({"axis": k, "side": side, "kind": kind, "lo": plo, "hi": phi,
                          "reason": reason})
    return faces
