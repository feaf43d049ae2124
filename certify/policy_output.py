"""Writing and reading policy certificates, the policy summary and ``policy.png``.

A policy proof writes into its folder one ordinary certificate per setting
(``setting-K.json.gz``), one for the differential inclusion (``inclusion.json.gz``), and
``policy.json.gz``: the model, the settings, the label and chosen setting of every
cell, and the names of those certificates (docs/certificate-format.md, "Policy
certificates"). ``certify check`` on the folder re-verifies all of it.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .check._policy import POLICY_FORMAT, POLICY_NAME, POLICY_VERSION
from .container import encode_array, fraction_text, write_certificate

__all__ = ["write_policy", "policy_summary", "read_policy", "PolicyMap", "plot_policy"]

INCLUSION_NAME = "inclusion.json.gz"


def _setting_text(setting):
    return ", ".join(f"{k} = {float(v):g}" for k, v in setting.items())


def policy_summary(pp, path=None):
    """The summary dictionary of a policy proof (``summary.json``).

    Parameters
    ----------
    pp : certify.policy.PolicyProof
    path : str, optional
        Where the policy certificate is written.

    Returns
    -------
    dict
    """
    from .report import SAFETY_NOTE

    model = pp.model
    counts = np.bincount(pp.choice[pp.choice >= 0], minlength=len(pp.settings))
    vol = pp.tree.volume_fraction(pp.leaves)
    return {
        "model": model.name,
        "model_file": model.path,
        "model_sha256": model.sha256,
        "controls": [{"name": c.name, "settings": [float(v) for v in c.settings],
                      "hold": float(c.hold)} for c in model.controls],
        "settings": [{k: float(v) for k, v in s.items()} for s in pp.settings],
        "fractions": {k: float(v) for k, v in pp.fractions.items()},
        "cells": pp.counts,
        "policy": [{"setting": {k: float(v) for k, v in s.items()},
                    "cells": int(counts[j]),
                    "share": float(vol[pp.choice == j].sum())}
                   for j, s in enumerate(pp.settings)],
        "safe_share_held_constant": (None if pp.constant_shares is None
                                     else [float(x) for x in pp.constant_shares]),
        "safe_share_policy": float(pp.fractions["safe"]),
        "depth_reached": int(pp.tree.depth[pp.leaves].max()),
        "rounds": pp.rounds,
        "stop_reason": pp.stop_reason,
        "seconds": round(pp.seconds, 3),
        "certificate": path,
        "note": SAFETY_NOTE,
    }


def policy_table(summary):
    """Lines of the table: the share of the window safe per constant setting and under
    the policy (what switching buys)."""
    lines = [f"{'settings':<28} {'safe share':>10}"]
    for s, share in zip(summary["settings"], summary["safe_share_held_constant"] or ()):
        text = _setting_text(s) + " held constant"
        lines.append(f"{text:<28} {share:>9.1%}")
    lines.append(f"{'policy (switching)':<28} {summary['safe_share_policy']:>9.1%}")
    return lines


def write_policy(pp, out_dir, *, figures=True, claim=None):
    """Write the certificates, ``summary.json`` and (optionally) ``policy.png``.

    Parameters
    ----------
    pp : certify.policy.PolicyProof
    out_dir : str or Path
    figures : bool
    claim : dict, optional
        A claim record (:meth:`certify.policy_claim.PolicyClaim.record`) to store.

    Returns
    -------
    dict
        The summary.
    """
    from .certificate import certificate_data
    from .report import proof_summary

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    names = [f"setting-{k}.json.gz" for k in range(len(pp.settings))]
    for name, proof in zip(names + [INCLUSION_NAME], pp.per_setting + [pp.inclusion]):
        write_certificate(out / name, certificate_data(proof, proof_summary(proof, str(out / name))))
    path = out / POLICY_NAME
    summary = policy_summary(pp, str(path))
    model = pp.model
    write_certificate(path, {
        "format": POLICY_FORMAT,
        "version": POLICY_VERSION,
        "model": {"name": model.name, "file": model.path, "text": model.text,
                  "sha256": model.sha256},
        "settings": [{k: fraction_text(v) for k, v in s.items()} for s in pp.settings],
        "files": {"settings": names, "inclusion": INCLUSION_NAME},
        "cells": {"count": int(len(pp.leaves)),
                  "label": [str(x) for x in pp.proof.labelling.label],
                  "choice": [int(x) for x in pp.choice],
                  "crossing_upper": encode_array(pp.proof.labelling.crossing_upper),
                  "survival_lower": encode_array(pp.proof.labelling.survival_lower)},
        "summary": summary,
        **({"claim": claim} if claim is not None else {}),
    })
    (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    if figures and pp.tree.n == 2:
        plot_policy(pp, out / "policy.png")
    return summary


class PolicyMap:
    """A policy certificate for queries (no verification: use ``certify check``).

    Attributes
    ----------
    certificate : certify.certificate.Certificate
        The inclusion's certificate (cells, crossing bounds under every control).
    labels : ndarray of str
        Labels with controls.
    choice : ndarray of int
        Chosen setting per cell (-1 where not safe).
    settings : list of dict
        ``{control: Fraction}`` per setting index.
    """

    def __init__(self, certificate, labels, choice, settings):
        self.certificate = certificate
        self.labels = labels
        self.choice = choice
        self.settings = settings

    def _leaf(self, points):
        cert = self.certificate
        points, node = cert._locate(points)
        return points, cert._leaf_of_node(node)

    def label_at(self, points):
        """Label with controls of each point (``outside`` where a limit is violated at
        t = 0; ``undecided`` outside the window or where the limits cannot be evaluated
        with certainty at the point, as :meth:`certify.certificate.Certificate.label_at`)."""
        points, leaf = self._leaf(points)
        out = np.where(leaf >= 0, self.labels[np.maximum(leaf, 0)], "undecided").astype(object)
        v = self.certificate._violates(points)
        out[v < 0] = "outside"
        out[(v == 0) & (out != "outside")] = "undecided"
        return out.astype(str)

    def setting_at(self, points):
        """Index of the policy's setting at each point, -1 where no policy is proven
        (the point's label is not ``safe``, :meth:`label_at`).

        A point on the border of cells gets the setting of one of them (either keeps it
        safe); use ``settings[i]`` for the values.
        """
        _, leaf = self._leaf(points)
        safe = self.label_at(points) == "safe"
        return np.where((leaf >= 0) & safe, self.choice[np.maximum(leaf, 0)], -1)


def read_policy(path):
    """Read a policy certificate for queries.

    Parameters
    ----------
    path : str or Path
        ``policy.json.gz`` or its folder.

    Returns
    -------
    PolicyMap
    """
    from fractions import Fraction

    from .certificate import read_certificate
    from .check._policy import _load

    path = Path(path)
    if path.is_dir():
        path = path / POLICY_NAME
    data = _load(path)
    cert = read_certificate(path.parent / data["files"]["inclusion"])
    settings = [{k: Fraction(v) for k, v in s.items()} for s in data["settings"]]
    return PolicyMap(cert, np.array(data["cells"]["label"]),
                     np.array(data["cells"]["choice"], int), settings)


def plot_policy(pp, path):
    """``policy.png`` (2D): safe cells coloured by the setting they hold, the other labels
    as on the map, clipped at the limits like the map (:func:`certify.plots.drawn_pieces`).
    """
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import Patch

    from .palette import HATCH_COLOUR, LABEL_COLOURS, SETTING_COLOURS, UNDECIDED_HATCH
    from .plots import _doomed_scale, _draw_labels, _draw_limits, _fill, _frame, drawn_pieces

    proof = pp.proof
    fig, ax = plt.subplots(figsize=(7.5, 5.5))
    pieces = drawn_pieces(proof)
    _draw_labels(ax, proof, pieces, _doomed_scale(proof))
    safe = pieces.label == "safe"
    colours = [SETTING_COLOURS[k % len(SETTING_COLOURS)] for k in pp.choice[pieces.cell[safe]]]
    _fill(ax, pieces, safe, colours)
    handles = _draw_limits(ax, proof, (0, 1), 0.5 * (proof.tree.lo[0] + proof.tree.hi[0]))
    _frame(ax, proof, (0, 1), [], None)
    vol = pp.tree.volume_fraction(pp.leaves)
    handles += [Patch(facecolor=SETTING_COLOURS[j % len(SETTING_COLOURS)],
                      label=f"safe, hold {_setting_text(s)} "
                            f"({100 * vol[pp.choice == j].sum():.1f} % of the window)")
                for j, s in enumerate(pp.settings)]
    handles += [Patch(facecolor=LABEL_COLOURS[k], label=k) for k in ("doomed", "outside")]
    handles.append(Patch(facecolor=LABEL_COLOURS["undecided"], edgecolor=HATCH_COLOUR,
                         hatch=UNDECIDED_HATCH, label="undecided"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1), fontsize=7)
    ax.set_title(f"{pp.model.name}: a proven policy\n(about the model, not the plant)",
                 fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path
