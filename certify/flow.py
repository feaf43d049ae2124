"""Validated flow enclosures for batches of boxes.

One step of size ``h`` from a set ``S = {m + A r : r in [r]}`` with box hull ``X``:

1. A-priori enclosure (Picard-Lindelof): a box ``E`` with ``X + [0, h] f(E)`` inside
   the interior of ``E``, or inside ``E`` with ``Df`` finite on ``E``; then every
   solution from ``X`` stays in ``E`` on ``[0, h]``.
2. Taylor step with the mean-value form (Moore 1966; Lohner 1987)::

       phi_h(x) in T(m) + DT(J) A [r] + h^q f^[q](E),   T(x) = sum_{k<q} h^k f^[k](x)

   with ``J`` the hull of ``X`` and ``m``.
3. Wrapping control (Lohner 1987): the new set is ``m' + A' [r']`` with
   ``[r'] = B (Y - m') + (B DT A) [r]`` and ``B`` a rigorous enclosure of ``A'^-1``,
   ``A'`` the orthogonal QR factor of ``mid(DT A)`` (:func:`qr_frame`). Rule
   ``"qr+parallelepiped"`` carries a second set beside it whose ``A'`` is ``mid(DT A)``
   with unit columns (:func:`parallelepiped_frame`), which a rotating, shearing flow
   does not wrap; the end box is the intersection of both sets' boxes.

See docs/method.md for the exact order of operations, which the checker repeats.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, fields
from itertools import product

import numpy as np

from . import interval as iv
from . import stacked
from .evaluate import evaluate_boxes
from .taylor import chosen_arguments

__all__ = ["DeadlinePassed", "FlowResult", "FlowStart", "flow_boxes", "imatmul",
           "interval_inverse", "hull_of_set", "join_results", "truncate_results", "qr_frame",
           "parallelepiped_frame", "FRAME_RULES"]

#: A parallelepiped frame with a larger condition number is replaced by its QR factor.
FRAME_CONDITION_LIMIT = 1e3
#: Target width of a step's Taylor remainder, as a share of the set's width.
REMAINDER_SHARE = 0.01

OK, STOPPED, STEP_LIMIT, NO_ENCLOSURE, NOT_FINITE = 0, 1, 2, -1, -2
STATUS_REASONS = {
    OK: "reached the horizon",
    STOPPED: "stopped early by the caller",
    STEP_LIMIT: "step limit reached before the horizon",
    NO_ENCLOSURE: "no a-priori enclosure: the step size fell below its minimum "
                  "(fast dynamics or blow-up)",
    NOT_FINITE: "enclosure not finite (overflow, a division by an interval containing 0, "
                "or a function outside its domain)",
}


def imatmul(alo, ahi, blo, bhi):
    """Interval matrix product of stacks ``(N, n, k) @ (N, k, p)``.

    Entry ``(i, j)`` is ``sum_l a_il b_lj`` folded left over ``l``. A float matrix
    passed as one array for both bounds is a point (its products are computed once).
    """
    a, b = stacked.stack(alo, ahi), stacked.stack(blo, bhi)
    products = stacked.mul(a[..., :, :, None], b[..., None, :, :])
    acc = products[..., 0, :]
    for l in range(1, alo.shape[-1]):
        acc = stacked.add(acc, products[..., l, :])
    return stacked.bounds(acc)


def _matvec(alo, ahi, vlo, vhi):
    lo, hi = imatmul(alo, ahi, vlo[..., None], vhi[..., None])
    return lo[..., 0], hi[..., 0]


def hull_of_set(m, A, rlo, rhi):
    """Box hull of ``{m + A r : r in [rlo, rhi]}`` for stacks (outward rounded)."""
    plo, phi = _matvec(A, A, rlo, rhi)
    return iv.add(m, m, plo, phi)


def interval_inverse(A):
    """Rigorous enclosure of ``A^-1`` for a stack of invertible float matrices.

    With ``C`` the float inverse of ``A`` (any approximation would do) and
    ``delta = ||I - C A||_inf < 1/2``, ``|A^-1 - C| <= delta / (1 - delta) ||C||_inf``
    entrywise.

    Returns
    -------
    lo, hi : ndarray, shape (N, n, n)
    ok : ndarray of bool, shape (N,)
        False where ``delta`` is not below 1/2 (the enclosure is then unusable).
    """
    n = A.shape[-1]
    C = np.linalg.inv(A)
    plo, phi = imatmul(C, C, A, A)
    eye = np.eye(n)
    rlo, rhi = iv.sub(eye, eye, plo, phi)
    mag = np.maximum(np.abs(rlo), np.abs(rhi))
    delta = _sum_up(mag)                         # row sums rounded up, shape (N, n)
    delta = delta.max(axis=-1)
    norm_c = _sum_up(np.abs(C)).max(axis=-1)
    ok = delta < 0.5
    one_minus = iv.round_down(1.0 - delta)
    eps = iv.round_up(iv.round_up(delta / one_minus) * norm_c)
    eps = np.where(ok, eps, np.inf)[:, None, None]
    return iv.round_down(C - eps), iv.round_up(C + eps), ok


def _sum_up(a):
    """Sum over the last axis rounded up (nonnegative entries)."""
    acc = a[..., 0]
    for j in range(1, a.shape[-1]):
        _, acc = iv.add(acc, acc, a[..., j], a[..., j])
    return acc


@dataclass
class FlowResult:
    """Enclosures of the flow of a batch of boxes.

    Step records are stored flat, grouped by box in step order; ``step_start[b]`` and
    ``n_steps[b]`` locate box ``b``'s steps.

    Attributes
    ----------
    status : ndarray of int, shape (N,)
        ``>= 0`` finished (0 horizon, 1 stopped by caller, 2 step limit); ``< 0`` failed.
    n_steps, step_start : ndarray of int, shape (N,)
    t_lo, t_hi : ndarray, shape (N,)
        Enclosure of the time reached (the horizon).
    image_lo, image_hi : ndarray, shape (N, n)
        Box containing the flow of the box at the horizon (NaN where failed).
    set0_m, set0_r_lo, set0_r_hi : ndarray, shape (N, n)
        The starting set ``m0 + [r0]`` (``A0 = I``), which contains the box.
    image_m, image_A, image_r_lo, image_r_hi : ndarray, shapes (N, n), (N, K, n, n),
            (N, K, n), (N, K, n)
        The sets ``image_m + image_A[:, k] [image_r[:, k]]`` at the horizon, one per
        frame of the rule (K of them), each enclosing the flow of the box there (NaN
        where the flow failed).
    next_h : ndarray, shape (N,)
        The size the box's next step would have had (NaN where the flow failed or was
        cut): with the image sets and box, where a longer flow resumes (:class:`FlowStart`).
    h : ndarray, shape (S,)
        Step sizes.
    t0_lo, t0_hi : ndarray, shape (S,)
        Enclosure of each step's start time.
    x_lo, x_hi : ndarray, shape (S, n)
        Box at the start of each step (the point-time enclosure at ``t0``).
    e_lo, e_hi : ndarray, shape (S, n)
        A-priori box of each step (the tube over the step).
    m, A, r_lo, r_hi : ndarray, shapes (S, n), (S, n, n), (S, n), (S, n), or None
        Set at the end of each step (None when flowed with ``keep_sets=False``).
    end_lo, end_hi : ndarray, shape (S, n)
        Box at the end of each step.
    """

    status: np.ndarray
    n_steps: np.ndarray
    step_start: np.ndarray
    t_lo: np.ndarray
    t_hi: np.ndarray
    image_lo: np.ndarray
    image_hi: np.ndarray
    set0_m: np.ndarray
    set0_r_lo: np.ndarray
    set0_r_hi: np.ndarray
    image_m: np.ndarray
    image_A: np.ndarray
    image_r_lo: np.ndarray
    image_r_hi: np.ndarray
    next_h: np.ndarray
    h: np.ndarray
    t0_lo: np.ndarray
    t0_hi: np.ndarray
    x_lo: np.ndarray
    x_hi: np.ndarray
    e_lo: np.ndarray
    e_hi: np.ndarray
    m: np.ndarray
    A: np.ndarray
    r_lo: np.ndarray
    r_hi: np.ndarray
    end_lo: np.ndarray
    end_hi: np.ndarray
    extras: dict = field(default_factory=dict)

    @property
    def success(self):
        """Bool array: the box has a usable image."""
        return self.status >= 0

    def reasons(self):
        """One plain-words reason per box."""
        return [STATUS_REASONS[int(s)] for s in self.status]

    def steps_of(self, b):
        """Slice of the step records of box `b`."""
        return slice(self.step_start[b], self.step_start[b] + self.n_steps[b])


def _time_box(h, flo, fhi):
    """``[0, h] * [f]``: exact zero end, other end rounded outward."""
    _, up = iv.mul(h, h, fhi, fhi)
    down, _ = iv.mul(h, h, flo, flo)
    return np.minimum(down, 0.0), np.maximum(up, 0.0)


#: Share of the room between the tightened a-priori box and the found one that is kept.
BLEND = 0.25


def _reach(programs, xlo, xhi, hh, elo, ehi, params):
    """``X + [0, h] f(E)`` (outward rounded)."""
    flo, fhi = evaluate_boxes(programs.field, elo, ehi, params)
    dlo, dhi = _time_box(hh, flo, fhi)
    return iv.add(xlo, xhi, dlo, dhi)


def _is_apriori(programs, nlo, nhi, elo, ehi, params):
    """Whether ``E`` is an a-priori box given its reach ``N = X + [0, h] f(E)``.

    ``N`` must lie in the interior of ``E``; where a side of ``N`` touches the side of
    ``E``, ``Df`` must be finite on ``E`` (uniqueness, docs/method.md step 1; never for
    programs without a Jacobian: order 1 and models with kinks).
    """
    inside = np.all((nlo >= elo) & (nhi <= ehi), axis=1)
    touching = inside & ~np.all((nlo > elo) & (nhi < ehi), axis=1)
    if touching.any():
        if programs.jacobian is None:
            inside &= ~touching
        else:
            jlo, jhi = evaluate_boxes(programs.jacobian, elo[touching], ehi[touching],
                                      params)
            inside[touching] = np.all(np.isfinite(jlo) & np.isfinite(jhi), axis=1)
    return inside


def _apriori(programs, xlo, xhi, h, params, iterations=4):
    """Find an a-priori box E (see :func:`_is_apriori`); returns (elo, ehi, ok)."""
    hh = h[:, None]
    elo, ehi = _reach(programs, xlo, xhi, hh, xlo, xhi, params)
    ok = np.zeros(len(h), bool)
    out_lo, out_hi = elo.copy(), ehi.copy()
    for _ in range(iterations):
        w = ehi - elo
        pad = 0.1 * w + 1e-12 * np.abs(elo) + 1e-300
        elo, ehi = iv.round_down(elo - pad), iv.round_up(ehi + pad)
        nlo, nhi = _reach(programs, xlo, xhi, hh, elo, ehi, params)
        inside = _is_apriori(programs, nlo, nhi, elo, ehi, params) & ~ok
        out_lo[inside], out_hi[inside] = elo[inside], ehi[inside]
        ok |= inside
        if ok.all():
            break
        elo, ehi = nlo, nhi
    # tighten: E' = X + [0,h] f(E) is usually an a-priori box too, and a smaller one
    tlo, thi = _reach(programs, xlo, xhi, hh, out_lo, out_hi, params)
    nlo, nhi = _reach(programs, xlo, xhi, hh, tlo, thi, params)
    tight = ok & _is_apriori(programs, nlo, nhi, tlo, thi, params)
    # keep a share BLEND of the room between the tight box and the found one: the
    # checker's ball arithmetic evaluates f a little wider and needs that room
    blo = np.minimum(tlo, iv.round_down(tlo + BLEND * (out_lo - tlo)))
    bhi = np.maximum(thi, iv.round_up(thi + BLEND * (out_hi - thi)))
    blo, bhi = np.maximum(blo, out_lo), np.minimum(bhi, out_hi)
    # short bounds (trailing zero bits, binary32), around the tight box: the certificate
    # stores them compactly
    blo, bhi = iv.short_bounds(blo, bhi, tlo, thi)
    nlo, nhi = _reach(programs, xlo, xhi, hh, blo, bhi, params)
    blended = ok & _is_apriori(programs, nlo, nhi, blo, bhi, params)
    out_lo[tight], out_hi[tight] = tlo[tight], thi[tight]
    out_lo[blended], out_hi[blended] = blo[blended], bhi[blended]
    return out_lo, out_hi, ok


def _split_at_point(program, lo, hi, point, params):
    """Hull of a program over the ``2^n`` boxes into which `point` cuts each box.

    The point lies in its box (``J = hull(X, m)`` contains ``m``), so the pieces cover
    it; cutting at ``m``, which the checker knows exactly, lets it cut its own (smaller)
    box at the same place. Natural interval extensions of rational rates overestimate
    less on the parts than on the whole box: on the demo fermenter cells of 1/128 of
    the window prove 24.5 % of it safe this way, and none without.
    """
    N, n = lo.shape
    corners = np.array(list(product((False, True), repeat=n)))
    plo = np.where(corners[:, None, :], point[None], lo[None]).reshape(-1, n)
    phi = np.where(corners[:, None, :], hi[None], point[None]).reshape(-1, n)
    vlo, vhi = evaluate_boxes(program, plo, phi, params)
    vlo, vhi = vlo.reshape(len(corners), N, -1), vhi.reshape(len(corners), N, -1)
    return vlo.min(axis=0), vhi.max(axis=0)


def _centered_jacobian(programs, glo, ghi, jlo, jhi, m, params):
    """``Df(J)`` with each entry of ``programs.centered`` intersected with its centered
    form ``Df_e(m) + sum_l (d Df_e / d x_l)(J) (J_l - m_l)`` (folded left over ``l``),
    where that form is finite (:func:`certify.taylor.centered_entries`); and the
    enclosure ``hlo, hhi`` of the second derivatives ``programs.hessian`` on ``J``.

    `m` lies in ``J``, so the mean-value theorem puts every value of ``Df_e`` on ``J``
    in the form; the checker applies the same rule to its own ``J`` and ``m``.
    """
    n = m.shape[1]
    entries = list(programs.centered)
    at_lo, at_hi = evaluate_boxes(programs.jacobian, m, m, params)
    hlo, hhi = evaluate_boxes(programs.hessian, jlo, jhi, params)
    dlo, dhi = iv.sub(jlo, jhi, m, m)
    clo, chi = at_lo[:, entries], at_hi[:, entries]
    for l in range(n):
        plo, phi = iv.mul(hlo[:, l::n], hhi[:, l::n], dlo[:, l:l + 1], dhi[:, l:l + 1])
        clo, chi = iv.add(clo, chi, plo, phi)
    return (*_narrowed(glo, ghi, entries, clo, chi), hlo, hhi)


def _product_jacobian(programs, glo, ghi, hlo, hhi, wlo, whi, jlo, jhi, params):
    """``Df^[2](J)`` (the first ``n * n`` columns of `wlo`, `whi`) intersected, where
    finite, with its product form ``(Df(J) Df(J) + sum_k D Df_.k(J) f_k(J)) / 2``.

    ``f^[2] = Df f / 2``, so ``Df^[2] = (Df Df + D^2f[f]) / 2`` with ``D^2f[f]_ij =
    sum_k (d^2 f_i / dx_j dx_k) f_k``: the product takes the centered ``Df(J)``
    (:func:`_centered_jacobian`), whose entries are 2-4 times narrower than their
    natural extension, and the Hessian entries ``hlo, hhi`` of ``programs.centered``
    (the other entries of ``Df`` are constant in the states). Products are folded in
    the order of ``k``; the checker applies the same rule to its own ``J``.
    """
    N, n = jlo.shape
    flo, fhi = evaluate_boxes(programs.field, jlo, jhi, params)
    G = glo.reshape(N, n, n), ghi.reshape(N, n, n)
    plo, phi = imatmul(*G, *G)
    for p, e in enumerate(programs.centered):
        i, j = divmod(e, n)
        for k in range(n):
            tlo, thi = iv.mul(hlo[:, p * n + k], hhi[:, p * n + k], flo[:, k], fhi[:, k])
            plo[:, i, j], phi[:, i, j] = iv.add(plo[:, i, j], phi[:, i, j], tlo, thi)
    plo, phi = iv.mul(plo.reshape(N, n * n), phi.reshape(N, n * n), 0.5, 0.5)
    return _narrowed(wlo, whi, slice(0, n * n), plo, phi)


def _first_order_at_centre(programs, hlo, hhi, jlo, jhi, m, h, params):
    """``Df(m)``, and the enclosure ``(h/2) sum_(j,l) (d^2 f / dx_j dx_l)(J) d_j d_l``
    (``d = J - m``) of what ``h (f(x) - f(m) - Df(m) (x - m))`` can be for ``x`` in ``J``.

    Taylor's formula with integral remainder gives ``f(x) - f(m) - Df(m) d =
    int_0^1 (1 - s) D^2f(m + s d)[d, d] ds``, and ``int_0^1 (1 - s) ds = 1/2``. The second
    derivatives ``hlo, hhi`` are those of ``programs.centered`` on ``J`` (the other
    entries of ``Df`` are constant in the states); ``d_j^2`` is a square (never
    negative). Sums fold over the entries, then over ``l``; the checker folds its own
    in the same order.
    """
    N, n = m.shape
    at_lo, at_hi = evaluate_boxes(programs.jacobian, m, m, params)
    dlo, dhi = iv.sub(jlo, jhi, m, m)
    qlo, qhi = np.zeros((N, n)), np.zeros((N, n))
    for p, e in enumerate(programs.centered):
        i, j = divmod(e, n)
        for l in range(n):
            if l == j:
                plo, phi = iv.pow_int(dlo[:, j], dhi[:, j], 2)
            else:
                plo, phi = iv.mul(dlo[:, j], dhi[:, j], dlo[:, l], dhi[:, l])
            tlo, thi = iv.mul(hlo[:, p * n + l], hhi[:, p * n + l], plo, phi)
            qlo[:, i], qhi[:, i] = iv.add(qlo[:, i], qhi[:, i], tlo, thi)
    half_lo, half_hi = iv.mul(h, h, 0.5, 0.5)
    qlo, qhi = iv.mul(half_lo[:, None], half_hi[:, None], qlo, qhi)
    return at_lo, at_hi, qlo, qhi


def _narrowed(lo, hi, columns, flo, fhi):
    """Copies of `lo`, `hi` with `columns` intersected with the enclosures `flo`, `fhi`
    of the same values where both of these bounds are finite."""
    usable = np.isfinite(flo) & np.isfinite(fhi)
    lo, hi = lo.copy(), hi.copy()
    lo[:, columns] = np.where(usable, np.maximum(lo[:, columns], flo), lo[:, columns])
    hi[:, columns] = np.where(usable, np.minimum(hi[:, columns], fhi), hi[:, columns])
    return lo, hi


def _ordered_columns(mid, width):
    """Columns of `mid` ordered by their spread ``|mid_j| width_j`` (non-finite: I)."""
    n = mid.shape[-1]
    with np.errstate(invalid="ignore", over="ignore"):
        spread = np.linalg.norm(mid, axis=1) * width
    order = np.argsort(-np.nan_to_num(spread, nan=0.0), axis=1, kind="stable")
    cols = np.take_along_axis(mid, order[:, None, :], axis=2)
    cols[~np.all(np.isfinite(cols), axis=(1, 2))] = np.eye(n)
    return cols


def qr_frame(mid, width):
    """Lohner's QR frame: the orthogonal factor of the ordered columns of `mid`."""
    return np.linalg.qr(_ordered_columns(mid, width))[0]


def parallelepiped_frame(mid, width):
    """The ordered columns of `mid` scaled to unit length (the QR frame where that matrix
    has a condition number above ``FRAME_CONDITION_LIMIT``)."""
    cols = _ordered_columns(mid, width)
    length = np.linalg.norm(cols, axis=1, keepdims=True)
    flat = ~np.all(length > 0, axis=(1, 2))
    frame = cols / np.where(length > 0, length, 1.0)
    frame[flat] = np.eye(cols.shape[-1])
    with np.errstate(divide="ignore", invalid="ignore"):
        skewed = flat | ~(np.linalg.cond(frame) <= FRAME_CONDITION_LIMIT)
    if skewed.any():
        frame[skewed] = np.linalg.qr(cols[skewed])[0]
    return frame


#: The frame of each set a rule carries: one set in QR frames, or that set and a second
#: one in parallelepiped frames, the end box being the intersection of their hulls.
_FRAMES = {"qr+parallelepiped": (qr_frame, parallelepiped_frame), "qr": (qr_frame,)}
#: Which sets a flow carries (the certificate records the rule; the checker applies it).
FRAME_RULES = tuple(_FRAMES)


def frame_count(frames):
    """The number of sets a flow under the frame rule `frames` carries."""
    return len(_FRAMES[frames])


def _coordinates(Q, new_m, ylo, yhi, Mlo, Mhi, rlo, rhi):
    """The set ``new_m + Q [r']`` of a step end in the frame `Q`, and its box hull.

    `Q` (an array of the caller's own) becomes ``I`` where its inverse is not enclosed.
    """
    n = Q.shape[-1]
    Blo, Bhi, inv_ok = interval_inverse(Q)
    fallback = ~inv_ok
    if fallback.any():
        Q[fallback] = np.eye(n)
        Blo[fallback] = np.eye(n)
        Bhi[fallback] = np.eye(n)
    dylo, dyhi = iv.sub(ylo, yhi, new_m, new_m)
    alo_, ahi_ = _matvec(Blo, Bhi, dylo, dyhi)
    BMlo, BMhi = imatmul(Blo, Bhi, Mlo, Mhi)
    clo_, chi_ = _matvec(BMlo, BMhi, rlo, rhi)
    nrlo, nrhi = iv.add(alo_, ahi_, clo_, chi_)
    hlo, hhi = hull_of_set(new_m, Q, nrlo, nrhi)
    return Q, nrlo, nrhi, hlo, hhi


def _taylor_step(programs, m, sets, xlo, xhi, elo, ehi, h, params, frames):
    """One mean-value Taylor step of the sets ``m + A [r]`` (one per frame of the rule
    `frames`); returns the new sets, their end box and a usable flag."""
    N, n = m.shape
    q = programs.order
    hk = [(np.ones(N), np.ones(N))] + [iv.pow_int(h, h, k) for k in range(1, q + 1)]
    # T(m)
    tlo, thi = m.copy(), m.copy()
    if q > 1:
        clo, chi = evaluate_boxes(programs.coefficients, m, m, params)
        for k in range(1, q):
            c_lo, c_hi = clo[:, (k - 1) * n:k * n], chi[:, (k - 1) * n:k * n]
            plo_, phi_ = iv.mul(hk[k][0][:, None], hk[k][1][:, None], c_lo, c_hi)
            tlo, thi = iv.add(tlo, thi, plo_, phi_)
    # remainder h^q f^[q](E)
    flo, fhi = evaluate_boxes(programs.remainder, elo, ehi, params)
    Rlo, Rhi = iv.mul(hk[q][0][:, None], hk[q][1][:, None], flo, fhi)
    ylo, yhi = iv.add(tlo, thi, Rlo, Rhi)
    # DT(J) = I + sum h^k Df^[k](J)
    eye = np.broadcast_to(np.eye(n), (N, n, n))
    dlo, dhi = eye.copy(), eye.copy()
    if q > 1:
        jlo, jhi = np.minimum(xlo, m), np.maximum(xhi, m)
        # the first-order term h Df(J) dominates: its Jacobian is evaluated on the parts
        # of J cut at m where that pays (FlowPrograms.cut_jacobian), the higher-order ones
        # on J whole
        if programs.cut_jacobian:
            glo, ghi = _split_at_point(programs.jacobian, jlo, jhi, m, params)
        else:
            glo, ghi = evaluate_boxes(programs.jacobian, jlo, jhi, params)
        if programs.hessian is not None:
            glo, ghi, hlo, hhi = _centered_jacobian(programs, glo, ghi, jlo, jhi, m, params)
        if q > 2:
            wlo, whi = evaluate_boxes(programs.higher_jacobians, jlo, jhi, params)
            if programs.hessian is not None:
                wlo, whi = _product_jacobian(programs, glo, ghi, hlo, hhi, wlo, whi, jlo,
                                             jhi, params)
            glo, ghi = np.concatenate([glo, wlo], axis=1), np.concatenate([ghi, whi], axis=1)
        if programs.hessian is not None:
            # h Df at m, and the rest of h (f(x) - f(m)) in Y (docs/method.md, exact order,
            # step 4)
            at_lo, at_hi, qlo, qhi = _first_order_at_centre(programs, hlo, hhi, jlo, jhi,
                                                            m, h, params)
            # rows where the rest is not finite keep h Df(J)
            rows = np.flatnonzero(np.all(np.isfinite(qlo) & np.isfinite(qhi), axis=1)
                                  & np.all(np.isfinite(at_lo) & np.isfinite(at_hi), axis=1))
            ylo, yhi = ylo.copy(), yhi.copy()
            ylo[rows], yhi[rows] = iv.add(ylo[rows], yhi[rows], qlo[rows], qhi[rows])
            glo[rows, :n * n], ghi[rows, :n * n] = at_lo[rows], at_hi[rows]
        for k in range(1, q):
            g_lo = glo[:, (k - 1) * n * n:k * n * n].reshape(N, n, n)
            g_hi = ghi[:, (k - 1) * n * n:k * n * n].reshape(N, n, n)
            plo_, phi_ = iv.mul(hk[k][0][:, None, None], hk[k][1][:, None, None], g_lo, g_hi)
            dlo, dhi = iv.add(dlo, dhi, plo_, phi_)
    # every set of the box: its image Y + M [r] and its new coordinates; the end box
    # is the intersection of all of them. The sets are stacked along the batch axis
    # (set k of box b in row k N + b): one pass of each operation serves all of them
    new_m = 0.5 * (ylo + yhi)
    K = len(sets)
    A, rlo, rhi = (np.concatenate(part) for part in zip(*sets))
    Mlo, Mhi = imatmul(*_repeat(K, dlo, dhi), A, A)
    vlo, vhi = _matvec(Mlo, Mhi, rlo, rhi)
    yklo, ykhi, km = _repeat(K, ylo, yhi, new_m)
    blo, bhi = iv.add(yklo, ykhi, vlo, vhi)
    mid, width = 0.5 * (Mlo + Mhi), rhi - rlo
    Q = np.concatenate([frame(mid[k * N:(k + 1) * N], width[k * N:(k + 1) * N])
                        for k, frame in enumerate(_FRAMES[frames])])
    Q, nrlo, nrhi, hlo, hhi = _coordinates(Q, km, yklo, ykhi, Mlo, Mhi, rlo, rhi)
    endlo = np.maximum(hlo, blo).reshape(K, N, n).max(axis=0)
    endhi = np.minimum(hhi, bhi).reshape(K, N, n).min(axis=0)
    usable = np.all(np.isfinite(new_m), axis=1)
    usable &= np.all((np.isfinite(nrlo) & np.isfinite(nrhi)).reshape(K, N, n), axis=(0, 2))
    new_sets = [(Q[k * N:(k + 1) * N], nrlo[k * N:(k + 1) * N], nrhi[k * N:(k + 1) * N])
                for k in range(K)]
    usable &= np.all(np.isfinite(endlo) & np.isfinite(endhi), axis=1)
    # how much the remainder adds, relative to the set's own size (step-size control)
    growth = np.max((Rhi - Rlo) / np.maximum(xhi - xlo, 1e-300), axis=1)
    return new_m, new_sets, endlo, endhi, usable, growth


def _branch_step(programs, m, sets, xlo, xhi, elo, ehi, h, params, frames):
    """:func:`_taylor_step` of each box with the programs of the smooth branch that the
    model's right-hand side is on its a-priori box ``E`` (``programs.branches``), and
    with `programs` (order 1) where a kink may lie in ``E``; also the order of each."""
    N = len(m)
    if programs.branches is None:
        # one group of every row: no copies of the batch on each step
        return (_taylor_step(programs, m, sets, xlo, xhi, elo, ehi, h, params, frames),
                np.full(N, programs.order))
    order = np.empty(N, int)
    out = None
    for progs, rows in branch_groups(programs, elo, ehi, params):
        part = _taylor_step(progs, m[rows], [tuple(a[rows] for a in one) for one in sets],
                            xlo[rows], xhi[rows], elo[rows], ehi[rows], h[rows], params,
                            frames)
        if out is None:
            out = _scatter_like(part, N)
        _scatter(out, part, rows)
        order[rows] = progs.order
    return out, order


def branch_groups(programs, elo, ehi, params):
    """The boxes ``E`` grouped by the programs that hold on the whole box.

    Returns
    -------
    list of (FlowPrograms, ndarray of int)
        For a model without branches, `programs` and every row. Otherwise the rows where
        a kink may lie in ``E`` with `programs` (order 1), then per smooth branch met the
        rows it holds on, with its programs (``programs.branches``). Empty groups are
        left out.
    """
    branches = programs.branches
    if branches is None:
        return [(programs, np.arange(len(elo)))]
    slo, shi = evaluate_boxes(branches.switches, elo, ehi, params)
    choice = chosen_arguments(branches.sites, slo, shi)
    known = np.all(choice >= 0, axis=1)
    groups = [(programs, np.flatnonzero(~known))]
    rows = np.flatnonzero(known)
    if len(rows):
        patterns, which = np.unique(choice[rows], axis=0, return_inverse=True)
        groups += [(branches.programs(tuple(int(v) for v in pattern)),
                    rows[which.ravel() == g]) for g, pattern in enumerate(patterns)]
    return [(progs, rows) for progs, rows in groups if len(rows)]


def _scatter_like(part, N):
    """Empty arrays of `N` rows shaped like the nested arrays of `part`."""
    if isinstance(part, (tuple, list)):
        return [_scatter_like(p, N) for p in part]
    return np.empty((N,) + part.shape[1:], part.dtype)


def _scatter(out, part, rows):
    if isinstance(part, (tuple, list)):
        for o, p in zip(out, part):
            _scatter(o, p, rows)
    else:
        out[rows] = part


def _repeat(K, *arrays):
    """Each array `K` times along its first axis (the rows of `K` stacked sets)."""
    return [np.concatenate([a] * K) if K > 1 else a for a in arrays]


#: Significant bits of a step size: few distinct sizes make a small certificate.
STEP_BITS = 8


def _coarse(h, rest):
    """The step size: `rest` (the time left to the horizon) where `h` reaches it, else `h`
    rounded down to :data:`STEP_BITS` significant bits.

    Any step size is sound (each step's a-priori box is proven for the size it has).
    """
    mant, exp = np.frexp(h)
    return np.where(h >= rest, rest, np.ldexp(np.floor(np.ldexp(mant, STEP_BITS)),
                                              exp - STEP_BITS))


@dataclass
class FlowStart:
    """Where the flows of a batch resume: per box, the state of an earlier flow of it at
    the end of its last step. Rows whose ``h`` is NaN start from their box instead.

    Attributes
    ----------
    m, A, r_lo, r_hi : ndarray, shapes (N, n), (N, K, n, n), (N, K, n), (N, K, n)
        The sets ``m + A[:, k] [r[:, k]]``, one per frame of the rule.
    x_lo, x_hi : ndarray, shape (N, n)
        The box.
    t_lo, t_hi : ndarray, shape (N,)
        Enclosure of the time.
    h : ndarray, shape (N,)
        Size of the next step.
    steps : ndarray of int, shape (N,)
        Steps taken to get there (they count toward ``max_steps``).
    """

    m: np.ndarray
    A: np.ndarray
    r_lo: np.ndarray
    r_hi: np.ndarray
    x_lo: np.ndarray
    x_hi: np.ndarray
    t_lo: np.ndarray
    t_hi: np.ndarray
    h: np.ndarray
    steps: np.ndarray

    @classmethod
    def of(cls, result):
        """Where the flows of `result` (a :class:`FlowResult` of flows from their boxes)
        would go on."""
        return cls(m=result.image_m, A=result.image_A, r_lo=result.image_r_lo,
                   r_hi=result.image_r_hi, x_lo=result.image_lo, x_hi=result.image_hi,
                   t_lo=result.t_lo, t_hi=result.t_hi, h=result.next_h,
                   steps=result.n_steps)

    def take(self, rows):
        """The starts of the boxes `rows`."""
        return FlowStart(**{f.name: getattr(self, f.name)[rows] for f in fields(self)})

    def put(self, front, t_lo, t_hi, steps_left):
        """Write the resuming rows into a fresh flow's front and times (in place);
        return the steps each box has left."""
        on = np.isfinite(self.h)
        front.m[on] = self.m[on]
        for k, (A, r_lo, r_hi) in enumerate(front.sets):
            A[on], r_lo[on], r_hi[on] = self.A[on, k], self.r_lo[on, k], self.r_hi[on, k]
        front.x_lo[on], front.x_hi[on] = self.x_lo[on], self.x_hi[on]
        front.h = np.where(on, self.h, front.h)
        t_lo[on], t_hi[on] = self.t_lo[on], self.t_hi[on]
        return np.where(on, steps_left - self.steps, steps_left)


class DeadlinePassed(Exception):
    """:func:`flow_boxes` was given a deadline and it passed before the batch was done."""


def flow_boxes(programs, lo, hi, params, *, min_horizon, max_horizon, step=0.1,
               max_step=0.25, min_step=1e-6, max_steps=400, should_stop=None, deadline=None,
               frames="qr+parallelepiped", keep_sets=True, start=None):
    """Enclose the flow of every box of a batch up to a horizon per box.

    Parameters
    ----------
    programs : certify.taylor.FlowPrograms
    lo, hi : ndarray, shape (N, n)
        The boxes.
    params : sequence of (float, float)
        Parameter intervals in model order (exactly representable endpoints that enclose
        the model's parameters).
    min_horizon, max_horizon : float or ndarray, shape (N,)
        A box stops at the first step end ``t >= min_horizon`` where `should_stop` says so,
        and at the latest at the first step end ``t >= max_horizon``.
    step : float
        First step size tried. The next step aims at a Taylor remainder of
        ``REMAINDER_SHARE`` of the set's width (changing by a factor 0.5 to 1.25),
        and halves while no a-priori enclosure is found.
    max_step : float
        Largest step size.
    min_step : float
        Below this step size a box fails with ``NO_ENCLOSURE``.
    max_steps : int
    should_stop : callable, optional
        ``should_stop(ids, end_lo, end_hi, t_lo, t_hi) -> bool array`` for boxes past
        `min_horizon`; ``ids`` are batch indices, ``t_lo, t_hi`` enclose the step end time.
    deadline : float, optional
        A time of :func:`time.monotonic`; checked before every step.
    frames : str
        The frame rule: one set in QR frames (``"qr"``) or two sets, one in QR and one in
        parallelepiped frames, whose boxes are intersected (``"qr+parallelepiped"``).
    keep_sets : bool
        Keep each step's (QR) set ``m + A [r]``; without, those fields of the result are
        None (the boxes alone take about half the memory).
    start : FlowStart, optional
        Where the flows of some boxes resume: from the end of an earlier flow of the box
        (its image sets and box, time and next step size) rather than from the box. The
        result then holds the steps after that end only, the same steps as the flow from
        the box would take there (:meth:`FlowStart.of`).

    Returns
    -------
    FlowResult

    Raises
    ------
    DeadlinePassed
        When `deadline` is passed before every box is done (nothing is returned).
    """
    lo = np.asarray(lo, float)
    hi = np.asarray(hi, float)
    N, n = lo.shape
    min_h = np.broadcast_to(np.asarray(min_horizon, float), (N,))
    max_h = np.broadcast_to(np.asarray(max_horizon, float), (N,))
    status = np.full(N, OK)
    n_steps = np.zeros(N, int)
    t_lo = np.zeros(N)
    t_hi = np.zeros(N)
    image_lo = np.full((N, n), np.nan)
    image_hi = np.full((N, n), np.nan)
    image_sets = _ImageSets(N, n, len(_FRAMES[frames]))

    m0 = 0.5 * (lo + hi)
    r0lo, _ = iv.sub(lo, lo, m0, m0)
    _, r0hi = iv.sub(hi, hi, m0, m0)
    # the first step obeys the same caps as later ones
    front = _Front(ids=np.arange(N), m=m0.copy(),
                   sets=[(np.broadcast_to(np.eye(n), (N, n, n)).copy(), r0lo.copy(), r0hi.copy())
                         for _ in _FRAMES[frames]],
                   x_lo=lo.copy(), x_hi=hi.copy(),
                   h=_coarse(min(float(step), max_step), np.maximum(max_h, min_step)))
    next_h = np.full(N, np.nan)
    steps_left = np.full(N, max_steps)

    def retire(mask):
        # boxes of the front that end here keep its box, sets and next step size
        rows = front.ids[mask]
        image_lo[rows], image_hi[rows] = front.x_lo[mask], front.x_hi[mask]
        image_sets.put(rows, front.m[mask], [tuple(a[mask] for a in one) for one in front.sets])
        next_h[rows] = front.h[mask]
        front.keep(~mask)

    def ends_here(mask):
        # of the front's boxes `mask`, at a step end: those that end there
        ids, t1lo = front.ids, t_lo[front.ids]
        finish = mask & (t1lo >= max_h[ids])
        sel = np.flatnonzero(mask & ~finish & (t1lo >= min_h[ids]))
        if should_stop is not None and len(sel):
            stop = np.asarray(should_stop(ids[sel], front.x_lo[sel], front.x_hi[sel], t1lo[sel],
                                          t_hi[ids[sel]]), bool)
            status[ids[sel[stop]]] = STOPPED
            finish[sel[stop]] = True
        return finish

    if start is not None:
        steps_left = start.put(front, t_lo, t_hi, steps_left)
        # a resumed flow meets the stop rules first where the earlier flow went on
        retire(ends_here(np.isfinite(start.h)))
    records = []
    while True:
        # boxes out of steps keep the image at the time they reached
        spent = n_steps[front.ids] >= steps_left[front.ids]
        status[front.ids[spent]] = STEP_LIMIT
        retire(spent)
        if len(front.ids) == 0:
            break
        if deadline is not None and time.monotonic() >= deadline:
            raise DeadlinePassed
        ids, m, sets, xlo, xhi, h = (front.ids, front.m, front.sets, front.x_lo, front.x_hi,
                                     front.h)
        elo, ehi, ok = _apriori(programs, xlo, xhi, h, params)
        clean = ok.copy()
        while not ok.all():
            retry = ~ok & (h >= 2 * min_step)
            if not retry.any():
                break
            h = np.where(retry, h / 2, h)
            a_lo, a_hi, a_ok = _apriori(programs, xlo[retry], xhi[retry], h[retry], params)
            elo[retry], ehi[retry] = a_lo, a_hi
            ok[retry] = a_ok
        failed = ~ok
        new, order = _branch_step(programs, m, sets, xlo, xhi, elo, ehi, h, params, frames)
        new_m, new_sets, endlo, endhi, usable, growth = new
        new_A, nrlo, nrhi = new_sets[0]
        bad = failed | ~usable
        status[ids[failed]] = NO_ENCLOSURE
        status[ids[~failed & ~usable]] = NOT_FINITE
        good = ~bad
        t0lo, t0hi = t_lo[ids], t_hi[ids]
        t1lo, t1hi = iv.add(t0lo, t0hi, h, h)
        recorded = ((new_m[good], new_A[good], nrlo[good], nrhi[good]) if keep_sets
                    else (None,) * 4)
        records.append((ids[good], h[good], t0lo[good], t0hi[good], xlo[good], xhi[good],
                        elo[good], ehi[good], *recorded, endlo[good], endhi[good]))
        t_lo[ids[good]], t_hi[ids[good]] = t1lo[good], t1hi[good]
        n_steps[ids[good]] += 1
        with np.errstate(divide="ignore", invalid="ignore"):
            factor = np.clip((REMAINDER_SHARE / growth) ** (1.0 / order), 0.5, 1.25)
        factor = np.where(np.isfinite(factor), factor, 0.5)
        factor = np.where(clean, factor, np.minimum(factor, 1.0))
        # never step past the largest horizon by much
        h = _coarse(np.minimum(h * factor, max_step),
                    np.maximum(max_h[ids] - t_lo[ids], min_step))
        front.move(new_m, new_sets, endlo, endhi, h)
        front.keep(good)
        retire(ends_here(np.ones(len(front.ids), bool)))
    return _assemble(records, N, n, status, n_steps, t_lo, t_hi, image_lo, image_hi,
                     m0, r0lo, r0hi, image_sets, next_h)


@dataclass
class _Front:
    """The boxes of a batch still flowing, with their sets, boxes and next step sizes."""

    ids: np.ndarray
    m: np.ndarray
    sets: list
    x_lo: np.ndarray
    x_hi: np.ndarray
    h: np.ndarray

    def keep(self, mask):
        """Keep only the boxes `mask`."""
        self.ids, self.m, self.h = self.ids[mask], self.m[mask], self.h[mask]
        self.x_lo, self.x_hi = self.x_lo[mask], self.x_hi[mask]
        self.sets = [tuple(a[mask] for a in one) for one in self.sets]

    def move(self, m, sets, x_lo, x_hi, h):
        """Every box on to the end of its step."""
        self.m, self.sets, self.x_lo, self.x_hi, self.h = m, sets, x_lo, x_hi, h


class _ImageSets:
    """The sets of a batch's boxes at their horizons (:class:`FlowResult` ``image_*``)."""

    def __init__(self, N, n, K):
        self.m = np.full((N, n), np.nan)
        self.A = np.full((N, K, n, n), np.nan)
        self.r_lo = np.full((N, K, n), np.nan)
        self.r_hi = np.full((N, K, n), np.nan)

    def put(self, boxes, m, sets):
        self.m[boxes] = m
        for k, (A, rlo, rhi) in enumerate(sets):
            self.A[boxes, k], self.r_lo[boxes, k], self.r_hi[boxes, k] = A, rlo, rhi


def _assemble(records, N, n, status, n_steps, t_lo, t_hi, image_lo, image_hi, m0, r0lo, r0hi,
              image_sets, next_h):
    shapes = [(), (), (), (), (n,), (n,), (n,), (n,), (n,), (n, n), (n,), (n,), (n,), (n,)]
    parts = [list(c) for c in zip(*records)] if records else [[np.zeros((0,) + s)]
                                                              for s in shapes]
    records.clear()
    order = np.argsort(np.concatenate(parts[0]), kind="stable")
    cols = []
    for j in range(len(parts)):
        # one column at a time, its parts freed as soon as it is joined: the peak is
        # the records and one column, not twice all of them
        joined = None if parts[j][0] is None else np.concatenate(parts[j])
        parts[j] = None
        cols.append(None if joined is None else joined[order])
    step_start = _step_starts(n_steps)
    (_, h, t0lo, t0hi, xlo, xhi, elo, ehi, m, A, rlo, rhi, endlo, endhi) = cols
    return FlowResult(status=status, n_steps=n_steps, step_start=step_start, t_lo=t_lo,
                      t_hi=t_hi, image_lo=image_lo, image_hi=image_hi, set0_m=m0,
                      set0_r_lo=r0lo, set0_r_hi=r0hi, image_m=image_sets.m,
                      image_A=image_sets.A, image_r_lo=image_sets.r_lo,
                      image_r_hi=image_sets.r_hi, next_h=next_h, h=h, t0_lo=t0lo, t0_hi=t0hi,
                      x_lo=xlo, x_hi=xhi, e_lo=elo, e_hi=ehi, m=m, A=A, r_lo=rlo,
                      r_hi=rhi, end_lo=endlo, end_hi=endhi)


def _step_starts(n_steps):
    """Where each box's step records begin in the flat step arrays."""
    return np.concatenate([[0], np.cumsum(n_steps)[:-1]]).astype(int)


#: The fields of :class:`FlowResult` with one row per step (the others have one per box).
_STEP_FIELDS = ("h", "t0_lo", "t0_hi", "x_lo", "x_hi", "e_lo", "e_hi", "m", "A", "r_lo", "r_hi",
                "end_lo", "end_hi")
_BOX_FIELDS = ("status", "n_steps", "t_lo", "t_hi", "image_lo", "image_hi", "set0_m",
               "set0_r_lo", "set0_r_hi", "image_m", "image_A", "image_r_lo", "image_r_hi",
               "next_h")


def join_results(parts):
    """One :class:`FlowResult` of batches flowed apart, the boxes in the order of `parts`.

    Parameters
    ----------
    parts : list of FlowResult
        Results of consecutive pieces of one batch (at least one). They are emptied: each
        field is dropped from them once joined, so that the peak is the parts and one
        joined field rather than twice all of them.

    Returns
    -------
    FlowResult
        The same records as :func:`flow_boxes` of the whole batch gives: every box's flow
        depends on that box alone.
    """
    joined = {}
    for name in _STEP_FIELDS + _BOX_FIELDS:
        joined[name] = None if getattr(parts[0], name) is None \
            else np.concatenate([getattr(p, name) for p in parts])
        for p in parts:
            setattr(p, name, None)
    joined["step_start"] = _step_starts(joined["n_steps"])
    return FlowResult(**joined)


def truncate_results(result, n_steps, boxes=None):
    """The flows of `result` (or of its boxes `boxes`) cut after ``n_steps[b]`` steps.

    A flow's first steps are a flow in their own right (each step starts from the end of
    the one before), stopped at the end of its last kept step: that end box is its image
    and the step's end time its horizon. Its image sets are not known (NaN): the sets
    at the whole flow's horizon are not its sets.

    Parameters
    ----------
    result : FlowResult
    n_steps : ndarray of int, shape (N,)
        Steps kept per box, between 1 and that box's ``n_steps`` (a box that keeps all
        its steps is left as it was).
    boxes : ndarray of int, shape (N,), optional
        The boxes of `result` to take, in that order (default: all of them). Only their
        kept steps are copied.

    Returns
    -------
    FlowResult
    """
    boxes = np.arange(len(result.n_steps)) if boxes is None else np.asarray(boxes, int)
    n_steps = np.asarray(n_steps, int)
    step_start = result.step_start[boxes]
    cut = n_steps < result.n_steps[boxes]
    starts, out = _first_steps(result, step_start, n_steps)
    fields = {name: getattr(result, name)[boxes] for name in _BOX_FIELDS}
    last = step_start[cut] + n_steps[cut] - 1
    fields["n_steps"] = n_steps.copy()
    fields["status"][cut] = STOPPED
    fields["t_lo"][cut], fields["t_hi"][cut] = iv.add(result.t0_lo[last], result.t0_hi[last],
                                                      result.h[last], result.h[last])
    fields["image_lo"][cut], fields["image_hi"][cut] = result.end_lo[last], result.end_hi[last]
    # the sets at the horizon belong to the whole flow: a cut flow has none (NaN)
    for name in ("image_m", "image_A", "image_r_lo", "image_r_hi", "next_h"):
        fields[name][cut] = np.nan
    return FlowResult(**out, **fields, step_start=starts)


def _first_steps(result, step_start, n_steps):
    """The step records of `result` beginning at ``step_start[b]``, ``n_steps[b]`` of
    them per box: their new starts and the step fields."""
    starts = _step_starts(n_steps)
    rows = np.repeat(step_start - starts, n_steps) + np.arange(int(n_steps.sum()))
    return starts, {name: None if getattr(result, name) is None else getattr(result, name)[rows]
                    for name in _STEP_FIELDS}
