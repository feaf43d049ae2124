"""Parallelotope trapping regions that survive a moving equilibrium.

With the parameters as intervals the equilibrium moves across the parameter box. A
quadratic Lyapunov function must then have level sets whose size grows with the
movement times the condition number of the linearisation, which for stiff models (a
slow and a fast direction, as a chemostat at low dilution) exceeds the room inside the
limits. In coordinates along the eigenvectors of the Jacobian the linear part is
diagonal, so a box in those coordinates only has to be somewhat larger than the
movement itself. Near a fold the movement is large along a weakly pulling direction,
and a face tilted otherwise (some eigenvectors swapped for state axes) can hold where
the eigenvector faces do not; candidate frames, centres and radii are screened in
floats and only the best are proven (:func:`find_box_region`).

The region is ``R = {c + T u : |u_i| <= r_i}`` with exact binary numbers: ``c`` near
the equilibrium, ``T`` a frame (columns of unit length in window units), ``r`` the
radii. Its face ``i`` on side ``s = +-1`` is ``u_i = s r_i``; its outward
normal is ``s N_i`` with ``N`` the rows of ``sign(det T) adj(T)`` (a positive multiple
of ``T^-1``), enclosed with intervals. It is proven, for every parameter value in the
boxes, that

* on every face, ``s N_i . f(x) < 0``: on a cover of the face by pieces, with the
  natural interval extension or the mean-value form in ``u`` at the piece's midpoint
  (``d/du_k (N_i . f) = N_i . Df T_k``, nearly zero across faces for eigenvectors);
* every limit holds on ``R``: on a cover of ``R`` by pieces.

Then ``R`` is forward invariant (at the last time a trajectory is in ``R`` it sits on
some face whose constraint it violates right after, but the face's outward rate is
negative there) and inside the limits, so every point of it is safe; it is not empty
(it holds ``c``).
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import product

import numpy as np

from . import interval as iv
from .evaluate import evaluate_boxes, evaluate_limits
from .faces import _bisect_until_proven
from .trapping import KINK_STEP, _binary, float_jacobians

__all__ = ["BoxRegion", "find_box_region", "prove_box_region", "float_equilibria",
           "float_margins", "parameter_grid", "FACTORS", "ATTEMPTS"]

#: Multiples of the float estimate of the equilibrium's movement tried as radii, per
#: axis (above two states every other one, so that the screening stays cheap).
FACTORS = (1.25, 1.5, 2.0, 3.0, 4.0, 6.0, 9.0, 14.0, 20.0, 30.0)
#: Interval proofs tried per equilibrium, best float screening first.
ATTEMPTS = 3
#: Bisection depth of the face and region covers (per free axis).
COVER_DEPTH = 7


@dataclass(frozen=True)
class BoxRegion:
    """A proven trapping region ``{c + T u : |u_i| <= r_i}`` (binary fractions).

    Attributes
    ----------
    centre : ndarray, shape (n,)
    frame : ndarray, shape (n, n)
        ``T``: column ``k`` is the direction of ``u_k``.
    radii : ndarray, shape (n,)
    pieces : int
        Face and region pieces of the proof.
    """

    centre: np.ndarray
    frame: np.ndarray
    radii: np.ndarray
    pieces: int

    def coordinates(self, x):
        """Float ``u = T^-1 (x - c)`` of points ``x`` (not rigorous; for checks)."""
        return np.linalg.solve(self.frame, (np.atleast_2d(x) - self.centre).T).T


def _idet(lo, hi):
    """Interval determinant of an interval matrix by Laplace expansion (small n)."""
    n = lo.shape[0]
    if n == 1:
        return lo[0, 0], hi[0, 0]
    acc_lo, acc_hi = np.zeros(1), np.zeros(1)
    rows = np.arange(1, n)
    for k in range(n):
        cols = [j for j in range(n) if j != k]
        mlo, mhi = _idet(lo[np.ix_(rows, cols)], hi[np.ix_(rows, cols)])
        plo, phi = iv.mul(np.atleast_1d(lo[0, k]), np.atleast_1d(hi[0, k]),
                          np.atleast_1d(mlo), np.atleast_1d(mhi))
        if k % 2:
            plo, phi = -phi, -plo
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, plo, phi)
    return acc_lo[0], acc_hi[0]


def normals(frame):
    """Interval rows of ``sign(det T) adj(T)``, or None when ``det T`` may be 0.

    Returns
    -------
    lo, hi : ndarray, shape (n, n)
        Row ``i`` encloses a positive multiple of row ``i`` of ``T^-1``.
    """
    n = len(frame)
    dlo, dhi = _idet(frame, frame)
    if dlo <= 0 <= dhi:
        return None
    sign = 1.0 if dlo > 0 else -1.0
    lo, hi = np.zeros((n, n)), np.zeros((n, n))
    if n == 1:
        return np.full((1, 1), sign), np.full((1, 1), sign)
    for i in range(n):
        for j in range(n):
            # adj(T)_ij = (-1)^(i+j) det(T without row j and column i)
            keep_r = [r for r in range(n) if r != j]
            keep_c = [c for c in range(n) if c != i]
            sub = frame[np.ix_(keep_r, keep_c)]
            mlo, mhi = _idet(sub, sub)
            if (i + j) % 2:
                mlo, mhi = -mhi, -mlo
            lo[i, j], hi[i, j] = (mlo, mhi) if sign > 0 else (-mhi, -mlo)
    return lo, hi


def _states(centre, frame, ulo, uhi):
    """Enclosure of ``c + T u`` for ``u`` in boxes."""
    n = len(centre)
    xlo = np.tile(centre, (len(ulo), 1)).astype(float)
    xhi = xlo.copy()
    for j in range(n):
        for k in range(n):
            plo, phi = iv.mul(frame[j, k], frame[j, k], ulo[:, k], uhi[:, k])
            xlo[:, j], xhi[:, j] = iv.add(xlo[:, j], xhi[:, j], plo, phi)
    return xlo, xhi


def _dot(nlo, nhi, flo, fhi):
    """Interval ``sum_j N_j F_j`` per row, ``N`` an interval vector, ``F`` (N, n)."""
    acc_lo, acc_hi = np.zeros(len(flo)), np.zeros(len(flo))
    for j in range(len(nlo)):
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *iv.mul(nlo[j], nhi[j], flo[:, j], fhi[:, j]))
    return acc_lo, acc_hi


def _at_midpoint(programs, sensitivity, params, nlo, nhi, mlo, mhi):
    """``N . f`` at the points `mlo`..`mhi` for every parameter value.

    The natural form, intersected with the mean-value form in the parameters
    ``N . f(m, p0) + sum_k (N . df/dp_k(m, P)) (P_k - p0_k)`` when `sensitivity` gives
    ``(program of df/dp, positions of the interval parameters)``.
    """
    flo, fhi = evaluate_boxes(programs.field, mlo, mhi, params)
    out_lo, out_hi = _dot(nlo, nhi, flo, fhi)
    if sensitivity is None:
        return out_lo, out_hi
    program, positions = sensitivity
    p0 = [0.5 * (a + b) for a, b in params]
    # only the interval parameters move to their midpoint: the others keep their
    # enclosures, which hold their exact values
    mid = [(p0[k], p0[k]) if k in positions else tuple(params[k]) for k in range(len(params))]
    flo, fhi = evaluate_boxes(programs.field, mlo, mhi, mid)
    acc_lo, acc_hi = _dot(nlo, nhi, flo, fhi)
    dlo, dhi = evaluate_boxes(program, mlo, mhi, params)
    n, m = len(nlo), len(positions)
    for col, k in enumerate(positions):
        glo, ghi = _dot(nlo, nhi, dlo[:, col::m][:, :n], dhi[:, col::m][:, :n])
        wlo, whi = iv.sub(params[k][0], params[k][1], p0[k], p0[k])
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *iv.mul(glo, ghi, wlo, whi))
    return np.fmax(out_lo, acc_lo), np.fmin(out_hi, acc_hi)


def _face_rate_hi(programs, sensitivity, params, centre, frame, nlo, nhi, ulo, uhi):
    """Upper bound of ``N_i . f`` on pieces: natural form and mean-value form in ``u``."""
    n = len(centre)
    xlo, xhi = _states(centre, frame, ulo, uhi)
    flo, fhi = evaluate_boxes(programs.field, xlo, xhi, params)
    _, nat_hi = _dot(nlo, nhi, flo, fhi)
    um = np.clip(0.5 * (ulo + uhi), ulo, uhi)
    mlo, mhi = _states(centre, frame, um, um)
    acc_lo, acc_hi = _at_midpoint(programs, sensitivity, params, nlo, nhi, mlo, mhi)
    jlo, jhi = evaluate_boxes(programs.jacobian, xlo, xhi, params)
    dlo, dhi = iv.sub(ulo, uhi, um, um)
    for k in range(n):
        # column k of Df T, then N . it
        clo, chi = np.zeros((len(ulo), n)), np.zeros((len(ulo), n))
        for j in range(n):
            for m in range(n):
                plo, phi = iv.scale(jlo[:, j * n + m], jhi[:, j * n + m], frame[m, k])
                clo[:, j], chi[:, j] = iv.add(clo[:, j], chi[:, j], plo, phi)
        glo, ghi = _dot(nlo, nhi, clo, chi)
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *iv.mul(glo, ghi, dlo[:, k], dhi[:, k]))
    return np.fmin(nat_hi, acc_hi)


def prove_box_region(programs, params, centre, frame, radii, *, sensitivity=None,
                     depth=COVER_DEPTH):
    """Prove ``{c + T u : |u_i| <= r_i}`` forward invariant and inside the limits.

    Parameters
    ----------
    programs : certify.taylor.FlowPrograms
        With a Jacobian (Taylor order at least 2).
    params : sequence of (float, float)
    centre : ndarray, shape (n,)
    frame : ndarray, shape (n, n)
    radii : ndarray, shape (n,)
        Positive.
    sensitivity : tuple, optional
        ``(program, positions)``: the program of ``df/dp`` (inputs states and parameters,
        outputs ``df_i/dp_k`` row-major over the parameters at `positions`) for the
        mean-value form in the parameters.
    depth : int
        Bisections per free axis of each cover.

    Returns
    -------
    BoxRegion or None
    """
    n = len(centre)
    found = normals(frame)
    if found is None or programs.jacobian is None or not np.all(radii > 0):
        return None
    nlo, nhi = found
    pieces = 0
    for i in range(n):
        for side in (1.0, -1.0):
            lo, hi = -radii.astype(float), radii.astype(float)
            lo[i] = hi[i] = side * radii[i]
            snlo, snhi = (nlo[i], nhi[i]) if side > 0 else (-nhi[i], -nlo[i])

            def inward(ulo, uhi, snlo=snlo, snhi=snhi):
                return (_face_rate_hi(programs, sensitivity, params, centre, frame, snlo, snhi,
                                      ulo, uhi) < 0).astype(int)

            cover = _bisect_until_proven(lo, hi, [j for j in range(n) if j != i], depth, inward)
            if cover is None:
                return None
            pieces += len(cover[0])

    def keeps_limits(ulo, uhi):
        xlo, xhi = _states(centre, frame, ulo, uhi)
        glo, _ = evaluate_limits(programs, xlo, xhi, params)
        return np.all(glo >= 0, axis=1).astype(int)

    cover = _bisect_until_proven(-radii.astype(float), radii.astype(float), list(range(n)),
                                 depth, keeps_limits)
    if cover is None:
        return None
    return BoxRegion(centre=centre, frame=frame, radii=radii, pieces=pieces + len(cover[0]))


def _newton(programs, x, p, steps=30, differences=None):
    """Float Newton iterations for ``f(x, p) = 0`` from the rows of `x` (NaN rows fail);
    `differences` are the central-difference steps of a model without a Jacobian
    program (:func:`certify.trapping.float_jacobians`)."""
    x = np.array(x, float, ndmin=2)
    for _ in range(steps):
        f = programs.field.point_at(x, p)
        jac = float_jacobians(programs, x, p, differences)
        ok = np.all(np.isfinite(jac), axis=(1, 2)) & (np.abs(np.linalg.det(jac)) > 0)
        step = np.full_like(x, np.nan)
        if np.any(ok):
            step[ok] = np.linalg.solve(jac[ok], f[ok][..., None])[..., 0]
        x = x - step
    return x


def _equilibrium(programs, x, p):
    """Float Newton estimate of the equilibrium near `x` at `p` (None when it fails)."""
    y = _newton(programs, x, p)[0]
    return y if np.all(np.isfinite(y)) else None


def float_equilibria(model, programs, p, starts=None):
    """Float estimates of the equilibria at the parameter point `p` (not rigorous).

    Newton's method from `starts`: a grid of that many points per state over the window
    (by default about 400 points in all), or an array of points, shape (m, n); the ends
    inside the window, without repeats. Programs without a Jacobian (models with kinks)
    are differenced centrally, in steps of ``KINK_STEP`` of the window's sides.

    Returns
    -------
    list of ndarray, shape (n,)
    """
    lo = np.array([float(a) for a, _ in model.window])
    hi = np.array([float(b) for _, b in model.window])
    if starts is None or np.ndim(starts) == 0:
        count = starts or max(3, int(400 ** (1 / len(model.window))))
        axes = [a + (b - a) * (np.arange(count) + 0.5) / count for a, b in zip(lo, hi)]
        starts = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, len(lo))
    found = []
    tol = 1e-7 * (hi - lo)
    with np.errstate(all="ignore"):
        ends = _newton(programs, starts, p, differences=KINK_STEP * (hi - lo))
        for x in ends:
            if not np.all(np.isfinite(x)) or np.any(x < lo - tol) or np.any(x > hi + tol):
                continue
            f = programs.field.point(np.concatenate([x, p]))
            if np.max(np.abs(f)) > 1e-9 * (1 + np.max(np.abs(x))):
                continue
            if not any(np.all(np.abs(x - y) <= 1e3 * tol) for y in found):
                found.append(x)
    return found


def _frames(jac, width):
    """Candidate frames around a stable node: eigenvectors, some swapped for state axes.

    Column ``k`` of the first frame is the eigenvector of eigenvalue ``k`` (unit length
    in window units). Then every frame with one eigenvector replaced by one state axis,
    then the state axes. A face along a slow direction of a moving equilibrium can need
    another tilt than the linearisation's (in a chemostat, a face of constant
    substrate), and which one only the float screening of :func:`find_box_region` tells.
    Frames with ``|det|`` below ``1e-3`` (in window units) are left out.
    """
    values, vectors = np.linalg.eig(jac)
    if np.any(np.abs(values.imag) > 0) or np.any(values.real >= 0):
        return []
    vectors = vectors.real / np.linalg.norm(vectors.real / width[:, None], axis=0)
    axes = np.diag(width)
    n = len(width)
    frames = [vectors]
    for k in range(n):
        for j in range(n):
            frame = vectors.copy()
            frame[:, k] = axes[:, j]
            frames.append(frame)
    frames.append(axes)
    out = []
    for frame in frames:
        frame = _binary(frame)
        if abs(np.linalg.det(frame / width[:, None])) >= 1e-3 \
                and not any(np.array_equal(frame, f) for f in out):
            out.append(frame)
    return out


def parameter_grid(params, positions):
    """The points ``{lo, mid, hi}^k`` over the interval parameters at `positions`.

    The other parameters sit at their midpoint (they are points, or enclosures of one
    value). For more than three interval parameters only the corners and the midpoint.
    """
    p = np.array(params, float).reshape(-1, 2)
    base = 0.5 * (p[:, 0] + p[:, 1])
    if not positions:
        return base[None]
    levels = (0.0, 0.5, 1.0) if len(positions) <= 3 else (0.0, 1.0)
    rows = []
    for t in product(levels, repeat=len(positions)):
        row = base.copy()
        for k, tk in zip(positions, t):
            row[k] = p[k, 0] + tk * (p[k, 1] - p[k, 0])
        rows.append(row)
    if len(positions) > 3:
        rows.append(base)
    return np.array(rows)


def _face_pattern(n, count):
    """Points of the faces of ``|u_i| <= 1`` (and the centre), with the outward axis.

    Returns
    -------
    u : ndarray, shape (k, n)
    axis : ndarray of int, shape (k,)
        ``i`` for a point on face ``u_i = +-1``, -1 for the centre.
    side : ndarray, shape (k,)
    """
    t = np.linspace(-1.0, 1.0, count)
    rest = list(product(t, repeat=n - 1))
    rest = np.array(rest, float).reshape(len(rest), n - 1)
    us, axes, sides = [np.zeros((1, n))], [np.array([-1])], [np.zeros(1)]
    for i in range(n):
        for side in (1.0, -1.0):
            u = np.empty((len(rest), n))
            u[:, [j for j in range(n) if j != i]] = rest
            u[:, i] = side
            us.append(u)
            axes.append(np.full(len(rest), i))
            sides.append(np.full(len(rest), side))
    return np.concatenate(us), np.concatenate(axes), np.concatenate(sides)


def float_margins(programs, samples, centre, frame, radii, count=7):
    """Float screening of parallelotopes (not rigorous; it picks what to prove).

    Parameters
    ----------
    programs : certify.taylor.FlowPrograms
    samples : ndarray, shape (k, p)
        Parameter points.
    centre : ndarray, shape (n,)
    frame : ndarray, shape (n, n)
    radii : ndarray, shape (m, n)
        One parallelotope per row.
    count : int
        Points per free axis of each face.

    Returns
    -------
    ndarray, shape (m,)
        Per parallelotope, the largest outward rate ``s du_i/dt / r_i`` over sampled face
        points and parameter samples (negative: every sampled face pulls inward), or
        ``inf`` when a limit fails at a sampled face point or at the centre.
    """
    radii = np.atleast_2d(radii)
    m, n = radii.shape
    pattern, axis, side = _face_pattern(n, count)
    k = len(pattern)
    u = (pattern[None] * radii[:, None]).reshape(-1, n)          # (m k, n)
    x = centre + u @ frame.T
    inputs = np.concatenate([np.tile(x, (len(samples), 1)),
                             np.repeat(samples, len(x), axis=0)], axis=1)
    shape = (len(samples), m, k)
    keeps = np.ones(shape, bool)
    if programs.limits.n_outputs:
        keeps = np.all(programs.limits.point(inputs) > 0, axis=-1).reshape(shape)
    du = (programs.field.point(inputs) @ np.linalg.inv(frame).T).reshape(shape + (n,))
    on_face = axis >= 0
    rows = np.arange(k)[on_face]
    rate = side[on_face] * du[:, :, rows, axis[on_face]] / radii[:, axis[on_face]]
    with np.errstate(invalid="ignore"):
        worst = np.max(rate, axis=(0, 2))
    worst[~np.all(keeps, axis=(0, 2)) | ~np.isfinite(worst)] = np.inf
    return worst


def find_box_region(model, programs, params, point, attempts=ATTEMPTS):
    """A parallelotope trapping region around the equilibrium estimate `point`, or None.

    For each candidate frame (:func:`_frames`), the equilibrium is followed in floats
    over a grid of the parameter box (:func:`parameter_grid`); the centre is the middle
    of its track in frame coordinates and the radii are the track's half-widths times
    factors from :data:`FACTORS`, chosen per axis, plus a slack for the interval
    overestimation. Every such parallelotope is screened in floats
    (:func:`float_margins`); the `attempts` with the strongest inward pull are proven
    (:func:`prove_box_region`). Soundness rests on that proof only.

    Parameters
    ----------
    model : certify.model.Model
    programs : certify.taylor.FlowPrograms
    params : sequence of (float, float)
    point : ndarray, shape (n,)
        A float estimate of a stable equilibrium inside the limits.
    attempts : int
        Interval proofs tried at most.

    Returns
    -------
    BoxRegion or None
    """
    from .points import _interval_positions, _programs

    width = np.array([float(b - a) for a, b in model.window])
    q = np.ldexp(1.0, np.frexp(width)[1] - 40)
    point = np.asarray(point, float)
    mid = np.array([0.5 * (a + b) for a, b in params], float)
    n = len(point)
    positions = _interval_positions(model)
    samples = parameter_grid(params, positions)
    track = [_equilibrium(programs, point, p) for p in samples]
    if any(x is None for x in track):
        return None
    track = np.array(track)
    jacobians = programs.jacobian.point(np.concatenate([track, samples], axis=1))
    if not np.all(np.linalg.eigvals(jacobians.reshape(-1, n, n)).real < 0):
        return None   # the track meets a fold or leaves for another equilibrium
    jac = programs.jacobian.point(np.concatenate([point, mid])).reshape(n, n)
    candidates = []
    for frame in _frames(jac, width):
        u = np.linalg.solve(frame, (track - point).T).T
        lo, hi = u.min(axis=0), u.max(axis=0)
        centre = np.round((point + frame @ (0.5 * (lo + hi))) / q) * q
        half = 0.5 * (hi - lo) + np.abs(np.linalg.solve(frame, centre - point
                                                        - frame @ (0.5 * (lo + hi))))
        # a direction the equilibrium does not move along still needs room for the
        # overestimation of interval arithmetic
        half = half + 0.25 * np.max(half) + 2.0 ** -20
        factors = np.array(list(product(FACTORS if n <= 2 else FACTORS[::2], repeat=n)))
        radii = _binary(half * factors, 20)
        margins = float_margins(programs, samples, centre, frame, radii, 7 if n <= 2 else 4)
        for j in np.flatnonzero(margins < 0):
            candidates.append((margins[j], len(candidates), centre, frame, radii[j]))
    if not candidates:
        return None
    sensitivity = None
    if positions and not model.uses_kinks:
        sensitivity = (_programs(model).param_jacobian, positions)
    candidates.sort(key=lambda c: c[:2])
    for _, _, centre, frame, radii in candidates[:attempts]:
        region = prove_box_region(programs, params, centre, frame, radii,
                                  sensitivity=sensitivity)
        if region is not None:
            return region
    return None
