"""Tests of the pictures (issue 15, items 1-4): areas read back from the figure's artists.

* The drawn area of each label agrees with the summary's volume fractions, and the
  drawn ``outside`` area with the closed-form area where a limit fails at t = 0.
* Limits are drawn; legends sit outside the data area; 1D and 2D proofs write both
  pictures.
* The label colours differ in relative luminance (W3C WCAG 2.1 definition), so they
  stay apart in greyscale and for the common colour-vision deficiencies.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402
from matplotlib import colors  # noqa: E402
from matplotlib.collections import PolyCollection  # noqa: E402

from certify import parse_model, prove  # noqa: E402
from certify.palette import LABEL_COLOURS, doomed_colormap  # noqa: E402
from certify.plots import DRAW_SUBGRID, parse_slice, plot_map, save_figures  # noqa: E402

# A stable spiral inside a disc of radius 1 in the window [-1.5, 1.5]^2: d(x^2+y^2)/dt
# = -2 (x^2+y^2), so the disc is invariant. Outside at t = 0 is the window minus the disc,
# of area 9 - pi (closed form).
DISC = (Path(__file__).parent / "data" / "spiral_disc.toml").read_text()
# The same spiral with a limit on one state: the window minus x <= 0.3, area 1.2 * 3.
STRIP = DISC.replace('disc = "x^2 + y^2 <= 1"', 'right = "x <= 0.3"')
# A 1D decay towards 0 with a floor at 0.5 in the window [0.2, 4]: outside is
# [0.2, 0.5], 0.3 / 3.8 of the window.
LINE = """
[model]
name = "decay"
time_unit = "s"
[states]
x = [0.2, 4]
[equations]
x = "-x"
[constraints]
floor = "x >= 0.5"
"""


def _drawn_areas(ax):
    """Area per label of the filled pieces, recognised by their face colours."""
    areas = dict.fromkeys(LABEL_COLOURS, 0.0)
    plain = {k: colors.to_rgba(v) for k, v in LABEL_COLOURS.items()}
    for coll in ax.collections:
        if not isinstance(coll, PolyCollection) or coll.get_gid() != "certify-pieces":
            continue
        faces = coll.get_facecolors()
        for path, face in zip(coll.get_paths(), np.broadcast_to(faces, (len(coll.get_paths()), 4))):
            v = path.vertices[:4]
            area = abs(v[2, 0] - v[0, 0]) * abs(v[2, 1] - v[0, 1])
            if coll.get_hatch():
                areas["undecided"] += area
                continue
            match = [k for k, c in plain.items() if np.allclose(face, c)]
            areas[match[0] if match else "doomed"] += area
    return areas


def _map(text, depth):
    proof = prove(parse_model(text), max_depth=depth)
    fig, ax = plt.subplots()
    plot_map(proof, ax, plane=tuple(range(proof.tree.n)))
    return proof, fig, ax


@pytest.mark.parametrize("text, outside", [(STRIP, 1.2 * 3 / 9), (LINE, 0.3 / 3.8)])
def test_areas_of_exact_splits_equal_the_fractions(text, outside):
    # every limit bounds one state: straddling cells are cut at the limit itself, so the
    # drawn rectangles are the boxes whose volumes the summary adds up
    proof, fig, ax = _map(text, 6)
    total = float(np.prod(proof.tree.hi[0] - proof.tree.lo[0]))  # a 1D strip is 1 high
    drawn = {k: v / total for k, v in _drawn_areas(ax).items()}
    plt.close(fig)
    assert proof.fractions_exact
    for k in LABEL_COLOURS:
        assert drawn[k] == pytest.approx(proof.fractions[k], abs=1e-9), k
    assert drawn["outside"] == pytest.approx(outside, abs=1e-9)


def test_areas_near_a_curved_limit_agree_within_the_sub_grid():
    proof, fig, ax = _map(DISC, 5)
    drawn = _drawn_areas(ax)
    plt.close(fig)
    # Tolerance: only a sub-box meeting the circle can be misclassified, and a curve of
    # length L meets at most 4 (L/s + 1) squares of a grid of side s (each piece of
    # length s meets at most 4), so the area error is at most 4 (L s + s^2); the
    # summary's own estimate errs by at most as much, on a sub-grid as fine.
    s = 3 / 2 ** 5 / DRAW_SUBGRID
    bound = 4 * (2 * math.pi * s + s * s)
    assert drawn["outside"] == pytest.approx(9 - math.pi, abs=bound)  # closed form
    for k in LABEL_COLOURS:
        assert drawn[k] / 9 == pytest.approx(proof.fractions[k], abs=2 * bound / 9), k
    assert sum(drawn.values()) == pytest.approx(9, rel=1e-12)


def test_limits_drawn_and_legend_outside_the_data_area():
    proof, fig, ax = _map(STRIP, 4)
    fig.canvas.draw()
    legend = ax.get_legend()
    assert legend is not None
    box, data = legend.get_window_extent(), ax.get_window_extent()
    assert box.y1 <= data.y0  # below the axes
    labels = [t.get_text() for t in legend.get_texts()]
    assert any(t.startswith("limit right") for t in labels)
    assert any(t.startswith("undecided") for t in labels)
    plt.close(fig)


@pytest.mark.parametrize("text", [LINE, STRIP])
def test_both_pictures_written_in_1d_and_2d(text, tmp_path):
    proof = prove(parse_model(text), max_depth=4)
    paths = save_figures(proof, tmp_path)
    assert sorted(p.name for p in paths) == ["map.png", "time_to_limit.png"]
    assert all(p.stat().st_size > 0 for p in paths)


def _luminance(colour):
    # relative luminance, W3C WCAG 2.1 (sRGB linearisation, Rec. 709 weights)
    rgb = np.array(colors.to_rgb(colour))
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    return float(lin @ [0.2126, 0.7152, 0.0722])


def test_label_colours_differ_in_luminance():
    shades = {**LABEL_COLOURS, "doomed soon": doomed_colormap()(0.0),
              "doomed late": doomed_colormap()(1.0)}
    lum = {k: _luminance(c) for k, c in shades.items()}
    # safe must stand apart from every doomed shade and from outside, and undecided
    # (also hatched) from safe; a luminance ratio of 1.3 is our own threshold
    ratio = lambda a, b: (max(lum[a], lum[b]) + 0.05) / (min(lum[a], lum[b]) + 0.05)  # noqa: E731
    for other in ("outside", "doomed late", "undecided"):
        assert ratio("safe", other) >= 1.3, other


def test_diff_picture_is_clipped_at_the_limits(tmp_path):
    # two proofs of the disc model: the diff picture's pieces outside the disc must be
    # drawn "outside, unchanged", so the pale outside area is the closed-form 9 - pi
    from certify.diff import LABELS, diff_certificates, plot_diff
    from certify.prove import write_proof

    for name in ("a", "b"):
        write_proof(prove(parse_model(DISC), max_depth=5), tmp_path / name, figures=False)
    result = diff_certificates(tmp_path / "a", tmp_path / "b")
    fig, ax = plt.subplots()
    plot_diff(result, ax)
    pale = colors.to_rgba(LABEL_COLOURS["outside"], alpha=0.25)
    area = 0.0
    for coll in ax.collections:
        if isinstance(coll, PolyCollection) and np.allclose(coll.get_facecolors()[:1], pale):
            for path in coll.get_paths():
                v = path.vertices
                area += abs(v[2, 0] - v[0, 0]) * abs(v[2, 1] - v[0, 1])
    plt.close(fig)
    s = 3 / 2 ** 5 / DRAW_SUBGRID  # sub-box side; error bound as in the map test above
    assert area == pytest.approx(9 - math.pi, abs=4 * (2 * math.pi * s + s * s))
    assert result.table[LABELS.index("outside"), LABELS.index("outside")] == \
        pytest.approx(9 - math.pi, abs=4 * (2 * math.pi * s + s * s))


def test_3d_pictures_have_one_legend(tmp_path, monkeypatch):
    # a 3D decay with a limit on z: each picture is three slices with one legend below
    text = DISC.replace('y = [-1.5, 1.5]\n', 'y = [-1.5, 1.5]\nz = [0, 2]\n') \
               .replace('y = "-x - y"\n', 'y = "-x - y"\nz = "-z"\n') \
               .replace('disc = "x^2 + y^2 <= 1"', 'cap = "z <= 1.5"')
    proof = prove(parse_model(text), max_depth=2)
    figures = []
    monkeypatch.setattr(plt, "close", figures.append)  # keep the figures to inspect
    save_figures(proof, tmp_path)
    save_figures(proof, tmp_path, slices=parse_slice(proof, "x=-1,0.5"))
    assert len(figures) == 4
    for fig, name, levels in zip(figures, ("map", "time", "map", "time"),
                                 (["z = 0.5", "z = 1", "z = 1.5"],) * 2 + (["x = -1", "x = 0.5"],) * 2):
        axes = [ax for ax in fig.axes if ax.get_label() != "<colorbar>"]
        assert len(axes) == len(levels) + (name == "map")  # map: the whole-window panel
        assert all(ax.get_legend() is None for ax in axes)
        assert len(fig.legends) == 1
        slices = [ax.get_title() for ax in axes if ax.get_title().startswith("slice")]
        assert slices == [f"slice {v}" for v in levels]
    monkeypatch.undo()
    plt.close("all")


@pytest.mark.parametrize("text, message", [
    ("w=1", "NAME one of the states (x, y, z)"), ("z=a", "the levels must be numbers"),
    ("z=3", "one to four levels within the window [0, 2] of z"),
])
def test_bad_slices_are_named(text, message):
    from certify import UsageError

    model = parse_model(DISC.replace('y = [-1.5, 1.5]\n', 'y = [-1.5, 1.5]\nz = [0, 2]\n')
                        .replace('y = "-x - y"\n', 'y = "-x - y"\nz = "-z"\n'))
    with pytest.raises(UsageError, match=re.escape(message)):
        parse_slice(model, text)
