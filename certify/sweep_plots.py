"""Figures of a parameter sweep (matplotlib is imported inside the functions).

One varied parameter: a band plot, per parameter box the proven lower bound of the safe
fraction of the window (solid), the upper bound (dashed) and the band between them. Two:
heat maps of the lower and the upper bound side by side, each box labelled with its
percentage. Boxes proven to have no safe state are hatched in both. Colours come from
:mod:`certify.palette`; legends sit outside the data area.
"""

from __future__ import annotations

import numpy as np

from certify.palette import INK, LABEL_COLOURS, NO_SAFE_COLOUR, safe_share_colormap

__all__ = ["plot_safe_band", "plot_safe_maps", "plot_sweep"]

_NO_SAFE_LABEL = "proven: no safe state"


def _box_edges(entries, name):
    """Sorted distinct box edges of parameter ``name``."""
    return np.unique([bound for e in entries for bound in e["params"][name]])


def _axis_label(data, name):
    unit = data["units"].get(name)
    return f"parameter {name} [{unit}]" if unit else f"parameter {name}"


def plot_safe_band(data, ax=None):
    """Draw the safe-fraction bounds of a one-parameter sweep.

    Parameters
    ----------
    data : dict
        The content of ``sweep.json`` with one varied parameter.
    ax : matplotlib.axes.Axes, optional
        Drawn into a new figure when None.

    Returns
    -------
    matplotlib.axes.Axes
    """
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    if ax is None:
        _, ax = plt.subplots(figsize=(8, 4))
    name = data["varied"][0]
    for e in data["entries"]:
        lo, hi = e["params"][name]
        s_lo, s_hi = e["safe_bounds"]
        ax.fill_between([lo, hi], [100 * s_lo] * 2, [100 * s_hi] * 2,
                        color=LABEL_COLOURS["safe"], alpha=0.2, linewidth=0)
        ax.hlines(100 * s_lo, lo, hi, colors=LABEL_COLOURS["safe"], linewidth=2.5)
        ax.hlines(100 * s_hi, lo, hi, colors=INK, linewidth=1.2, linestyles=(0, (4, 2)))
        if e["no_safe_state"]:
            ax.axvspan(lo, hi, facecolor="none", edgecolor=NO_SAFE_COLOUR, hatch="///",
                       linewidth=0)
    edges = _box_edges(data["entries"], name)
    ax.set_xlim(edges[0], edges[-1])
    ax.set_ylim(-2, 102)
    ax.set_xlabel(_axis_label(data, name))
    ax.set_ylabel("safe part of the window [%]")
    ax.legend(handles=[Line2D([], [], color=LABEL_COLOURS["safe"], linewidth=2.5,
                              label="proven safe (lower bound)"),
                       Line2D([], [], color=INK, linewidth=1.2, linestyle=(0, (4, 2)),
                              label="at most safe (upper bound)"),
                       Patch(facecolor=LABEL_COLOURS["safe"], alpha=0.2,
                             label="not yet decided between them"),
                       Patch(facecolor="none", edgecolor=NO_SAFE_COLOUR, hatch="///",
                             label=_NO_SAFE_LABEL)],
              loc="upper left", bbox_to_anchor=(1.01, 1), fontsize=8, frameon=False)
    ax.set_title(f"{data['model']}: safe fraction per box of {name}", fontsize=10)
    return ax


def plot_safe_maps(data, axes=None):
    """Draw heat maps of the lower and upper safe-fraction bound of a two-parameter sweep.

    Parameters
    ----------
    data : dict
        The content of ``sweep.json`` with two varied parameters.
    axes : sequence of two matplotlib.axes.Axes, optional
        Drawn into a new figure when None.

    Returns
    -------
    sequence of matplotlib.axes.Axes
    """
    import matplotlib.pyplot as plt
    from matplotlib.patches import Patch, Rectangle

    if axes is None:
        _, axes = plt.subplots(1, 2, figsize=(11, 4.5), sharey=True)
    first, second = data["varied"]
    x_edges = _box_edges(data["entries"], first)
    y_edges = _box_edges(data["entries"], second)
    grids = np.full((2, len(y_edges) - 1, len(x_edges) - 1), np.nan)
    for e in data["entries"]:
        i, j = e["index"]
        grids[:, j, i] = [100 * bound for bound in e["safe_bounds"]]
    titles = ("proven safe fraction (lower bound)", "largest possible safe fraction (upper bound)")
    for ax, grid, title in zip(axes, grids, titles):
        mesh = ax.pcolormesh(x_edges, y_edges, grid, vmin=0, vmax=100, cmap=safe_share_colormap(),
                             edgecolors="white", linewidth=0.3)
        for (j, i), value in np.ndenumerate(grid):
            if np.isfinite(value) and grid.size <= 400:  # numbers only where they fit
                ax.text(0.5 * (x_edges[i] + x_edges[i + 1]), 0.5 * (y_edges[j] + y_edges[j + 1]),
                        f"{value:.0f}", ha="center", va="center", fontsize=7,
                        color="white" if value > 55 else INK)
        for e in data["entries"]:
            if e["no_safe_state"]:
                (xl, xh), (yl, yh) = e["params"][first], e["params"][second]
                ax.add_patch(Rectangle((xl, yl), xh - xl, yh - yl, facecolor="none",
                                       edgecolor=NO_SAFE_COLOUR, hatch="///", linewidth=0))
        ax.set_title(title, fontsize=10)
        ax.set_xlabel(_axis_label(data, first))
    axes[0].set_ylabel(_axis_label(data, second))
    colorbar = axes[0].figure.colorbar(mesh, ax=list(axes), fraction=0.04)
    colorbar.set_label("safe part of the window [%]")
    axes[1].legend(handles=[Patch(facecolor="none", edgecolor=NO_SAFE_COLOUR, hatch="///",
                                  label=_NO_SAFE_LABEL)], loc="upper center",
                   bbox_to_anchor=(0.5, -0.15), fontsize=8, frameon=False)
    return axes


def plot_sweep(data, path):
    """Write the figure of a sweep: a band plot (one parameter) or two heat maps (two).

    Parameters
    ----------
    data : dict
        The content of ``sweep.json``.
    path : str or path-like
        The PNG file to write.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    if len(data["varied"]) == 1:
        ax = plot_safe_band(data)
        fig = ax.figure
    else:
        fig = plot_safe_maps(data)[0].figure
        fig.suptitle(f"{data['model']}: safe fraction per parameter box", fontsize=11)
    fig.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(fig)
