"""The checker's own confirmation of the window faces a certificate calls harmless.

* ``limit``: bisect the face exactly until a limit is proven violated on every piece.
* ``inflow``: the same, where a piece may instead have a strictly inward normal
  component of ``f``.
* ``invariant``: the normal component ``f_k`` is proven 0 once ``x_k`` is replaced by
  the face's exact value (:func:`_identically_zero`: exact for rational functions,
  otherwise only a structural zero; the model's symbols are real), and every entry of
  the Jacobian of ``f`` is finite on a slab around the face: ``|x_k - b| <= d_k`` and
  every other side overhanging by ``d_j``, with ``d = side / 1024``. Then ``f`` is
  Lipschitz near the face and, by uniqueness, a solution that meets the face stays on
  the hyperplane ``x_k = b`` near that time, so none leaves the window through it.
* ``no-outflow``: bisect the face exactly until every piece violates a limit or has an
  inward normal component of ``f`` that is ``>= 0``; and the Jacobian is finite on the
  slab around the face, as for ``invariant``. A trajectory that keeps the limits then
  cannot leave the window through it: near the last time ``t*`` it is in the window,
  the distance ``D`` by which it lies beyond the faces grows at most at rate
  ``n L D`` (``L`` a Lipschitz constant on the slab, the inward rate ``>= 0`` at the
  nearest point of the face), and ``D(t*) = 0`` keeps it 0 (Gronwall).

Pieces are tried in ball arithmetic first, then with exact endpoints.
"""

from __future__ import annotations

import numpy as np
import sympy

from ._arith import ARITHMETICS, evaluate
from ._cells import SLAB, _limits_upper_negative, _params, _true

__all__ = ["confirm_face"]

#: Faces are bisected at most this often along each of their axes.
FACE_LEVELS = 10
#: Largest number of face pieces examined per level.
FACE_PIECES = 1 << 16


def confirm_face(context, axis, side, kind):
    """Whether a face is proven to be of the claimed harmless kind.

    Parameters
    ----------
    context : certify.check._cells.CheckContext
    axis : int
    side : {"lo", "hi"}
    kind : {"limit", "inflow", "invariant", "no-outflow"}

    Returns
    -------
    bool
    """
    window = context.window
    n = len(window)
    value = window[axis][0] if side == "lo" else window[axis][1]
    others = [k for k in range(n) if k != axis]
    if kind == "invariant":
        programs = context.programs
        normal = programs.equations[axis].xreplace({programs.states[axis]: value})
        return _identically_zero(normal) and _lipschitz_slab(context, axis, value, others)
    lo = [value if k == axis else window[k][0] for k in range(n)]
    hi = [value if k == axis else window[k][1] for k in range(n)]
    rule = {"limit": _LIMIT_ONLY, "inflow": _STRICT, "no-outflow": _WEAK}[kind]

    def proven(arithmetic, plo, phi):
        return _face_pieces_harmless(context, arithmetic, axis, side, plo, phi, rule)
    if not _bisect(np.array([lo], dtype=object), np.array([hi], dtype=object), others,
                   proven):
        return False
    return kind != "no-outflow" or _lipschitz_slab(context, axis, value, others)


def _lipschitz_slab(context, axis, value, others):
    """Whether every Jacobian entry of ``f`` is finite on the slab around ``x_axis = value``
    (``|x_axis - value| <= d_axis``, every other side overhanging by ``d_j``)."""
    if context.programs.field_jacobian is None:
        return False
    lo, hi = [], []
    for k, (a, b) in enumerate(context.window):
        d = SLAB * (b - a)
        lo.append(value - d if k == axis else a - d)
        hi.append(value + d if k == axis else b + d)

    def proven(arithmetic, plo, phi):
        return _jacobian_finite(context, arithmetic, plo, phi)
    return _bisect(np.array([lo], dtype=object), np.array([hi], dtype=object), others,
                   proven)


def _identically_zero(e):
    """Whether the sympy expression `e` is 0 for every real value of its symbols.

    A rational function without floats: ``cancel(together(e)) == 0``, which decides it.
    Anything else: only a structural zero (:func:`_structural_zero`). False means "not
    shown", and the face is then treated as open.
    """
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


def _bisect(lo, hi, axes, proven):
    """Bisect a box along `axes` until `proven(arithmetic, lo, hi)` holds on every piece."""
    for level in range(FACE_LEVELS + 1):
        todo = np.ones(len(lo), bool)
        for arithmetic in ("ball", "endpoint"):
            sel = np.flatnonzero(todo)
            if len(sel):
                todo[sel[proven(arithmetic, lo[sel], hi[sel])]] = False
        lo, hi = lo[todo], hi[todo]
        if len(lo) == 0:
            return True
        if level == FACE_LEVELS or not axes or len(lo) << len(axes) > FACE_PIECES:
            return False
        for k in axes:
            mid = (lo[:, k] + hi[:, k]) / 2
            left_hi, right_lo = hi.copy(), lo.copy()
            left_hi[:, k] = mid
            right_lo[:, k] = mid
            lo, hi = np.concatenate([lo, right_lo]), np.concatenate([left_hi, hi])
    return False


#: What a face piece may show besides a violated limit: nothing, a strictly inward
#: normal component of ``f``, or one that is ``>= 0`` inward.
_LIMIT_ONLY, _STRICT, _WEAK = "limit", "strict", "weak"


def _face_pieces_harmless(context, arithmetic, axis, side, lo, hi, rule):
    """Pieces of a face where a limit is violated or, by `rule`, ``f`` points strictly
    into the window (``_STRICT``) or not out of it (``_WEAK``)."""
    ar = ARITHMETICS[arithmetic]()
    ar.enter()
    n = context.programs.n
    box = [ar.rationals(lo[:, i], hi[:, i]) for i in range(n)]
    proven = _limits_upper_negative(ar, context, box, len(lo))
    if rule != _LIMIT_ONLY:
        f = evaluate(context.programs.field, ar, box + _params(ar, context))[axis]
        if rule == _STRICT:
            inward = ar.lower(f) > 0 if side == "lo" else ar.upper(f) < 0
        else:
            inward = ar.lower(f) >= 0 if side == "lo" else ar.upper(f) <= 0
        proven |= _true(inward)
    return proven


def _jacobian_finite(context, arithmetic, lo, hi):
    """Pieces on which every entry of the Jacobian of ``f`` is finite."""
    ar = ARITHMETICS[arithmetic]()
    ar.enter()
    n = context.programs.n
    box = [ar.rationals(lo[:, i], hi[:, i]) for i in range(n)]
    entries = evaluate(context.programs.field_jacobian, ar, box + _params(ar, context))
    proven = np.ones(len(lo), bool)
    for entry in entries:
        proven &= np.asarray(ar.finite(entry), bool)
    return proven
