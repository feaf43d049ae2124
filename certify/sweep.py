"""Parameter sweeps: a proven map of fates for every box of a parameter range.

The range of each varied parameter (one or two of them) is cut into equal boxes with
exact rational edges. Each combination of boxes is analysed with those parameters as
intervals (:meth:`certify.model.Model.with_parameters`), so every statement about a box
holds for every constant parameter value in it. Boxes run in a local process pool or on
a Dask cluster; each finished box is written to ``DIR/boxes/<key>.json`` at once, so a
rerun with the same folder and settings skips the boxes already done, and ``sweep.json``
is assembled from those files in a fixed order at the end.
"""

from __future__ import annotations

import contextlib
import json
import re
import tempfile
import time
import uuid
from dataclasses import dataclass
from fractions import Fraction
from functools import lru_cache
from itertools import product
from pathlib import Path

import numpy as np

from certify.errors import UsageError
from certify.executors import EXECUTORS, check_executor, open_runner
from certify.files import write_atomic
from certify.expr import format_number

__all__ = [
    "EXECUTORS",
    "MAX_BOXES",
    "MAX_VARIED",
    "MESSAGES",
    "SWEEP_FORMAT",
    "SweepResult",
    "analyse_box",
    "default_sweep_dir",
    "sweep",
]

#: Format tag of ``sweep.json`` and of the settings file of a sweep folder.
SWEEP_FORMAT = "certify-sweep/1"
#: Largest number of varied parameters.
MAX_VARIED = 2
#: Largest number of parameter boxes in one sweep.
MAX_BOXES = 10_000
#: Status codes of :class:`SweepResult` and their messages.
MESSAGES = {
    0: "Every parameter box analysed.",
    1: "Interrupted; rerun with the same folder and settings to resume.",
}
_SETTINGS_FILE = "sweep-settings.json"
_LIMIT_POSITIONS = ("inside", "straddles", "outside")


@dataclass(frozen=True)
class SweepResult:
    """The outcome of a sweep.

    Attributes
    ----------
    status : int
        A key of :data:`MESSAGES`: 0 when every box is analysed, 1 when interrupted.
    message : str
    names : tuple of str
        The varied parameters, in the order of the box indices.
    entries : tuple of dict
        One entry per finished box, in box order (the first parameter's index varies
        slowest); the same dictionaries as in ``sweep.json``.
    n_boxes : int
        Boxes of the whole sweep.
    n_resumed : int
        Boxes found already done in the folder.
    out : pathlib.Path
        The sweep folder.
    seconds : float
        Wall time of this call.
    """

    status: int
    message: str
    names: tuple
    entries: tuple
    n_boxes: int
    n_resumed: int
    out: Path
    seconds: float

    @property
    def success(self):
        """bool: True when every box was analysed."""
        return self.status == 0


@dataclass(frozen=True)
class _Box:
    key: str
    index: tuple
    bounds: dict  # name -> (Fraction, Fraction)


def default_sweep_dir(model):
    """The default folder of a sweep: ``proofs_out/<model file stem>-sweep``.

    Parameters
    ----------
    model : certify.model.Model

    Returns
    -------
    pathlib.Path
        For a model read from text, the stem is made of the model's name.
    """
    if model.path:
        stem = Path(model.path).stem
    else:
        stem = re.sub(r"[^A-Za-z0-9_.-]+", "-", model.name).strip("-") or "model"
    return Path("proofs_out") / f"{stem}-sweep"


def sweep(model, vary, *, max_depth=None, time_limit_each=None, executor="local",
          scheduler=None, workers=None, out=None, keep_certificates=False, progress=None):
    """Prove a map of fates for every box of a range of one or two parameters.

    Parameters
    ----------
    model : certify.model.Model
    vary : dict[str, tuple]
        ``{NAME: (lo, hi, n)}`` for at most :data:`MAX_VARIED` parameters that the model
        gives as numbers: ``[lo, hi]`` (``lo < hi``, exact numbers as accepted by
        :meth:`~certify.model.Model.with_parameters`) is cut into ``n`` equal boxes.
    max_depth : int, optional
        Deepest bisection level of the cells of each box's proof.
    time_limit_each : float, optional
        Wall-clock budget of each box's proof, in seconds (results then depend on the
        machine; give only ``max_depth`` for reproducible sweeps).
    executor : {"local", "dask"}
        ``local``: a process pool on this machine. ``dask``: a Dask distributed
        scheduler (``scheduler``), or a ``LocalCluster`` on 127.0.0.1 when None.
    scheduler : str, optional
        Address of a running Dask scheduler, such as ``tcp://10.0.0.5:8786``.
    workers : int, optional
        Processes of the local pool or of the ``LocalCluster`` (default: all cores).
    out : str or path-like, optional
        The sweep folder (default :func:`default_sweep_dir`).
    keep_certificates : bool
        Also write each box's certificate and summary to ``DIR/boxes/<key>/``.
    progress : callable, optional
        ``progress(n_done, n_boxes)`` once at the start (counting resumed boxes) and
        after every finished box.

    Returns
    -------
    SweepResult
        With status 0 ``sweep.json`` and ``sweep.png`` are written; a KeyboardInterrupt
        gives status 1 and keeps the finished boxes for a rerun.

    Raises
    ------
    UsageError
        For a bad ``vary``, budget or executor choice, or a folder that holds a sweep
        with other settings.

    Notes
    -----
    Each entry holds ``params`` (float bounds; ``params_exact`` gives them as exact
    ``"p/q"`` texts), ``fractions`` of the window per label, ``safe_bounds`` (a proven
    lower and upper bound of the safe fraction for every parameter value in the box),
    ``no_safe_state`` (proven: every cell is doomed or outside), ``safe_state_exists``
    (proven: some state satisfying the limits is safe), ``equilibria`` counts, and
    ``seconds``. A certificate speaks about the model, not the plant.
    """
    start = time.monotonic()
    names, ranges = check_vary(model, vary)
    check_options(max_depth, time_limit_each, executor, scheduler, workers)
    boxes = _boxes(names, ranges)
    settings = _settings(model, names, ranges, max_depth, time_limit_each, keep_certificates)
    out = Path(out) if out is not None else default_sweep_dir(model)
    claim_folder(out, settings)
    done = {box.key for box in boxes if (out / "boxes" / f"{box.key}.json").is_file()}
    todo = [box for box in boxes if box.key not in done]
    status = 0
    try:
        if progress is not None:
            progress(len(done), len(boxes))
        if todo:
            _run(model, todo, settings, executor, scheduler, workers, out, progress,
                 len(done), len(boxes))
    except KeyboardInterrupt:
        status = 1
    entries = tuple(read_json(path) for path in
                    (out / "boxes" / f"{box.key}.json" for box in boxes) if path.is_file())
    if status == 0:
        data = _sweep_data(model, names, settings, entries)
        write_json(out / "sweep.json", data)
        from certify.sweep_plots import plot_sweep

        plot_sweep(data, out / "sweep.png")
    return SweepResult(status=status, message=MESSAGES[status], names=names, entries=entries,
                       n_boxes=len(boxes), n_resumed=len(done), out=out,
                       seconds=time.monotonic() - start)


# ------------------------------------------------------------------------- validation


def check_vary(model, vary):
    """Check ``{NAME: (lo, hi, n)}``; return ``(names, ((lo, hi, n), ...))`` with Fractions."""
    if not isinstance(vary, dict):
        raise UsageError(f"vary must be a dict {{NAME: (lo, hi, n)}}, got {type(vary).__name__}")
    if not vary:
        raise UsageError("give at least one parameter to vary")
    if len(vary) > MAX_VARIED:
        raise UsageError(f"at most {MAX_VARIED} parameters can be varied, got {len(vary)}: "
                         + ", ".join(vary))
    given = {p.name: p for p in model.parameters}
    names, ranges = [], []
    for name, spec in vary.items():
        if not isinstance(spec, (tuple, list)) or len(spec) != 3:
            raise UsageError(f"vary {name!r}: expected (lo, hi, n), got {spec!r}")
        lo, hi, n = spec
        # with_parameters names the unknown parameter (with close names) and checks numbers
        varied = model.with_parameters({name: (lo, hi)})
        if name in {c.name for c in model.controls}:
            raise UsageError(f"parameter {name!r} is a control of the model ([controls]); "
                             "the policy chooses its setting, a sweep cannot vary it")
        if given[name].is_interval:
            raise UsageError(
                f"parameter {name!r} is already the interval [{format_number(given[name].lo)}, "
                f"{format_number(given[name].hi)}] in the model; a sweep cuts the range of a "
                "parameter given as a number")
        lo, hi = next((p.lo, p.hi) for p in varied.parameters if p.name == name)
        if not lo < hi:
            raise UsageError(f"parameter {name!r}: the sweep range is empty (LO "
                             f"{format_number(lo)} is not below HI {format_number(hi)})")
        if isinstance(n, bool) or not isinstance(n, int) or n < 1:
            raise UsageError(f"parameter {name!r}: the number of boxes must be a whole number "
                             f"of at least 1, got {n!r}")
        names.append(name)
        ranges.append((lo, hi, n))
    total = int(np.prod([n for _, _, n in ranges]))
    if total > MAX_BOXES:
        raise UsageError(f"the sweep has {total:,} boxes; at most {MAX_BOXES:,} are allowed")
    return tuple(names), tuple(ranges)


def check_options(max_depth, time_limit_each, executor, scheduler, workers):
    """Check the budget and executor options of a sweep; raise UsageError naming the option."""
    from certify.model import SETTINGS

    rule = SETTINGS["max_depth"]  # the range [settings] accepts
    if max_depth is not None and (isinstance(max_depth, bool) or not isinstance(max_depth, int)
                                  or not rule.lo <= max_depth <= rule.hi):
        raise UsageError(f"max_depth (--max-depth) must be a whole number between {rule.lo} "
                         f"and {rule.hi}")
    if time_limit_each is not None and not (isinstance(time_limit_each, (int, float))
                                            and 0 < time_limit_each < float("inf")):
        raise UsageError("time_limit_each (--time-limit-each) must be a positive number of seconds")
    check_executor(executor, scheduler, workers)


def _boxes(names, ranges):
    edges = [[lo + (hi - lo) * Fraction(k, n) for k in range(n + 1)] for lo, hi, n in ranges]
    boxes = []
    for index in product(*(range(n) for _, _, n in ranges)):
        bounds = {name: (edges[d][i], edges[d][i + 1]) for d, (name, i) in enumerate(zip(names, index))}
        key = "_".join(f"{i:04d}" for i in index)
        boxes.append(_Box(key=key, index=index, bounds=bounds))
    return boxes


def _settings(model, names, ranges, max_depth, time_limit_each, keep_certificates):
    from certify.certificate import fraction_text

    return {
        "format": SWEEP_FORMAT,
        "model_sha256": model.sha256,
        "parameters": {p.name: [fraction_text(p.lo), fraction_text(p.hi)] for p in model.parameters},
        "vary": [{"name": name, "lo": fraction_text(lo), "hi": fraction_text(hi), "boxes": n}
                 for name, (lo, hi, n) in zip(names, ranges)],
        "max_depth": max_depth,
        "time_limit_each": None if time_limit_each is None else float(time_limit_each),
        "keep_certificates": bool(keep_certificates),
    }


def claim_folder(out, settings, *, settings_file=_SETTINGS_FILE, boxes="boxes", what="a sweep"):
    """Record the settings in a new folder, or check them against the run already there.

    Parameters
    ----------
    out : Path
    settings : dict
        JSON-ready settings, written to ``out / settings_file``.
    settings_file : str
    boxes : str
        The folder of finished boxes, refused when it exists without settings.
    what : str
        The kind of run, for messages ("a sweep", "an atlas").

    Raises
    ------
    UsageError
        When the folder holds a run with other settings, or boxes without settings.
    """
    path = out / settings_file
    if path.is_file():
        try:
            found = read_json(path)
        except (OSError, ValueError) as exc:
            raise UsageError(f"{path}: cannot read the settings of {what} there ({exc})") from None
        if found != settings:
            keys = [k for k in settings if found.get(k) != settings[k]] if isinstance(found, dict) \
                else ["format"]
            raise UsageError(f"{out}: holds {what} with other settings ({', '.join(keys)}); "
                             "choose another --out folder or delete that one")
        return
    if (out / boxes).exists():
        raise UsageError(f"{out}: has a {boxes}/ folder but no {settings_file}; "
                         "choose another --out folder or delete that one")
    write_json(path, settings)


# -------------------------------------------------------------------------- execution


def analyse_box(model_text, model_path, parameters, max_depth, time_limit, keep_certificate):
    """Prove the map of fates of one parameter box (the worker of a sweep).

    Takes and returns plain data only, so that it runs in any process or on any machine
    that has certify installed.

    Parameters
    ----------
    model_text : str
        The model file's text.
    model_path : str or None
        Its path, used in messages and summaries only.
    parameters : dict[str, list of str]
        ``[lo, hi]`` as exact texts for every parameter of the model.
    max_depth : int or None
    time_limit : float or None
    keep_certificate : bool
        Also return the certificate and summary files.

    Returns
    -------
    dict
        ``"result"``: the proven facts of the box (see :func:`sweep`); ``"files"``:
        file name -> bytes (empty unless ``keep_certificate``).

    Raises
    ------
    KeyboardInterrupt
        When the proof was interrupted: a partial proof is not a result of the box.
    """
    from certify.prove import prove

    started = time.monotonic()
    model = parsed_model(model_text, model_path).with_parameters(
        {name: (Fraction(lo), Fraction(hi)) for name, (lo, hi) in parameters.items()})
    proof = prove(model, max_depth=max_depth, time_limit=time_limit)
    if proof.interrupted:
        raise KeyboardInterrupt
    result = box_facts(proof)
    result["equilibria"] = _equilibria_counts(model)
    files = _certificate_files(proof) if keep_certificate else {}
    result["seconds"] = round(time.monotonic() - started, 3)
    return {"result": result, "files": files}


@lru_cache(maxsize=4)
def parsed_model(text, path):
    """The model parsed from its text, cached per process (workers reuse it box to box)."""
    from certify.model import parse_model

    return parse_model(text, path=path)


def box_facts(proof):
    """Fractions, proven safe bounds and flags of one box's proof (see :func:`sweep`)."""
    from certify.evaluate import evaluate_limits
    from certify.taylor import flow_programs

    fractions = {k: float(v) for k, v in proof.fractions.items()}
    counts = proof.counts
    tree, leaves, label = proof.tree, proof.leaves, proof.labelling.label
    glo, _ = evaluate_limits(flow_programs(proof.model, 1), tree.lo[leaves], tree.hi[leaves],
                          proof.params)
    wholly_inside = np.all(glo >= 0, axis=1)
    safe = label == "safe"
    if proof.fractions_exact:
        lower = fractions["safe"]
        upper = 1.0 - fractions["doomed"] - fractions["outside"]
    else:
        # the straddling split is an estimate: count only what the labels prove
        volume = tree.volume_fraction(leaves)
        lower = float(np.sum(volume[safe & wholly_inside]))
        upper = 1.0 - float(np.sum(volume[(label == "doomed") | (label == "outside")]))
    return {
        "fractions": fractions,
        "fractions_exact": bool(proof.fractions_exact),
        "safe_bounds": [max(lower, 0.0), min(max(upper, 0.0), 1.0)],
        "no_safe_state": counts["safe"] == 0 and counts["undecided"] == 0,
        "safe_state_exists": bool(np.any(safe & wholly_inside))
        or (proof.fractions_exact and fractions["safe"] > 0),
        "cells": counts,
        "depth_reached": proof.depth_reached,
        "stop_reason": proof.stop_reason,
    }


def _equilibria_counts(model):
    from certify.points import STABILITIES, find_equilibria

    result = find_equilibria(model)
    by_stability = {word: 0 for word in STABILITIES}
    by_limits = {word: 0 for word in _LIMIT_POSITIONS}
    for point in result.equilibria:
        by_stability[point.stability] += 1
        by_limits[point.limits] += 1
    return {"count": len(result.equilibria), "by_stability": by_stability,
            "by_limits": by_limits, "complete": bool(result.complete),
            "unresolved_boxes": len(result.unresolved)}


def _certificate_files(proof):
    from certify.prove import write_proof

    with tempfile.TemporaryDirectory(prefix="certify-box-") as tmp:
        write_proof(proof, tmp, figures=False)
        return {name: (Path(tmp) / name).read_bytes()
                for name in ("certificate.json.gz", "summary.json")}


def _task(model, box, settings):
    from certify.certificate import fraction_text

    parameters = dict(settings["parameters"])
    for name, (lo, hi) in box.bounds.items():
        parameters[name] = [fraction_text(lo), fraction_text(hi)]
    return (model.text, model.path, parameters, settings["max_depth"],
            settings["time_limit_each"], settings["keep_certificates"])


def _run(model, todo, settings, executor, scheduler, workers, out, progress, n_done, n_boxes):
    tasks = {box.key: _task(model, box, settings) for box in todo}
    by_key = {box.key: box for box in todo}
    with open_runner(executor, scheduler, workers, pooled=True, at_most=len(tasks)) as runner:
        for key, answer in runner.results(analyse_box, tasks):
            _save_box(out, by_key[key], answer)
            n_done += 1
            if progress is not None:
                progress(n_done, n_boxes)


def _save_box(out, box, answer):
    """Write a finished box: its certificate files first, then ``boxes/<key>.json``."""
    from certify.certificate import fraction_text

    folder = out / "boxes"
    for name, data in answer["files"].items():
        write_atomic(folder / box.key / name, data)
    entry = {
        "key": box.key,
        "index": list(box.index),
        "params": {name: [float(lo), float(hi)] for name, (lo, hi) in box.bounds.items()},
        "params_exact": {name: [fraction_text(lo), fraction_text(hi)]
                         for name, (lo, hi) in box.bounds.items()},
        **answer["result"],
    }
    write_json(folder / f"{box.key}.json", entry)


# ------------------------------------------------------------------------------ files


def _sweep_data(model, names, settings, entries):
    from certify.report import SAFETY_NOTE

    return {
        "format": SWEEP_FORMAT,
        "model": model.name,
        "model_file": model.path,
        "model_sha256": model.sha256,
        "varied": list(names),
        "units": {p.name: p.unit for p in model.parameters if p.name in names},
        "settings": settings,
        "entries": list(entries),
        "note": SAFETY_NOTE,
    }


def read_json(path):
    """The JSON data of a file."""
    return json.loads(Path(path).read_text(encoding="utf-8"))


def write_json(path, data):
    """Write JSON data to a file atomically (indented, one trailing newline)."""
    write_atomic(path, (json.dumps(data, indent=1) + "\n").encode("utf-8"))


