"""The proven verdict of one parameter box: a safe state exists, none exists, or open.

Every statement holds for every constant parameter value in the box (the parameters
enter as intervals). The cheap questions come first:

1. **A safe state exists** (:func:`safe_by_region`): trapping regions around a stable
   equilibrium inside the limits (:func:`certify.atlas_regions.find_box_region`,
   :func:`certify.trapping.find_regions`), proven forward invariant and inside the limits
   with the parameters as intervals. Every point of one is safe for every parameter
   value, and it is not empty: it holds its centre, which keeps every limit. At the
   resolution, a box may be covered by halved parameter parts, each with its own region.
2. **No safe state** (:func:`none_by_limit_rate`): every face of the window is
   ``limit``, ``inflow``, ``invariant`` or ``no-outflow``
   (:func:`certify.faces.analyse_faces`), so a
   trajectory keeping the limits stays in the window; and the window is covered by boxes
   that either violate some limit on the whole box or where the rate ``dg/dt`` of one
   fixed limit ``g >= 0`` is at most ``-eps < 0``. Then ``g`` falls by ``eps`` per unit
   of time as long as the limits hold, so every start in the window crosses a limit by
   ``max g / eps``.
3. **Equilibrium structure** (:func:`box_structure`, :func:`certify.points.find_equilibria`):
   how many equilibria, which are stable, which lie inside the limits; the atlas proves
   it for its leaves once every verdict is in, and before a map (an equilibrium inside
   the limits spares it).
4. Only when these do not decide, the map of fates (:func:`certify.prove.prove`):
   ``none`` when every cell is doomed or outside, ``safe`` when a safe cell lies wholly
   inside the limits.
"""

from __future__ import annotations

import time
from fractions import Fraction
from itertools import product

import numpy as np

__all__ = ["VERDICTS", "analyse_parameter_box", "box_structure", "equilibrium_structure",
           "safe_by_region", "none_by_limit_rate"]

#: Verdicts of a parameter box.
VERDICTS = ("safe", "none", "undetermined")
#: Budget of the trapping-region cover in an atlas (smaller than in a proof: a box that
#: fails here is split, and its halves are easier).
REGION_DEPTH = 12
REGION_BOXES = 40_000
#: Halvings of a finest box's parameters allowed when no single region serves it (each
#: part then needs its own region).
SPLIT_DEPTH = 2
#: Depth of the equilibrium search of each box (the structure drawn in the atlas).
EQUILIBRIUM_DEPTH = 8
#: Budget of the cover of the window in the limit-rate test.
RATE_DEPTH = 24
RATE_BOXES = 100_000


def equilibrium_structure(result):
    """Counts of a :class:`certify.points.EquilibriumResult` for the atlas.

    Parameters
    ----------
    result : certify.points.EquilibriumResult

    Returns
    -------
    dict
        ``count``, ``stable``, ``stable_inside`` (stable and inside every limit),
        ``by_stability``, ``by_limits``, ``complete`` and ``changes``: True when the
        search left boxes unresolved or some equilibrium's stability or position
        relative to the limits is not uniform over the box, as where equilibria meet
        (a fold) or exchange stability. Without ``changes`` the counts hold for every
        parameter value in the box.
    """
    from certify.points import STABILITIES

    by_stability = {word: 0 for word in STABILITIES}
    by_limits = {word: 0 for word in ("inside", "straddles", "outside")}
    for point in result.equilibria:
        by_stability[point.stability] += 1
        by_limits[point.limits] += 1
    stable_inside = sum(1 for p in result.equilibria
                        if p.stability == "stable" and p.limits == "inside")
    changes = (not result.complete or by_stability["undetermined"] > 0
               or by_limits["straddles"] > 0)
    return {"count": len(result.equilibria), "stable": by_stability["stable"],
            "stable_inside": stable_inside, "by_stability": by_stability,
            "by_limits": by_limits, "complete": bool(result.complete),
            "changes": bool(changes)}


def _in_window(model, point):
    return all(lo <= Fraction(x) <= hi for x, (lo, hi) in zip(point, model.window))


def _resting_points(model, programs, mid):
    """Float estimates of equilibria at `mid` and whether one keeps every limit there."""
    from certify.atlas_regions import float_equilibria

    points = float_equilibria(model, programs, mid)
    inside = []
    for point in points:
        inputs = np.concatenate([point, mid])
        limits = programs.limits.point(inputs) if programs.limits.n_outputs else np.ones(1)
        inside.append(bool(np.all(limits > 0)))
    return points, inside


def _region_in(model, programs, params):
    """A trapping region for the parameter box `params` (floats), and `resting`."""
    from certify.atlas_regions import find_box_region
    from certify.trapping import find_regions

    mid = np.array([0.5 * (a + b) for a, b in params], float)
    spirals = False
    points, inside = _resting_points(model, programs, mid)
    for point, keeps in zip(points, inside):
        n = len(point)
        values = np.linalg.eigvals(
            programs.jacobian.point(np.concatenate([point, mid])).reshape(n, n))
        if np.any(values.real >= 0) or not keeps:
            continue
        if np.any(values.imag != 0):
            spirals = True
            continue
        region = find_box_region(model, programs, params, point)
        if region is not None and _in_window(model, region.centre):
            return region, True
    if not spirals:
        return None, any(inside)
    search = find_regions(model, programs, params, max_depth=REGION_DEPTH,
                          max_boxes=REGION_BOXES)
    for region in search.regions:
        if _in_window(model, region.centre):
            return region, True
    return None, any(inside)


def _halves(params, positions):
    """The ``2^k`` parameter boxes that halve `params` along every interval parameter.

    The midpoints are floats, so the halves cover the box exactly.
    """
    out = []
    for sides in product((0, 1), repeat=len(positions)):
        child = [tuple(p) for p in params]
        for k, side in zip(positions, sides):
            lo, hi = child[k]
            mid = 0.5 * (lo + hi)
            child[k] = (lo, mid) if side == 0 else (mid, hi)
        out.append(child)
    return out


def _stable_inside(model, programs, point, p):
    """Float test: `point` is a stable equilibrium estimate keeping every limit at `p`."""
    if point is None or not _in_window(model, point):
        return False
    n = len(point)
    inputs = np.concatenate([point, p])
    if programs.limits.n_outputs and not np.all(programs.limits.point(inputs) > 0):
        return False
    return bool(np.all(np.linalg.eigvals(programs.jacobian.point(inputs).reshape(n, n)).real
                       < 0))


def _rests_throughout(model, programs, params, positions):
    """Float test: at every point of a grid of the parameter box some equilibrium is
    stable and keeps the limits (else no set of regions can cover the box, and halving
    it is not worth its cost). The midpoint's equilibria are followed by Newton's method
    first; a full search only where that fails."""
    from certify.atlas_regions import _equilibrium, float_equilibria, parameter_grid

    mid = np.array([0.5 * (a + b) for a, b in params], float)
    points = [x for x in float_equilibria(model, programs, mid)
              if _stable_inside(model, programs, x, mid)]
    for p in parameter_grid(params, positions):
        if not any(_stable_inside(model, programs, _equilibrium(programs, x, p), p)
                   for x in points) \
                and not any(_stable_inside(model, programs, x, p)
                            for x in float_equilibria(model, programs, p)):
            return False
    return True


def _regions_on(model, programs, params, positions, depth):
    """Regions covering `params` by halving up to `depth` times, or None."""
    region, resting = _region_in(model, programs, params)
    if region is not None:
        return [(params, region)], True
    if depth == 0 or not resting or not _rests_throughout(model, programs, params, positions):
        return None, resting
    parts = []
    for child in _halves(params, positions):
        found, _ = _regions_on(model, programs, child, positions, depth - 1)
        if found is None:
            return None, resting
        parts.extend(found)
    return parts, resting


def safe_by_region(model, split_depth=0):
    """Trapping regions proving that a safe state exists, or None.

    Around each float estimate of a stable equilibrium inside the limits at the
    parameter midpoint (:func:`certify.atlas_regions.float_equilibria`), a parallelotope
    (:func:`certify.atlas_regions.find_box_region`, for real eigenvalues); where some
    such equilibrium is a spiral, also the quadratic Lyapunov regions of
    :func:`certify.trapping.find_regions`. Soundness rests on the regions' own proofs
    only: the estimates just say where to look. When no region serves the whole box,
    the box is halved along every interval parameter, up to `split_depth` times, and
    every part needs its own region: each parameter value then lies in a part whose
    region is forward invariant and inside the limits for it.

    Parameters
    ----------
    model : certify.model.Model
        With the parameter box as intervals.
    split_depth : int
        Halvings of the parameter box allowed.

    Returns
    -------
    parts : list of (params, region) or None
        ``params`` the part's ``(lo, hi)`` per model parameter (floats, exact), ``region``
        a :class:`certify.atlas_regions.BoxRegion` or :class:`certify.trapping.Region`
        proven forward invariant and inside the limits for every parameter value in the
        part, whose centre lies in the window. The parts cover the box.
    resting : bool
        Some float estimate of an equilibrium keeps every limit at the midpoint (then
        the limit-rate test cannot succeed and is skipped).
    """
    from certify.evaluate import parameter_enclosures
    from certify.points import _interval_positions
    from certify.taylor import flow_programs

    if model.uses_kinks:
        return None, False
    programs = flow_programs(model, 2)
    params = [tuple(p) for p in parameter_enclosures(model)]
    with np.errstate(all="ignore"):
        return _regions_on(model, programs, params, _interval_positions(model), split_depth)


def _rate_cover(programs, params, lo, hi, k):
    """Bisect the window until every box violates a limit or has ``dg_k/dt < 0``.

    Returns ``(largest rate bound, largest g_k bound, boxes)`` over the boxes with a
    negative rate, or None.
    """
    from certify.evaluate import evaluate_limits

    rate_hi, g_hi, n_boxes = -np.inf, -np.inf, 0
    width = hi - lo
    for _ in range(RATE_DEPTH + 1):
        glo, ghi = evaluate_limits(programs, lo, hi, params)
        _, rhi = evaluate_limits(programs, lo, hi, params, rates=True)
        violated = np.any(ghi < 0, axis=1)
        falling = ~violated & (rhi[:, k] < 0)
        if np.any(falling):
            rate_hi = max(rate_hi, float(np.max(rhi[falling, k])))
            g_hi = max(g_hi, float(np.max(ghi[falling, k])))
        n_boxes += int(np.sum(violated | falling))
        keep = ~(violated | falling)
        lo, hi = lo[keep], hi[keep]
        if len(lo) == 0:
            return rate_hi, g_hi, n_boxes
        if n_boxes + 2 * len(lo) > RATE_BOXES:
            return None
        axis = np.argmax((hi - lo) / width, axis=1)
        mid = 0.5 * (lo + hi)
        rows = np.arange(len(lo))
        lo2, hi2 = lo.copy(), hi.copy()
        hi[rows, axis] = mid[rows, axis]
        lo2[rows, axis] = mid[rows, axis]
        lo, hi = np.concatenate([lo, lo2]), np.concatenate([hi, hi2])
    return None


def none_by_limit_rate(model):
    """Prove that no start in the window is safe from the sign of a limit's rate.

    Parameters
    ----------
    model : certify.model.Model
        With the parameter box as intervals.

    Returns
    -------
    dict or None
        ``{"limit": name, "rate_at_most": -eps, "deadline": T, "boxes": count}`` when
        proven: every start in the window keeping the limits crosses one by time ``T``
        (an upper bound computed in floats, for information); None otherwise.
    """
    from certify.cells import CellTree
    from certify.evaluate import parameter_enclosures
    from certify.faces import HARMLESS, analyse_faces
    from certify.taylor import flow_programs

    if not model.constraints:
        return None
    programs = flow_programs(model, 1)
    params = parameter_enclosures(model)
    tree = CellTree(model.window)
    with np.errstate(all="ignore"):
        faces = analyse_faces(model, programs, tree, params)
        if any(face["kind"] not in HARMLESS for face in faces):
            return None
        lo_lo, _, _, hi_hi = tree.window_bounds()
        for k, limit in enumerate(model.constraints):
            found = _rate_cover(programs, params, lo_lo[None].copy(), hi_hi[None].copy(), k)
            if found is None:
                continue
            rate_hi, g_hi, n_boxes = found
            deadline = 0.0 if rate_hi == -np.inf else max(g_hi, 0.0) / -rate_hi
            return {"limit": limit.name, "rate_at_most": rate_hi,
                    "deadline": float(np.nextafter(deadline, np.inf)), "boxes": n_boxes}
    return None


def _map_facts(model, max_depth, time_limit):
    from certify.prove import prove
    from certify.sweep import box_facts

    proof = prove(model, max_depth=max_depth, time_limit=time_limit)
    if proof.interrupted:
        raise KeyboardInterrupt
    return box_facts(proof)


def _region_record(region):
    """What proves a ``safe`` box: the region's exact numbers."""
    from certify.atlas_regions import BoxRegion
    from certify.certificate import fraction_text

    def texts(values):
        return [fraction_text(Fraction(float(v))) for v in values]

    if isinstance(region, BoxRegion):
        return {"region": "parallelotope {centre + frame u : |u_i| <= radii_i}",
                "centre": texts(region.centre),
                "frame": [texts(row) for row in region.frame],
                "radii": texts(region.radii), "pieces": int(region.pieces)}
    centre, matrix, level, box = region.exact()
    return {"region": "ellipsoid {x in box : (x - centre)^T matrix (x - centre) <= level}",
            "centre": [fraction_text(x) for x in centre],
            "matrix": [[fraction_text(x) for x in row] for row in matrix],
            "level": fraction_text(level), "box": [[fraction_text(a), fraction_text(b)]
                                                   for a, b in box],
            "pieces": int(len(region.cover_class))}


def _parts_record(model, parts):
    """The region record of one part, or ``{"parts": [...]}`` with each part's box."""
    from certify.certificate import fraction_text

    if len(parts) == 1:
        return _region_record(parts[0][1])
    varied = [k for k, p in enumerate(model.parameters) if p.is_interval]
    return {"parts": [{"params": {model.parameters[k].name: [fraction_text(Fraction(v))
                                                             for v in params[k]]
                                  for k in varied}, **_region_record(region)}
                      for params, region in parts]}


def _box_model(model_text, model_path, parameters):
    from certify.sweep import parsed_model

    return parsed_model(model_text, model_path).with_parameters(
        {name: (Fraction(lo), Fraction(hi)) for name, (lo, hi) in parameters.items()})


def _structure_of(model):
    """``(equilibrium_structure, any equilibrium proven inside the limits)``."""
    from certify.points import find_equilibria

    with np.errstate(all="ignore"):
        equilibria = find_equilibria(model, max_depth=EQUILIBRIUM_DEPTH)
    return (equilibrium_structure(equilibria),
            any(p.limits == "inside" for p in equilibria.equilibria))


def box_structure(model_text, model_path, parameters):
    """The proven equilibrium structure of one parameter box (a worker of an atlas).

    Parameters
    ----------
    model_text : str
    model_path : str or None
    parameters : dict[str, list of str]
        ``[lo, hi]`` as exact texts for every parameter of the model.

    Returns
    -------
    dict
        :func:`equilibrium_structure` with ``seconds`` and ``cpu_seconds`` added.
    """
    started, cpu = time.monotonic(), time.process_time()
    out, _ = _structure_of(_box_model(model_text, model_path, parameters))
    out["seconds"] = round(time.monotonic() - started, 3)
    out["cpu_seconds"] = round(time.process_time() - cpu, 3)
    return out


def analyse_parameter_box(model_text, model_path, parameters, max_depth, time_limit, use_map,
                          fractions, finest, structure=True):
    """The verdict of one parameter box (the worker of an atlas).

    Takes and returns plain data only, so that it runs in any process or on any machine
    that has certify installed.

    Parameters
    ----------
    model_text : str
    model_path : str or None
    parameters : dict[str, list of str]
        ``[lo, hi]`` as exact texts for every parameter of the model.
    max_depth, time_limit : int or None, float or None
        Budget of the map of fates, when one is run.
    use_map : bool
        Run the map of fates where the cheap tests do not decide a box at the finest
        level.
    fractions : bool
        Also run the map for the safe-fraction bounds, whatever the verdict.
    finest : bool
        The box is at the resolution: it will not be split.
    structure : bool
        Prove the equilibrium structure of a box that is decided or will not be split
        (the costliest part for wide boxes; the atlas proves it later with
        :func:`box_structure`). It is also proven before a map, which it can spare.

    Returns
    -------
    dict
        ``verdict`` (one of :data:`VERDICTS`), ``by`` (``"trapping region"``,
        ``"limit rate"``, ``"map"`` or None), ``proof`` (what proves it), ``structure``
        (:func:`equilibrium_structure`; None for an undetermined box above the finest
        level, which is split), ``seconds``, ``cpu_seconds`` (of this process) and,
        with a map, ``safe_bounds`` and ``fractions``.
    """
    started, cpu = time.monotonic(), time.process_time()
    model = _box_model(model_text, model_path, parameters)
    out = {"verdict": "undetermined", "by": None, "proof": None, "structure": None}
    parts, resting = safe_by_region(model, SPLIT_DEPTH if finest else 0)
    if parts is not None:
        out.update(verdict="safe", by="trapping region", proof=_parts_record(model, parts))
    elif not resting:
        rate = none_by_limit_rate(model)
        if rate is not None:
            out.update(verdict="none", by="limit rate", proof=rate)
    map_next = use_map and finest and out["verdict"] == "undetermined" and not resting
    if (structure and (out["verdict"] != "undetermined" or finest)) or map_next:
        out["structure"], inside = _structure_of(model)
        # an equilibrium inside the limits is itself a safe state: no map can show "none"
        resting = resting or inside
    if fractions or (map_next and not resting):
        facts = _map_facts(model, max_depth, time_limit)
        out["safe_bounds"] = facts["safe_bounds"]
        out["fractions"] = facts["fractions"]
        if out["verdict"] == "undetermined" and (facts["no_safe_state"]
                                                 or facts["safe_state_exists"]):
            out.update(verdict="none" if facts["no_safe_state"] else "safe", by="map",
                       proof={"cells": facts["cells"], "depth_reached": facts["depth_reached"],
                              "stop_reason": facts["stop_reason"]})
    out["seconds"] = round(time.monotonic() - started, 3)
    out["cpu_seconds"] = round(time.process_time() - cpu, 3)
    return out
