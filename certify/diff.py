"""Compare two certificates of models with the same states and window.

Both maps are dyadic trees over the same window, so each pair of overlapping leaves
meets in the deeper of the two: these *pieces* form the common refinement. Each point
of a piece carries the label its certificate gives it (``outside`` where it violates a
limit of that certificate's model at t = 0, otherwise its cell's label), and the table
says how much volume moves from each OLD label to each NEW label.

Volumes of whole pieces are exact dyadic shares of the window. A piece that straddles a
limit is split between its cell's label and ``outside`` as the prover's summary does:
exactly when every limit of both models bounds a single state by a number, otherwise
estimated on a sub-grid (``exact`` is then False).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from fractions import Fraction
from itertools import product
from pathlib import Path

import numpy as np

from .certificate import decode_array, read_certificate
from .container import certificate_path
from .errors import CertificateError
from .expr import format_expression, format_number
from .palette import TRANSITION_COLOURS
from .evaluate import evaluate_limits
from .taylor import flow_programs
from .volumes import axis_threshold

__all__ = ["LABELS", "FAIL_ON", "DiffResult", "diff_certificates", "plot_diff", "write_diff"]

LABELS = ("safe", "doomed", "outside", "undecided")
FAIL_ON = ("safe-loss", "any-change")
#: Sub-boxes per axis when a straddling piece's split has to be estimated.
SUBGRID = 8


@dataclass(frozen=True)
class DiffResult:
    """How two certified maps differ.

    Attributes
    ----------
    old, new : str
        Certificate paths.
    states : tuple of str
    window_volume : float
    table : ndarray, shape (4, 4)
        Volume (in state units) whose label is ``LABELS[i]`` in OLD and ``LABELS[j]``
        in NEW; the entries sum to ``window_volume``.
    exact : bool
        False when some straddling piece's split was estimated.
    model_changes : list of dict
        ``{"kind": "parameter"|"equation"|"limit", "name", "old", "new"}`` for the
        entries that differ (text in the model-file grammar; None where absent).
    pieces : dict
        ``lo``, ``hi`` (float boxes, shape (P, n)), ``old``, ``new`` (label indices:
        the cell's label, or ``outside`` where the whole piece violates a limit) of the
        common refinement, for plots; ``known_old``, ``known_new`` (1 within every
        limit, -1 violating one on the whole piece, 0 straddling).
    limits : tuple
        The limits of the OLD and NEW models, to clip pictures at the limits.
    """

    old: str
    new: str
    states: tuple
    window_volume: float
    table: np.ndarray
    exact: bool
    model_changes: list
    pieces: dict
    limits: tuple = ()

    def volume(self, old_label, new_label):
        """Volume labelled `old_label` in OLD and `new_label` in NEW."""
        return float(self.table[LABELS.index(old_label), LABELS.index(new_label)])

    @property
    def changed_volume(self):
        """Volume whose label differs between OLD and NEW."""
        return float(self.table.sum() - np.trace(self.table))

    @property
    def proven_loss(self):
        """Volume proven safe in OLD and proven doomed or outside in NEW."""
        return self.volume("safe", "doomed") + self.volume("safe", "outside")

    @property
    def unproven_loss(self):
        """Volume proven safe in OLD and undecided in NEW."""
        return self.volume("safe", "undecided")

    def fails(self, fail_on):
        """True when the condition `fail_on` (``safe-loss`` or ``any-change``) holds."""
        if fail_on == "safe-loss":
            return self.proven_loss > 0
        if fail_on == "any-change":
            return self.changed_volume > 0
        raise ValueError(f"fail_on must be one of {FAIL_ON}")

    def to_json(self):
        """JSON-ready dictionary (what ``certify diff --json`` prints)."""
        W = self.window_volume
        return {"old": self.old, "new": self.new, "states": list(self.states),
                "labels": list(LABELS), "window_volume": W,
                "table": self.table.tolist(), "table_fractions": (self.table / W).tolist(),
                "exact": self.exact, "changed_volume": self.changed_volume,
                "proven_loss_volume": self.proven_loss,
                "unproven_loss_volume": self.unproven_loss,
                "proven_loss_boxes": self.boxes("safe", ("doomed", "outside")),
                "unproven_loss_boxes": self.boxes("safe", ("undecided",)),
                "model_changes": self.model_changes}

    def boxes(self, old_label, new_labels):
        """Float boxes (``[lo, hi]`` per state) of the pieces labelled `old_label` in OLD
        and one of `new_labels` in NEW (straddling pieces by their cells' labels)."""
        a, b = self.pieces["old"], self.pieces["new"]
        sel = (a == LABELS.index(old_label)) & np.isin(b, [LABELS.index(k) for k in new_labels])
        lo, hi = self.pieces["lo"][sel], self.pieces["hi"][sel]
        return np.stack([lo, hi], -1).tolist()


def _leaf_keys(cert):
    cells = cert.data["cells"]
    depth = decode_array(cells["depth"], "cells.depth").astype(int)
    index = decode_array(cells["index"], "cells.index").astype(np.int64)
    return depth, index


def _common_refinement(old_keys, new_keys):
    """Pairs ``(old leaf, new leaf, depth, index)``: the deeper leaf of each overlapping
    pair (both trees cover the same window)."""
    lookup = [{(int(d), tuple(int(v) for v in i)): j for j, (d, i) in enumerate(zip(*keys))}
              for keys in (old_keys, new_keys)]
    pairs = []
    for side in (0, 1):
        depth, index = (new_keys, old_keys)[side]
        other = lookup[side]
        first = 0 if side == 0 else 1   # equal depths are counted once
        for j, (d, i) in enumerate(zip(depth, index)):
            d = int(d)
            for k in range(first, d + 1):
                key = (d - k, tuple(int(v) >> k for v in i))
                if key in other:
                    o = other[key]
                    pairs.append((o, j, d, i) if side == 0 else (j, o, d, i))
                    break
    return pairs


def _exact_box(window, depth, index):
    return [(a + (b - a) * Fraction(int(i), 2 ** depth),
             a + (b - a) * Fraction(int(i) + 1, 2 ** depth)) for (a, b), i in zip(window, index)]


class _Limits:
    """The limits of one certificate's model, evaluated on boxes and points."""

    def __init__(self, cert):
        self.model = cert.model
        self.params = cert.data["_param_floats"]
        self.programs = flow_programs(cert.model, 1)
        states = cert.model.state_symbols
        self.thresholds = [axis_threshold(c.g, states) for c in cert.model.constraints]

    @property
    def axis_aligned(self):
        return all(t is not None for t in self.thresholds)

    def status(self, lo, hi):
        """Per box: 1 certainly within every limit, -1 certainly violating one, 0 unknown."""
        glo, ghi = evaluate_limits(self.programs, lo, hi, self.params)
        res = np.zeros(len(lo), int)
        res[np.all(glo >= 0, axis=1)] = 1
        res[np.any(ghi < 0, axis=1)] = -1
        return res

    def inside_box(self, lo, hi):
        """The box of points of ``[lo, hi]`` within every limit (axis-aligned limits)."""
        lo, hi = lo.copy(), hi.copy()
        for k, c, above in self.thresholds:
            if above:
                lo[k] = max(lo[k], c)
            else:
                hi[k] = min(hi[k], c)
        return lo, hi

    def inside_points(self, points):
        """Bool per point: within every limit (plain float evaluation, for estimates)."""
        mid = [0.5 * (p[0] + p[1]) for p in self.params]
        return np.all(self.programs.limits.point_at(points, mid) >= 0, axis=1)


def _box_volume(lo, hi):
    return float(np.prod(np.clip(hi - lo, 0, None)))


def _split(limits_old, limits_new, lo, hi, known_old, known_new):
    """Shares of a box: (within both, OLD only, NEW only, neither); exact flag.

    ``known_old``/``known_new`` are the boxes' proven statuses (1 within, -1 outside,
    0 unknown); proven statuses override the split.
    """
    if limits_old.axis_aligned and limits_new.axis_aligned:
        a_lo, a_hi = limits_old.inside_box(lo, hi)
        b_lo, b_hi = limits_new.inside_box(lo, hi)
        whole = _box_volume(lo, hi)
        a, b = _box_volume(a_lo, a_hi), _box_volume(b_lo, b_hi)
        both = _box_volume(np.maximum(a_lo, b_lo), np.minimum(a_hi, b_hi))
        shares = np.array([both, a - both, b - both, 0.0]) / whole
        shares[3] = 1.0 - shares[:3].sum()
        exact = True
    else:
        n = len(lo)
        grid = (np.array(list(product(range(SUBGRID), repeat=n))) + 0.5) / SUBGRID
        points = lo + grid * (hi - lo)
        a, b = limits_old.inside_points(points), limits_new.inside_points(points)
        shares = np.array([np.mean(a & b), np.mean(a & ~b), np.mean(~a & b),
                           np.mean(~a & ~b)])
        exact = False
    # shares are ordered (in, in), (in, out), (out, in), (out, out)
    moves = {1: ((2, 0), (3, 1)), -1: ((0, 2), (1, 3))}   # OLD known within / outside
    for src, dst in moves.get(known_old, ()):
        shares[dst] += shares[src]
        shares[src] = 0.0
    moves = {1: ((1, 0), (3, 2)), -1: ((0, 1), (2, 3))}   # NEW known within / outside
    for src, dst in moves.get(known_new, ()):
        shares[dst] += shares[src]
        shares[src] = 0.0
    return shares, exact


def _check_same_space(old, new, old_path, new_path):
    s_old = [s.name for s in old.model.states]
    s_new = [s.name for s in new.model.states]
    if s_old != s_new:
        raise CertificateError(f"{old_path} and {new_path} are about different states "
                               f"({', '.join(s_old)} vs {', '.join(s_new)}); diff compares "
                               "certificates of the same state space")
    for s, w_old, w_new in zip(s_old, old.data["window"], new.data["window"]):
        a = [Fraction(v) for v in w_old]
        b = [Fraction(v) for v in w_new]
        if a != b:
            raise CertificateError(
                f"{old_path} and {new_path} have different windows for {s} "
                f"([{format_number(a[0])}, {format_number(a[1])}] vs "
                f"[{format_number(b[0])}, {format_number(b[1])}]); diff compares maps of "
                "the same window")


def _model_changes(old, new):
    """Parameters, equations and limits that differ, as text."""
    changes = []

    def param_text(p):
        if p is None:
            return None
        if p.lo == p.hi:
            return format_number(p.lo)
        return f"[{format_number(p.lo)}, {format_number(p.hi)}]"

    p_old = {p.name: p for p in old.parameters}
    p_new = {p.name: p for p in new.parameters}
    for name in list(p_old) + [k for k in p_new if k not in p_old]:
        a, b = param_text(p_old.get(name)), param_text(p_new.get(name))
        if a != b:
            changes.append({"kind": "parameter", "name": name, "old": a, "new": b})
    for state, e_old, e_new in zip(old.states, old.equations, new.equations):
        a, b = format_expression(e_old), format_expression(e_new)
        if a != b:
            changes.append({"kind": "equation", "name": state.name, "old": a, "new": b})
    c_old = {c.name: c for c in old.constraints}
    c_new = {c.name: c for c in new.constraints}
    for name in list(c_old) + [k for k in c_new if k not in c_old]:
        a, b = c_old.get(name), c_new.get(name)
        if a is None or b is None or format_expression(a.g) != format_expression(b.g):
            changes.append({"kind": "limit", "name": name, "old": a and a.text,
                            "new": b and b.text})
    return changes


def diff_certificates(old_path, new_path):
    """Compare the maps of two certificates over their common refinement.

    Parameters
    ----------
    old_path, new_path : str or Path
        Certificate files (or folders holding ``certificate.json.gz``).

    Returns
    -------
    DiffResult

    Raises
    ------
    CertificateError
        Unreadable certificates, or certificates of different states or windows.
    """
    old_path, new_path = certificate_path(old_path), certificate_path(new_path)
    old, new = read_certificate(old_path), read_certificate(new_path)
    _check_same_space(old, new, old_path, new_path)
    window = old.model.window
    n = len(window)
    W = Fraction(1)
    for a, b in window:
        W *= b - a
    pairs = _common_refinement(_leaf_keys(old), _leaf_keys(new))
    o_leaf = np.array([p[0] for p in pairs], int)
    n_leaf = np.array([p[1] for p in pairs], int)
    depth = np.array([p[2] for p in pairs], int)
    index = np.array([p[3] for p in pairs], np.int64).reshape(len(pairs), n)
    label_index = {k: i for i, k in enumerate(LABELS)}
    a = np.array([label_index[x] for x in old.labels])[o_leaf]
    b = np.array([label_index[x] for x in new.labels])[n_leaf]
    lo, hi = old.tree._geometry(depth, index)   # float boxes enclosing the exact pieces
    lim_old, lim_new = _Limits(old), _Limits(new)
    s_old, s_new = lim_old.status(lo, hi), lim_new.status(lo, hi)
    # whole pieces: exact dyadic shares, summed as integers at the deepest level
    D = int(depth.max(initial=0))
    counts = [[0] * 4 for _ in range(4)]
    whole = (s_old != 0) & (s_new != 0)
    a_eff = np.where(s_old < 0, label_index["outside"], a)
    b_eff = np.where(s_new < 0, label_index["outside"], b)
    for i, j, d in zip(a_eff[whole], b_eff[whole], depth[whole]):
        counts[i][j] += 1 << (n * (D - int(d)))
    scale = W / (1 << (n * D))
    table = np.array([[float(c * scale) for c in row] for row in counts])
    exact = True
    out = label_index["outside"]
    for k in np.flatnonzero(~whole):
        shares, ok = _split(lim_old, lim_new, lo[k], hi[k], s_old[k], s_new[k])
        exact &= ok
        v = float(W / (1 << (n * int(depth[k]))))
        table[a[k], b[k]] += v * shares[0]
        table[a[k], out] += v * shares[1]
        table[out, b[k]] += v * shares[2]
        table[out, out] += v * shares[3]
    return DiffResult(old=str(old_path), new=str(new_path),
                      states=tuple(s.name for s in old.model.states), window_volume=float(W),
                      table=table, exact=exact, model_changes=_model_changes(old.model,
                                                                             new.model),
                      pieces={"lo": lo, "hi": hi, "old": a_eff, "new": b_eff,
                              "known_old": s_old, "known_new": s_new},
                      limits=(lim_old, lim_new))


def _clipped_pieces(result, on, axes, centre):
    """Pieces on the slice, straddling ones cut on a sub-grid and relabelled per model.

    A sub-box whose centre (other coordinates at `centre`) violates a model's limits is
    ``outside`` for that model, so the picture is clipped at the limits of both.
    """
    from .plots import DRAW_SUBGRID

    p = result.pieces
    lo, hi, a, b = p["lo"][on], p["hi"][on], p["old"][on], p["new"][on]
    k_old, k_new = p["known_old"][on], p["known_new"][on]
    straddle = (k_old == 0) | (k_new == 0)
    if not straddle.any() or not result.limits:
        return lo, hi, a, b
    out = LABELS.index("outside")
    grid = np.array(list(product(range(DRAW_SUBGRID), repeat=len(axes))))
    parts = [(lo[~straddle], hi[~straddle], a[~straddle], b[~straddle])]
    idx = np.flatnonzero(straddle)
    n_sub = len(grid)
    slo = np.repeat(lo[idx], n_sub, axis=0)
    shi = np.repeat(hi[idx], n_sub, axis=0)
    width = (shi - slo)[:, axes] / DRAW_SUBGRID
    tiled = np.tile(grid, (len(idx), 1))
    slo[:, axes] = slo[:, axes] + tiled * width
    shi[:, axes] = slo[:, axes] + width
    centres = np.tile(centre, (len(slo), 1))
    centres[:, axes] = 0.5 * (slo[:, axes] + shi[:, axes])
    sa, sb = np.repeat(a[idx], n_sub), np.repeat(b[idx], n_sub)
    for labels, known, limits in ((sa, np.repeat(k_old[idx], n_sub), result.limits[0]),
                                  (sb, np.repeat(k_new[idx], n_sub), result.limits[1])):
        unknown = known == 0
        labels[unknown & ~limits.inside_points(centres)] = out
    parts.append((slo, shi, sa, sb))
    return tuple(np.concatenate([part[k] for part in parts]) for k in range(4))


def _diff_limit_lines(ax, result, plane, centre, wlo, whi):
    """Zero lines of both models' limits on the plane (2D); legend handles."""
    from matplotlib.lines import Line2D

    from .palette import limit_style

    i, j = plane
    X, Y = np.meshgrid(np.linspace(wlo[i], whi[i], 300), np.linspace(wlo[j], whi[j], 300))
    pts = np.tile(centre, (X.size, 1))
    pts[:, i], pts[:, j] = X.ravel(), Y.ravel()
    handles, drawn = [], set()
    shared = ({c.text for c in result.limits[0].model.constraints}
              & {c.text for c in result.limits[1].model.constraints})
    for tag, limits in zip(("OLD", "NEW"), result.limits):
        mid = [0.5 * (q[0] + q[1]) for q in limits.params]
        g = limits.programs.limits.point_at(pts, mid)
        for k, c in enumerate(limits.model.constraints):
            G = g[:, k].reshape(X.shape)
            if c.text in drawn or not np.nanmin(G) < 0 < np.nanmax(G):
                continue
            drawn.add(c.text)
            colour, dash = limit_style(k) if tag == "OLD" else limit_style(k + 3)
            ax.contour(X, Y, G, levels=[0], colors=[colour], linestyles=[dash],
                       linewidths=1.2, zorder=4)
            handles.append(Line2D([], [], color=colour, linestyle=dash,
                                  label=("" if c.text in shared else f"{tag} ")
                                  + f"limit {c.name}: {c.text}"[:70]))
    return handles


def _diff_title(result):
    """What changed between the models, in a few words."""
    changes = [f"{c['kind']} {c['name']}: {c['old'] or '(absent)'} \u2192 "
               f"{c['new'] or '(absent)'}" for c in result.model_changes]
    if not changes:
        return "labels OLD \u2192 NEW (same model)"
    more = f" (+{len(changes) - 2} more)" if len(changes) > 2 else ""
    return "labels OLD \u2192 NEW; " + "; ".join(text[:50] for text in changes[:2]) + more


def plot_diff(result, ax=None, plane=(0, 1)):
    """Draw where labels changed: unchanged pieces pale, changed ones by transition.

    Pieces straddling a limit are cut on a sub-grid and drawn ``outside`` where they
    violate that model's limits, and the limits of both models are drawn.

    Parameters
    ----------
    result : DiffResult
    ax : matplotlib Axes, optional
    plane : (int, int)
        The two state axes drawn; for more than two states, the pieces containing the
        window centre in the other axes are drawn. One-state maps are drawn as a strip.

    Returns
    -------
    matplotlib Axes
    """
    import matplotlib.pyplot as plt
    from matplotlib import colors
    from matplotlib.collections import PolyCollection
    from matplotlib.patches import Patch

    from .palette import LABEL_COLOURS

    if ax is None:
        _, ax = plt.subplots(figsize=(7.5, 6))
    lo, hi = result.pieces["lo"], result.pieces["hi"]
    n = lo.shape[1]
    axes = (0,) if n == 1 else tuple(plane)
    wlo, whi = lo.min(axis=0), hi.max(axis=0)
    centre = 0.5 * (wlo + whi)
    others = [k for k in range(n) if k not in axes]
    on = np.all([(lo[:, k] <= centre[k]) & (hi[:, k] >= centre[k]) for k in others], axis=0) \
        if others else np.ones(len(lo), bool)
    lo, hi, a, b = _clipped_pieces(result, on, axes, centre)
    if n == 1:
        lo = np.concatenate([lo, np.zeros((len(lo), 1))], 1)
        hi = np.concatenate([hi, np.ones((len(hi), 1))], 1)
    i, j = (0, 1) if n == 1 else plane

    def rectangles(sel):
        return np.stack([np.stack([lo[sel, i], lo[sel, j]], 1),
                         np.stack([hi[sel, i], lo[sel, j]], 1),
                         np.stack([hi[sel, i], hi[sel, j]], 1),
                         np.stack([lo[sel, i], hi[sel, j]], 1)], 1)

    legend = []
    for k, name in enumerate(LABELS):
        sel = (a == k) & (b == k)
        pale = colors.to_rgba(LABEL_COLOURS[name], alpha=0.25)
        ax.add_collection(PolyCollection(rectangles(sel), facecolors=[pale], edgecolors="none"))
        legend.append(Patch(color=pale, label=f"{name}, unchanged"))
    drawn = set(zip(a[a != b].tolist(), b[a != b].tolist()))
    moves = sorted(drawn | {(x, y) for x in range(4) for y in range(4)
                            if x != y and result.table[x, y] > 0})
    for x, y in moves:
        sel = (a == x) & (b == y)
        colour = TRANSITION_COLOURS[(LABELS[x], LABELS[y])]
        ax.add_collection(PolyCollection(rectangles(sel), facecolors=[colour],
                                         edgecolors="none"))
        share = 100 * result.table[x, y] / result.window_volume
        legend.append(Patch(color=colour, label=f"{LABELS[x]} \u2192 {LABELS[y]} "
                                                f"{share:.2f} %"))
    if n > 1 and result.limits:
        legend += _diff_limit_lines(ax, result, (i, j), centre, wlo, whi)
    states = result.limits[0].model.states if result.limits else None

    def name(k):
        if states is None:
            return result.states[k]
        return f"{states[k].name} [{states[k].unit}]" if states[k].unit else states[k].name

    ax.set_xlim(wlo[i], whi[i])
    ax.set_xlabel(name(i))
    if n == 1:
        ax.set_ylim(0, 1)
        ax.set_yticks([])
    else:
        ax.set_ylim(wlo[j], whi[j])
        ax.set_ylabel(name(j))
    title = _diff_title(result)
    if others:
        title += "\n(slice " + ", ".join(f"{name(k)} = {centre[k]:.3g}" for k in others) + ")"
    ax.set_title(title, fontsize=9)
    ax.legend(handles=legend, loc="upper left", bbox_to_anchor=(1.02, 1), fontsize=8,
              frameon=False)
    return ax


def write_diff(result, out_dir):
    """Write ``diff.png`` and ``diff.json`` into `out_dir`; return the folder path."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    fig, ax = plt.subplots(figsize=(7.5, 6 if len(result.states) > 1 else 2.5))
    plot_diff(result, ax)
    fig.savefig(out / "diff.png", dpi=120, bbox_inches="tight")
    plt.close(fig)
    (out / "diff.json").write_text(json.dumps(result.to_json(), indent=2) + "\n")
    return out
