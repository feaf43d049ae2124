"""The colours and marks of every picture, kept in one place.

The four labels differ in lightness as well as hue, so they stay apart for readers
with the common colour-vision deficiencies and in greyscale: ``safe`` a mid blue,
``doomed`` a brown-to-sand ramp (darker: the crossing comes sooner), ``outside`` a
neutral grey, ``undecided`` a pale straw crossed by hatching. Limit arcs are drawn in
ink and told apart by arrows, not by colour: arrows pointing out of the limits where
the flow provably leaves, into them where it provably returns.

matplotlib is imported inside the functions.
"""

from __future__ import annotations

__all__ = ["LABEL_COLOURS", "UNDECIDED_HATCH", "HATCH_COLOUR", "INK", "LIMIT_STYLES",
           "ARC_STYLES", "TRANSITION_COLOURS", "NO_SAFE_COLOUR", "doomed_colormap",
           "time_colormap", "safe_share_colormap", "limit_style", "SETTING_COLOURS",
           "VERDICT_COLOURS", "VERDICT_LABELS", "MULTISTABLE_HATCH", "CHANGES_HATCH"]

LABEL_COLOURS = {"safe": "#3a6ea5", "doomed": "#c9782f", "outside": "#a9a9a9",
                 "undecided": "#f1e7bd"}
#: Hatching laid over every ``undecided`` area (and its legend entry).
UNDECIDED_HATCH = "////"
HATCH_COLOUR = "#a08a3c"
INK = "#161616"
#: Colour and dash pattern of the zero line of the k-th limit (cycled): dark tones
#: unlike any label colour, and a different dash for each so that colour is not needed.
LIMIT_STYLES = [("#161616", "solid"), ("#0f5c52", (0, (6, 2))), ("#5c3d0f", (0, (2, 1.5))),
                ("#3d2f6b", (0, (6, 2, 1.5, 2))), ("#5a5a5a", (0, (10, 3))),
                ("#6b1f2f", (0, (3, 3)))]
#: Limit arcs where the flow provably leaves or returns: thick ink lines, arrows
#: pointing out of the limits (leaves) or into them (returns).
ARC_STYLES = {
    "leaves": {"color": INK, "linewidth": 3.0, "arrow": -1,
               "label": "limit: flow leaves (proven), arrows point out"},
    "returns": {"color": "#ffffff", "linewidth": 3.0, "edge": INK, "arrow": 1,
                "label": "limit: flow returns (proven), arrows point in"},
}
#: Colours of label changes in ``diff.png``: losses of ``safe`` dark, gains light.
TRANSITION_COLOURS = {
    ("safe", "doomed"): "#7a1e12", ("safe", "outside"): "#3b0c06",
    ("safe", "undecided"): "#d0506e", ("doomed", "safe"): "#1f6f8b",
    ("undecided", "safe"): "#8fc1d6", ("outside", "safe"): "#0b3a4d",
    ("undecided", "doomed"): "#6a4c93", ("doomed", "undecided"): "#c7b8e0",
    ("doomed", "outside"): "#7a5a1e", ("outside", "doomed"): "#d9b26f",
    ("undecided", "outside"): "#2e5e3a", ("outside", "undecided"): "#9cc79f",
}
#: Colours of the settings of a policy in ``policy.png`` (safe cells, by the setting
#: held): blues, teals and purples, apart from the doomed browns and the outside grey.
SETTING_COLOURS = ("#1b4f8a", "#3a9fb5", "#8fd3c1", "#5b3f8c", "#a37cc4", "#2f7d4f",
                   "#85b86b", "#d6d36a")
#: Hatching colour of sweep boxes proven to hold no safe state.
NO_SAFE_COLOUR = "#7a1e12"

#: Fill of atlas boxes by proven verdict: safe states exist (the safe colour), no safe
#: state (a mid tone of the doomed ramp), undetermined (the undecided straw).
VERDICT_COLOURS = {"safe": LABEL_COLOURS["safe"], "none": "#d38a45",
                   "undetermined": LABEL_COLOURS["undecided"]}
VERDICT_LABELS = {"safe": "proven: a safe state exists", "none": "proven: no safe state",
                  "undetermined": "undetermined"}
#: Hatching (in ink) over atlas boxes with two or more stable equilibria, and dots over
#: boxes where the proven equilibrium structure changes (a fold or an exchange of
#: stability runs through the box).
MULTISTABLE_HATCH = "//"
CHANGES_HATCH = ".."

_DOOMED_RAMP = ("#6e3208", "#a85a1c", "#d38a45", "#f2c58f")
_TIME_RAMP = ("#fbf3d5", "#e3cb7e", "#ad9249", "#6e5a2b", "#3a2c17")


def doomed_colormap():
    """The ramp of ``doomed`` cells by their proven latest crossing time (dark: sooner)."""
    from matplotlib.colors import LinearSegmentedColormap
    return LinearSegmentedColormap.from_list("certify-doomed", _DOOMED_RAMP)


def time_colormap():
    """The ramp of proven time within the limits (light: short, dark: long)."""
    from matplotlib.colors import LinearSegmentedColormap
    return LinearSegmentedColormap.from_list("certify-time", _TIME_RAMP)


def safe_share_colormap():
    """The ramp of a safe share from 0 % (white) to 100 % (the safe colour)."""
    from matplotlib.colors import LinearSegmentedColormap
    return LinearSegmentedColormap.from_list("certify-safe-share",
                                             ("#ffffff", LABEL_COLOURS["safe"], "#1d3a5c"))


def limit_style(k):
    """Colour and dash pattern of the k-th limit's zero line."""
    return LIMIT_STYLES[k % len(LIMIT_STYLES)]
