"""What the checker recomputes per cell: its tube, image, and the facts its label needs.

Everything runs vectorized over a chunk of cells, step by step, in one of the two
arithmetics of :mod:`certify.check._arith`. For step ``k`` of a cell (stored: step size
``h``, a-priori box ``E``, and the coordinates ``m``, ``A`` of the set at the step end):

* Picard: ``X_k + [0, h] f(E) ⊆ E`` with every side strict (inside the interior of
  ``E``), or, where a side is reached exactly, every entry of ``Df`` finite on ``E``;
  then every solution from ``X_k`` stays in ``E`` on ``[0, h]``;
* mean-value Taylor step: ``Y = T(m_k) + h^q f^[q](E)``, ``M = DT(J) A_k`` with
  ``J = hull(X_k, m_k)`` (for ``Df`` cut at ``m_k`` into ``2^n`` parts where the
  prover cuts its own, and intersected with its centered form at ``m_k`` where the
  prover uses that); the checker's own new coordinates
  ``r_{k+1} = B (Y - m_{k+1}) + (B M) r_k`` with ``B`` enclosing ``A_{k+1}^-1``, and
  ``X_{k+1} = hull(m_{k+1} + A_{k+1} r_{k+1}) ∩ (Y + M r_k)``;
* a limit ``g`` is kept on the step when ``g(X_k) + [0, h] (grad g . f)(E) >= 0`` or
  ``(grad g . f)(E) >= 0``;
* the step end is crossing evidence when ``g_j(X_{k+1}) < 0`` for one ``j``.

``X_0`` is the exact cell, ``m_0`` the stored start point (version 3 stores none: the
float nearest the cell's midpoint), ``A_0 = I`` and ``r_0`` the cell minus ``m_0``. The
stored ``r`` boxes are not used: the checker's own are proven. Version 3 stores no frames
``m``, ``A`` either: the checker chooses its own (:func:`_own_frame`), as any frame is
sound.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from fractions import Fraction
from functools import lru_cache

import numpy as np

from ._arith import ARITHMETICS, evaluate
from ._floats import float_down, float_up

__all__ = ["CheckContext", "CellTask", "cell_facts", "exact_cells", "grid_bounds"]

#: Tries at a passing a-priori box per step in a regression check (``search_tubes``).
TUBE_TRIES = 4

#: Slab half-width around an invariant face, as a fraction of each window side.
SLAB = Fraction(1, 1024)


@dataclass(frozen=True)
class CheckContext:
    """What every chunk needs: the programs and the geometry (picklable).

    Attributes
    ----------
    programs : certify.check._programs.CheckPrograms
    params : tuple of (Fraction, Fraction)
    window : tuple of (Fraction, Fraction)
    open_faces : tuple of (int, str)
        ``(axis, side)`` of the faces the checker treats as open.
    invariant_faces : tuple of (int, str)
        ``(axis, side)`` of the faces confirmed ``invariant``.
    grid_depth : int
        Depth of the finest grid used for exact successor lookups.
    search_tubes : bool
        Where a stored a-priori box fails the Picard inclusion, look for one from it (a
        regression check against a revised model: the stored boxes were made for the
        old one). Off for a certificate's own model, whose boxes must hold as stored.
    frames : str
        The certificate's frame rule, ``"qr+parallelepiped"`` or ``"qr"``
        (:func:`_own_frame`).
    """

    programs: object
    params: tuple
    window: tuple
    open_faces: tuple
    grid_depth: int
    invariant_faces: tuple = ()
    search_tubes: bool = False
    frames: str = "qr"


@dataclass
class CellTask:
    """A chunk of cells to recompute.

    Attributes
    ----------
    cells : ndarray of int, shape (N,)
        Leaf numbers (for the caller).
    depth : ndarray of int, shape (N,)
    index : ndarray of int, shape (N, n)
    n_steps : ndarray of int, shape (N,)
        Steps to recompute per cell (0: only the outside test).
    image_known : ndarray of bool, shape (N,)
    m0 : ndarray, shape (N, n), or None
    h : ndarray, shape (S,)
    E : ndarray, shape (S, n, 2)
    m : ndarray, shape (S, n), or None
    A : ndarray, shape (S, n, n), or None
        Step records of the cells, concatenated in cell order. Without start points and
        frames (version 3) the checker chooses its own.
    """

    cells: np.ndarray
    depth: np.ndarray
    index: np.ndarray
    n_steps: np.ndarray
    image_known: np.ndarray
    m0: np.ndarray
    h: np.ndarray
    E: np.ndarray
    m: np.ndarray
    A: np.ndarray


def exact_cells(window, depth, index):
    """Exact sides of dyadic cells of a box as object arrays of Fractions, each (N, n).

    `depth` is one depth per cell, shape (N,), or one per cell and axis, shape (N, n).
    """
    N, n = index.shape
    depth = np.broadcast_to(depth if np.ndim(depth) == 2 else np.reshape(depth, (N, 1)),
                            (N, n))
    lo = np.empty((N, n), dtype=object)
    hi = np.empty((N, n), dtype=object)
    for k, (a, b) in enumerate(window):
        # cells share sides: compute each (depth, index) pair once
        pairs, where = np.unique(np.stack([depth[:, k], index[:, k]], 1), axis=0,
                                 return_inverse=True)
        ends = [(a + Fraction(b - a, 1 << int(e)) * int(j),
                 a + Fraction(b - a, 1 << int(e)) * (int(j) + 1)) for e, j in pairs]
        side = np.empty((len(ends), 2), dtype=object)
        side[:] = ends
        lo[:, k], hi[:, k] = side[where.reshape(-1), 0], side[where.reshape(-1), 1]
    return lo, hi


def _params(ar, context):
    return [ar.rational(lo, hi) for lo, hi in context.params]


def _limits_upper_negative(ar, context, X, count):
    """Bool array of length `count`: some limit is below 0 on the whole box."""
    return _some_negative(ar, evaluate(context.programs.limits, ar,
                                       list(X) + _params(ar, context)), count)


def _some_negative(ar, g, count):
    """Bool array of length `count`: some interval of `g` lies wholly below 0."""
    out = np.zeros(count, bool)
    for gj in g:
        out |= _true(ar.upper(gj) < 0)
    return out


def _matmul(ar, P, Q):
    """Interval matrix product of lists of lists, each entry folded left."""
    rows, inner, cols = len(P), len(Q), len(Q[0])
    out = []
    for i in range(rows):
        row = []
        for j in range(cols):
            acc = ar.mul(P[i][0], Q[0][j])
            for l in range(1, inner):
                acc = ar.add(acc, ar.mul(P[i][l], Q[l][j]))
            row.append(acc)
        out.append(row)
    return out


def _matvec(ar, P, v):
    return [row[0] for row in _matmul(ar, P, [[x] for x in v])]


@dataclass
class StepOutcome:
    """What one step proves for the active cells (see :func:`_step`).

    Attributes
    ----------
    ok, kept, crossed : ndarray of bool
        The step verified; every limit is kept on it; its end box violates a limit.
    X_next, E : list of intervals
        The end box and the a-priori box (per axis).
    E_bounds : ndarray, shape (N, n, 2)
        The a-priori boxes used (a regression check may have replaced stored ones).
    m_next : ndarray
        The centre of the end sets (stored or the checker's own).
    sets_next : list of (ndarray, list of intervals)
        Frame ``A`` and coordinates ``r`` of each end set.
    moved : list of intervals
        ``h f(E)`` per axis: encloses how far a solution moves during the step.
    """

    ok: np.ndarray
    kept: np.ndarray
    crossed: np.ndarray
    X_next: list
    E: list
    E_bounds: np.ndarray
    m_next: np.ndarray
    sets_next: list
    moved: list


def _step(ar, context, X, X_bounds, m, sets, h, E_bounds, m_next=None, A_next=None):
    """One step for the active cells; returns the new box, coordinates and facts.

    `sets` holds per set of the certificate's frame rule its frame ``A`` (floats) and
    coordinates ``r``; all share the centre `m`. `X_bounds` are exact lower and upper
    bounds of the box ``X`` (per axis), which the Picard test uses: a ball's own bounds
    may be a little wider. Without a stored frame (`m_next`, `A_next` None) the step
    end's frames are the checker's own.
    """
    progs = context.programs
    n = progs.n
    params = _params(ar, context)
    hh = ar.exact(h)
    tube, ok, reach = _picard(ar, progs, params, hh, X_bounds, E_bounds)
    if context.search_tubes and not ok.all():
        E_bounds, tube = _search_tubes(ar, progs, params, hh, X_bounds, E_bounds, tube, ok,
                                       reach)
    field, rates = tube[:n], tube[n:]
    E = [ar.box(E_bounds[:, k, 0], E_bounds[:, k, 1]) for k in range(n)]
    point = [ar.exact(m[:, k]) for k in range(n)]
    Y, D = _taylor_by_branch(ar, progs, params, hh, X, E, point)
    if m_next is None:
        m_next = np.stack([_mid(ar, y) for y in Y], 1)
    new_m = [ar.exact(m_next[:, k]) for k in range(n)]
    X_next, sets_next = None, []
    # every set the rule carries: its image Y + M [r] and its new coordinates; the end
    # box is the intersection of all of them
    for (A, r), frame in zip(sets, FRAME_KINDS[context.frames]):
        Ae = [[ar.exact(A[:, i, j]) for j in range(n)] for i in range(n)]
        M = _matmul(ar, D, Ae)
        V = _matvec(ar, M, r)
        image = [ar.add(Y[i], V[i]) for i in range(n)]
        Q = A_next if A_next is not None else _own_frame(ar, M, r, frame)
        B = ar.inverse(Q)
        a = _matvec(ar, B, [ar.sub(Y[i], new_m[i]) for i in range(n)])
        c = _matvec(ar, _matmul(ar, B, M), r)
        new_r = [ar.add(a[i], c[i]) for i in range(n)]
        Qe = [[ar.exact(Q[:, i, j]) for j in range(n)] for i in range(n)]
        spread = _matvec(ar, Qe, new_r)
        box = [ar.intersect(ar.add(new_m[i], spread[i]), image[i]) for i in range(n)]
        X_next = box if X_next is None else [ar.intersect(X_next[i], box[i])
                                             for i in range(n)]
        for k in range(n):
            ok &= ar.finite(new_r[k])
        sets_next.append((Q, new_r))
    for k in range(n):
        ok &= ar.finite(X_next[k])
    # limits kept on the step, crossing evidence at its end
    g = evaluate(progs.limits, ar, list(X) + params)
    g_end = evaluate(progs.limits, ar, X_next + params)
    kept_by = []
    for j in range(progs.n_limits):
        integral = ar.sum_lower(ar.lower(g[j]), _span(ar, hh, rates[j])[0])
        kept_by.append(_true(integral >= 0) | _true(ar.lower(rates[j]) >= 0))
    kept = np.ones(len(h), bool)
    for by_rates, by_curvature in zip(kept_by, _kept_by_curvature(ar, context, hh, E, g, g_end,
                                                                  kept_by)):
        kept &= by_rates | by_curvature
    crossed = _some_negative(ar, g_end, len(h))
    return StepOutcome(ok=ok, kept=kept, crossed=crossed, X_next=X_next, E=E,
                       E_bounds=E_bounds, m_next=m_next, sets_next=sets_next,
                       moved=[ar.mul(hh, f) for f in field])


def _taylor_by_branch(ar, progs, params, hh, X, E, point):
    """``Y = T(m) + h^q f^[q](E)`` and ``DT(J)`` of the steps, each with the Taylor
    programs of the smooth branch that ``f`` is on its tube ``E`` where the model has
    kinks and ``method.kinks`` is ``"branches"`` (:class:`CheckBranches`), else with
    `progs` (models with kinks: order 1)."""
    if progs.branches is None:
        return _taylor(ar, progs, params, hh, X, E, point)
    N, n = len(ar.lower(point[0])), progs.n
    Y = [ar.exact(np.zeros(N)) for _ in range(n)]
    D = [[ar.exact(np.zeros(N)) for _ in range(n)] for _ in range(n)]
    for own, rows in _branch_groups(ar, progs, params, E):
        part = [[ar.take(a, rows) for a in box] for box in (X, E, point)]
        y, d = _taylor(ar, own, params, ar.take(hh, rows), *part)
        Y = [ar.put(a, rows, b) for a, b in zip(Y, y)]
        D = [[ar.put(a, rows, b) for a, b in zip(row_a, row_b)] for row_a, row_b in zip(D, d)]
    return Y, D


def _branch_groups(ar, progs, params, E):
    """The steps grouped by the programs that hold on their whole tubes `E`: for a model
    with branches (``progs.branches``) the steps where a kink may lie in ``E`` with
    `progs` (order 1), then per smooth branch met its steps with its Taylor programs and
    limit curvatures; otherwise every step with `progs`. Empty groups are left out."""
    N = len(ar.lower(E[0]))
    branches = progs.branches
    if branches is None:
        return [(progs, np.arange(N))]
    switch = evaluate(branches.switches, ar, list(E) + params)
    positive = np.stack([np.broadcast_to(_true(ar.lower(s) >= 0), N) for s in switch], axis=1)
    negative = np.stack([np.broadcast_to(_true(ar.upper(s) <= 0), N) for s in switch], axis=1)
    choices = branches.choices(positive, negative)
    known = np.all(choices >= 0, axis=1)
    groups = [(progs, np.flatnonzero(~known))]
    patterns, which = np.unique(choices[known], axis=0, return_inverse=True)
    groups += [(replace(progs, **branches.taylor(tuple(int(v) for v in pattern))),
                np.flatnonzero(known)[which.ravel() == g]) for g, pattern in enumerate(patterns)]
    return [(own, rows) for own, rows in groups if len(rows)]


def _taylor(ar, progs, params, hh, X, E, point):
    """``Y = T(m) + h^q f^[q](E)`` and ``DT(J) = I + sum h^k Df^[k](J)`` with
    ``J = hull(X, m)`` (`point` is ``m``), at the order of `progs`."""
    n, q = progs.n, progs.order
    remainder = _joined(ar, progs.remainder, ar.cover(E, ar.pieces.remainder), params)
    powers = [None, hh] + [ar.pow_int(hh, k) for k in range(2, q + 1)]
    # T(m) + h^q f^[q](E)
    Y = list(point)
    if q > 1:
        coeff = evaluate(progs.coefficients, ar, point + params)
        for k in range(1, q):
            for i in range(n):
                Y[i] = ar.add(Y[i], ar.mul(powers[k], coeff[(k - 1) * n + i]))
    Y = [ar.add(Y[i], ar.mul(powers[q], remainder[i])) for i in range(n)]
    # DT(J) = I + sum h^k Df^[k](J)
    N = len(ar.lower(point[0]))
    D = [[ar.exact(np.full(N, float(i == j))) for j in range(n)] for i in range(n)]
    if q > 1:
        # the Jacobian of f on J cut at m into 2^n parts where the prover cuts its own J
        J = [ar.hull(X[k], point[k]) for k in range(n)]
        parts = ar.split_at(J, point) if progs.cut_jacobian else [J]
        jac = _joined(ar, progs.jacobian,
                      [c for part in parts for c in ar.cover(part, ar.pieces.jacobians[0])],
                      params)
        if progs.hessian is not None:
            jac, hessian = _centered_jacobian(ar, progs, params, jac, J, point)
        if q > 2:
            higher = _joined(ar, progs.higher_jacobians, ar.cover(J, ar.pieces.jacobians[-1]),
                             params)
            if progs.hessian is not None:
                higher = _product_jacobian(ar, progs, params, jac, hessian, higher, J)
            jac = jac + higher
        if progs.hessian is not None:
            at_m, rest = _first_order_at_centre(ar, progs, params, hessian, J, point, hh)
            # rows where the rest is not finite keep h Df(J)
            usable = np.ones(N, bool)
            for a in list(rest) + list(at_m[:n * n]):
                usable &= np.broadcast_to(ar.finite(a), N)
            rows = np.flatnonzero(usable)
            Y = [ar.put(Y[i], rows, ar.add(ar.take(Y[i], rows), ar.take(rest[i], rows)))
                 for i in range(n)]
            jac = [ar.put(jac[e], rows, ar.take(at_m[e], rows)) for e in range(n * n)] \
                + list(jac[n * n:])
        for k in range(1, q):
            for i in range(n):
                for j in range(n):
                    term = ar.mul(powers[k], jac[(k - 1) * n * n + i * n + j])
                    D[i][j] = ar.add(D[i][j], term)
    return Y, D


def _centered_jacobian(ar, progs, params, jac, J, point):
    """``Df(J)`` with each entry of ``progs.centered`` intersected with its centered form
    ``Df_e(m) + sum_l (d Df_e / d x_l)(J) (J_l - m_l)`` (folded left over ``l``) where that
    form is finite, and the second derivatives ``progs.hessian`` on ``J``. `point`
    (``m``) lies in ``J``, so by the mean-value theorem the form holds every value of
    ``Df_e`` on ``J``."""
    n = progs.n
    at_m = evaluate(progs.jacobian, ar, list(point) + params)
    hessian = _joined(ar, progs.hessian, ar.cover(J, ar.pieces.jacobians[0]), params)
    offsets = [ar.sub(J[l], point[l]) for l in range(n)]
    jac = list(jac)
    for k, e in enumerate(progs.centered):
        form = at_m[e]
        for l in range(n):
            form = ar.add(form, ar.mul(hessian[k * n + l], offsets[l]))
        jac[e] = _narrowed(ar, jac[e], form, len(ar.lower(point[0])))
    return jac, hessian


def _first_order_at_centre(ar, progs, params, hessian, J, point, hh):
    """``Df(m)``, and ``(h/2) sum_(j,l) (d^2 f / dx_j dx_l)(J) d_j d_l`` with ``d = J - m``:
    by Taylor's formula with integral remainder it holds ``h (f(x) - f(m) - Df(m) (x - m))``
    for every ``x`` in ``J`` (``int_0^1 (1 - s) ds = 1/2``). The second derivatives are
    those of ``progs.centered``; ``d_j^2`` is a square. Sums fold over the entries, then
    over ``l``, as the prover's."""
    n = progs.n
    N = len(ar.lower(point[0]))
    at_m = evaluate(progs.jacobian, ar, list(point) + params)
    offsets = [ar.sub(J[l], point[l]) for l in range(n)]
    rest = [ar.exact(np.zeros(N)) for _ in range(n)]
    for p, e in enumerate(progs.centered):
        i, j = divmod(e, n)
        for l in range(n):
            pair = (ar.pow_int(offsets[j], 2) if l == j
                    else ar.mul(offsets[j], offsets[l]))
            rest[i] = ar.add(rest[i], ar.mul(hessian[p * n + l], pair))
    half_h = ar.mul(hh, ar.exact(np.full(N, 0.5)))
    return at_m, [ar.mul(half_h, r) for r in rest]


def _product_jacobian(ar, progs, params, jac, hessian, higher, J):
    """``Df^[2](J)`` (the first ``n * n`` entries of `higher`) intersected, where finite,
    with ``(Df(J) Df(J) + D^2f(J)[f(J)]) / 2``: ``f^[2] = Df f / 2`` by definition of the
    Taylor coefficients, so ``Df^[2] = (Df Df + D^2f[f]) / 2`` with ``D^2f[f]_ij =
    sum_k (d^2 f_i / dx_j dx_k) f_k``. `jac` is the centered ``Df(J)``; the second
    derivatives are those of ``progs.centered`` (the other entries of ``Df`` are
    constant in the states). Sums fold left over the inner index, then over ``k``."""
    n = progs.n
    field = _joined(ar, progs.field, ar.cover(J, ar.pieces.jacobians[0]), params)
    product = []
    for i in range(n):
        for j in range(n):
            acc = ar.mul(jac[i * n], jac[j])
            for l in range(1, n):
                acc = ar.add(acc, ar.mul(jac[i * n + l], jac[l * n + j]))
            product.append(acc)
    for p, e in enumerate(progs.centered):
        for k in range(n):
            product[e] = ar.add(product[e], ar.mul(hessian[p * n + k], field[k]))
    N = len(ar.lower(J[0]))
    half = ar.exact(np.full(N, 0.5))
    return [_narrowed(ar, higher[e], ar.mul(half, product[e]), N) if e < n * n else higher[e]
            for e in range(len(higher))]


def _narrowed(ar, a, form, N):
    """`a` intersected with `form` on the `N` rows where `form` is finite (both enclose
    one value)."""
    rows = np.flatnonzero(np.broadcast_to(ar.finite(form), N))
    if len(rows) == 0:
        return a
    return ar.put(a, rows, ar.intersect(ar.take(a, rows), ar.take(form, rows)))


def _kept_by_curvature(ar, context, hh, E, g, g_end, kept_by):
    """Rule (c) of docs/design.md, section 5: per limit, on which steps it is kept.

    A solution's ``phi(t) = g_j(x(t))`` with ``phi'' <= M`` on a step of size ``h`` lies
    above the lower of its two ends minus ``M h^2 / 8``; ``M`` bounds the limit's second
    derivative along solutions on the a-priori box `E`. Tried on the steps whose limits
    are not all kept by rules (a) and (b) (`kept_by`, one array per limit) and whose ends
    keep every limit.
    """
    n_steps = len(kept_by[0]) if kept_by else 0
    out = [np.zeros(n_steps, bool) for _ in kept_by]
    start = [ar.lower(gj) for gj in g]
    end = [ar.lower(gj) for gj in g_end]
    todo = ~np.all(kept_by, axis=0) if kept_by else np.zeros(0, bool)
    for s, e in zip(start, end):
        todo &= _true(s >= 0) & _true(e >= 0)
    if not todo.any():
        return out
    params = _params(ar, context)
    todo_idx = np.flatnonzero(todo)
    tubes = [ar.take(x, todo_idx) for x in E]
    # on the smooth branch a model with kinks is on the tube; none where a kink may lie
    for progs, rows in _branch_groups(ar, context.programs, params, tubes):
        if progs.curvatures is None:
            continue
        idx = todo_idx[rows]
        box = [ar.take(x, rows) for x in tubes]
        M = _joined(ar, progs.curvatures, ar.cover(box, ar.pieces.tube), params)
        h2 = ar.pow_int(ar.take(hh, idx), 2)
        for j, Mj in enumerate(M):
            dip = ar.upper(ar.mul(h2, Mj))
            s, e = start[j][idx], end[j][idx]
            out[j][idx] = _true(dip <= 0) | (_true(s * 8 >= dip) & _true(e * 8 >= dip))
    return out


def _floats(values):
    """Nearest floats of an object array of exact numbers (arb)."""
    return np.asarray(values, dtype=object).astype(float)


#: A parallelepiped frame with a larger condition number is replaced by its QR factor.
FRAME_CONDITION_LIMIT = 1e3
#: The frame kind of each set a frame rule carries (docs/method.md, step 3).
FRAME_KINDS = {"qr+parallelepiped": ("qr", "parallelepiped"), "qr": ("qr",)}


def _mid(ar, a):
    return 0.5 * (_floats(ar.lower(a)) + _floats(ar.upper(a)))


def _own_frame(ar, M, r, kind):
    """The checker's own frame ``A_{k+1}`` of a step end's set (plain floats).

    Any invertible float frame is sound: ``B`` encloses the inverse of the matrix used,
    and ``r_{k+1}`` is proven for this frame. It is chosen as the prover chooses its own
    (docs/method.md, step 3): the columns of ``mid(M)`` ordered by their spread
    ``|mid(M)_j| width(r_j)``; for kind ``"qr"`` their orthogonal QR factor; for kind
    ``"parallelepiped"`` the columns scaled to unit length, or the QR factor where that
    matrix's condition number exceeds ``FRAME_CONDITION_LIMIT``.
    """
    n = len(r)
    middle = np.stack([np.stack([_mid(ar, M[i][j]) for j in range(n)], 1) for i in range(n)], 1)
    width = np.stack([_floats(ar.upper(x)) - _floats(ar.lower(x)) for x in r], 1)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        spread = np.linalg.norm(middle, axis=1) * width
        order = np.argsort(-np.nan_to_num(spread, nan=0.0), axis=1, kind="stable")
        cols = np.take_along_axis(middle, order[:, None, :], axis=2)
        cols[~np.all(np.isfinite(cols), axis=(1, 2))] = np.eye(n)
        use_qr = np.ones(len(cols), bool)
        frame = cols.copy()
        if kind == "parallelepiped":
            length = np.linalg.norm(cols, axis=1, keepdims=True)
            zero = ~np.all(length > 0, axis=(1, 2))
            frame = cols / np.where(length > 0, length, 1.0)
            frame[zero] = np.eye(n)
            use_qr = zero | ~(np.linalg.cond(frame) <= FRAME_CONDITION_LIMIT)
    if use_qr.any():
        frame[use_qr] = np.linalg.qr(cols[use_qr])[0]
    return frame


def _picard(ar, progs, params, hh, X_bounds, E_bounds):
    """Field and limit rates on the boxes, and whether ``E`` is an a-priori box.

    ``X + [0, h] f(E)`` must lie in ``E``, strictly on every side or else with ``Df``
    finite on ``E`` (see :func:`_lipschitz`).

    Returns
    -------
    tube : list of intervals
        ``f`` then the limit rates on ``E``.
    ok : ndarray of bool
    reach : list of (lo, hi)
        Exact bounds of ``X + [0, h] f(E)`` per axis.
    """
    n = progs.n
    E = [ar.box(E_bounds[:, k, 0], E_bounds[:, k, 1]) for k in range(n)]
    tube = _joined(ar, progs.on_tube, ar.cover(E, ar.pieces.tube), params)
    ok = np.ones(len(E_bounds), bool)
    strict = np.ones(len(E_bounds), bool)
    reach = []
    for k in range(n):
        move_lo, move_hi = _span(ar, hh, tube[k])
        low = ar.sum_lower(X_bounds[0][k], move_lo)
        high = ar.sum_upper(X_bounds[1][k], move_hi)
        e_lo = ar.lower(ar.exact(E_bounds[:, k, 0]))
        e_hi = ar.upper(ar.exact(E_bounds[:, k, 1]))
        ok &= _true(low >= e_lo) & _true(high <= e_hi)
        strict &= _true(low > e_lo) & _true(high < e_hi)
        reach.append((low, high))
    # a side reached exactly needs uniqueness: Df finite on E (docs/method.md, step 1)
    touching = np.flatnonzero(ok & ~strict)
    if len(touching):
        ok[touching] = _lipschitz(ar, progs, params, [ar.take(e, touching) for e in E],
                                  len(touching))
    return tube, ok, reach


def _lipschitz(ar, progs, params, E, count):
    """Bool array: every entry of ``Df`` has a finite enclosure on the box ``E``.

    Models with kinks (``abs``, ``min``, ``max``) have no Jacobian program: False.
    """
    if progs.field_jacobian is None:
        return np.zeros(count, bool)
    entries = _joined(ar, progs.field_jacobian, ar.cover(E, ar.pieces.tube), params)
    finite = np.ones(count, bool)
    for entry in entries:
        finite &= np.asarray(ar.finite(entry), bool)
    return finite


def _search_tubes(ar, progs, params, hh, X_bounds, E_bounds, tube, ok, reach):
    """Replace failing a-priori boxes by boxes that pass, where a few tries find one.

    Each try joins the box with ``X + [0, h] f(E)`` and pads it by a tenth of its width
    (plain floats: a candidate is only a candidate until the Picard test accepts it).
    Updates `ok` in place.

    Returns
    -------
    E_bounds : ndarray, shape (N, n, 2)
    tube : list of intervals
        ``f`` and the limit rates on the boxes finally used.
    """
    E_bounds = E_bounds.copy()
    rows = np.flatnonzero(~ok)
    candidate = E_bounds[rows]
    reach = [(low[rows], high[rows]) for low, high in reach]
    for _ in range(TUBE_TRIES):
        for k, (low, high) in enumerate(reach):
            lo = np.minimum(candidate[:, k, 0], np.array([float(v) for v in low]))
            hi = np.maximum(candidate[:, k, 1], np.array([float(v) for v in high]))
            pad = 0.1 * (hi - lo) + 1e-12 * np.maximum(np.abs(lo), np.abs(hi)) + 1e-300
            candidate[:, k, 0], candidate[:, k, 1] = lo - pad, hi + pad
        sub_X = ([b[rows] for b in X_bounds[0]], [b[rows] for b in X_bounds[1]])
        found, passed, reach = _picard(ar, progs, params, ar.take(hh, rows), sub_X, candidate)
        good = np.flatnonzero(passed)
        E_bounds[rows[good]] = candidate[good]
        ok[rows[good]] = True
        tube = [ar.put(a, rows[good], ar.take(b, good)) for a, b in zip(tube, found)]
        rest = np.flatnonzero(~passed)
        rows, candidate = rows[rest], candidate[rest]
        reach = [(low[rest], high[rest]) for low, high in reach]
        if len(rows) == 0:
            break
    return E_bounds, tube


def _span(ar, h, a):
    """Exact bounds of ``[0, h] a`` for point intervals ``h > 0`` (NaN stays NaN)."""
    p = ar.mul(h, a)
    lo, hi = ar.lower(p), ar.upper(p)
    return np.minimum(lo, 0) + (lo - lo), np.maximum(hi, 0) + (hi - hi)


def _joined(ar, program, pieces, params):
    """Hull of a program's outputs over the pieces of a box."""
    out = None
    for piece in pieces:
        part = evaluate(program, ar, piece + params)
        out = part if out is None else [ar.hull(a, b) for a, b in zip(out, part)]
    return out


def _true(a):
    return np.asarray(a, dtype=object).astype(bool)


def _to_fraction(x):
    """Exact value of a finite float or exact arb number."""
    if isinstance(x, float):
        return Fraction(x)
    m, e = x.man_exp()
    m, e = int(m), int(e)
    return Fraction(m << e) if e >= 0 else Fraction(m, 1 << -e)


def cell_facts(context, task, arithmetic):
    """:func:`_chunk_facts` with float64 exceptions silenced (overflow and ``inf - inf``
    give infinities and NaN, which the float pass handles)."""
    with np.errstate(all="ignore"):
        return _chunk_facts(context, task, arithmetic)


def _chunk_facts(context, task, arithmetic):
    """Recompute the facts of a chunk of cells.

    Parameters
    ----------
    context : CheckContext
    task : CellTask
    arithmetic : {"float", "ball", "fine", "endpoint"}
        A key of :data:`certify.check._arith.ARITHMETICS`.

    Returns
    -------
    dict
        Arrays over the chunk's cells: ``outside`` (bool), ``n_valid`` (steps that verified,
        a prefix), ``first_unkept`` (index of the first step not kept, ``n_valid`` if none),
        ``crossing_step`` (first verified step whose end box violates a limit, -1),
        ``image`` (0 not known, 1 known), ``escapes`` (bool), ``empty`` (the clipped image
        is empty), ``grid_lo``/``grid_hi`` (int arrays (N, n): the clipped image in units
        of the finest grid, see :func:`grid_bounds`), ``image_lo``/``image_hi`` (object
        arrays (N, n) of Fractions: the clipped image; None where not known),
        ``set_m`` (N, n), ``set_A`` (N, K, n, n), ``set_r_lo``/``set_r_hi`` (N, K, n):
        float arrays of the sets ``m + A [r]`` at the horizon, ``r`` rounded outward,
        ``K = MAX_SETS`` (NaN where the image or a set is not known).
    """
    ar = ARITHMETICS[arithmetic]()
    ar.enter()
    n = context.programs.n
    N = len(task.cells)
    lo_q, hi_q = exact_cells(context.window, task.depth, task.index)
    cell = [ar.rationals(lo_q[:, k], hi_q[:, k]) for k in range(n)]
    outside = _limits_upper_negative(ar, context, cell, N)
    K = task.n_steps
    start = np.concatenate([[0], np.cumsum(K)]).astype(int)
    tube_boxes = task.E.copy()
    moved = [ar.exact(np.zeros(len(task.h))) for _ in range(n)]
    n_valid = np.zeros(N, int)
    first_unkept = np.full(N, -1)
    crossing = np.full(N, -1)
    ids = np.flatnonzero(K > 0)
    X = [ar.take(x, ids) for x in cell]
    X_bounds = ([ar.lower(ar.rationals(lo_q[ids, k], lo_q[ids, k])) for k in range(n)],
                [ar.upper(ar.rationals(hi_q[ids, k], hi_q[ids, k])) for k in range(n)])
    m = _cell_midpoints(lo_q, hi_q)[ids] if task.m0 is None else task.m0[ids]
    m_q = [np.array([Fraction(float(v)) for v in m[:, k]], dtype=object) for k in range(n)]
    r = [ar.rationals(lo_q[ids, k] - m_q[k], hi_q[ids, k] - m_q[k]) for k in range(n)]
    # stored frames (version 2, claims) belong to one set; else one set per frame kind
    kinds = 1 if task.m is not None else len(FRAME_KINDS[context.frames])
    sets = [(np.broadcast_to(np.eye(n), (len(ids), n, n)), r)] * kinds
    image = [None] * n
    image_cells = np.zeros(0, int)
    end_sets = _end_sets(N, n)
    k = 0
    while len(ids):
        s = start[ids] + k
        stored = (None, None) if task.m is None else (task.m[s], task.A[s])
        out = _step(ar, context, X, X_bounds, m, sets, task.h[s], task.E[s], *stored)
        ok, kept, crossed, X_next, E = out.ok, out.kept, out.crossed, out.X_next, out.E
        tube_boxes[s] = out.E_bounds
        moved = [ar.put(a, s, b) for a, b in zip(moved, out.moved)]
        n_valid[ids[ok]] = k + 1
        unkept = ok & ~kept & (first_unkept[ids] < 0)
        first_unkept[ids[unkept]] = k
        hit = ok & crossed & (crossing[ids] < 0)
        crossing[ids[hit]] = k
        finished = ok & (K[ids] == k + 1)
        if finished.any():
            done = np.flatnonzero(finished)
            E_last = [ar.take(e, done) for e in E]
            pieces = [ar.intersect(ar.take(X_next[i], done), E_last[i]) for i in range(n)]
            image = pieces if image[0] is None else [_concat(ar, image[i], pieces[i])
                                                     for i in range(n)]
            image_cells = np.concatenate([image_cells, ids[done]])
            _keep_end_sets(ar, end_sets, ids[done], out.m_next[done],
                           [(A[done], [ar.take(x, done) for x in r]) for A, r in out.sets_next])
        go = ok & (K[ids] > k + 1)
        keep = np.flatnonzero(go)
        X = [ar.take(x, keep) for x in X_next]
        X_bounds = ([ar.lower(x) for x in X], [ar.upper(x) for x in X])
        sets = [(A[keep], [ar.take(x, keep) for x in r]) for A, r in out.sets_next]
        m = out.m_next[keep]
        ids = ids[keep]
        k += 1
    if len(image_cells):
        drift = _drift(ar, context, task, tube_boxes, image_cells, moved)
        image = [ar.intersect(image[i], ar.add(ar.take(cell[i], image_cells), drift[i]))
                 for i in range(n)]
    first_unkept = np.where(first_unkept < 0, n_valid, first_unkept)
    facts = {"outside": outside, "n_valid": n_valid, "first_unkept": first_unkept,
             "crossing_step": crossing}
    facts.update(_images(ar, context, task, tube_boxes, image, image_cells))
    facts.update(end_sets)
    return facts


#: The most sets a frame rule carries (the ``set_*`` facts have room for that many).
MAX_SETS = max(len(kinds) for kinds in FRAME_KINDS.values())


def _end_sets(N, n):
    """Room for the sets at the horizon of N cells (NaN: not known)."""
    return {"set_m": np.full((N, n), np.nan), "set_A": np.full((N, MAX_SETS, n, n), np.nan),
            "set_r_lo": np.full((N, MAX_SETS, n), np.nan),
            "set_r_hi": np.full((N, MAX_SETS, n), np.nan)}


def _keep_end_sets(ar, end_sets, cells, m, sets):
    """Store the last step's sets of `cells` as floats, coordinates rounded outward."""
    end_sets["set_m"][cells] = m
    for k, (A, r) in enumerate(sets):
        end_sets["set_A"][cells, k] = A
        for i, x in enumerate(r):
            lo, hi = _outward_floats(ar, x)
            end_sets["set_r_lo"][cells, k, i] = lo
            end_sets["set_r_hi"][cells, k, i] = hi


def _outward_floats(ar, a):
    """Floats at or below the lower ends of intervals `a` and at or above the upper ends
    (-inf and inf where an end is not finite)."""
    lo, hi = ar.lower(a), ar.upper(a)
    if lo.dtype != object:  # the float pass: its ends are floats
        return np.where(np.isnan(lo), -np.inf, lo), np.where(np.isnan(hi), np.inf, hi)
    return (np.array([float_down(_to_fraction(x)) if x.is_finite() else -np.inf for x in lo]),
            np.array([float_up(_to_fraction(x)) if x.is_finite() else np.inf for x in hi]))


def _cell_midpoints(lo, hi):
    """The floats nearest the midpoints of exact cells (object arrays of Fractions)."""
    return np.array([[float((a + b) / 2) for a, b in zip(row_lo, row_hi)]
                     for row_lo, row_hi in zip(lo, hi)], float).reshape(lo.shape)


def _drift(ar, context, task, tube_boxes, cells, moved):
    """Per cell of `cells`, an enclosure of ``x(T) - x(0)``: the sum of ``h f(E)``.

    Each tube box ``E`` is first cut at the invariant faces where
    :func:`_cut_at_invariant_faces` allows it, then to the window where
    :func:`_cut_to_window` allows it; `moved` holds ``h f(E)`` of the steps'
    own boxes (:class:`StepOutcome`), recomputed here only for the boxes cut. The
    enclosure holds for the trajectories that keep the limits up to the horizon, the
    only ones an image must hold.
    """
    n = context.programs.n
    owner = np.repeat(np.arange(len(task.cells)), task.n_steps)
    E = _cut_at_invariant_faces(context, tube_boxes, owner, len(task.cells))
    E = _cut_to_window(context, E, _tube_pokes(context, task, tube_boxes)[owner])
    cut = np.flatnonzero(np.any(E != tube_boxes, axis=(1, 2)))
    if len(cut):
        box = [ar.box(E[cut, k, 0], E[cut, k, 1]) for k in range(n)]
        f = _joined(ar, context.programs.field, ar.cover(box, ar.pieces.tube),
                    _params(ar, context))
        hh = ar.exact(task.h[cut])
        moved = [ar.put(moved[i], cut, ar.mul(hh, f[i])) for i in range(n)]
    start = np.concatenate([[0], np.cumsum(task.n_steps)]).astype(int)
    steps = task.n_steps[cells]
    drift = [ar.exact(np.zeros(len(cells))) for _ in range(n)]
    for j in range(int(steps.max(initial=0))):
        live = np.flatnonzero(steps > j)
        s = start[cells[live]] + j
        drift = [ar.put(d, live, ar.add(ar.take(d, live), ar.take(m, s)))
                 for d, m in zip(drift, moved)]
    return drift


def _cut_at_invariant_faces(context, tube_boxes, owner, n_cells):
    """Tube boxes cut at the invariant faces wherever no trajectory can be beyond them.

    A trajectory reaches the far side of an invariant face ``x_k = b`` only through a
    point of the hyperplane off the open cross-section of the slab (elsewhere ``f`` is
    Lipschitz on a neighbourhood, and uniqueness keeps a solution that meets the
    hyperplane on it): when every tube box of a cell that reaches ``x_k = b`` lies
    strictly within the cross-section (exact comparisons), the cell's boxes are cut at
    the largest float not beyond ``b``.
    """
    E = tube_boxes.copy()
    window = context.window
    for axis, side in context.invariant_faces:
        inside = np.ones(len(E), bool)
        for j, (a, c) in enumerate(window):
            if j != axis:
                margin = SLAB * (c - a)
                inside &= _float_above(E[:, j, 0], a - margin)
                inside &= _float_below(E[:, j, 1], c + margin)
        a, c = window[axis]
        if side == "lo":
            reaches, bound = ~_float_above(E[:, axis, 0], a), _float_at_most(a)
        else:
            reaches, bound = ~_float_below(E[:, axis, 1], c), -_float_at_most(-c)
        unsure = np.zeros(n_cells, bool)
        np.logical_or.at(unsure, owner[reaches & ~inside], True)
        cut = ~unsure[owner]
        if side == "lo":
            E[cut, axis, 0] = np.maximum(E[cut, axis, 0], bound)
        else:
            E[cut, axis, 1] = np.minimum(E[cut, axis, 1], bound)
    return E


def _tube_pokes(context, task, tube_boxes):
    """Per cell of `task`: some tube box reaches beyond an open face (exact comparisons)."""
    rows = np.repeat(np.arange(len(task.cells)), task.n_steps)
    pokes = np.zeros(len(task.cells), bool)
    for axis, side in context.open_faces:
        a, b = context.window[axis]
        if side == "lo":
            beyond = _float_below(tube_boxes[:, axis, 0], a)
        else:
            beyond = _float_above(tube_boxes[:, axis, 1], b)
        np.logical_or.at(pokes, rows[beyond], True)
    return pokes


def _cut_to_window(context, tube_boxes, escaping):
    """Tube boxes cut to the window (at the largest float not beyond each side), except
    those of cells whose tubes reach beyond an open face (`escaping`, per box) and those
    the window would empty.

    A trajectory that keeps the limits cannot leave the window through a ``limit``,
    ``inflow``, ``invariant`` or ``no-outflow`` face (``_faces``), so when no tube box
    of its cell reaches beyond an open face it lies in the window throughout.
    """
    E = tube_boxes.copy()
    lo = np.array([_float_at_most(a) for a, _ in context.window])
    hi = np.array([-_float_at_most(-c) for _, c in context.window])
    cut_lo, cut_hi = np.maximum(E[:, :, 0], lo), np.minimum(E[:, :, 1], hi)
    cut = ~escaping & np.all(cut_lo <= cut_hi, axis=1)
    E[cut, :, 0], E[cut, :, 1] = cut_lo[cut], cut_hi[cut]
    return E


def _float_at_most(a):
    """The largest float not above the Fraction `a`."""
    v = float(a)
    return v if Fraction(v) <= a else float(np.nextafter(v, -np.inf))


def _concat(ar, a, b):
    if isinstance(a, tuple):
        return np.concatenate([a[0], b[0]]), np.concatenate([a[1], b[1]])
    return np.concatenate([a, b])


def _images(ar, context, task, tube_boxes, image, image_cells):
    """Clip the images at the window, decide escapes, express them on the grid.

    `tube_boxes` are the a-priori boxes of the steps (as verified).
    """
    n = context.programs.n
    N = len(task.cells)
    known = np.zeros(N, int)
    escapes = np.zeros(N, bool)
    empty = np.zeros(N, bool)
    grid_lo = np.zeros((N, n), np.int64)
    grid_hi = np.full((N, n), -1, np.int64)
    if len(image_cells) == 0:
        none = np.full((N, n), None, dtype=object)
        return {"image": known, "escapes": escapes, "empty": empty, "grid_lo": grid_lo,
                "grid_hi": grid_hi, "image_lo": none, "image_hi": none}
    usable = np.ones(len(image_cells), bool)
    for i in range(n):
        usable &= ar.finite(image[i])
    usable &= task.image_known[image_cells]
    sel = np.flatnonzero(usable)
    cells = image_cells[sel]
    lo = np.array([[_to_fraction(x) for x in ar.lower(ar.take(image[i], sel))]
                   for i in range(n)], dtype=object).T.reshape(len(sel), n)
    hi = np.array([[_to_fraction(x) for x in ar.upper(ar.take(image[i], sel))]
                   for i in range(n)], dtype=object).T.reshape(len(sel), n)
    known[cells] = 1
    escapes[cells] = _escapes(ar, context, task, tube_boxes, cells, lo, hi)
    clipped_lo = np.full((N, n), None, dtype=object)
    clipped_hi = np.full((N, n), None, dtype=object)
    for c, row_lo, row_hi in zip(cells, lo, hi):
        for i, (a, b) in enumerate(context.window):
            row_lo[i] = max(row_lo[i], a)
            row_hi[i] = min(row_hi[i], b)
        clipped_lo[c], clipped_hi[c] = row_lo, row_hi
        if any(x > y for x, y in zip(row_lo, row_hi)):
            empty[c] = True
            continue
        grid_lo[c], grid_hi[c] = grid_bounds(context.window, context.grid_depth, row_lo, row_hi)
    return {"image": known, "escapes": escapes, "empty": empty, "grid_lo": grid_lo,
            "grid_hi": grid_hi, "image_lo": clipped_lo, "image_hi": clipped_hi}


def grid_bounds(window, depth, lo, hi):
    """The leaves a box inside the window needs as successors, on the finest grid.

    Along an axis where the box is thick (``lo < hi``) a leaf is needed when it overlaps
    the open range; along a flat axis, when it meets the point. The leaves so named cover
    the box: every point of the box's relative interior lies in a leaf, each such leaf is
    named, and their union is closed.

    Returns
    -------
    first, last : ndarray of int, shape (n,)
        The grid cell ``j`` of axis ``k`` (``[j, j + 1]`` in units of ``2^-depth`` of the
        side) is needed exactly when ``first[k] <= j + 1`` and ``j <= last[k]``. With
        ``u`` the box's sides relative to the window (in ``[0, 1]``) and ``s = 2^depth``:
        thick axes have ``first = floor(u_lo s) + 1``, ``last = ceil(u_hi s) - 1``; flat
        axes ``first = ceil(u_lo s)``, ``last = floor(u_hi s)``.
    """
    first, last = [], []
    for x, y, (an, ad, wn, wd) in zip(lo, hi, _grid_units(tuple(window), depth)):
        x = x if type(x) is Fraction else Fraction(x)
        y = y if type(y) is Fraction else Fraction(y)
        # u = (x - a) / (b - a) * 2^depth as one integer quotient (no gcd on the way)
        lo_num = (x.numerator * ad - an * x.denominator) * wn
        lo_den = x.denominator * wd
        hi_num = (y.numerator * ad - an * y.denominator) * wn
        hi_den = y.denominator * wd
        if x < y:
            first.append(lo_num // lo_den + 1)
            last.append(-(-hi_num // hi_den) - 1)
        else:
            first.append(-(-lo_num // lo_den))
            last.append(hi_num // hi_den)
    return np.array(first, np.int64), np.array(last, np.int64)


@lru_cache(maxsize=8)
def _grid_units(window, depth):
    """Per axis ``(a.n, a.d, W.n, W.d)`` with ``W = 2^depth / ((b - a) a.d)`` (exact), so
    that ``(x - a) / (b - a) 2^depth = (x.n a.d - a.n x.d) W.n / (x.d W.d)`` for ``x = x.n /
    x.d``; denominators are positive."""
    out = []
    for a, b in window:
        a = Fraction(a)
        unit = Fraction(1 << depth) / ((Fraction(b) - a) * a.denominator)
        out.append((a.numerator, a.denominator, unit.numerator, unit.denominator))
    return out


def _escapes(ar, context, task, tube_boxes, cells, lo, hi):
    """Whether a part of each image outside the window may hold a trajectory in K.

    A trajectory that stays within the limits can leave the window only through an
    open face (a ``limit`` face violates a limit at every point, an ``inflow`` face
    pushes back every point within the limits, no solution leaves through an
    ``invariant`` face, none within the limits through a ``no-outflow`` one). If no
    a-priori box of the cell reaches
    beyond an open face, no such trajectory left the window and the parts outside it
    are harmless. Otherwise every part beyond a face must violate a limit (in one
    dimension a trajectory beyond the window lies beyond the open face it left by, so
    only open faces are checked there).
    """
    window = context.window
    n = len(window)
    out = np.zeros(len(cells), bool)
    if not context.open_faces:
        return out
    check = _tube_pokes(context, task, tube_boxes)[cells]
    if not check.any():
        return out
    faces = [(axis, side) for axis in range(n) for side in ("lo", "hi")]
    if n == 1:
        faces = list(context.open_faces)
    for axis, side in faces:
        a, b = window[axis]
        if side == "lo":
            pokes = check & np.array([row[axis] < a for row in lo], bool)
        else:
            pokes = check & np.array([row[axis] > b for row in hi], bool)
        sel = np.flatnonzero(pokes)
        if len(sel) == 0:
            continue
        slab_lo, slab_hi = lo[sel].copy(), hi[sel].copy()
        if side == "lo":
            slab_hi[:, axis] = a
        else:
            slab_lo[:, axis] = b
        box = [ar.rationals(slab_lo[:, i], slab_hi[:, i]) for i in range(n)]
        harmless = _limits_upper_negative(ar, context, box, len(sel))
        out[sel[~harmless]] = True
    return out


def _float_below(x, a):
    """Exact ``x < a`` for a float array `x` and a Fraction `a`."""
    v = float(a)
    if Fraction(v) == a:
        return x < v
    below = v if Fraction(v) < a else float(np.nextafter(v, -np.inf))
    return x <= below


def _float_above(x, b):
    """Exact ``x > b`` for a float array `x` and a Fraction `b`."""
    v = float(b)
    if Fraction(v) == b:
        return x > v
    above = v if Fraction(v) > b else float(np.nextafter(v, np.inf))
    return x >= above
