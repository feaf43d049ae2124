"""Figures of a proven map (matplotlib is imported inside the functions).

Colours (distinguishable with the common colour-vision deficiencies): safe blue,
doomed orange shaded by its proven crossing-time bound, outside grey, undecided pale
yellow. Cells are drawn as rectangles, never resampled to pixels.
"""

from __future__ import annotations

import numpy as np

__all__ = ["LABEL_COLOURS", "plot_map", "plot_survival", "save_figures"]

LABEL_COLOURS = {"safe": "#2f6db5", "doomed": "#e07b24", "outside": "#a3a3a3",
                 "undecided": "#f6e27a"}
_LINE_COLOURS = ["#111111", "#7a1f5c", "#1b7a4a", "#5a3e1b", "#333399", "#993333"]


def _rectangles(lo, hi, i, j):
    return np.stack([np.stack([lo[:, i], lo[:, j]], 1), np.stack([hi[:, i], lo[:, j]], 1),
                     np.stack([hi[:, i], hi[:, j]], 1), np.stack([lo[:, i], hi[:, j]], 1)], 1)


def _axis_label(state):
    return f"{state.name} [{state.unit}]" if state.unit else state.name


def _draw_limits(ax, proof, i, j, fixed):
    """Draw each limit's zero set as a contour line on the plane (i, j)."""
    from .taylor import flow_programs

    model = proof.model
    window = proof.tree.lo[0], proof.tree.hi[0]
    xs = np.linspace(window[0][i], window[1][i], 300)
    ys = np.linspace(window[0][j], window[1][j], 300)
    X, Y = np.meshgrid(xs, ys)
    pts = np.tile(fixed, (X.size, 1))
    pts[:, i], pts[:, j] = X.ravel(), Y.ravel()
    params = np.array([0.5 * (p[0] + p[1]) for p in proof.params])
    inputs = np.concatenate([pts, np.tile(params, (len(pts), 1))], 1) if len(params) else pts
    g = flow_programs(model, 1).limits.point(inputs)
    # points that violate a limit at t = 0 are outside whatever their cell's label
    worst = np.min(g, axis=1).reshape(X.shape)
    if np.nanmin(worst) < 0:
        ax.contourf(X, Y, worst, levels=[-np.inf, 0], colors=[LABEL_COLOURS["outside"]])
    handles = []
    for k, c in enumerate(model.constraints):
        G = g[:, k].reshape(X.shape)
        if np.nanmin(G) < 0 < np.nanmax(G):
            colour = _LINE_COLOURS[k % len(_LINE_COLOURS)]
            ax.contour(X, Y, G, levels=[0], colors=[colour], linewidths=1.2)
            handles.append((colour, f"limit {c.name}: {c.text}"))
    return handles


def _slice(proof, plane, fixed):
    """Leaf boxes, the cells crossing the slice through `fixed`, and the slice point."""
    tree, leaves = proof.tree, proof.leaves
    lo, hi = tree.lo[leaves], tree.hi[leaves]
    if fixed is None:
        fixed = 0.5 * (tree.lo[0] + tree.hi[0])
    others = [k for k in range(tree.n) if k not in plane]
    on_slice = np.ones(len(leaves), bool)
    for k in others:
        on_slice &= (lo[:, k] <= fixed[k]) & (hi[:, k] >= fixed[k])
    return lo, hi, on_slice, fixed, others


def _frame(ax, proof, plane):
    """Axis limits and labels of a map panel."""
    tree, states = proof.tree, proof.model.states
    i, j = plane
    ax.set_xlim(tree.lo[0][i], tree.hi[0][i])
    ax.set_ylim(tree.lo[0][j], tree.hi[0][j])
    ax.set_xlabel(_axis_label(states[i]))
    ax.set_ylabel(_axis_label(states[j]))


def plot_map(proof, ax=None, plane=(0, 1), fixed=None):
    """Draw the proven map of fates of a 2D model (or a 2D slice of a larger one).

    Parameters
    ----------
    proof : certify.prove.Proof
    ax : matplotlib Axes, optional
    plane : (int, int)
        The two state axes drawn.
    fixed : ndarray, shape (n,), optional
        For n > 2: the point whose other coordinates select the slice (default: the
        window centre). Cells containing the slice are drawn.

    Returns
    -------
    matplotlib Axes
    """
    import matplotlib.pyplot as plt
    from matplotlib.collections import PolyCollection
    from matplotlib.patches import Patch
    from matplotlib.lines import Line2D
    from matplotlib import colormaps

    from .plots_points import draw_points

    if ax is None:
        _, ax = plt.subplots(figsize=(7, 6))
    i, j = plane
    lab = proof.labelling
    lo, hi, on_slice, fixed, others = _slice(proof, plane, fixed)
    labels = lab.label
    for name in ("outside", "undecided", "safe"):
        sel = on_slice & (labels == name)
        ax.add_collection(PolyCollection(_rectangles(lo[sel], hi[sel], i, j),
                                         facecolors=LABEL_COLOURS[name], edgecolors="none"))
    sel = on_slice & (labels == "doomed")
    if sel.any():
        t = lab.crossing_upper[sel]
        tmax = max(float(np.max(t[np.isfinite(t)], initial=1.0)), 1e-9)
        cmap = colormaps["Oranges_r"]
        colours = cmap(0.15 + 0.6 * np.clip(t / tmax, 0, 1))
        ax.add_collection(PolyCollection(_rectangles(lo[sel], hi[sel], i, j),
                                         facecolors=colours, edgecolors="none"))
    states = proof.model.states
    handles = _draw_limits(ax, proof, i, j, fixed)
    draw_points(ax, proof, plane)  # equilibria, limit arcs, tangencies, curves (2D only)
    _frame(ax, proof, plane)
    frac = proof.fractions
    legend = [Patch(color=LABEL_COLOURS[k], label=f"{k} {100 * frac[k]:.2f} %")
              for k in ("safe", "doomed", "outside", "undecided")]
    legend += [Line2D([], [], color=c, label=text) for c, text in handles]
    ax.legend(handles=legend, loc="upper right", fontsize=8, framealpha=0.9)
    title = proof.model.name
    if others:
        title += " (slice " + ", ".join(f"{states[k].name} = {fixed[k]:.3g}" for k in others) + ")"
    ax.set_title(title, fontsize=10)
    return ax


def plot_survival(proof, ax=None, plane=(0, 1), fixed=None):
    """Draw the proven lower bound of the time to the first crossing per cell.

    Parameters
    ----------
    proof : certify.prove.Proof
    ax : matplotlib Axes, optional
    plane, fixed : see :func:`plot_map`

    Returns
    -------
    matplotlib Axes
    """
    import matplotlib.pyplot as plt
    from matplotlib.collections import PolyCollection
    from matplotlib import colormaps, colors

    if ax is None:
        _, ax = plt.subplots(figsize=(7, 6))
    i, j = plane
    lo, hi, on_slice, fixed, _ = _slice(proof, plane, fixed)
    t = proof.labelling.survival_lower
    finite = on_slice & np.isfinite(t)
    tmax = max(float(np.max(t[finite], initial=1.0)), 1e-9)
    norm = colors.Normalize(0, tmax)
    cmap = colormaps["viridis"]
    coll = PolyCollection(_rectangles(lo[finite], hi[finite], i, j),
                          facecolors=cmap(norm(t[finite])), edgecolors="none")
    ax.add_collection(coll)
    forever = on_slice & ~np.isfinite(t)
    ax.add_collection(PolyCollection(_rectangles(lo[forever], hi[forever], i, j),
                                     facecolors=LABEL_COLOURS["safe"], edgecolors="none"))
    sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
    plt.colorbar(sm, ax=ax, label=f"proven time within the limits at least "
                 f"[{proof.model.time_unit}] (blue: forever)")
    _frame(ax, proof, plane)
    ax.set_title(f"{proof.model.name}: survival-time lower bounds", fontsize=10)
    return ax


def save_figures(proof, out_dir):
    """Write ``map.png`` and ``survival.png`` (1D models: a strip; 3D: a slice grid).

    Returns
    -------
    list of pathlib.Path
    """
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from pathlib import Path

    out_dir = Path(out_dir)
    n = proof.tree.n
    paths = []
    if n == 1:
        fig, ax = plt.subplots(figsize=(8, 2.5))
        _plot_line(proof, ax)
        paths.append(out_dir / "map.png")
        fig.savefig(paths[-1], dpi=120, bbox_inches="tight")
        plt.close(fig)
        return paths
    if n == 2:
        for name, fn in (("map.png", plot_map), ("survival.png", plot_survival)):
            fig, ax = plt.subplots(figsize=(7.5, 6))
            fn(proof, ax)
            paths.append(out_dir / name)
            fig.savefig(paths[-1], dpi=120, bbox_inches="tight")
            plt.close(fig)
        return paths
    # higher dimension: slices of the first two axes at three levels of the third
    k = 2
    lo, hi = proof.tree.lo[0], proof.tree.hi[0]
    levels = lo[k] + (hi[k] - lo[k]) * np.array([0.25, 0.5, 0.75])
    for name, fn in (("map.png", plot_map), ("survival.png", plot_survival)):
        fig, axes = plt.subplots(1, 3, figsize=(19, 5.5))
        for ax, level in zip(axes, levels):
            fixed = 0.5 * (lo + hi)
            fixed[k] = level
            fn(proof, ax, plane=(0, 1), fixed=fixed)
        paths.append(out_dir / name)
        fig.savefig(paths[-1], dpi=110, bbox_inches="tight")
        plt.close(fig)
    return paths


def _plot_line(proof, ax):
    from matplotlib.collections import PolyCollection
    from matplotlib.patches import Patch

    tree, leaves, lab = proof.tree, proof.leaves, proof.labelling
    lo, hi = tree.lo[leaves, 0], tree.hi[leaves, 0]
    for name in ("safe", "doomed", "outside", "undecided"):
        sel = lab.label == name
        rects = np.stack([np.stack([lo[sel], np.zeros(sel.sum())], 1),
                          np.stack([hi[sel], np.zeros(sel.sum())], 1),
                          np.stack([hi[sel], np.ones(sel.sum())], 1),
                          np.stack([lo[sel], np.ones(sel.sum())], 1)], 1)
        ax.add_collection(PolyCollection(rects, facecolors=LABEL_COLOURS[name], edgecolors="none"))
    ax.set_xlim(tree.lo[0][0], tree.hi[0][0])
    ax.set_ylim(0, 1)
    ax.set_yticks([])
    ax.set_xlabel(_axis_label(proof.model.states[0]))
    frac = proof.fractions
    ax.legend(handles=[Patch(color=LABEL_COLOURS[k], label=f"{k} {100 * frac[k]:.2f} %")
                       for k in ("safe", "doomed", "outside", "undecided")],
              loc="upper center", bbox_to_anchor=(0.5, -0.35), ncol=4, fontsize=8)
    ax.set_title(proof.model.name, fontsize=10)
