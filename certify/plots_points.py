"""Equilibria, limit arcs, tangency points and explaining curves drawn on a proof map.

:func:`draw_points` adds to the axes of :func:`certify.plots.plot_map` (2D models):

* equilibria, marker by stability: filled circle stable, open circle unstable,
  cross saddle, diamond undetermined;
* the arcs of each limit surface where the flow provably leaves or returns, where
  the other limits hold: thick lines with arrows pointing out of the limits (leaves)
  or into them (returns), styles from :mod:`certify.palette`;
* tangency points: filled star where the tangent trajectory leaves, open star where
  it returns, grey star undetermined;
* the explaining curves, thin and dashed, labelled as estimates.

1D models get their equilibria only. The legend handles are returned for the map's
single legend.
"""

from __future__ import annotations

import numpy as np

from .palette import ARC_STYLES, INK
from .points import SUMMARY_BUDGET, analyse_points, explaining_curves

__all__ = ["draw_points", "EQUILIBRIUM_MARKERS"]

_INK = INK
#: Marker keyword arguments per stability.
EQUILIBRIUM_MARKERS = {
    "stable": {"marker": "o", "markerfacecolor": _INK, "markeredgecolor": _INK},
    "unstable": {"marker": "o", "markerfacecolor": "white", "markeredgecolor": _INK},
    "saddle": {"marker": "X", "markerfacecolor": _INK, "markeredgecolor": "white"},
    "undetermined": {"marker": "D", "markerfacecolor": "#9a9a9a", "markeredgecolor": _INK},
}
_TANGENCY_MARKERS = {
    "leaves": {"marker": "*", "markerfacecolor": _INK, "markeredgecolor": _INK},
    "returns": {"marker": "*", "markerfacecolor": "white", "markeredgecolor": _INK},
    "undetermined": {"marker": "*", "markerfacecolor": "#9a9a9a", "markeredgecolor": _INK},
}
_CURVE_STYLES = {
    "stable manifold": {"color": _INK, "linestyle": (0, (5, 3)), "linewidth": 1.0},
    "tangent trajectory": {"color": "#3b3b3b", "linestyle": (0, (5, 2, 1, 2)), "linewidth": 1.0},
}


def _zero_lines(program, params, lo, hi, k, resolution=400):
    """Polylines of ``g_k = 0`` in the window (float contouring at the midpoint parameters)."""
    import contourpy

    xs = np.linspace(lo[0], hi[0], resolution)
    ys = np.linspace(lo[1], hi[1], resolution)
    X, Y = np.meshgrid(xs, ys)
    pts = np.stack([X.ravel(), Y.ravel()], 1)
    G = np.ma.masked_invalid(program.point_at(pts, params)[:, k].reshape(X.shape))
    if G.count() == 0 or not (G.min() <= 0 <= G.max()):
        return []
    return contourpy.contour_generator(X, Y, G).lines(0.0)


def _in_boxes(points, boxes):
    if not len(boxes):
        return np.zeros(len(points), bool)
    inside = (points[:, None, :] >= boxes[None, :, :, 0]) & (points[:, None, :] <= boxes[None, :, :, 1])
    return inside.all(2).any(1)


def _arc_segments(line, boxes, keep):
    """Segments of a polyline whose both ends lie in the given boxes and are kept."""
    inside = _in_boxes(line, boxes) & keep
    both = inside[:-1] & inside[1:]
    return np.stack([line[:-1][both], line[1:][both]], 1)


def _within_other_limits(program, params, line, k):
    """Points of a polyline of ``g_k = 0`` where every other limit holds (float check)."""
    g = program.point_at(line, params)
    others = np.delete(g, k, axis=1)
    return (others >= 0).all(1)


def _arc_arrows(ax, margins, params, segments, ks, lo, hi, sign):
    """Arrows across arc segments, about every 6 % of the window, pointing where
    ``sign * g_k`` grows (sign -1: out of the limits, +1: into them)."""
    span = hi - lo
    u0, u1 = (segments[:, 0] - lo) / span, (segments[:, 1] - lo) / span
    d = u1 - u0
    length = np.hypot(d[:, 0], d[:, 1])
    steps = np.floor(np.cumsum(length) / 0.06)
    pick = np.flatnonzero(np.diff(steps, prepend=-1) > 0)
    pick = pick[length[pick] > 0]
    if not len(pick):
        return
    normal = np.stack([-d[pick, 1], d[pick, 0]], 1) / length[pick, None]
    mid = 0.5 * (segments[pick, 0] + segments[pick, 1])
    probe = mid + 1e-3 * normal * span
    g = margins.point_at(probe, params)
    g_mid = margins.point_at(mid, params)
    rows = np.arange(len(pick))
    grows = g[rows, ks[pick]] > g_mid[rows, ks[pick]]
    direction = np.where((grows == (sign > 0))[:, None], normal, -normal) * 0.035 * span
    ax.quiver(mid[:, 0], mid[:, 1], direction[:, 0], direction[:, 1], angles="xy",
              scale_units="xy", scale=1, color=INK, width=0.004, headwidth=4,
              headlength=4, headaxislength=3.5, zorder=5)


def _arc_style(key):
    """Keyword arguments of a LineCollection / Line2D for arcs of kind `key`."""
    from matplotlib import patheffects

    style = ARC_STYLES[key]
    kw = {"color": style["color"], "linewidth": style["linewidth"]}
    if "edge" in style:
        kw["path_effects"] = [patheffects.Stroke(linewidth=style["linewidth"] + 2,
                                                 foreground=style["edge"]),
                              patheffects.Normal()]
    return kw


def draw_points(ax, proof, plane=(0, 1)):
    """Draw equilibria, limit arcs, tangencies and explaining curves of a proof map.

    Parameters
    ----------
    ax : matplotlib Axes
        The axes of the map.
    proof : certify.prove.Proof
    plane : tuple of int
        The state axes drawn; only the full line of a 1D model (equilibria only) or
        the full plane of a 2D model is drawn on.

    Returns
    -------
    list
        The legend handles of what was drawn (empty when nothing was drawn).
    """
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    from .taylor import flow_programs

    model = proof.model
    n = len(model.states)
    if tuple(plane) != tuple(range(n)) or n > 2:
        return []
    result = analyse_points(model, **SUMMARY_BUDGET)
    handles = []
    seen = set()
    if n == 1:
        for e in result.equilibria.equilibria:
            ax.plot(e.centre[0], 0.5, linestyle="none", markersize=10, zorder=7,
                    **EQUILIBRIUM_MARKERS[e.stability])
            seen.add(("equilibrium", e.stability))
        return _marker_handles(seen)
    lo = np.array([float(a) for a, _ in model.window])
    hi = np.array([float(b) for _, b in model.window])
    params = np.array([0.5 * (p[0] + p[1]) for p in proof.params])
    margins = flow_programs(model, 1).limits
    arcs = {"leaves": [], "returns": []}
    for k, limit in enumerate(result.limits):
        for line in _zero_lines(margins, params, lo, hi, k):
            keep = _within_other_limits(margins, params, line, k)
            for key in arcs:
                part = _arc_segments(line, getattr(limit, key), keep)
                arcs[key].append((part, np.full(len(part), k)))
    for key, parts in arcs.items():
        segments = np.concatenate([p for p, _ in parts]) if parts else np.empty((0, 2, 2))
        if len(segments):
            kw = _arc_style(key)
            ax.add_collection(LineCollection(segments, capstyle="butt", zorder=3, **kw))
            _arc_arrows(ax, margins, params, segments, np.concatenate([k for _, k in parts]),
                        lo, hi, ARC_STYLES[key]["arrow"])
            handles.append(Line2D([], [], label=ARC_STYLES[key]["label"], **kw))
    for curve in explaining_curves(model, result):
        style = _CURVE_STYLES[curve.kind]
        ax.plot(curve.points[:, 0], curve.points[:, 1], zorder=4, **style)
        label = f"estimate: {curve.kind}"
        if label not in [h.get_label() for h in handles]:
            handles.append(Line2D([], [], label=label, **style))
    for limit in result.limits:
        for t in limit.tangencies:
            c = t.box.mean(axis=1)
            ax.plot(c[0], c[1], linestyle="none", markersize=14, zorder=6,
                    **_TANGENCY_MARKERS[t.kind])
            seen.add(("tangency", t.kind))
    for e in result.equilibria.equilibria:
        c = e.centre
        ax.plot(c[0], c[1], linestyle="none", markersize=10, zorder=7,
                clip_on=False, **EQUILIBRIUM_MARKERS[e.stability])
        seen.add(("equilibrium", e.stability))
    return handles + _marker_handles(seen)


def _marker_handles(seen):
    from matplotlib.lines import Line2D

    handles = []
    for stability, style in EQUILIBRIUM_MARKERS.items():
        if ("equilibrium", stability) in seen:
            handles.append(Line2D([], [], linestyle="none", markersize=8,
                                  label=f"equilibrium: {stability}", **style))
    for kind, style in _TANGENCY_MARKERS.items():
        if ("tangency", kind) in seen:
            handles.append(Line2D([], [], linestyle="none", markersize=11,
                                  label=f"tangency: {kind}", **style))
    return handles
