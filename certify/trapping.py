"""Trapping regions: sets around stable equilibria proven forward invariant inside the limits.

Near a stable equilibrium the flow contracts, but validated enclosures of cells of
moderate size still grow when the Jacobian is far from normal, so no set of cells
around it closes. A quadratic Lyapunov function of the linearisation closes it instead.

For a stable equilibrium inside the limits (:func:`certify.points.find_equilibria`),
with ``c`` an exact point near it and ``A = Df(c)`` at the parameter midpoint,
``P`` solves ``A^T P + P A = -I`` (rounded to exact binary fractions, symmetric), and
``V(x) = (x - c)^T P (x - c)``. The region is ``R = {x in B : V(x) <= level}`` for an
exact box ``B``. Its certificate is a tiling of ``B`` by dyadic sub-boxes (the *cover*),
each proven with interval arithmetic, for every parameter value in the model's boxes,
to be one of

* ``above``: ``V > level`` on the whole sub-box;
* ``below``: ``V < level`` on it;
* ``shell``: ``dV/dt = 2 (x - c)^T P f(x) < 0`` on it;

where every sub-box touching the boundary of ``B`` is ``above`` and every sub-box that is
not ``above`` satisfies every limit. Then ``R`` is forward invariant and inside the limits
(docs/proof-loop.md, "Trapping regions"): a trajectory leaving ``R`` would, at the last
time it is in ``R``, sit either on the boundary of ``B`` (where ``V > level``, so not in
``R``) or at a point with ``V = level`` whose neighbourhood lies in shell sub-boxes,
where ``V`` strictly decreases.

A cell is then safe when its tube keeps the limits and its image box lies in ``R``
(inside ``B`` with an upper bound of ``V`` at most ``level``), or when the cell itself
lies in ``R``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from fractions import Fraction
from itertools import islice, product

import numpy as np

from . import interval as iv
from .evaluate import evaluate_boxes, evaluate_limits

__all__ = ["Region", "RegionSearch", "find_regions", "prove_region", "grid_box",
           "trapped_cells", "in_regions", "trapping_summary", "lyapunov_matrix",
           "v_bounds", "v_rate_bounds", "classify", "ABOVE", "BELOW", "SHELL", "CLASSES"]

ABOVE, BELOW, SHELL = 0, 1, 2
#: Class names in the order of their codes (the certificate stores the codes).
CLASSES = ("above", "below", "shell")
#: Fractions of the largest level the float check allows, tried in turn.
LEVEL_TRIES = (0.95, 0.8, 0.5, 0.25, 0.1)
#: Width in log scale at which the bisection for that level stops (0.1 % of the level;
#: the levels tried are 5 % and more below it).
LEVEL_TOLERANCE = 1e-3
#: Directions of the float check's first bisection (:func:`_largest_level`).
COARSE_DIRECTIONS = 256
#: Factors of the scale search for P (:func:`_candidates`).
SCALE_STEPS = (2.0, 2.0 ** 0.5, 2.0 ** 0.25, 2.0 ** 0.125)
#: The box B is the bounding box of the ellipsoid {V <= level} widened by this factor.
BOX_MARGIN = 1.25
#: Central-difference step, as a share of the window's sides, of the linearisation of a
#: model with kinks (abs, min, max), which has no Jacobian program.
KINK_STEP = 1e-7


@dataclass(frozen=True)
class Region:
    """A proven trapping region ``{x in box : (x - c)^T P (x - c) <= level}``.

    All numbers are binary fractions, so the float arrays hold them exactly.

    Attributes
    ----------
    centre : ndarray, shape (n,)
    matrix : ndarray, shape (n, n)
        Symmetric ``P``.
    level : float
    box_lo, box_hi : ndarray, shape (n,)
        The box ``B``.
    cover_depth : ndarray of int, shape (k, n)
    cover_index : ndarray of int, shape (k, n)
        Dyadic sub-boxes of ``B``: along axis ``i`` the sub-box is the ``index[i]``-th of
        ``2^depth[i]`` equal parts of ``B``'s side (a k-d tree's leaves).
    cover_class : ndarray of int, shape (k,)
        :data:`ABOVE`, :data:`BELOW` or :data:`SHELL`.
    """

    centre: np.ndarray
    matrix: np.ndarray
    level: float
    box_lo: np.ndarray
    box_hi: np.ndarray
    cover_depth: np.ndarray
    cover_index: np.ndarray
    cover_class: np.ndarray

    def exact(self):
        """The region's numbers as Fractions: ``(centre, matrix, level, box)``."""
        fr = Fraction
        return ([fr(x) for x in self.centre], [[fr(x) for x in row] for row in self.matrix],
                fr(self.level), [(fr(a), fr(b)) for a, b in zip(self.box_lo, self.box_hi)])


@dataclass(frozen=True)
class RegionSearch:
    """Regions found and why some stable equilibria have none.

    Attributes
    ----------
    regions : tuple of Region
    notes : tuple of str
    """

    regions: tuple
    notes: tuple


# -- V and dV/dt on boxes (outward rounded) -------------------------------------------------
def v_bounds(centre, matrix, lo, hi):
    """Enclosure of ``V`` on boxes, as ``sum_i P_ii d_i^2 + sum_{i<j} (2 P_ij) d_i d_j``.

    The checker evaluates the same expression with exact rationals, which encloses no
    more than these outward-rounded floats.

    Parameters
    ----------
    centre : ndarray, shape (n,)
    matrix : ndarray, shape (n, n)
    lo, hi : ndarray, shape (N, n)

    Returns
    -------
    lo, hi : ndarray, shape (N,)
    """
    n = len(centre)
    dlo, dhi = iv.sub(lo, hi, centre, centre)
    acc_lo = np.zeros(len(lo))
    acc_hi = np.zeros(len(lo))
    for i in range(n):
        s = iv.scale(*iv.sqr(dlo[:, i], dhi[:, i]), matrix[i, i])
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *s)
        for j in range(i + 1, n):
            prod = iv.mul(dlo[:, i], dhi[:, i], dlo[:, j], dhi[:, j])
            acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *iv.scale(*prod, 2.0 * matrix[i, j]))
    return acc_lo, acc_hi


def _rate(centre, matrix, dlo, dhi, flo, fhi):
    """``sum_i w_i f_i`` with ``w_i = sum_j (2 P_ij) d_j``; also returns the ``w_i``."""
    n = len(centre)
    acc_lo = np.zeros(len(dlo))
    acc_hi = np.zeros(len(dlo))
    w = []
    for i in range(n):
        wlo, whi = iv.scale(dlo[:, 0], dhi[:, 0], 2.0 * matrix[i, 0])
        for j in range(1, n):
            wlo, whi = iv.add(wlo, whi, *iv.scale(dlo[:, j], dhi[:, j], 2.0 * matrix[i, j]))
        w.append((wlo, whi))
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *iv.mul(wlo, whi, flo[:, i], fhi[:, i]))
    return acc_lo, acc_hi, w


def v_rate_bounds(programs, params, centre, matrix, lo, hi):
    """Enclosure of ``W = dV/dt = sum_i w_i f_i``, ``w_i = sum_j (2 P_ij) d_j``, on boxes.

    The natural interval extension, intersected with the mean-value form
    ``W(m) + sum_k (dW/dx_k)(X) (X_k - m_k)`` at the box's midpoint ``m``, where
    ``dW/dx_k = sum_i (2 P_ki) f_i + sum_i w_i (df_i/dx_k)``. The mean-value form holds
    for each parameter value, so evaluating both parts on the parameter boxes is sound;
    near the level set it is much tighter (the natural form overestimates by the box
    width times the size of the state, the mean-value form by its square).
    """
    n = len(centre)
    flo, fhi = evaluate_boxes(programs.field, lo, hi, params)
    dlo, dhi = iv.sub(lo, hi, centre, centre)
    nat_lo, nat_hi, w = _rate(centre, matrix, dlo, dhi, flo, fhi)
    if programs.jacobian is None:
        return nat_lo, nat_hi
    mid = np.clip(0.5 * (lo + hi), lo, hi)
    mflo, mfhi = evaluate_boxes(programs.field, mid, mid, params)
    mdlo, mdhi = iv.sub(mid, mid, centre, centre)
    acc_lo, acc_hi, _ = _rate(centre, matrix, mdlo, mdhi, mflo, mfhi)
    jlo, jhi = evaluate_boxes(programs.jacobian, lo, hi, params)
    xlo, xhi = iv.sub(lo, hi, mid, mid)
    for k in range(n):
        glo, ghi = iv.scale(flo[:, 0], fhi[:, 0], 2.0 * matrix[k, 0])
        for i in range(1, n):
            glo, ghi = iv.add(glo, ghi, *iv.scale(flo[:, i], fhi[:, i], 2.0 * matrix[k, i]))
        for i in range(n):
            glo, ghi = iv.add(glo, ghi, *iv.mul(*w[i], jlo[:, i * n + k], jhi[:, i * n + k]))
        acc_lo, acc_hi = iv.add(acc_lo, acc_hi, *iv.mul(glo, ghi, xlo[:, k], xhi[:, k]))
    # NaN in either form leaves the other (fmax/fmin ignore NaN)
    return np.fmax(nat_lo, acc_lo), np.fmin(nat_hi, acc_hi)


# -- the float construction -----------------------------------------------------------------
def lyapunov_matrix(jacobian, scale):
    """Symmetric ``P`` with ``A^T P + P A = -I`` in coordinates scaled by `scale`.

    Parameters
    ----------
    jacobian : ndarray, shape (n, n)
        ``A``.
    scale : ndarray, shape (n,)
        Typical sizes of the states (the window's widths).

    Returns
    -------
    ndarray, shape (n, n)
        ``P`` in the original coordinates, symmetric, or None when the solution is not
        positive definite (the linearisation is not stable enough).
    """
    from scipy.linalg import solve_continuous_lyapunov

    s = np.asarray(scale, float)
    a = jacobian * s[None, :] / s[:, None]       # S^-1 A S
    with warnings.catch_warnings():  # nearly singular equations: the checks below decide
        warnings.simplefilter("ignore", RuntimeWarning)
        p = solve_continuous_lyapunov(a.T, -np.eye(len(s)))
    p = 0.5 * (p + p.T) / s[:, None] / s[None, :]  # S^-1 P_y S^-1
    if not np.all(np.isfinite(p)) or np.linalg.eigvalsh(p * s[:, None] * s[None, :]).min() <= 0:
        return None
    return p


def _sphere(n, count, rng):
    u = rng.standard_normal((count, n))
    return u / np.linalg.norm(u, axis=1, keepdims=True)


def _parameter_samples(params, rng, count=6):
    """The midpoint, a few corners and a few random points of the parameter boxes."""
    p = np.array(params, float).reshape(-1, 2)
    if len(p) == 0:
        return np.zeros((1, 0))
    mid = 0.5 * (p[:, 0] + p[:, 1])
    rows = np.arange(len(p))
    corners = [p[rows, np.array(bits, int)] for bits in
               islice(product((0, 1), repeat=len(p)), count)]
    randoms = list(p[:, 0] + rng.random((count, len(p))) * (p[:, 1] - p[:, 0]))
    return np.unique(np.array([mid] + corners + randoms).reshape(-1, len(p)), axis=0)


def _level_ok(programs, samples, centre, matrix, factor, level, dirs):
    """Float check: on sampled points of {V = level}, dV/dt < 0 and every limit holds.

    All parameter samples are evaluated in one batch (one program call, not one per
    sample: the search calls this a few hundred times).
    """
    x = centre + np.sqrt(level) * dirs @ factor
    k = len(x)
    inputs = np.concatenate([np.tile(x, (len(samples), 1)),
                             np.repeat(samples, k, axis=0)], axis=1)
    f = programs.field.point(inputs)
    if programs.limits.n_outputs and not np.all(programs.limits.point(inputs) > 0):
        return False
    d = np.tile(x - centre, (len(samples), 1))
    return bool(np.all(np.sum((d @ matrix) * f, axis=1) < 0))


def _largest_level(programs, samples, centre, matrix, width, rng):
    """Bisection (in log scale, to :data:`LEVEL_TOLERANCE`) for the largest level passing
    the float check.

    The bisection first checks :data:`COARSE_DIRECTIONS` of the 2000 directions; the
    level found is then checked on all of them, and only when it fails there does the
    bisection go on below it with all directions (from 10 % below it when that passes).
    """
    factor = np.linalg.inv(np.linalg.cholesky(matrix))   # rows: x - c = u @ factor, V = |u|^2
    dirs = _sphere(len(centre), 2000, rng)
    top = float(np.max(np.diag(matrix) * width ** 2))
    lo, hi = np.log(top) - 40.0, np.log(top)
    def passes(log_level, d):
        return _level_ok(programs, samples, centre, matrix, factor, np.exp(log_level), d)

    if not passes(lo, dirs):
        # with interval parameters the equilibrium moves: small levels fail, so take
        # the largest passing level of a coarse grid below the top instead
        lo = next((g for g in np.log(top) - np.arange(1.0, 40.0) if passes(g, dirs)), None)
        if lo is None:
            return None
        hi = lo + 1.0
    floor = lo
    for d in (dirs[:COARSE_DIRECTIONS], dirs):
        while hi - lo > LEVEL_TOLERANCE:
            mid = 0.5 * (lo + hi)
            if passes(mid, d):
                lo = mid
            else:
                hi = mid
        if d is dirs or passes(lo, dirs):
            break
        # a little below the coarse level usually passes: bisect from there
        lo, hi = max(floor, lo - 0.1), lo
        if not passes(lo, dirs):
            lo = floor
    return float(np.exp(lo))


# -- the rigorous cover ---------------------------------------------------------------------
def _sub_boxes(box_lo, box_hi, depth, index):
    """Float boxes enclosing the exact dyadic sub-boxes of ``B`` (outward rounded)."""
    wlo, whi = iv.sub(box_hi, box_hi, box_lo, box_lo)
    scale = 2.0 ** -depth.astype(float)
    wlo, whi = wlo * scale, whi * scale     # exact: powers of two
    lo, _ = iv.add(box_lo, box_lo, *iv.mul(wlo, whi, index, index))
    _, hi = iv.add(box_lo, box_lo, *iv.mul(wlo, whi, index + 1, index + 1))
    return lo, hi


def grid_box(lo, hi, bits=20):
    """Round a box outward to multiples of a power of two ``q`` with ``|ends| < 2^(bits+1) q``."""
    top = np.maximum(np.abs(lo), np.abs(hi))
    q = np.ldexp(1.0, np.frexp(top)[1] - bits)
    return np.floor(lo / q) * q, np.ceil(hi / q) * q


def classify(programs, params, centre, matrix, level, box_lo, box_hi, depth, index):
    """Prove classes of sub-boxes of ``B`` (floats, outward rounded).

    Returns
    -------
    ndarray of int
        :data:`ABOVE`, :data:`BELOW`, :data:`SHELL`, or -1 where nothing is proven.
    """
    lo, hi = _sub_boxes(box_lo, box_hi, depth, index)
    vlo, vhi = v_bounds(centre, matrix, lo, hi)
    glo, _ = evaluate_limits(programs, lo, hi, params)
    limits_ok = np.all(glo >= 0, axis=1)
    edge = np.any((index == 0) | (index == (1 << depth) - 1), axis=1)
    out = np.full(len(lo), -1)
    inner = limits_ok & ~edge
    out[inner] = np.where(vhi[inner] < level, BELOW, -1)
    rest = np.flatnonzero(inner & (out < 0))
    if len(rest):
        _, rhi = v_rate_bounds(programs, params, centre, matrix, lo[rest], hi[rest])
        out[rest[rhi < 0]] = SHELL
    out[vlo > level] = ABOVE
    return out


def _split_axis(matrix, lo, hi):
    """Per box, the axis whose halving most reduces the overestimation of ``V``.

    The interval form of ``V`` overestimates by about ``sum_ij |P_ij| w_i w_j`` (``w`` the
    widths); halving axis ``a`` removes about ``w_a sum_j |P_aj| w_j`` of it.
    """
    w = hi - lo
    return np.argmax(w * (w @ np.abs(matrix)), axis=1)


def _cover(programs, params, centre, matrix, level, box_lo, box_hi, max_depth, max_boxes):
    """A k-d cover: sub-boxes not proven are halved along one axis (:func:`_split_axis`)."""
    n = len(centre)
    depth = np.zeros((1, n), np.int64)
    index = np.zeros((1, n), np.int64)
    done_depth, done_index, done_class = [], [], []
    total = 0
    while len(depth):
        cls = classify(programs, params, centre, matrix, level, box_lo, box_hi, depth, index)
        ok = cls >= 0
        done_depth.append(depth[ok])
        done_index.append(index[ok])
        done_class.append(cls[ok])
        total += int(ok.sum())
        depth, index = depth[~ok], index[~ok]
        if len(depth) == 0:
            break
        if total + 2 * len(depth) > max_boxes:
            return None
        lo, hi = _sub_boxes(box_lo, box_hi, depth, index)
        axis = _split_axis(matrix, lo, hi)
        rows = np.arange(len(depth))
        if depth[rows, axis].max() >= max_depth:
            return None
        depth = np.repeat(depth, 2, axis=0)
        index = np.repeat(index, 2, axis=0)
        rows, axis = np.arange(len(depth)), np.repeat(axis, 2)
        depth[rows, axis] += 1
        index[rows, axis] = 2 * index[rows, axis] + (rows & 1)
    return (np.concatenate(done_depth), np.concatenate(done_index),
            np.concatenate(done_class))


def prove_region(programs, params, centre, matrix, level, box_lo, box_hi, *, max_depth=8,
                 max_boxes=200_000):
    """Prove ``{x in B : V(x) <= level}`` forward invariant inside the limits.

    Parameters
    ----------
    programs : certify.taylor.FlowPrograms
    params : sequence of (float, float)
    centre : ndarray, shape (n,)
    matrix : ndarray, shape (n, n)
        Symmetric; need not be positive definite (the cover's classes prove everything).
    level : float
    box_lo, box_hi : ndarray, shape (n,)
        ``B`` (:func:`grid_box` rounds a box to a coarse binary grid).

    Returns
    -------
    Region or None
        None when no cover within `max_depth` halvings per axis and `max_boxes` sub-boxes
        proves it.
    """
    if not np.array_equal(matrix, matrix.T):
        raise ValueError("the matrix must be symmetric")
    with np.errstate(all="ignore"):
        cover = _cover(programs, params, centre, matrix, level, box_lo, box_hi, max_depth,
                       max_boxes)
    if cover is None:
        return None
    return Region(centre=centre, matrix=matrix, level=level, box_lo=box_lo, box_hi=box_hi,
                  cover_depth=cover[0], cover_index=cover[1], cover_class=cover[2])


def _binary(x, bits=30):
    """Round floats to binary fractions with `bits` significant bits (exact in floats)."""
    m, e = np.frexp(np.asarray(x, float))
    return np.ldexp(np.round(m * 2.0 ** bits), e - bits)


def _candidate(programs, samples, centre, jacobian, width, scale, rng):
    """``(volume, matrix, top level)`` for ``P`` solved in coordinates scaled by `scale`."""
    matrix = lyapunov_matrix(jacobian, scale)
    if matrix is None:
        return None
    matrix = _binary(matrix)
    matrix = np.triu(matrix) + np.triu(matrix, 1).T
    if np.linalg.eigvalsh(matrix).min() <= 0:
        return None
    top = _largest_level(programs, samples, centre, matrix, width, rng)
    if top is None:
        return None
    return top ** (len(centre) / 2) / np.sqrt(np.linalg.det(matrix)), matrix, top


def _candidates(programs, params, model, centre, rng):
    """Float candidates ``(volume, matrix, top level)``, largest region first.

    ``P`` depends on the coordinates in which ``A^T P + P A = -I`` is solved: scaled by
    the window's widths, by the equilibrium's own coordinates, or unscaled (on the 3D
    food chain the second gives a region 13 times larger than the first). From the
    best of these, a search multiplies one axis' scale at a time by ``2^(+-1)``,
    ``2^(+-1/2)``, ... while the float region grows (2.1 times larger on the lake
    plankton model, 1.4 times on the food chain).
    """
    n = len(centre)
    mid = np.array([0.5 * (a + b) for a, b in params], float)
    width = np.array([float(b - a) for a, b in model.window])
    jac = _linearisation(programs, centre, mid, width)
    samples = _parameter_samples(params, rng)
    out = []
    for scale in (width, np.where(np.abs(centre) > 0, np.abs(centre), width), np.ones(n)):
        found = _candidate(programs, samples, centre, jac, width, scale, rng)
        if found is not None:
            out.append((found, scale))
    if not out:
        return []
    best, scale = max(out, key=lambda t: t[0][0])
    start = best
    for step in SCALE_STEPS:
        for i, factor in product(range(n), (step, 1.0 / step)):
            trial = scale.copy()
            trial[i] *= factor
            found = _candidate(programs, samples, centre, jac, width, trial, rng)
            if found is not None and found[0] > best[0]:
                best, scale = found, trial
    found = [t[0] for t in out] + ([best] if best is not start else [])
    return sorted(found, key=lambda t: -t[0])


def float_jacobians(programs, x, p, steps):
    """Float Jacobians of the field at the rows of `x`, parameters `p`: from the
    Jacobian program, or by central differences of `steps` for a model with kinks
    (which has none; the points should lie off the kinks). Not rigorous.

    Returns
    -------
    ndarray, shape (N, n, n)
    """
    n = x.shape[1]
    if programs.jacobian is not None:
        return programs.jacobian.point_at(x, p).reshape(-1, n, n)
    return programs.field.point_jacobian(x, p, steps)


def _linearisation(programs, point, mid, width):
    """The float Jacobian of the field at `point` (:func:`float_jacobians`)."""
    return float_jacobians(programs, point[None], mid, KINK_STEP * width)[0]


def _kink_estimates(model, programs, params, found):
    """Float estimates of the stable equilibria inside the limits of a model with kinks.

    Its equilibria are not proven (:func:`certify.points.find_equilibria` only excludes
    them), so Newton's method (:func:`certify.atlas_regions.float_equilibria`, with a
    central-difference Jacobian) starts from the centre of each box the search left
    unresolved; the ends inside the limits whose eigenvalues have negative real parts
    are kept. Only a region's invariance is proven, not the equilibrium inside it.
    """
    from .atlas_regions import float_equilibria

    mid = np.array([0.5 * (a + b) for a, b in params], float)
    width = np.array([float(b - a) for a, b in model.window])
    estimates = []
    for x in float_equilibria(model, programs, mid, starts=found.unresolved.mean(axis=2)):
        inside = not programs.limits.n_outputs or \
            np.all(programs.limits.point_at(x[None], mid) > 0)
        if inside and np.all(np.linalg.eigvals(_linearisation(programs, x, mid, width)).real < 0):
            estimates.append(x)
    return estimates


def _region_at(model, programs, params, point, rng, max_depth, max_boxes):
    """A region around the equilibrium estimate `point`, or a note why there is none."""
    # on a binary grid 2^-40 of the window's sides: exact, and 0 stays 0
    width = np.array([float(b - a) for a, b in model.window])
    q = np.ldexp(1.0, np.frexp(width)[1] - 40)
    centre = np.round(np.asarray(point, float) / q) * q
    candidates = _candidates(programs, params, model, centre, rng)
    if not candidates:
        return None, "no Lyapunov matrix passes the float check (dV/dt < 0 near the point)"
    for _, matrix, top in candidates:
        inverse = np.linalg.inv(matrix)
        for fraction in LEVEL_TRIES:
            level = float(_binary(top * fraction, 20))
            half = BOX_MARGIN * np.sqrt(level * np.diag(inverse))
            box_lo, box_hi = grid_box(centre - half, centre + half)
            region = prove_region(programs, params, centre, matrix, level, box_lo, box_hi,
                                  max_depth=max_depth, max_boxes=max_boxes)
            if region is not None:
                return region, None
    return None, "no level set was proven invariant within the cover budget"


def find_regions(model, programs, params, *, max_depth=16, max_boxes=200_000,
                 equilibria=None):
    """Trapping regions around the stable equilibria inside the limits.

    Parameters
    ----------
    model : certify.model.Model
    programs : certify.taylor.FlowPrograms
        Of Taylor order at least 2 (the Jacobian is needed), or of order 1 for a model
        with kinks (linearised by central differences at float equilibrium estimates).
    params : sequence of (float, float)
        Parameter enclosures.
    max_depth : int
        Most halvings of the box ``B`` along one axis.
    max_boxes : int
        Largest number of sub-boxes in a cover.
    equilibria : certify.points.EquilibriumResult, optional
        Of `model`, when already found.

    Returns
    -------
    RegionSearch
    """
    from .points import find_equilibria

    if programs.jacobian is None and not model.uses_kinks:
        return RegionSearch((), ("the flow programs have no Jacobian (Taylor order 1)",))
    rng = np.random.default_rng(20261204)
    regions, notes = [], []
    with np.errstate(all="ignore"):
        found = equilibria if equilibria is not None else find_equilibria(model)
        if model.uses_kinks:
            points = _kink_estimates(model, programs, params, found)
        else:
            points = [eq.centre for eq in found.equilibria
                      if eq.stability == "stable" and eq.limits == "inside"]
        for point in points:
            region, note = _region_at(model, programs, params, point, rng,
                                      max_depth, max_boxes)
            if region is None:
                notes.append(f"equilibrium near {np.round(point, 6).tolist()}: {note}")
            else:
                regions.append(region)
    return RegionSearch(tuple(regions), tuple(notes))


# -- use by the cells -----------------------------------------------------------------------
def _inside(region, lo, hi):
    within = np.all((lo >= region.box_lo) & (hi <= region.box_hi), axis=1)
    _, vhi = v_bounds(region.centre, region.matrix, lo, hi)
    return within & (vhi <= region.level)


def in_regions(regions, lo, hi):
    """Bool per box: it lies in some region (inside its ``B``, upper bound of ``V`` <= level)."""
    out = np.zeros(len(lo), bool)
    for r in regions:
        out |= _inside(r, lo, hi)
    return out


def trapped_cells(regions, cell_lo, cell_hi, image_lo, image_hi, image_usable):
    """Which region each cell is proven to enter.

    Parameters
    ----------
    regions : sequence of Region
    cell_lo, cell_hi : ndarray, shape (L, n)
    image_lo, image_hi : ndarray, shape (L, n)
        Image boxes at the horizon.
    image_usable : ndarray of bool, shape (L,)
        The tube keeps every limit and the image encloses every trajectory's end.

    Returns
    -------
    region : ndarray of int, shape (L,)
        A region holding the cell or its image; -1 for none.
    whole : ndarray of bool, shape (L,)
        The cell itself lies in that region (no flow needed).
    """
    L = len(cell_lo)
    image_usable = image_usable & np.all(image_lo <= image_hi, axis=1)
    region = np.full(L, -1)
    whole = np.zeros(L, bool)
    for k, r in enumerate(regions):
        free = region < 0
        cell_in = free & _inside(r, cell_lo, cell_hi)
        region[cell_in] = k
        whole[cell_in] = True
        sel = np.flatnonzero((region < 0) & image_usable)
        if len(sel):
            region[sel[_inside(r, image_lo[sel], image_hi[sel])]] = k
    return region, whole


# -- certificate records --------------------------------------------------------------------
def regions_data(search):
    """The certificate's ``regions`` list (docs/certificate-format.md)."""
    from .container import encode_array, fraction_text

    out = []
    for r in (search.regions if search is not None else ()):
        centre, matrix, level, box = r.exact()
        out.append({"centre": [fraction_text(x) for x in centre],
                    "matrix": [[fraction_text(x) for x in row] for row in matrix],
                    "level": fraction_text(level),
                    "box": [[fraction_text(a), fraction_text(b)] for a, b in box],
                    "cover_depths": encode_array(r.cover_depth, "<i8"),
                    "cover_index": encode_array(r.cover_index, "<i8"),
                    "cover_class": encode_array(r.cover_class, "<i8")})
    return out


def trapping_cells(facts):
    """The per-cell keys ``trapped`` and ``trapped_whole`` of the certificate."""
    from .container import encode_array

    L = len(facts.outside)
    trapped = np.full(L, -1) if facts.trapped is None else facts.trapped
    whole = np.zeros(L, bool) if facts.trapped_whole is None else facts.trapped_whole
    return {"trapped": encode_array(np.asarray(trapped), "<i8"),
            "trapped_whole": [bool(x) for x in whole]}


def trapping_summary(search, facts):
    """The summary's ``trapping`` entry: each region and the cells it traps, and notes."""
    if search is None:
        return {"regions": [], "notes": []}
    trapped = np.full(len(facts.outside), -1) if facts.trapped is None else facts.trapped
    return {"regions": [{"centre": [float(x) for x in r.centre], "level": float(r.level),
                         "sub_boxes": int(len(r.cover_depth)),
                         "cells": int(np.sum(trapped == k))}
                        for k, r in enumerate(search.regions)],
            "notes": list(search.notes)}
