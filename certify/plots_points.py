"""Equilibria, limit arcs, tangency points and explaining curves drawn on a proof map.

:func:`draw_points` adds to the axes of :func:`certify.plots.plot_map` (2D models):

* equilibria, marker by stability: filled circle stable, open circle unstable,
  cross saddle, diamond undetermined;
* the arcs of each limit surface where the flow provably leaves (thick solid) or
  returns (thick dashed), where the other limits hold;
* tangency points: filled star where the tangent trajectory leaves, open star where
  it returns, grey star undetermined;
* the explaining curves, thin and dashed, labelled as estimates.

Its legend sits below the axes, apart from the map's own legend.
"""

from __future__ import annotations

import numpy as np

from .points import SUMMARY_BUDGET, analyse_points, explaining_curves

__all__ = ["draw_points", "EQUILIBRIUM_MARKERS"]

_INK = "#111111"
#: Marker keyword arguments per stability.
EQUILIBRIUM_MARKERS = {
    "stable": {"marker": "o", "markerfacecolor": _INK, "markeredgecolor": _INK},
    "unstable": {"marker": "o", "markerfacecolor": "white", "markeredgecolor": _INK},
    "saddle": {"marker": "X", "markerfacecolor": _INK, "markeredgecolor": "white"},
    "undetermined": {"marker": "D", "markerfacecolor": "#9a9a9a", "markeredgecolor": _INK},
}
_ARC_STYLES = {
    "leaves": {"color": "#b2182b", "linestyle": "solid", "linewidth": 3.5,
               "label": "limit: flow leaves (proven)"},
    "returns": {"color": "#542788", "linestyle": (0, (1.2, 0.8)), "linewidth": 3.5,
                "label": "limit: flow returns (proven)"},
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
    inputs = np.concatenate([pts, np.tile(params, (len(pts), 1))], 1)
    G = np.ma.masked_invalid(program.point(inputs)[:, k].reshape(X.shape))
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
    g = program.point(np.concatenate([line, np.tile(params, (len(line), 1))], 1))
    others = np.delete(g, k, axis=1)
    return (others >= 0).all(1)


def draw_points(ax, proof, plane=(0, 1)):
    """Draw equilibria, limit arcs, tangencies and explaining curves of a 2D proof.

    Parameters
    ----------
    ax : matplotlib Axes
        The axes of the map.
    proof : certify.prove.Proof
    plane : (int, int)
        The state axes drawn; only the full plane of a 2D model is drawn on.

    Returns
    -------
    list
        The legend handles added (empty when nothing was drawn).
    """
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    from .taylor import flow_programs

    model = proof.model
    if len(model.states) != 2 or tuple(plane) != (0, 1):
        return []
    result = analyse_points(model, **SUMMARY_BUDGET)
    handles = []
    lo = np.array([float(a) for a, _ in model.window])
    hi = np.array([float(b) for _, b in model.window])
    params = np.array([0.5 * (p[0] + p[1]) for p in proof.params])
    margins = flow_programs(model, 1).limits
    arcs = {"leaves": [], "returns": []}
    for k, limit in enumerate(result.limits):
        for line in _zero_lines(margins, params, lo, hi, k):
            keep = _within_other_limits(margins, params, line, k)
            for key in arcs:
                arcs[key].append(_arc_segments(line, getattr(limit, key), keep))
    for key, parts in arcs.items():
        segments = np.concatenate(parts) if parts else np.empty((0, 2, 2))
        if len(segments):
            style = dict(_ARC_STYLES[key])
            label = style.pop("label")
            ax.add_collection(LineCollection(segments, capstyle="butt", zorder=3, **style))
            handles.append(Line2D([], [], label=label, **style))
    for curve in explaining_curves(model, result):
        style = _CURVE_STYLES[curve.kind]
        ax.plot(curve.points[:, 0], curve.points[:, 1], zorder=4, **style)
        label = f"estimate: {curve.kind}"
        if label not in [h.get_label() for h in handles]:
            handles.append(Line2D([], [], label=label, **style))
    seen = set()
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
    for stability, style in EQUILIBRIUM_MARKERS.items():
        if ("equilibrium", stability) in seen:
            handles.append(Line2D([], [], linestyle="none", markersize=8,
                                  label=f"equilibrium: {stability}", **style))
    for kind, style in _TANGENCY_MARKERS.items():
        if ("tangency", kind) in seen:
            handles.append(Line2D([], [], linestyle="none", markersize=11,
                                  label=f"tangency: {kind}", **style))
    if handles:
        legend = ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.11),
                           ncol=3, fontsize=8, frameon=False)
        ax.add_artist(legend)
        legend.set_clip_on(False)  # add_artist clips to the axes; this legend sits below them
    return handles
