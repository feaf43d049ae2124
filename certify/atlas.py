"""Adaptive atlas of operating parameters: where a safe state exists, where none does.

The rectangle of one or two parameters starts as a coarse grid of boxes. Each box gets
a verdict proven for every constant parameter value in it
(:func:`certify.atlas_proofs.analyse_parameter_box`); boxes left ``undetermined`` are
halved along every parameter (a binary tree over one parameter, a quadtree over two)
until their side is ``1/resolution`` of the range or the time budget is spent. The
leaves tile the rectangle. Boxes run in a local process pool or on a Dask cluster
(:func:`certify.executors.open_runner`); each finished box is written to
``DIR/atlas-boxes/<key>.json`` at once, so a rerun with the same folder and settings
reuses it. ``atlas.json`` and ``atlas.png`` are written at the end.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from fractions import Fraction
from itertools import product
from pathlib import Path

from certify.errors import UsageError

__all__ = ["ATLAS_FORMAT", "MAX_RESOLUTION", "AtlasResult", "atlas", "check_resolution",
           "default_atlas_dir"]

#: Format tag of ``atlas.json`` and of the settings file of an atlas folder.
ATLAS_FORMAT = "certify-atlas/1"
#: Finest resolution: boxes of ``1/MAX_RESOLUTION`` of each range.
MAX_RESOLUTION = 1024
_SETTINGS_FILE = "atlas-settings.json"
_MESSAGES = {
    0: "Every box decided or at the resolution.",
    1: "Time budget spent; undetermined boxes coarser than the resolution remain.",
    2: "Interrupted; rerun with the same folder and settings to resume.",
    3: "Every box decided or at the resolution; the time budget was spent before the "
       "equilibrium structure of every leaf was proven.",
}


@dataclass(frozen=True)
class AtlasResult:
    """The outcome of an atlas.

    Attributes
    ----------
    status : int
        0 done, 1 stopped by the time budget, 2 interrupted, 3 verdicts done but the
        time budget stopped the structure proofs.
    message : str
    names : tuple of str
        The varied parameters.
    boxes : tuple of dict
        The leaves (they tile the rectangle), as in ``atlas.json``.
    areas : dict
        Share of the rectangle's area per verdict.
    n_analysed : int
        Boxes analysed by this call (not counting reused ones).
    out : pathlib.Path
    seconds : float
    """

    status: int
    message: str
    names: tuple
    boxes: tuple
    areas: dict
    n_analysed: int
    out: Path
    seconds: float


@dataclass(frozen=True)
class _Box:
    levels: tuple   # per parameter: the box is one of 2**level equal parts of the range
    index: tuple

    @property
    def key(self):
        return "_".join(f"{e}-{i}" for e, i in zip(self.levels, self.index))

    def bounds(self, ranges):
        return {name: (lo + (hi - lo) * Fraction(i, 2 ** e), lo + (hi - lo) * Fraction(i + 1, 2 ** e))
                for (name, lo, hi), e, i in zip(ranges, self.levels, self.index)}

    def area(self):
        return Fraction(1, 2 ** sum(self.levels))

    def children(self, top):
        """The halves along every parameter not yet at level `top`."""
        axes = [(2 * i, 2 * i + 1) if e < top else (i,) for e, i in zip(self.levels, self.index)]
        levels = tuple(e + 1 if e < top else e for e in self.levels)
        return [_Box(levels, index) for index in product(*axes)]


def default_atlas_dir(model):
    """The default folder of an atlas: ``proofs_out/<model file stem>-atlas``."""
    from certify.sweep import default_sweep_dir

    folder = default_sweep_dir(model)
    return folder.with_name(folder.name[:-len("-sweep")] + "-atlas")


def check_resolution(resolution, name="resolution (--resolution)"):
    """Check that a resolution is a power of two from 1 to :data:`MAX_RESOLUTION`.

    Returns
    -------
    int
        Its base-2 logarithm.

    Raises
    ------
    UsageError
    """
    if isinstance(resolution, bool) or not isinstance(resolution, int) or resolution < 1 \
            or resolution > MAX_RESOLUTION or resolution & (resolution - 1):
        raise UsageError(f"{name} must be a power of two from 1 to {MAX_RESOLUTION} "
                         f"(boxes of 1/N of each range), got {resolution!r}")
    return resolution.bit_length() - 1


def _check_vary(model, vary, resolution, start):
    from certify.sweep import check_vary

    if not isinstance(vary, dict):
        raise UsageError(f"vary must be a dict {{NAME: (lo, hi)}}, got {type(vary).__name__}")
    for name, spec in vary.items():
        if not isinstance(spec, (tuple, list)) or len(spec) != 2:
            raise UsageError(f"vary {name!r}: expected (lo, hi), got {spec!r}")
    names, ranges = check_vary(model, {name: (lo, hi, 1) for name, (lo, hi) in vary.items()})
    top = check_resolution(resolution)
    first = check_resolution(start, "the starting boxes per parameter")
    if first > top:
        raise UsageError(f"the starting boxes per parameter ({start}) exceed the resolution "
                         f"({resolution})")
    return names, tuple((name, lo, hi) for name, (lo, hi, _) in zip(names, ranges)), top, first


def _settings(model, ranges, resolution, start, use_map, structure, max_depth, time_limit_each,
              fractions):
    from certify.certificate import fraction_text

    return {
        "format": ATLAS_FORMAT,
        "model_sha256": model.sha256,
        "parameters": {p.name: [fraction_text(p.lo), fraction_text(p.hi)] for p in model.parameters},
        "vary": [{"name": name, "lo": fraction_text(lo), "hi": fraction_text(hi)}
                 for name, lo, hi in ranges],
        "resolution": resolution,
        "start": start,
        "map": bool(use_map),
        "structure": bool(structure),
        "max_depth": max_depth,
        "time_limit_each": None if time_limit_each is None else float(time_limit_each),
        "fractions": bool(fractions),
    }


def _task(model, box, ranges, settings, top):
    from certify.certificate import fraction_text

    parameters = dict(settings["parameters"])
    for name, (lo, hi) in box.bounds(ranges).items():
        parameters[name] = [fraction_text(lo), fraction_text(hi)]
    return (model.text, model.path, parameters, settings["max_depth"],
            settings["time_limit_each"], settings["map"], settings["fractions"],
            max(box.levels) >= top, False)


def _entry(box, ranges, answer):
    from certify.certificate import fraction_text

    bounds = box.bounds(ranges)
    return {"key": box.key, "levels": list(box.levels), "index": list(box.index),
            "params": {name: [float(lo), float(hi)] for name, (lo, hi) in bounds.items()},
            "params_exact": {name: [fraction_text(lo), fraction_text(hi)]
                             for name, (lo, hi) in bounds.items()},
            "area": float(box.area()), **answer}


def atlas(model, vary, *, resolution=64, start=4, time_budget=None, use_map=True,
          structure=True, max_depth=None, time_limit_each=None, fractions=False,
          executor="local",
          scheduler=None, workers=None, out=None, progress=None):
    """Prove where in a parameter rectangle a safe state exists and where none does.

    Parameters
    ----------
    model : certify.model.Model
    vary : dict[str, tuple]
        ``{NAME: (lo, hi)}`` for one or two parameters the model gives as numbers.
    resolution : int
        Finest box side, as ``1/resolution`` of each range (a power of two).
    start : int
        Boxes per parameter of the starting grid (a power of two, at most `resolution`).
    time_budget : float, optional
        Seconds after which no box is split any more (the boxes running then finish).
    use_map : bool
        Prove a map of fates where the cheap tests do not decide a box at the finest
        level (unless an equilibrium inside the limits shows that a safe state exists).
    structure : bool
        Prove the equilibrium structure of every leaf (the costliest part of wide boxes),
        once every verdict is in, while the time budget lasts.
    max_depth, time_limit_each : int or float, optional
        Budget of each such map (as in :func:`certify.sweep.sweep`).
    fractions : bool
        Prove the map of every box for its safe-fraction bounds.
    executor, scheduler, workers :
        Where the boxes run (as in :func:`certify.sweep.sweep`).
    out : str or path-like, optional
        The atlas folder (default ``proofs_out/<model file stem>-atlas``).
    progress : callable, optional
        ``progress(n_done, n_queued)`` after every finished box.

    Returns
    -------
    AtlasResult
        ``atlas.json`` and ``atlas.png`` are written unless interrupted (status 2).

    Raises
    ------
    UsageError
        For a bad parameter, range, resolution or option, or a folder holding an atlas
        with other settings.
    """
    from certify.executors import open_runner
    from certify.sweep import check_options, claim_folder

    started = time.monotonic()
    names, ranges, top, first = _check_vary(model, vary, resolution, start)
    check_options(max_depth, time_limit_each, executor, scheduler, workers)
    if time_budget is not None and not (isinstance(time_budget, (int, float))
                                        and 0 < time_budget < float("inf")):
        raise UsageError("time_budget (--time-budget) must be a positive number of seconds")
    settings = _settings(model, ranges, resolution, start, use_map, structure, max_depth,
                         time_limit_each, fractions)
    out = Path(out) if out is not None else default_atlas_dir(model)
    claim_folder(out, settings, settings_file=_SETTINGS_FILE, boxes="atlas-boxes",
                     what="an atlas")
    roots = [_Box((first,) * len(names), index)
             for index in product(range(2 ** first), repeat=len(names))]
    todo = roots
    leaves, n_analysed, status = {}, 0, 0
    try:
        with open_runner(executor, scheduler, workers, pooled=True) as runner:
            while todo:
                done, n_new, stopped = _level(model, todo, ranges, settings, top, runner, out,
                                              progress, started, time_budget)
                n_analysed += n_new
                leaves.update(done)
                if stopped:
                    status = 1
                    break
                split = [box for box in todo if box.key in done and max(box.levels) < top
                         and done[box.key]["verdict"] == "undetermined"]
                if split and time_budget is not None and time.monotonic() - started > time_budget:
                    status = 1
                    break
                todo = [child for box in split for child in box.children(top)]
                for box in split:
                    leaves[box.key]["split"] = True
            if structure and status == 0 and not _structures(
                    model, leaves, _tile(roots, leaves, top), settings, runner, out, progress,
                    started, time_budget):
                status = 3
    except KeyboardInterrupt:
        status = 2
    boxes = _tile(roots, leaves, top)
    areas = _areas(boxes)
    result = AtlasResult(status=status, message=_MESSAGES[status], names=names,
                         boxes=tuple(boxes), areas=areas, n_analysed=n_analysed, out=out,
                         seconds=time.monotonic() - started)
    if status != 2:
        data = _atlas_data(model, names, ranges, settings, result)
        from certify.atlas_plots import plot_atlas
        from certify.sweep import write_json

        write_json(out / "atlas.json", data)
        plot_atlas(data, out / "atlas.png")
    return result


def _level(model, todo, ranges, settings, top, runner, out, progress, started, time_budget):
    """Analyse the boxes of one level; reuse the ones already in the folder."""
    from certify.sweep import read_json, write_json

    folder = out / "atlas-boxes"
    done, tasks, by_key = {}, {}, {}
    for box in todo:
        path = folder / f"{box.key}.json"
        if path.is_file():
            done[box.key] = read_json(path)
        else:
            tasks[box.key] = _task(model, box, ranges, settings, top)
            by_key[box.key] = box
    if progress is not None:
        progress(len(done), len(todo))
    n_new, stopped = 0, False
    if tasks:
        results = runner.results(_analyse, tasks)
        try:
            for key, answer in results:
                entry = _entry(by_key[key], ranges, answer)
                write_json(folder / f"{key}.json", entry)
                done[key] = entry
                n_new += 1
                if progress is not None:
                    progress(len(done), len(todo))
                if time_budget is not None and time.monotonic() - started > time_budget \
                        and len(done) < len(todo):
                    stopped = True
                    break
        finally:
            results.close()
    return done, n_new, stopped


def _structures(model, leaves, boxes, settings, runner, out, progress, started, time_budget):
    """Prove the equilibrium structure of the leaves `boxes` that lack it; False if the
    budget stopped it. Each box file and its entry in `leaves` get the structure.

    The widest leaves go first: each proof costs about the same, so a budget that stops
    them leaves the most area with a structure."""
    from certify.sweep import write_json

    folder = out / "atlas-boxes"
    todo = {e["key"]: e for e in sorted(boxes, key=lambda e: -e["area"])
            if e["structure"] is None}
    if not todo:
        return True
    tasks = {key: (model.text, model.path, {**settings["parameters"], **e["params_exact"]})
             for key, e in todo.items()}
    results = runner.results(_structure, tasks)
    n_done = len(boxes) - len(todo)
    try:
        for key, found in results:
            todo.pop(key)
            entry = leaves[key]
            entry["seconds"] = round(entry["seconds"] + found.pop("seconds"), 3)
            entry["cpu_seconds"] = round(entry.get("cpu_seconds", 0) + found.pop("cpu_seconds"),
                                         3)
            entry["structure"] = found
            write_json(folder / f"{key}.json", entry)
            n_done += 1
            if progress is not None:
                progress(n_done, len(boxes))
            if todo and time_budget is not None and time.monotonic() - started > time_budget:
                return False
    finally:
        results.close()
    return True


def _structure(*args):
    from certify.atlas_proofs import box_structure

    return box_structure(*args)


def _analyse(*args):
    from certify.atlas_proofs import analyse_parameter_box

    return analyse_parameter_box(*args)


def _tile(roots, analysed, top):
    """The leaves under `roots`: a split box whose halves were all analysed gives way to them.

    A box split when the time budget ran out, with some halves missing, stays a leaf.
    """
    out = []
    stack = list(roots)
    while stack:
        box = stack.pop()
        entry = analysed.get(box.key)
        if entry is None:
            continue
        children = box.children(top)
        if entry.get("split") and all(child.key in analysed for child in children):
            stack.extend(children)
        else:
            out.append({k: v for k, v in entry.items() if k != "split"})
    return sorted(out, key=lambda e: tuple(v[0] for v in e["params"].values()))


def _areas(boxes):
    areas = {"safe": 0.0, "none": 0.0, "undetermined": 0.0}
    for entry in boxes:
        areas[entry["verdict"]] += entry["area"]
    return areas


def _atlas_data(model, names, ranges, settings, result):
    from certify.certificate import fraction_text
    from certify.report import SAFETY_NOTE

    return {
        "format": ATLAS_FORMAT,
        "model": model.name,
        "model_file": model.path,
        "model_sha256": model.sha256,
        "varied": list(names),
        "ranges": {name: [fraction_text(lo), fraction_text(hi)] for name, lo, hi in ranges},
        "units": {p.name: p.unit for p in model.parameters if p.name in names},
        "settings": settings,
        "status": result.message,
        "areas": result.areas,
        "n_boxes": len(result.boxes),
        "n_analysed": result.n_analysed,
        "seconds": round(result.seconds, 3),
        "boxes": list(result.boxes),
        "note": SAFETY_NOTE,
    }
