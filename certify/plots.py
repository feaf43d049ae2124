"""Figures of a proven map (matplotlib is imported inside the functions).

Colours and marks come from :mod:`certify.palette`. Cells are drawn as rectangles,
never resampled to pixels, and every picture is clipped at the limits: a cell that
straddles a limit is cut into pieces (at the limit itself when every limit bounds a
single state by a number, else on a sub-grid of ``DRAW_SUBGRID`` per side), and a
piece whose centre violates a limit is drawn ``outside``. So the drawn areas of a 1D
or 2D map agree with the label percentages of the summary (exactly in the first case,
within the sub-grid's resolution in the second).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .palette import (HATCH_COLOUR, LABEL_COLOURS, UNDECIDED_HATCH, doomed_colormap,
                      limit_style, time_colormap)

__all__ = ["Pieces", "drawn_pieces", "plot_map", "plot_time_to_limit", "save_figures",
           "parse_slice", "TITLE_LENGTH"]

LABELS = ("safe", "doomed", "outside", "undecided")
#: Sub-boxes per side of a straddling cell when a limit is not a bound on one state.
DRAW_SUBGRID = 8
#: Longest model name shown in a picture title (longer names are cut with "...").
TITLE_LENGTH = 60


@dataclass(frozen=True)
class Pieces:
    """Disjoint rectangles of a map on a plane, each with one label.

    Attributes
    ----------
    lo, hi : ndarray, shape (P, 2)
        Corners in the plane's coordinates (1D maps: the second axis is [0, 1]).
    label : ndarray of str, shape (P,)
        The cell's label, or ``outside`` where the piece's centre violates a limit.
    cell : ndarray of int, shape (P,)
        Index of the piece's cell among the proof's leaves.
    """

    lo: np.ndarray
    hi: np.ndarray
    label: np.ndarray
    cell: np.ndarray

    def rectangles(self, sel):
        """Corner lists of the selected pieces, for a PolyCollection."""
        lo, hi = self.lo[sel], self.hi[sel]
        return np.stack([lo, np.stack([hi[:, 0], lo[:, 1]], 1), hi,
                         np.stack([lo[:, 0], hi[:, 1]], 1)], 1)


def _short(text):
    return text if len(text) <= TITLE_LENGTH else text[:TITLE_LENGTH - 3] + "..."


def _narrowed(proof, title):
    """A title, with a second line naming the parameters proven for other boxes than
    the model file's (``--param`` overrides)."""
    from .container import narrowed_text
    from .report import narrowed_parameters

    narrowed = narrowed_parameters(proof.model)
    return f"{title}\nproven only for {narrowed_text(narrowed)}" if narrowed else title


def _axis_label(state):
    return f"{state.name} [{state.unit}]" if state.unit else state.name


def _centre_params(proof):
    return np.array([0.5 * (p[0] + p[1]) for p in proof.params])


def _limit_values(proof, points):
    """Float values of every limit at the given full-dimensional points."""
    from .taylor import flow_programs

    params = _centre_params(proof)
    return flow_programs(proof.model, 1).limits.point_at(points, params)


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
    return lo, hi, on_slice, np.asarray(fixed, float), others


def _sub_edges(proof, lo, hi, plane):
    """Per plane axis, the edges splitting one straddling cell (exact cuts or a grid)."""
    from .volumes import axis_threshold

    cuts = [axis_threshold(c.g, proof.model.state_symbols) for c in proof.model.constraints]
    edges = []
    for a in plane:
        if all(t is not None for t in cuts):
            inner = [c for k, c, _ in cuts if k == a and lo[a] < c < hi[a]]
            edges.append(np.unique([lo[a], hi[a], *inner]))
        else:
            edges.append(np.linspace(lo[a], hi[a], DRAW_SUBGRID + 1))
    return edges


def drawn_pieces(proof, plane=(0, 1), fixed=None):
    """The pieces a map of `proof` draws on a plane, clipped at the limits.

    Parameters
    ----------
    proof : certify.prove.Proof
    plane : tuple of int
        One state axis (1D strip) or two.
    fixed : ndarray, shape (n,), optional
        The point whose other coordinates select the slice (default: window centre).

    Returns
    -------
    Pieces
    """
    from .evaluate import evaluate_limits
    from .taylor import flow_programs

    lo, hi, on_slice, fixed, others = _slice(proof, plane, fixed)
    cells = np.flatnonzero(on_slice)
    slo, shi = lo[cells].copy(), hi[cells].copy()
    slo[:, others], shi[:, others] = fixed[others], fixed[others]
    label = proof.labelling.label[cells].astype(object)
    glo, ghi = evaluate_limits(flow_programs(proof.model, 1), slo, shi, proof.params)
    violated = np.any(ghi < 0, axis=1)
    label[violated] = "outside"
    straddle = (label != "outside") & ~np.all(glo >= 0, axis=1)
    whole = ~straddle
    out_lo, out_hi = [slo[whole][:, plane]], [shi[whole][:, plane]]
    out_label, out_cell = [label[whole]], [cells[whole]]
    boxes, owner = [], []
    for c in np.flatnonzero(straddle):
        edges = _sub_edges(proof, slo[c], shi[c], plane)
        grids = np.meshgrid(*[np.arange(len(e) - 1) for e in edges], indexing="ij")
        idx = np.stack([g.ravel() for g in grids], 1)
        blo = np.stack([edges[a][idx[:, a]] for a in range(len(plane))], 1)
        bhi = np.stack([edges[a][idx[:, a] + 1] for a in range(len(plane))], 1)
        boxes.append((blo, bhi))
        owner.append(np.full(len(blo), c))
    if boxes:
        blo = np.concatenate([b[0] for b in boxes])
        bhi = np.concatenate([b[1] for b in boxes])
        owner = np.concatenate(owner)
        centres = np.tile(fixed, (len(blo), 1))
        centres[:, plane] = 0.5 * (blo + bhi)
        inside = np.all(_limit_values(proof, centres) >= 0, axis=1)
        out_lo.append(blo)
        out_hi.append(bhi)
        out_label.append(np.where(inside, label[owner], "outside"))
        out_cell.append(cells[owner])
    plo, phi = np.concatenate(out_lo), np.concatenate(out_hi)
    if len(plane) == 1:
        plo = np.concatenate([plo, np.zeros((len(plo), 1))], 1)
        phi = np.concatenate([phi, np.ones((len(phi), 1))], 1)
    return Pieces(lo=plo, hi=phi, label=np.concatenate(out_label).astype(str),
                  cell=np.concatenate(out_cell))


def _doomed_scale(proof):
    """Normalisation of the doomed ramp: 0 to the largest proven crossing time."""
    from matplotlib import colors

    t = proof.labelling.crossing_upper[proof.labelling.label == "doomed"]
    tmax = float(np.max(t[np.isfinite(t)], initial=0.0))
    return colors.Normalize(0.0, tmax if tmax > 0 else 1.0)


def _fill(ax, pieces, sel, colours, hatch=None):
    from matplotlib.collections import PolyCollection

    if not np.any(sel):
        return
    kw = {"hatch": hatch, "edgecolors": HATCH_COLOUR, "linewidths": 0} if hatch else \
        {"edgecolors": "none"}
    ax.add_collection(PolyCollection(pieces.rectangles(sel), facecolors=colours,
                                     gid="certify-pieces", **kw))


def _draw_labels(ax, proof, pieces, norm):
    """Fill the pieces by label; doomed ones shaded by their crossing-time bound."""
    for name in ("outside", "safe"):
        _fill(ax, pieces, pieces.label == name, LABEL_COLOURS[name])
    _fill(ax, pieces, pieces.label == "undecided", LABEL_COLOURS["undecided"],
          hatch=UNDECIDED_HATCH)
    sel = pieces.label == "doomed"
    t = proof.labelling.crossing_upper[pieces.cell[sel]]
    _fill(ax, pieces, sel, doomed_colormap()(norm(np.where(np.isfinite(t), t, norm.vmax))))


def _draw_limits(ax, proof, plane, fixed):
    """Draw each limit's zero set on the plane; return legend handles."""
    from matplotlib.lines import Line2D

    window = proof.tree.lo[0], proof.tree.hi[0]
    handles = []
    if len(plane) == 1:
        i = plane[0]
        xs = np.linspace(window[0][i], window[1][i], 4001)
        pts = np.tile(fixed, (len(xs), 1))
        pts[:, i] = xs
        g = _limit_values(proof, pts)
        for k, c in enumerate(proof.model.constraints):
            flips = np.flatnonzero(np.sign(g[:-1, k]) * np.sign(g[1:, k]) < 0)
            colour, dash = limit_style(k)
            for f in flips:  # linear interpolation between the two grid points
                x = xs[f] - g[f, k] * (xs[f + 1] - xs[f]) / (g[f + 1, k] - g[f, k])
                ax.axvline(x, color=colour, linestyle=dash, linewidth=1.5, zorder=4)
            if len(flips):
                handles.append(Line2D([], [], color=colour, linestyle=dash,
                                      label=f"limit {c.name}: {_short(c.text)}"))
        return handles
    i, j = plane
    xs = np.linspace(window[0][i], window[1][i], 300)
    ys = np.linspace(window[0][j], window[1][j], 300)
    X, Y = np.meshgrid(xs, ys)
    pts = np.tile(fixed, (X.size, 1))
    pts[:, i], pts[:, j] = X.ravel(), Y.ravel()
    g = _limit_values(proof, pts)
    for k, c in enumerate(proof.model.constraints):
        G = g[:, k].reshape(X.shape)
        if np.nanmin(G) < 0 < np.nanmax(G):
            colour, dash = limit_style(k)
            ax.contour(X, Y, G, levels=[0], colors=[colour], linewidths=1.3,
                       linestyles=[dash], zorder=4)
            handles.append(Line2D([], [], color=colour, linestyle=dash,
                                  label=f"limit {c.name}: {_short(c.text)}"))
    return handles


def _frame(ax, proof, plane, others, fixed):
    """Axis limits, labels and title of a panel."""
    tree, states = proof.tree, proof.model.states
    ax.set_xlim(tree.lo[0][plane[0]], tree.hi[0][plane[0]])
    ax.set_xlabel(_axis_label(states[plane[0]]))
    if len(plane) == 1:
        ax.set_ylim(0, 1)
        ax.set_yticks([])
    else:
        ax.set_ylim(tree.lo[0][plane[1]], tree.hi[0][plane[1]])
        ax.set_ylabel(_axis_label(states[plane[1]]))
    if others:
        ax.set_title("slice " + ", ".join(
            f"{states[k].name} = {fixed[k]:.3g}" + (f" {states[k].unit}" if states[k].unit
                                                     else "") for k in others), fontsize=9)


def _label_handles(proof):
    from matplotlib.patches import Patch

    frac = proof.fractions
    doomed = doomed_colormap()(0.5)
    colours = {**LABEL_COLOURS, "doomed": doomed}
    return [Patch(facecolor=colours[k], edgecolor=HATCH_COLOUR if k == "undecided" else
                  colours[k], hatch=UNDECIDED_HATCH if k == "undecided" else None,
                  label=f"{k} {100 * frac[k]:.2f} %") for k in LABELS]


def _draw_map(ax, proof, plane, fixed, norm):
    """Draw one map panel; return the legend handles of its limits and marks."""
    from .plots_points import draw_points

    pieces = drawn_pieces(proof, plane, fixed)
    _, _, _, fixed, others = _slice(proof, plane, fixed)
    _draw_labels(ax, proof, pieces, norm)
    handles = _draw_limits(ax, proof, plane, fixed)
    handles += draw_points(ax, proof, plane)  # equilibria, limit arcs, tangencies, curves
    _frame(ax, proof, plane, others, fixed)
    return handles


def _doomed_colourbar(fig, axes, proof, norm, **kw):
    import matplotlib.pyplot as plt

    if not np.any(proof.labelling.label == "doomed"):
        return
    unit = proof.model.time_unit or "time units"
    bar = fig.colorbar(plt.cm.ScalarMappable(norm=norm, cmap=doomed_colormap()), ax=axes,
                       **kw)
    bar.set_label(f"doomed: proven latest crossing time [{unit}]\n(darker: sooner)",
                  fontsize=8)


def _legend_below(fig_or_ax, handles, ncol=2):
    """One legend below the axes (or below a whole figure), outside the data area."""
    if hasattr(fig_or_ax, "transAxes"):
        height = fig_or_ax.get_window_extent().height / fig_or_ax.figure.dpi
        return fig_or_ax.legend(handles=handles, loc="upper center", ncol=ncol, fontsize=8,
                                frameon=False, bbox_to_anchor=(0.5, -0.7 / height))
    return fig_or_ax.legend(handles=handles, loc="upper center", ncol=ncol, fontsize=8,
                            frameon=False, bbox_to_anchor=(0.5, 0.0))


def plot_map(proof, ax=None, plane=(0, 1), fixed=None):
    """Draw the proven map of fates of a model (a strip in 1D, a plane or slice else).

    Parameters
    ----------
    proof : certify.prove.Proof
    ax : matplotlib Axes, optional
    plane : tuple of int
        The state axes drawn: one (strip) or two.
    fixed : ndarray, shape (n,), optional
        For more states than drawn: the point whose other coordinates select the
        slice (default: the window centre). Cells containing the slice are drawn.

    Returns
    -------
    matplotlib Axes
    """
    import matplotlib.pyplot as plt

    if ax is None:
        _, ax = plt.subplots(figsize=(7, 6))
    norm = _doomed_scale(proof)
    handles = _draw_map(ax, proof, plane, fixed, norm)
    _doomed_colourbar(ax.figure, ax, proof, norm, fraction=0.05, pad=0.02)
    _legend_below(ax, _label_handles(proof) + handles, ncol=4 if len(plane) == 1 else 2)
    title = _short(proof.model.name)
    if ax.get_title():
        title += f" ({ax.get_title()})"
    ax.set_title(_narrowed(proof, title), fontsize=10)
    return ax


def parse_slice(proof_or_model, text):
    """Read ``NAME=V1,V2,...`` (``--slice``) into ``(state index, levels)``.

    Raises
    ------
    UsageError
        Unknown state, a level that is not a number or lies outside the window, or more
        than four levels.
    """
    from .errors import UsageError

    model = getattr(proof_or_model, "model", proof_or_model)
    names = [s.name for s in model.states]
    name, sep, values = text.partition("=")
    name = name.strip()
    if not sep or name not in names:
        raise UsageError(f"--slice {text!r}: write NAME=VALUE[,VALUE...] with NAME one of "
                         f"the states ({', '.join(names)})")
    k = names.index(name)
    try:
        levels = [float(v) for v in values.split(",")]
    except ValueError:
        raise UsageError(f"--slice {text!r}: the levels must be numbers") from None
    lo, hi = (float(b) for b in model.window[k])
    if not 1 <= len(levels) <= 4 or not all(lo <= v <= hi for v in levels):
        raise UsageError(f"--slice {text!r}: give one to four levels within the window "
                         f"[{lo:g}, {hi:g}] of {name}")
    return k, levels


def _shares_along(ax, proof, k, bins=48):
    """Stacked shares of the labels along state k over the whole window (cells whole)."""
    tree, leaves, labels = proof.tree, proof.leaves, proof.labelling.label
    lo, hi = tree.lo[leaves], tree.hi[leaves]
    wlo, whi = tree.lo[0], tree.hi[0]
    others = [a for a in range(tree.n) if a != k]
    cross = np.prod((hi[:, others] - lo[:, others]) / (whi[others] - wlo[others]), axis=1)
    edges = np.linspace(wlo[k], whi[k], bins + 1)
    share = np.zeros((len(LABELS), bins))
    for j in range(bins):
        overlap = np.clip(np.minimum(hi[:, k], edges[j + 1]) - np.maximum(lo[:, k], edges[j]),
                          0, None) / (edges[j + 1] - edges[j])
        for m, name in enumerate(LABELS):
            sel = labels == name
            share[m, j] = np.sum(cross[sel] * overlap[sel])
    centres = 0.5 * (edges[:-1] + edges[1:])
    colours = [LABEL_COLOURS[x] if x != "doomed" else doomed_colormap()(0.5) for x in LABELS]
    polys = ax.stackplot(centres, 100 * share, colors=colours, step=None)
    polys[LABELS.index("undecided")].set_hatch(UNDECIDED_HATCH)
    polys[LABELS.index("undecided")].set_edgecolor(HATCH_COLOUR)
    state = proof.model.states[k]
    ax.set_xlim(wlo[k], whi[k])
    ax.set_ylim(0, 100)
    ax.set_xlabel(_axis_label(state))
    ax.set_ylabel("share of the cross-section [%]")
    ax.set_title(f"whole window: labels along {state.name}\n(cells straddling a limit "
                 "counted whole)", fontsize=9)


def _time_scale(proof):
    """Normalisation of the time ramp: 0 to the largest finite proven lower bound."""
    from matplotlib import colors

    t = proof.labelling.survival_lower
    tmax = float(np.max(t[np.isfinite(t)], initial=0.0))
    return colors.Normalize(0, tmax if tmax > 0 else 1.0)


def _draw_time(ax, proof, plane, fixed, norm):
    """Draw one time-within-the-limits panel; return the legend handles."""
    from matplotlib.patches import Patch

    pieces = drawn_pieces(proof, plane, fixed)
    _, _, _, fixed, others = _slice(proof, plane, fixed)
    t = proof.labelling.survival_lower[pieces.cell]
    inside = pieces.label != "outside"
    finite = inside & np.isfinite(t)
    _fill(ax, pieces, finite, time_colormap()(norm(t[finite])))
    _fill(ax, pieces, inside & ~np.isfinite(t), LABEL_COLOURS["safe"])
    _fill(ax, pieces, ~inside, LABEL_COLOURS["outside"])
    handles = _draw_limits(ax, proof, plane, fixed)
    _frame(ax, proof, plane, others, fixed)
    return [Patch(color=LABEL_COLOURS["safe"], label="within the limits forever (safe)"),
            Patch(color=LABEL_COLOURS["outside"], label="outside the limits at the start"),
            *handles]


def _time_colourbar(fig, axes, proof, norm, **kw):
    import matplotlib.pyplot as plt

    bar = fig.colorbar(plt.cm.ScalarMappable(norm=norm, cmap=time_colormap()), ax=axes, **kw)
    bar.set_label(f"proven time within the limits, at least "
                  f"[{proof.model.time_unit or 'time units'}]", fontsize=8)


def plot_time_to_limit(proof, ax=None, plane=(0, 1), fixed=None):
    """Draw, per cell, the proven lower bound of the time spent within the limits.

    Cells proven to stay forever (``safe``) are drawn in the safe colour, the parts
    outside the limits in the outside colour.

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

    if ax is None:
        _, ax = plt.subplots(figsize=(7, 6))
    norm = _time_scale(proof)
    handles = _draw_time(ax, proof, plane, fixed, norm)
    _time_colourbar(ax.figure, ax, proof, norm, fraction=0.05, pad=0.02)
    _legend_below(ax, handles, ncol=2)
    title = f"{_short(proof.model.name)}: time within the limits"
    if ax.get_title():
        title += f" ({ax.get_title()})"
    ax.set_title(_narrowed(proof, title), fontsize=10)
    return ax


def save_figures(proof, out_dir, slices=None):
    """Write ``map.png`` and ``time_to_limit.png``.

    1D models: strips; 2D: the plane. More states: slices of the plane of the first two
    states not sliced, at the levels `slices` gives (default: three levels of the third
    state), the other states at the window centre; ``map.png`` adds a panel with the share
    of each label along the sliced state over the whole window.

    Parameters
    ----------
    proof : certify.prove.Proof
    out_dir : str or Path
    slices : (int, list of float), optional
        The sliced state's index and its levels (see :func:`parse_slice`).

    Returns
    -------
    list of pathlib.Path
    """
    import warnings

    with warnings.catch_warnings():
        # names may hold characters the default font lacks; a box drawn instead is enough
        warnings.filterwarnings("ignore", message="Glyph .* missing from", category=UserWarning)
        return _save_figures(proof, out_dir, slices)


def _save_figures(proof, out_dir, slices):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from pathlib import Path

    out_dir = Path(out_dir)
    n = proof.tree.n
    paths = []
    if n <= 2:
        plane = (0,) if n == 1 else (0, 1)
        size = (8, 3) if n == 1 else (7.5, 7)
        for name, fn in (("map.png", plot_map), ("time_to_limit.png", plot_time_to_limit)):
            fig, ax = plt.subplots(figsize=size)
            fn(proof, ax, plane=plane)
            paths.append(out_dir / name)
            fig.savefig(paths[-1], dpi=120, bbox_inches="tight")
            plt.close(fig)
        return paths
    lo, hi = proof.tree.lo[0], proof.tree.hi[0]
    if slices is None:
        k = 2
        levels = lo[k] + (hi[k] - lo[k]) * np.array([0.25, 0.5, 0.75])
    else:
        k, levels = slices
    plane = tuple(a for a in range(n) if a != k)[:2]
    fixed_points = []
    for level in levels:
        fixed = 0.5 * (lo + hi)
        fixed[k] = level
        fixed_points.append(fixed)
    for name, draw, scale, bar in (("map.png", _draw_map, _doomed_scale, _doomed_colourbar),
                                   ("time_to_limit.png", _draw_time, _time_scale,
                                    _time_colourbar)):
        panels = len(levels) + (name == "map.png")
        fig, axes = plt.subplots(1, panels, figsize=(6.3 * panels, 6), squeeze=False)
        axes = list(axes[0])
        norm = scale(proof)
        handles = {}
        if name == "map.png":  # first, so that the colour bar sits beside the slices
            _shares_along(axes.pop(0), proof, k)
        for ax, fixed in zip(axes, fixed_points):
            for h in draw(ax, proof, plane, fixed, norm):
                handles.setdefault(h.get_label(), h)
        bar(fig, axes, proof, norm, fraction=0.02, pad=0.01)
        fig.suptitle(_narrowed(proof, f"{_short(proof.model.name)}"
                     + (" (label shares of the whole window)" if name == "map.png" else
                        ": time within the limits")), fontsize=11)
        first = _label_handles(proof) if name == "map.png" else []
        _legend_below(fig, first + list(handles.values()), ncol=4)
        paths.append(out_dir / name)
        fig.savefig(paths[-1], dpi=110, bbox_inches="tight")
        plt.close(fig)
    return paths
