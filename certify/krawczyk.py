"""Every zero of a system in a box: subdivision, exclusion and the Krawczyk test.

A *system* is ``h(x, p) = 0`` with ``m`` equations in ``n`` unknowns ``x`` and
parameters ``p`` that range over a box (an interval parameter means "for every value").
The search splits the box, discards pieces where some ``h_i`` certainly has no zero
(exclusion), and proves zeros with the Krawczyk operator (Krawczyk 1969; Moore 1977,
both (from memory))::

    K(X) = m - C h(m, p^) - (C J_p(m, P)) (P - p^) + (I - C J_x(X, P)) (X - m)

with ``m`` the midpoint of the box ``X``, ``p^`` the midpoint of the parameter box ``P``
and ``C`` any float matrix (here an approximate inverse of the midpoint of ``J_x``).
For every fixed ``p`` in ``P`` every zero of ``h(., p)`` in ``X`` lies in ``K(X)`` (mean
value theorem row by row), and ``K(X)`` inside the interior of ``X`` proves that
``h(., p)`` has exactly one zero in ``X``. The parameter term is the mean-value form in
``p``: it keeps the enclosure of a zero that moves with ``p`` close to the set it sweeps.

Everything runs on batches of boxes with the outward-rounded kernels of
:mod:`certify.interval`; floats serve only to choose midpoints, ``C`` and the Newton
guesses that the test then proves or rejects.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import sympy

from . import interval as iv
from .program import compile_program

__all__ = ["RootSystem", "RootSearch", "find_roots", "krawczyk", "evaluate", "split_boxes",
           "merge_boxes"]

#: Relative widening of a box before the Krawczyk test, so that a zero on a face is inside.
INFLATION = 1.0 / 64
#: Newton iterations from each guess.
NEWTON_STEPS = 30
#: Rounds of epsilon-inflation around a Newton guess.
INFLATION_ROUNDS = 12
#: Rounds of growing a proven box (doubling) into a larger region of uniqueness.
GROWTH_ROUNDS = 20
#: Most pieces of the parameter box when a moving zero is proven piece by piece.
MAX_PIECES = 64
#: Most failed retries (symbolic preconditioning, pieces) in one search; each compiles.
MAX_RETRIES = 8
#: Most Newton guesses verified in one level (more only when zeros are not isolated).
MAX_GUESSES = 64


@dataclass(frozen=True)
class RootSystem:
    """A system ``h(x, p) = 0`` compiled for interval and float evaluation.

    Attributes
    ----------
    values : certify.program.Program
        ``h`` (m outputs); inputs are the n unknowns followed by the parameters.
    jacobian : certify.program.Program or None
        ``dh/dx`` row-major (``m * n`` outputs); None when no derivative exists
        (then only exclusion is possible).
    param_jacobian : certify.program.Program or None
        ``dh/dp`` for the interval parameters, row-major (``m * len(interval_params)``
        outputs); None when no parameter is an interval.
    params : ndarray, shape (n_params, 2)
        Float enclosures of the parameter boxes, in input order.
    interval_params : tuple of int
        Positions (in `params`) of the parameters that are intervals.
    exprs : tuple of sympy.Expr
        ``h`` as expressions (empty when unknown); with `inputs` they let a zero that the
        plain test cannot prove be retried with the preconditioner applied symbolically.
    inputs : tuple of sympy.Symbol
        The program inputs: the unknowns, then the parameters.
    """

    values: object
    jacobian: object
    param_jacobian: object
    params: np.ndarray
    interval_params: tuple
    exprs: tuple = ()
    inputs: tuple = ()

    @property
    def n_params(self):
        """int: number of parameter inputs."""
        return len(self.params)

    def point_params(self):
        """ndarray, shape (n_params,): the float midpoints of the parameter boxes."""
        return 0.5 * (self.params[:, 0] + self.params[:, 1]) if self.n_params else np.zeros(0)


@dataclass(frozen=True)
class RootSearch:
    """The result of :func:`find_roots`.

    Attributes
    ----------
    lo, hi : ndarray, shape (k, n)
        Box ``i`` holds exactly one zero of ``h(., p)`` for every ``p`` in the parameter
        box (with a Jacobian) and meets the search box; distinct boxes hold distinct zeros.
    unresolved_lo, unresolved_hi : ndarray, shape (u, n)
        Pieces of the search box that could not be cleared; every zero of the search box
        that is not in a box of ``lo, hi`` lies in one of them.
    n_boxes : int
        Number of boxes examined.
    """

    lo: np.ndarray
    hi: np.ndarray
    unresolved_lo: np.ndarray
    unresolved_hi: np.ndarray
    n_boxes: int

    @property
    def complete(self):
        """bool: True when the search box outside the reported boxes is proven free of zeros."""
        return len(self.unresolved_lo) == 0


def evaluate(program, lo, hi, params):
    """Interval evaluation of a program on boxes with parameter boxes appended.

    Parameters
    ----------
    program : certify.program.Program
    lo, hi : ndarray, shape (N, n)
    params : ndarray, shape (n_params, 2) or (N, n_params, 2)
        The same parameter boxes for every row, or one set per row.

    Returns
    -------
    lo, hi : ndarray, shape (N, n_outputs)
        Outward-rounded; NaN marks unusable rows.
    """
    count = len(lo)
    params = np.broadcast_to(params, (count,) + np.shape(params)[-2:])
    cols_lo = list(lo.T) + list(params[:, :, 0].T)
    cols_hi = list(hi.T) + list(params[:, :, 1].T)
    out = program.interval_columns(cols_lo, cols_hi)
    return (np.stack([o[0] for o in out], -1).reshape(count, len(out)),
            np.stack([o[1] for o in out], -1).reshape(count, len(out)))


def _sum_last(lo, hi):
    """Interval sum over the last axis (left fold)."""
    slo, shi = lo[..., 0], hi[..., 0]
    for k in range(1, lo.shape[-1]):
        slo, shi = iv.add(slo, shi, lo[..., k], hi[..., k])
    return slo, shi


def _matvec(a, blo, bhi):
    """Float matrices ``a`` (N, r, c) times interval vectors ``b`` (N, c)."""
    plo, phi = iv.mul(a, a, blo[:, None, :], bhi[:, None, :])
    return _sum_last(plo, phi)


def _preconditioner(jlo, jhi):
    """Approximate inverses of the midpoint matrices (identity where unusable)."""
    mid = 0.5 * jlo + 0.5 * jhi
    bad = ~np.isfinite(mid).all(axis=(1, 2))
    mid[bad] = np.eye(mid.shape[1])
    return np.linalg.pinv(mid)


def _pieces(lo, hi, params, interval_params, levels):
    """Cut boxes and the interval parameters into equal pieces.

    Parameters
    ----------
    lo, hi : ndarray, shape (N, n)
    params : ndarray, shape (n_params, 2)
    interval_params : sequence of int
        Positions of the parameters that are cut too.
    levels : int
        Halvings of every cut side.

    Returns
    -------
    lo, hi : ndarray, shape (N * k, n)
        The pieces, ``k = 2^(levels (n + len(interval_params)))`` consecutive per box.
    params : ndarray, shape (N * k, n_params, 2)
        The parameter boxes of each piece.
    """
    count, n = lo.shape
    which = list(interval_params)
    blo = np.concatenate([lo, np.tile(params[which, 0], (count, 1))], 1)
    bhi = np.concatenate([hi, np.tile(params[which, 1], (count, 1))], 1)
    for _ in range(levels):
        blo, bhi = split_boxes(blo, bhi)
    out = np.tile(params, (len(blo), 1, 1))
    out[:, which, 0], out[:, which, 1] = blo[:, n:], bhi[:, n:]
    return blo[:, :n], bhi[:, :n], out


def _jacobian(system, lo, hi, levels):
    """Enclose ``J_x`` over boxes times the parameter box as the hull over pieces.

    The box and the interval parameters are halved ``levels`` times along every side;
    the hull of the enclosures over the pieces encloses the Jacobian over the whole box
    and is tighter than one evaluation (less dependency in each piece).
    """
    count = len(lo)
    if levels == 0:
        return evaluate(system.jacobian, lo, hi, system.params)
    plo, phi, params = _pieces(lo, hi, system.params, system.interval_params, levels)
    jlo, jhi = evaluate(system.jacobian, plo, phi, params)
    jlo = jlo.reshape(count, -1, jlo.shape[1])
    jhi = jhi.reshape(count, -1, jhi.shape[1])
    return jlo.min(axis=1), jhi.max(axis=1)


def _levels(system, n):
    """Halvings for :func:`_pieces` that keep the pieces per box at most 256."""
    d = n + len(system.interval_params)
    return 2 if d <= 4 else 1 if d <= 8 else 0


def krawczyk(system, lo, hi, levels=0):
    """The Krawczyk operator ``K(X)`` on a batch of boxes.

    Parameters
    ----------
    system : RootSystem
        A square system (``m == n``) with a Jacobian.
    lo, hi : ndarray, shape (N, n)
        The boxes ``X``.
    levels : int
        Halvings of ``X`` (and of the interval parameters) for a tighter enclosure of
        the Jacobian: ``2^(levels d)`` evaluations per box, ``d`` the halved dimensions.

    Returns
    -------
    lo, hi : ndarray, shape (N, n)
        ``K(X)``; rows with a NaN or infinite bound are unusable.

    Notes
    -----
    For every parameter value in the box, every zero in ``X`` lies in ``K(X)``; and
    ``K(X)`` inside the interior of ``X`` proves exactly one zero in ``X``.
    """
    count, n = lo.shape
    if count == 0:
        return np.empty((0, n)), np.empty((0, n))
    m = np.clip(0.5 * lo + 0.5 * hi, lo, hi)
    params = system.params
    p_hat = system.point_params()
    fixed = np.stack([p_hat, p_hat], 1) if system.n_params else params
    jlo, jhi = _jacobian(system, lo, hi, levels)
    jlo, jhi = jlo.reshape(count, n, n), jhi.reshape(count, n, n)
    c = _preconditioner(jlo, jhi)
    flo, fhi = evaluate(system.values, m, m, fixed)
    cflo, cfhi = _matvec(c, flo, fhi)
    if system.param_jacobian is not None:
        k = len(system.interval_params)
        plo, phi = evaluate(system.param_jacobian, m, m, params)
        plo, phi = plo.reshape(count, n, k), phi.reshape(count, n, k)
        cplo, cphi = _cp_product(c, plo, phi)
        which = list(system.interval_params)
        dplo, dphi = iv.sub(params[which, 0], params[which, 1], p_hat[which], p_hat[which])
        tlo, thi = _sum_last(*iv.mul(cplo, cphi, dplo[None, None, :], dphi[None, None, :]))
        cflo, cfhi = iv.add(cflo, cfhi, tlo, thi)
    cjlo, cjhi = _cp_product(c, jlo, jhi)
    eye = np.eye(n)[None]
    mlo, mhi = iv.sub(eye, eye, cjlo, cjhi)
    dlo, dhi = iv.sub(lo, hi, m, m)
    rlo, rhi = _sum_last(*iv.mul(mlo, mhi, dlo[:, None, :], dhi[:, None, :]))
    klo, khi = iv.sub(m, m, cflo, cfhi)
    return iv.add(klo, khi, rlo, rhi)


def _cp_product(c, blo, bhi):
    """Float matrices ``c`` (N, r, s) times interval matrices ``b`` (N, s, t)."""
    plo, phi = iv.mul(c[:, :, :, None], c[:, :, :, None], blo[:, None, :, :], bhi[:, None, :, :])
    return _sum_last(np.moveaxis(plo, 2, 3), np.moveaxis(phi, 2, 3))


def _proven_inside(klo, khi, lo, hi):
    """Rows where ``K`` is usable and lies in the interior of the box."""
    finite = np.isfinite(klo).all(1) & np.isfinite(khi).all(1)
    return finite & (klo > lo).all(1) & (khi < hi).all(1)


def _tighten(system, lo, hi, rounds=6):
    """Shrink proven boxes by ``X := X & K(X)`` (every zero in X stays inside)."""
    for _ in range(rounds):
        klo, khi = krawczyk(system, lo, hi, _levels(system, lo.shape[1]))
        usable = (np.isfinite(klo) & np.isfinite(khi)).all(1, keepdims=True)
        lo = np.where(usable, np.maximum(lo, klo), lo)
        hi = np.where(usable, np.minimum(hi, khi), hi)
    return lo, hi


def _newton(system, x):
    """Float Newton iterations from guesses ``x`` (N, n).

    Returns the points and a mask of those that converged to a zero with a
    well-conditioned Jacobian (only those can pass the Krawczyk test).
    """
    p = system.point_params()
    n = x.shape[1]
    step = np.full_like(x, np.inf)
    good = np.ones(len(x), bool)
    for _ in range(NEWTON_STEPS):
        f = system.values.point_at(x, p)
        jac = system.jacobian.point_at(x, p).reshape(len(x), n, n)
        good = np.isfinite(f).all(1) & np.isfinite(jac).all(axis=(1, 2))
        f[~good] = 0.0
        jac[~good] = np.eye(n)
        step = np.einsum("nij,nj->ni", np.linalg.pinv(jac), f)
        step[~good] = np.inf
        x = x - np.where(np.isfinite(step), step, 0.0)
        if not (np.abs(step) > 1e-13 * (np.abs(x) + 1.0)).any():
            break
    converged = (np.abs(step) <= 1e-9 * (np.abs(x) + 1.0)).all(1)
    conditioned = good & (np.linalg.cond(jac) < 1e10)
    return x, np.isfinite(x).all(1) & converged & conditioned


def _inflate_and_test(system, points, scale):
    """Epsilon-inflation (Rump 1983 (from memory)) around float guesses: ``X := K(X)`` widened.

    Returns
    -------
    done : ndarray of bool, shape (k,)
        Rows where ``K(X)`` landed inside the interior of ``X``.
    lo, hi : ndarray, shape (k, n)
        The last boxes ``X`` (proven boxes where `done`).
    """
    tiny = 1e-10 * (np.abs(points) + scale)
    lo, hi = points - tiny, points + tiny
    live = np.ones(len(points), bool)
    done = np.zeros(len(points), bool)
    levels = _levels(system, lo.shape[1])
    for _ in range(INFLATION_ROUNDS):
        todo = np.flatnonzero(live)
        if not len(todo):
            break
        klo, khi = krawczyk(system, lo[todo], hi[todo], levels)
        ok = _proven_inside(klo, khi, lo[todo], hi[todo])
        done[todo[ok]] = True
        centre, radius = 0.5 * (klo + khi), 0.5 * (khi - klo)
        radius = 1.5 * radius + 1e-10 * (np.abs(centre) + scale)
        usable = np.isfinite(centre).all(1) & np.isfinite(radius).all(1)
        live[todo[ok | ~usable]] = False
        step = ~ok & usable
        lo[todo[step]], hi[todo[step]] = centre[step] - radius[step], centre[step] + radius[step]
    return done, lo, hi


def _preconditioned(system, point):
    """The system ``C h`` with ``C ~ J(point)^-1`` multiplied out symbolically.

    Expanding ``C J`` (and ``C dh/dp``) lets terms cancel that interval evaluation of
    ``J`` entry by entry keeps apart: e.g. ``x^2 - x^2`` across two entries, or a
    parameter that drops out of a combination of rows. ``C`` enters as exact rationals
    (the binary values of the floats), so ``C h`` has the same zeros as ``h`` whenever
    ``C`` is invertible, which a successful Krawczyk test on ``C h`` proves.
    """
    n = len(point)
    jac = system.jacobian.point_at(point[None], system.point_params()).reshape(n, n)
    c = np.linalg.pinv(jac)
    inputs = system.inputs
    matrix = sympy.Matrix(n, n, [sympy.Rational(float(v)) for v in c.ravel()])
    rows = matrix * sympy.Matrix(system.exprs)
    unknowns = sympy.Matrix(inputs[:n])
    jac_exprs = [sympy.expand(e) for e in rows.jacobian(unknowns)]
    param_jacobian = None
    if system.interval_params:
        wrt = sympy.Matrix([inputs[n + k] for k in system.interval_params])
        param_jacobian = compile_program([sympy.expand(e) for e in rows.jacobian(wrt)], inputs)
    return replace(system, values=compile_program(list(rows), inputs),
                   jacobian=compile_program(jac_exprs, inputs), param_jacobian=param_jacobian)


def _prove_one(system, point, scale):
    """Prove one zero near `point`: plain test, then symbolically preconditioned.

    Returns
    -------
    (RootSystem, ndarray, ndarray) or None
        The system whose Krawczyk test succeeded and the proven box ``lo, hi`` (1, n).
    """
    ok, lo, hi = _inflate_and_test(system, point[None], scale)
    if ok[0]:
        return system, lo, hi
    if not (system.exprs and system.interval_params):
        return None
    sub = _preconditioned(system, point)
    ok, lo, hi = _inflate_and_test(sub, point[None], scale)
    return (sub, lo, hi) if ok[0] else None


def _prove_by_pieces(system, point, scale):
    """Prove a zero that moves far as the interval parameters vary.

    The parameter box is cut into pieces (2, 4, then 8 per interval parameter, at most
    :data:`MAX_PIECES` in all); for each piece a zero is proven near the Newton guess
    of that piece. The hull ``H`` of their boxes holds a zero for every parameter value,
    and it is the only one when the Jacobian over ``H`` and the whole parameter box is
    regular (:func:`_regular`): then the mean value theorem, row by row, makes ``h``
    injective on ``H``.

    Returns
    -------
    (RootSystem, ndarray, ndarray) or None
        The system that proved regularity and the hull ``lo, hi`` (1, n).
    """
    which = list(system.interval_params)
    for level in (1, 2, 3):
        if 2 ** (level * len(which)) > MAX_PIECES:
            break
        plo, phi = system.params[which, 0][None], system.params[which, 1][None]
        for _ in range(level):
            plo, phi = split_boxes(plo, phi)
        boxes = []
        for a, b in zip(plo, phi):
            params = system.params.copy()
            params[which, 0], params[which, 1] = a, b
            piece = replace(system, params=params)
            guess, ok = _newton(piece, point[None])
            proof = _prove_one(piece, guess[0], scale) if ok[0] else None
            if proof is None:
                break
            boxes.append(np.concatenate(_tighten(*proof)))
        else:
            lo = np.min([b[:1] for b in boxes], axis=0)
            hi = np.max([b[1:] for b in boxes], axis=0)
            for candidate in (system, _preconditioned(system, 0.5 * (lo[0] + hi[0]))):
                if _regular(candidate, lo, hi)[0]:
                    return candidate, lo, hi
    return None


def _regular(system, lo, hi):
    """Rows where every matrix of the interval Jacobian over the box is invertible.

    With ``C`` an approximate inverse of the midpoint matrix and ``B`` the entrywise
    magnitude bound of ``I - C J(X, P)``, a positive vector ``v`` with ``B v < v`` proves
    the spectral radius of ``B`` below 1 (Collatz-Wielandt), hence ``C A`` invertible
    for every ``A`` in the enclosure. ``v`` comes from float power iteration; the
    inequality is checked with outward rounding.
    """
    count, n = lo.shape
    jlo, jhi = _jacobian(system, lo, hi, _levels(system, n))
    jlo, jhi = jlo.reshape(count, n, n), jhi.reshape(count, n, n)
    c = _preconditioner(jlo, jhi)
    cjlo, cjhi = _cp_product(c, jlo, jhi)
    eye = np.eye(n)[None]
    mlo, mhi = iv.sub(eye, eye, cjlo, cjhi)
    mag = np.maximum(np.abs(mlo), np.abs(mhi))
    usable = np.isfinite(mag).all(axis=(1, 2))
    mag[~usable] = 0.0
    v = np.ones((count, n))
    for _ in range(40):
        v = np.einsum("nij,nj->ni", mag, v) + 1e-3 * v.max(axis=1, keepdims=True)
        v /= v.max(axis=1, keepdims=True)
    _, bound = _sum_last(*iv.mul(mag, mag, v[:, None, :], v[:, None, :]))
    return usable & (bound < v).all(1)


def _verify(system, points, scale, registry):
    """Prove zeros near float guesses.

    Every guess is tried with the plain Krawczyk test. With interval parameters, guesses
    that fail are retried one at a time with a symbolically preconditioned system
    (:func:`_preconditioned`) and by pieces of the parameter box
    (:func:`_prove_by_pieces`); guesses that still fail are remembered in `registry`
    and not retried, and retries stop after :data:`MAX_RETRIES` failures.

    Returns
    -------
    enc_lo, enc_hi, reg_lo, reg_hi : ndarray, shape (k, n)
        Tight enclosures of proven zeros and larger boxes where each is the only zero.
    """
    done, lo, hi = _inflate_and_test(system, points, scale)
    enc = [_tighten(system, lo[done], hi[done])]
    reg = [_grow(system, lo[done], hi[done], scale)]
    retry = np.flatnonzero(~done) if system.exprs and system.interval_params else []
    for k in retry[:max(0, MAX_RETRIES - len(registry.failed))]:
        proof = _prove_one(system, points[k], scale)
        if proof is not None:
            enc.append(_tighten(*proof))
        else:
            proof = _prove_by_pieces(system, points[k], scale)
            if proof is not None:
                enc.append(proof[1:])
        if proof is None:
            registry.failed.append(points[k])
        else:
            reg.append(_grow(*proof, scale))
    return tuple(np.concatenate([part[i] for part in parts])
                 for parts in (enc, reg) for i in (0, 1))


def _grow(system, lo, hi, scale):
    """Enlarge boxes that hold one proven zero while the Jacobian stays regular.

    A box whose interval Jacobian is regular (:func:`_regular`) holds at most one zero
    for each parameter value, so a larger such box around a proven one still holds only
    that zero. Each round doubles every side, or failing that one side at a time, so
    that regions stretch along the directions where the zero is well isolated.
    """
    lo, hi = lo.copy(), hi.copy()
    n = lo.shape[1]
    centre = 0.5 * (lo + hi)
    radius = np.maximum(0.5 * (hi - lo), 1e-4 * scale)
    growth = np.vstack([np.full(n, 2.0), 1.0 + np.eye(n)])
    live = np.ones(len(lo), bool)
    for _ in range(GROWTH_ROUNDS):
        waiting = live.copy()
        for factor in growth:
            todo = np.flatnonzero(waiting)
            if not len(todo):
                break
            wider = np.minimum(factor * radius[todo], scale)
            tlo = np.minimum(centre[todo] - wider, lo[todo])
            thi = np.maximum(centre[todo] + wider, hi[todo])
            ok = _regular(system, tlo, thi) & (wider > radius[todo]).any(1)
            lo[todo[ok]], hi[todo[ok]] = tlo[ok], thi[ok]
            radius[todo[ok]] = wider[ok]
            waiting[todo[ok]] = False
        live &= ~waiting
    return lo, hi


def _inflate(lo, hi):
    """Widen boxes by :data:`INFLATION` of their width (and a little absolute room)."""
    pad = INFLATION * (hi - lo) + 1e-12 * (np.abs(lo) + np.abs(hi)) + 1e-300
    return lo - pad, hi + pad


def split_boxes(lo, hi):
    """Halve every side of each box.

    Parameters
    ----------
    lo, hi : ndarray, shape (N, n)

    Returns
    -------
    lo, hi : ndarray, shape (N * 2^n, n)
        The children, ``2^n`` consecutive per box; they cover the box (the shared
        midpoint is the same float on both sides).
    """
    n = lo.shape[1]
    mid = 0.5 * lo + 0.5 * hi
    corners = np.array(np.meshgrid(*[[0, 1]] * n, indexing="ij")).reshape(n, -1).T
    clo = np.where(corners[None] == 0, lo[:, None], mid[:, None]).reshape(-1, n)
    chi = np.where(corners[None] == 0, mid[:, None], hi[:, None]).reshape(-1, n)
    return clo, chi


class _Registry:
    """Proven zeros: tight enclosures and the regions where each is the only zero.

    ``unique(lo, hi)`` tells, per box, whether it can hold at most one zero (used to
    merge two proven zeros whose enclosures overlap).
    """

    def __init__(self, n, unique):
        self.unique = unique
        self.enc_lo = np.empty((0, n))
        self.enc_hi = np.empty((0, n))
        self.reg_lo = np.empty((0, n))
        self.reg_hi = np.empty((0, n))
        self.reg_root = np.empty(0, int)
        self.doubtful = []
        self.failed = []

    def covers(self, lo, hi):
        """Boxes inside some region (any zero there is a known one)."""
        if not len(self.reg_lo) or not len(lo):
            return np.zeros(len(lo), bool)
        inside = (lo[:, None] >= self.reg_lo[None]) & (hi[:, None] <= self.reg_hi[None])
        return inside.all(2).any(1)

    def add(self, enc_lo, enc_hi, reg_lo, reg_hi):
        """Register proven zeros, merging those that are provably the same zero."""
        for elo, ehi, rlo, rhi in zip(enc_lo, enc_hi, reg_lo, reg_hi):
            meets = ((self.enc_lo <= ehi) & (self.enc_hi >= elo)).all(1)
            target = None
            for r in np.flatnonzero(meets):
                in_old = ((elo >= self.reg_lo) & (ehi <= self.reg_hi)).all(1) & (self.reg_root == r)
                old_in_new = (self.enc_lo[r] >= rlo).all() and (self.enc_hi[r] <= rhi).all()
                hull_lo = np.minimum(elo, self.enc_lo[r])
                hull_hi = np.maximum(ehi, self.enc_hi[r])
                if in_old.any() or old_in_new or self.unique(hull_lo[None], hull_hi[None])[0]:
                    target = r
                else:
                    # overlapping enclosures of zeros not proven equal: claim neither
                    self.doubtful.append((hull_lo, hull_hi))
                    self.enc_lo[r], self.enc_hi[r] = np.nan, np.nan
                    target = -1
                break
            if target is None:
                target = len(self.enc_lo)
                self.enc_lo = np.vstack([self.enc_lo, elo])
                self.enc_hi = np.vstack([self.enc_hi, ehi])
            elif target >= 0:
                self.enc_lo[target] = np.maximum(self.enc_lo[target], elo)
                self.enc_hi[target] = np.minimum(self.enc_hi[target], ehi)
            self.reg_lo = np.vstack([self.reg_lo, rlo])
            self.reg_hi = np.vstack([self.reg_hi, rhi])
            self.reg_root = np.append(self.reg_root, target)


def merge_boxes(lo, hi):
    """Join boxes whose union is a box: equal sides but one, touching along that one.

    Parameters
    ----------
    lo, hi : ndarray, shape (N, n)

    Returns
    -------
    lo, hi : ndarray, shape (M, n)
        ``M <= N`` boxes with exactly the same union (so any property proven on each
        input box holds on each output box).
    """
    n = lo.shape[1]
    for axis in range(n):
        if len(lo) < 2:
            break
        others = [k for k in range(n) if k != axis]
        keys = [lo[:, axis]] + [hi[:, k] for k in others[::-1]] + [lo[:, k] for k in others[::-1]]
        order = np.lexsort(keys)
        lo, hi = lo[order], hi[order]
        out_lo, out_hi = [lo[0].copy()], [hi[0].copy()]
        for a, b in zip(lo[1:], hi[1:]):
            last_lo, last_hi = out_lo[-1], out_hi[-1]
            if (np.array_equal(a[others], last_lo[others]) and np.array_equal(b[others], last_hi[others])
                    and a[axis] <= last_hi[axis]):
                last_hi[axis] = max(last_hi[axis], b[axis])
            else:
                out_lo.append(a.copy())
                out_hi.append(b.copy())
        lo, hi = np.array(out_lo), np.array(out_hi)
    return lo, hi


def find_roots(system, lo, hi, *, max_depth=12, max_boxes=20_000):
    """Enclose every zero of a system in a box.

    Parameters
    ----------
    system : RootSystem
    lo, hi : ndarray, shape (n,)
        The search box.
    max_depth : int
        Deepest level of halving of the search box (a box of depth ``d`` has sides of
        ``2^-d`` of the search box).
    max_boxes : int
        Largest number of boxes in one level; beyond it the search stops and lists the
        boxes left.

    Returns
    -------
    RootSearch

    Notes
    -----
    Square systems with a Jacobian use the Krawczyk test on each box (widened by
    :data:`INFLATION`, so that zeros on a face or on the edge of the search box are
    found) and on boxes around float Newton guesses (epsilon-inflation), then grow each
    proven box into a larger region of uniqueness: boxes inside such a region are
    settled. A reported box may reach a little beyond the search box when its zero lies
    on the edge. Other systems use exclusion only: the boxes left at ``max_depth`` are
    the result's unresolved boxes.
    """
    lo = np.asarray(lo, float)
    hi = np.asarray(hi, float)
    n = len(lo)
    scale = np.maximum(hi - lo, 1e-300)
    square = system.jacobian is not None and system.values.n_outputs == n
    registry = _Registry(n, lambda a, b: _regular(system, a, b))
    box_lo, box_hi = lo[None].copy(), hi[None].copy()
    leftover_lo, leftover_hi = np.empty((0, n)), np.empty((0, n))
    n_boxes = 0
    for depth in range(max_depth + 1):
        n_boxes += len(box_lo)
        vlo, vhi = evaluate(system.values, box_lo, box_hi, system.params)
        keep = ~((vlo > 0) | (vhi < 0)).any(1) & ~registry.covers(box_lo, box_hi)
        box_lo, box_hi = box_lo[keep], box_hi[keep]
        if square and len(box_lo):
            box_lo, box_hi = _krawczyk_round(system, registry, box_lo, box_hi, scale)
        if not len(box_lo):
            break
        if depth == max_depth or len(box_lo) * 2 ** n > max_boxes:
            leftover_lo, leftover_hi = box_lo, box_hi
            break
        box_lo, box_hi = split_boxes(box_lo, box_hi)
    enc_lo, enc_hi = registry.enc_lo, registry.enc_hi
    real = np.isfinite(enc_lo).all(1) & ((enc_lo <= hi) & (enc_hi >= lo)).all(1)
    if registry.doubtful:
        leftover_lo = np.vstack([leftover_lo] + [d[0][None] for d in registry.doubtful])
        leftover_hi = np.vstack([leftover_hi] + [d[1][None] for d in registry.doubtful])
    if len(leftover_lo):
        leftover_lo, leftover_hi = merge_boxes(leftover_lo, leftover_hi)
    order = np.lexsort(enc_lo[real].T[::-1]) if real.any() else np.zeros(0, int)
    return RootSearch(lo=enc_lo[real][order], hi=enc_hi[real][order],
                      unresolved_lo=leftover_lo, unresolved_hi=leftover_hi, n_boxes=n_boxes)


def _krawczyk_round(system, registry, box_lo, box_hi, scale):
    """Prove or clear boxes with the Krawczyk test and with Newton guesses."""
    wide_lo, wide_hi = _inflate(box_lo, box_hi)
    klo, khi = krawczyk(system, wide_lo, wide_hi)
    usable = np.isfinite(klo).all(1) & np.isfinite(khi).all(1)
    empty = usable & ((klo > box_hi) | (khi < box_lo)).any(1)
    proven = _proven_inside(klo, khi, wide_lo, wide_hi)
    if proven.any():
        enc_lo, enc_hi = _tighten(system, np.maximum(klo[proven], wide_lo[proven]),
                                  np.minimum(khi[proven], wide_hi[proven]))
        registry.add(enc_lo, enc_hi, wide_lo[proven], wide_hi[proven])
    box_lo, box_hi = box_lo[~empty & ~proven], box_hi[~empty & ~proven]
    if not len(box_lo):
        return box_lo, box_hi
    guesses, ok = _newton(system, 0.5 * box_lo + 0.5 * box_hi)
    width = box_hi - box_lo
    near = ok & ((guesses >= box_lo - width) & (guesses <= box_hi + width)).all(1)
    guesses = guesses[near]
    if len(guesses):
        rounded = np.round(guesses / scale, 7)
        _, first = np.unique(rounded, axis=0, return_index=True)
        guesses = guesses[np.sort(first)]
        guesses = guesses[~registry.covers(guesses, guesses)]
    if len(guesses) and registry.failed:
        failed = np.array(registry.failed)
        close = (np.abs(guesses[:, None] - failed[None]) <= 1e-7 * scale).all(2).any(1)
        guesses = guesses[~close]
    if len(guesses):
        registry.add(*_verify(system, guesses[:MAX_GUESSES], scale, registry))
    keep = ~registry.covers(box_lo, box_hi)
    return box_lo[keep], box_hi[keep]
