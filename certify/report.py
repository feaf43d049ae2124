"""Run summaries: the JSON summary of a proof and the console table for people."""

from __future__ import annotations

import numpy as np

from .container import narrowed_text, parameter_differences
from .points import points_summary
from .trapping import trapping_summary

__all__ = ["proof_summary", "summary_table", "narrowed_parameters", "SAFETY_NOTE"]

SAFETY_NOTE = ("This certificate is a theorem about the model, not about the system it "
               "describes. Decisions about a real system need a validated model, margins, "
               "and review under the rules and practice that govern that system.")

LABELS = ("safe", "doomed", "outside", "undecided")


def proof_summary(proof, certificate_path=None):
    """The summary dictionary of a proof (scripts rely on its keys).

    Parameters
    ----------
    proof : certify.prove.Proof
    certificate_path : str, optional

    Returns
    -------
    dict
    """
    model = proof.model
    depth = proof.depth_reached
    return {
        "model": model.name,
        "model_file": model.path,
        "time_unit": model.time_unit,
        "model_sha256": model.sha256,
        "window": [[float(a), float(b)] for a, b in model.window],
        "parameters": {p.name: [float(p.lo), float(p.hi)] for p in model.parameters},
        "parameters_narrowed": narrowed_parameters(model),
        "fractions": {k: float(proof.fractions[k]) for k in LABELS},
        "fractions_exact": bool(proof.fractions_exact),
        "cells": proof.counts,
        "depth_reached": depth,
        "finest_cells_per_side": [2 ** depth] * proof.tree.n,
        "rounds": proof.rounds,
        "horizons": [proof.method.min_horizon, proof.method.max_horizon],
        "time_scale": proof.method.time_scale,
        "stop_reason": proof.stop_reason,
        "interrupted": proof.interrupted,
        "faces": [{"state": model.states[f["axis"]].name, "side": f["side"],
                   "kind": f["kind"]} for f in proof.faces],
        "crossing_time_max": _finite_max(proof.labelling.crossing_upper),
        "seconds": round(proof.seconds, 3),
        "certificate": certificate_path,
        "note": SAFETY_NOTE,
        "trapping": trapping_summary(proof.trapping, proof.facts),
        **points_summary(model),  # equilibria, complete, unresolved, limits
    }


def narrowed_parameters(model):
    """The parameters whose box differs from the one in the model's own text.

    A map proven with ``--param`` overrides is a theorem about the overridden boxes only.

    Parameters
    ----------
    model : certify.model.Model

    Returns
    -------
    list of dict
        See :func:`certify.container.parameter_differences` (exact text).
    """
    from .model import parse_model

    stated = parse_model(model.text, path=model.path).parameters
    return parameter_differences({p.name: (p.lo, p.hi) for p in model.parameters},
                                 {p.name: (p.lo, p.hi) for p in stated})


def _finite_max(a):
    a = np.asarray(a)
    a = a[np.isfinite(a)]
    return float(a.max()) if len(a) else None


def summary_table(summary):
    """A short human-readable table of a summary.

    Returns
    -------
    str
    """
    lines = [f"model      {summary['model']}"]
    lines.append(f"{'label':<10} {'cells':>8} {'window %':>10}")
    for k in LABELS:
        lines.append(f"{k:<10} {summary['cells'][k]:>8} {100 * summary['fractions'][k]:>10.3f}")
    if summary["cells"]["safe"] == 0 and summary["cells"]["undecided"] > 0:
        lines.append(f"nothing is proven safe at depth {summary['depth_reached']} yet: go deeper "
                     "with --max-depth (or max_depth in [settings]), or allow more time "
                     "with --time-limit")
    exact = "" if summary["fractions_exact"] else " (straddling cells split by estimate)"
    lines.append(f"finest cell 1/{summary['finest_cells_per_side'][0]} of each side, "
                 f"{summary['rounds']} rounds, {summary['seconds']:.1f} s{exact}")
    lines.append(f"stopped:   {summary['stop_reason']}")
    unit = summary.get("time_unit") or "time units"
    if "horizons" in summary:
        shortest, longest = summary["horizons"]
        scaled = ("" if summary["time_scale"] == 1 else
                  f" (the defaults times {summary['time_scale']:.3g}, to suit the model's "
                  f"rates; [settings] min_horizon etc. override)")
        lines.append(f"horizons:  {shortest:.3g} to {longest:.3g} {unit}{scaled}")
    if summary.get("parameters_narrowed"):
        lines.append(f"proven only for {narrowed_text(summary['parameters_narrowed'])}")
    # faces come two per state, in state order (see certify.faces.analyse_faces)
    sides = [f"{face['state']} = {summary['window'][i // 2][i % 2]:g} {face['kind']}"
             for i, face in enumerate(summary["faces"])]
    lines.append(f"sides:     {', '.join(sides)}")
    open_sides = [side.removesuffix(" open") for side in sides if side.endswith(" open")]
    if open_sides:
        lines.append(f"open:      the flow may leave the window at {', '.join(open_sides)}; "
                     f"trajectories are followed outside it, and cells whose trajectories "
                     f"stay away undecided: widen the window there to decide them")
    trap = summary.get("trapping") or {"regions": [], "notes": []}
    if trap["regions"] or trap["notes"]:
        lines.append(f"trapping:  {len(trap['regions'])} region(s) around stable equilibria, "
                     f"{sum(r['cells'] for r in trap['regions'])} cells trapped"
                     + "".join(f"; {note}" for note in trap["notes"]))
    if summary["cells"]["doomed"] and summary.get("crossing_time_max") is not None:
        lines.append(f"every doomed start crosses a limit within "
                     f"{summary['crossing_time_max']:.4g} {unit}")
    if summary.get("certificate"):
        lines.append(f"certificate {summary['certificate']}")
    lines.append(summary["note"])
    return "\n".join(lines)
