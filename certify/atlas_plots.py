"""The atlas picture (matplotlib is imported inside the functions).

The parameter plane (or line) coloured by proven verdict, with the proven equilibrium
structure over it: hatching where two or more stable equilibria are proven, dots where
the equilibria are not all resolved (every box through which a fold or an exchange of
stability runs is such a box: equilibria that meet cannot be isolated), and in boxes
large enough to hold it the number of stable equilibria inside the limits. Colours and
hatches come from :mod:`certify.palette`; the legend sits below.
"""

from __future__ import annotations

from certify.palette import (CHANGES_HATCH, INK, MULTISTABLE_HATCH, VERDICT_COLOURS,
                             VERDICT_LABELS)

__all__ = ["plot_atlas"]

#: Boxes at least this share of each range carry their count of stable equilibria.
_TEXT_SHARE = 1 / 16


def _axis_label(data, name):
    unit = data["units"].get(name)
    return f"{name} [{unit}]" if unit else f"{name} (the model gives no unit)"


def _rectangles(data):
    """Per box ``(x0, y0, width, height)`` (the second axis spans [0, 1] with one parameter)."""
    names = data["varied"]
    out = []
    for e in data["boxes"]:
        (x0, x1) = e["params"][names[0]]
        y0, y1 = e["params"][names[1]] if len(names) == 2 else (0.0, 1.0)
        out.append((x0, y0, x1 - x0, y1 - y0))
    return out


def _legend(ax, structure):
    from matplotlib.patches import Patch

    handles = [Patch(facecolor=VERDICT_COLOURS[v], edgecolor=INK, linewidth=0.5,
                     label=VERDICT_LABELS[v]) for v in VERDICT_COLOURS]
    if structure:
        handles += [Patch(facecolor="white", edgecolor=INK, hatch=MULTISTABLE_HATCH,
                          linewidth=0.5, label="two or more stable equilibria (proven)"),
                    Patch(facecolor="white", edgecolor=INK, hatch=CHANGES_HATCH,
                          linewidth=0.5, label="structure not resolved or not uniform "
                                               "(holds every fold and exchange of stability)"),
                    Patch(facecolor="white", edgecolor="white",
                          label="digit: stable equilibria inside the limits (\u2265: at least)")]
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=2,
              fontsize=8, frameon=False)


def plot_atlas(data, path):
    """Write the atlas picture.

    Parameters
    ----------
    data : dict
        The content of ``atlas.json``.
    path : str or path-like
        The PNG file to write.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.collections import PatchCollection
    from matplotlib.patches import Rectangle

    names = data["varied"]
    two = len(names) == 2
    fig, ax = plt.subplots(figsize=(8, 6.5) if two else (8, 3.2))
    rects = _rectangles(data)
    boxes = data["boxes"]
    for verdict, colour in VERDICT_COLOURS.items():
        patches = [Rectangle(r[:2], r[2], r[3]) for r, e in zip(rects, boxes)
                   if e["verdict"] == verdict]
        ax.add_collection(PatchCollection(patches, facecolor=colour, edgecolor="white",
                                          linewidth=0.2))
    for hatch, pick in ((MULTISTABLE_HATCH, lambda s: s["stable"] >= 2),
                        (CHANGES_HATCH, lambda s: s["changes"])):
        patches = [Rectangle(r[:2], r[2], r[3]) for r, e in zip(rects, boxes)
                   if e["structure"] is not None and pick(e["structure"])]
        ax.add_collection(PatchCollection(patches, facecolor="none", edgecolor=INK,
                                          hatch=hatch, linewidth=0))
    xlo, xhi = (float(v) for v in _range(data, names[0]))
    ylo, yhi = (float(v) for v in _range(data, names[1])) if two else (0.0, 1.0)
    min_w, min_h = 0.999 * _TEXT_SHARE * (xhi - xlo), 0.999 * _TEXT_SHARE * (yhi - ylo)
    for r, e in zip(rects, boxes):
        big = r[2] >= min_w and (not two or r[3] >= min_h)
        if big and e["structure"] is not None:
            count = e["structure"]["stable_inside"]
            text = f"\u2265{count}" if e["structure"]["changes"] else str(count)
            ax.text(r[0] + r[2] / 2, r[1] + r[3] / 2, text,
                    ha="center", va="center", fontsize=8, color=INK,
                    bbox={"facecolor": "white", "edgecolor": "none", "pad": 0.8, "alpha": 0.8})
    ax.set_xlim(xlo, xhi)
    ax.set_ylim(ylo, yhi)
    ax.set_xlabel(_axis_label(data, names[0]))
    if two:
        ax.set_ylabel(_axis_label(data, names[1]))
    else:
        ax.set_yticks([])
    shares = ", ".join(f"{VERDICT_LABELS[v].replace('proven: ', '')} {100 * data['areas'][v]:.1f} %"
                       for v in VERDICT_COLOURS)
    ax.set_title(f"{data['model']}: proven atlas of {' and '.join(names)}\n({shares} of the "
                 "area)", fontsize=10)
    _legend(ax, any(e["structure"] is not None for e in boxes))
    fig.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(fig)


def _range(data, name):
    from fractions import Fraction

    return [Fraction(v) for v in data["ranges"][name]]
