"""How much wider than the true image a cell's enclosure grows along its tube.

Run from the repository root::

    .venv/bin/python benchmarks/enclosure_growth.py models/microbial_food_chain.toml \
        --depth 6 --cells 40 --horizons 6

Draws random cells of the grid at the given depth (seeded) whose corners keep the
limits, encloses the flow of each with the prover's flow (:func:`certify.flow.flow_boxes`
with the proof's default method, lengths of time scaled to the model's rate as
`certify prove` scales them), up to ``--horizons`` time scales, and compares at the
step end nearest each whole time scale:

- the width of the enclosure (the step end box) with the width of the hull of
  ``5^n`` trajectories started on a grid of the cell (scipy ``solve_ivp``, LSODA,
  rtol 1e-10, atol 1e-12, parameters at their midpoints): the ratio is at least about 1,
  and how far it rises is the enclosure's overestimation;
- the width of the interval Jacobian ``Df`` on the step's mean-value box
  ``J = hull(X_k, m_k)`` (the quantity that multiplies the set in the mean-value form,
  docs/method.md), as the natural interval extension gives it and as the step encloses it
  (with the centered form where the model gets it), with the range of ``Df`` over ``5^n``
  points of ``J`` (floats): the ratios are what interval evaluation adds to the true
  variation of ``Df`` over ``J``.

Every sampled trajectory point must lie in its enclosure (up to 1e-7 of the window's
side, for the integrator's own error); the count of points outside is printed and must
be 0 (a containment check of the flow against scipy, besides the tests).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy.integrate import solve_ivp

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from certify.evaluate import evaluate_boxes, evaluate_limits, parameter_enclosures  # noqa: E402
from certify.flow import _centered_jacobian, flow_boxes  # noqa: E402
from certify.model import load_model  # noqa: E402
from certify.prove import Method  # noqa: E402
from certify.taylor import flow_programs  # noqa: E402
from certify.time_scale import time_scale  # noqa: E402
from mixed_floor import cell_offsets  # noqa: E402


def draw_cells(model, programs, params, depth, count, seed):
    """`count` random cells of the grid at `depth` whose corners keep every limit."""
    lo = np.array([float(s.lo) for s in model.states])
    hi = np.array([float(s.hi) for s in model.states])
    width = (hi - lo) / 2 ** depth
    rng = np.random.default_rng(seed)
    index = rng.integers(0, 2 ** depth, size=(20 * count, len(lo)))
    cell_lo = lo + index * width
    g_lo, _ = evaluate_limits(programs, cell_lo, cell_lo + width, params)
    keep = np.all(g_lo >= 0, axis=1) if g_lo.size else np.ones(len(cell_lo), bool)
    return cell_lo[keep][:count], width


def trajectories(programs, params, starts, times):
    """States of every start at `times` (shape (len(times), len(starts), n)), or None."""
    point = [0.5 * (a + b) for a, b in params]
    n = starts.shape[1]

    def field(_, y):
        return programs.field.point_at(y.reshape(-1, n), point).ravel()

    sol = solve_ivp(field, (0.0, times[-1]), starts.ravel(), method="LSODA",
                    t_eval=times, rtol=1e-10, atol=1e-12)
    if sol.status != 0 or sol.y.shape[1] != len(times):
        return None
    return sol.y.T.reshape(len(times), len(starts), n)


def grid_points(lo, hi, per_side=5):
    """``per_side^n`` points on a regular grid of the box ``[lo, hi]``, corners included."""
    return lo + cell_offsets(len(lo), per_side) * (hi - lo)


def jacobian_ratios(programs, params, xlo, xhi, m):
    """Largest ratio over the Jacobian's entries of the interval width of ``Df(J)`` to the
    range of ``Df`` over grid points of ``J = hull(X, m)``: natural, and as the step
    encloses it."""
    jlo, jhi = np.minimum(xlo, m)[None], np.maximum(xhi, m)[None]
    natural = evaluate_boxes(programs.jacobian, jlo, jhi, params)
    step = natural
    if programs.hessian is not None:
        step = _centered_jacobian(programs, *natural, jlo, jhi, m[None], params)[:2]
    values = programs.jacobian.point_at(grid_points(jlo[0], jhi[0]),
                                        [0.5 * (a + b) for a, b in params])
    sampled = values.max(axis=0) - values.min(axis=0)
    big = sampled > 1e-12 * np.max(np.abs(values))
    if not big.any():
        return float("nan"), float("nan")
    return tuple(float(np.max((hi - lo)[0][big] / sampled[big])) for lo, hi in (natural, step))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("model")
    parser.add_argument("--depth", type=int, default=6)
    parser.add_argument("--cells", type=int, default=40)
    parser.add_argument("--horizons", type=int, default=6)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)

    model = load_model(args.model)
    method = Method()
    programs = flow_programs(model, method.order, method.kinks)
    params = parameter_enclosures(model)
    scale = time_scale(model).scale
    cells, width = draw_cells(model, programs, params, args.depth, args.cells, args.seed)
    side = np.array([float(s.hi - s.lo) for s in model.states])
    horizon = args.horizons * scale
    result = flow_boxes(programs, cells, cells + width, params, min_horizon=horizon,
                        max_horizon=horizon, step=method.step * scale,
                        max_step=method.max_step * scale, min_step=method.min_step * scale,
                        max_steps=2000, frames=method.frames, keep_sets=False)
    rows = {k: [] for k in range(args.horizons + 1)}
    outside = sampled = 0
    for b in np.flatnonzero(result.n_steps > 0):
        first, count = result.step_start[b], result.n_steps[b]
        ends = result.t0_lo[first:first + count] + result.h[first:first + count]
        picks = sorted({int(np.argmin(np.abs(ends - k * scale)))
                        for k in range(1, args.horizons + 1) if ends[-1] >= (k - 0.5) * scale})
        if not picks:
            continue
        traj = trajectories(programs, params, grid_points(cells[b], cells[b] + width),
                            ends[picks])
        if traj is None:
            continue
        for at, step in zip(traj, picks):
            s = first + step
            end_lo, end_hi = result.end_lo[s], result.end_hi[s]
            slack = 1e-7 * side
            outside += int(np.sum(np.any((at < end_lo - slack) | (at > end_hi + slack),
                                         axis=1)))
            sampled += len(at)
            true = at.max(axis=0) - at.min(axis=0)
            over = np.max((end_hi - end_lo) / np.maximum(true, 1e-300))
            grown = np.max((end_hi - end_lo) / width)
            jac = (jacobian_ratios(programs, params, result.x_lo[s], result.x_hi[s],
                                   0.5 * (result.x_lo[s] + result.x_hi[s]))
                   if programs.jacobian is not None else (float("nan"),) * 2)
            rows[int(round(ends[step] / scale))].append((over, grown, *jac))
    print(f"{args.model}: depth {args.depth}, {len(cells)} cells, time scale {scale:.4g}")
    print("| time scales | cells | enclosure / true width (median, q90) "
          "| enclosure / cell | Df(J) / sampled range: natural, step (medians) |")
    print("|---|---|---|---|---|")
    for k, found in rows.items():
        if not found:
            continue
        a = np.array(found)
        print(f"| {k} | {len(a)} | {np.median(a[:, 0]):.2f}, {np.quantile(a[:, 0], 0.9):.2f} "
              f"| {np.median(a[:, 1]):.2f} "
              f"| {np.nanmedian(a[:, 2]):.2f}, {np.nanmedian(a[:, 3]):.2f} |")
    print(f"sampled trajectory points outside their enclosure: {outside} of {sampled}")
    return 0 if outside == 0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
