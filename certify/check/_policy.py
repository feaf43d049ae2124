"""Independent re-verification of a policy certificate (``policy.json.gz``).

A policy certificate names one ordinary certificate per setting of the controls (the
model with its controls fixed at that setting) and one for the differential inclusion
over the hull of the settings (order 1), all on the same cells. The check:

1. each of them is an ordinary certificate of the stored model with the right
   parameters (the setting, or the hull and order 1), and passes
   :func:`certify.check.checker.check_certificate`;
2. they tile the window with the same cells as the policy;
3. every ``safe`` cell's steps under its chosen setting are recomputed here: every step
   verifies and keeps the limits, the horizon is at least the hold time, the image is
   usable, and every cell it meets is ``safe`` (or ``outside``) in the policy: the
   policy's safe set is then closed, the greatest fixpoint's defining property;
4. ``doomed`` and ``outside`` cells are doomed and outside in the inclusion's
   certificate, whose own check re-verified its order-1 inclusion steps and fixpoint.
"""

from __future__ import annotations

import hashlib
import time
from fractions import Fraction
from itertools import product
from pathlib import Path

import numpy as np

from ..container import read_gzip_json
from ..errors import CertificateError, CertifyError
from ..model import parse_model
from ._arith import PASSES
from ._cells import CheckContext, exact_cells
from ._claim import _limit_signs
from ._programs import derive_programs
from ._read import read_for_check
from .checker import (CheckResult, _Facts, _Judge, _compute, _global, _leaves_meeting,
                      _record, _tasks, _tile, check_certificate)

__all__ = ["POLICY_FORMAT", "POLICY_VERSION", "POLICY_NAME", "check_policy", "is_policy"]

POLICY_FORMAT = "certify-policy"
POLICY_VERSION = 1
POLICY_NAME = "policy.json.gz"


def is_policy(path):
    """Whether `path` names a policy certificate or a folder holding one."""
    path = Path(path)
    return (path / POLICY_NAME).is_file() if path.is_dir() else path.name == POLICY_NAME


def _load(path):
    data = read_gzip_json(path, f"a policy certificate ({POLICY_NAME}, gzip-compressed JSON)")
    if not isinstance(data, dict) or data.get("format") != POLICY_FORMAT:
        raise CertificateError(f"{path}: not a certify policy certificate (key 'format')")
    if data.get("version") != POLICY_VERSION:
        raise CertificateError(f"{path}: unknown policy certificate version "
                               f"{data.get('version')!r} (this tool reads {POLICY_VERSION})")
    return data


def _get(data, key, kind, path):
    value = data.get(key) if isinstance(data, dict) else None
    if not isinstance(value, kind) or isinstance(value, bool):
        raise CertificateError(f"{path}: key '{key}': missing or not a {kind.__name__}")
    return value


def _expected_parameters(model):
    """Per setting, and for the inclusion: the parameter boxes the sub-certificates need."""
    base = {p.name: (p.lo, p.hi) for p in model.parameters}
    names = [c.name for c in model.controls]
    settings = []
    for values in product(*(c.settings for c in model.controls)):
        settings.append(base | {name: (v, v) for name, v in zip(names, values)})
    hull = base | {c.name: (min(c.settings), max(c.settings)) for c in model.controls}
    return settings, hull


def _stored_settings(data, path):
    """The ``settings`` list as stored (``{control: Fraction}`` per index): the values
    :func:`certify.policy_output.read_policy` hands out for the policy's choices."""
    stored = _get(data, "settings", list, path)
    try:
        return [{k: Fraction(v) for k, v in entry.items()} for entry in stored]
    except (AttributeError, TypeError, ValueError, ZeroDivisionError):
        raise CertificateError(f"{path}: key 'settings': expected {{control: 'p/q'}} per "
                               f"setting") from None


def check_policy(path, jobs=None):
    """Re-verify a policy certificate and the certificates it names.

    Parameters
    ----------
    path : str or Path
        ``policy.json.gz`` or the folder holding it.
    jobs : int, optional
        Worker processes (default: all cores).

    Returns
    -------
    CheckResult
        ``cells_checked`` counts the policy's cells.

    Raises
    ------
    CertificateError
        When a file is unreadable or malformed.
    """
    start = time.monotonic()
    path = Path(path)
    if path.is_dir():
        path = path / POLICY_NAME
    data = _load(path)
    model_obj = _get(data, "model", dict, path)
    text = _get(model_obj, "text", str, path)
    if hashlib.sha256(text.encode("utf-8")).hexdigest() != model_obj.get("sha256"):
        return _result([_global("the model text does not match its sha256")], 0, start)
    try:
        model = parse_model(text)
    except CertifyError as exc:
        raise CertificateError(f"{path}: key 'model.text': the model does not parse ({exc})") \
            from None
    if not model.controls:
        raise CertificateError(f"{path}: key 'model.text': the model has no [controls]")
    settings, hull = _expected_parameters(model)
    if _stored_settings(data, path) != [{c.name: s[c.name][0] for c in model.controls}
                                        for s in settings]:
        return _result([_global("the stored settings differ from those of the model's "
                                "[controls] (in their order)")], 0, start)
    files = _get(data, "files", dict, path)
    names = _get(files, "settings", list, path)
    if len(names) != len(settings) or not all(isinstance(n, str) for n in names):
        raise CertificateError(f"{path}: key 'files.settings': expected {len(settings)} file names")
    folder = path.parent
    subs = [folder / Path(n).name for n in names] + \
        [folder / Path(_get(files, "inclusion", str, path)).name]
    cells = _get(data, "cells", dict, path)
    labels = np.array(_get(cells, "label", list, path), dtype=object).astype(str)
    choice = np.array(_get(cells, "choice", list, path))
    if choice.dtype.kind != "i" or choice.shape != labels.shape:
        raise CertificateError(f"{path}: key 'cells.choice': expected one integer per cell")
    failures = []
    certs = []
    for k, sub in enumerate(subs):
        what = f"setting {k}" if k < len(settings) else "the inclusion"
        result = check_certificate(sub, jobs=jobs)
        failures += [_global(f"{what} ({sub.name}): {f['reason']}"
                             + (f" (cell {f['cell']})" if f["cell"] is not None else ""))
                     for f in result.failures]
        cert = read_for_check(sub)
        want = settings[k] if k < len(settings) else hull
        if cert.model is None or cert.model.text != text:
            failures.append(_global(f"{what} ({sub.name}) is not about the policy's model"))
        if cert.params != want:
            failures.append(_global(f"{what} ({sub.name}) does not have the parameters of "
                                    f"its setting"))
        if k == len(settings) and cert.order != 1:
            failures.append(_global(f"the inclusion ({sub.name}) has order {cert.order}; "
                                    f"only order 1 holds for every measurable control"))
        if cert.L != len(labels) or not (np.array_equal(cert.depth, certs[0].depth if certs
                                                        else cert.depth)
                                         and np.array_equal(cert.index, certs[0].index
                                                            if certs else cert.index)):
            failures.append(_global(f"{what} ({sub.name}) does not have the policy's cells"))
        certs.append(cert)
    if failures:
        return _result(failures, 0, start)
    failures += _labels(certs[-1], labels, choice, len(settings), data, path)
    if failures:
        return _result(failures, 0, start)
    hold = max(c.hold for c in model.controls)
    for k in range(len(settings)):
        failures += _safe_cells(certs[k], model.with_parameters(settings[k]),
                                np.flatnonzero(choice == k), labels, hold, jobs, k)
    if "claim" in data:
        failures += _claim(data["claim"], certs[-1], model, labels, path)
    return _result(failures, len(labels), start)


def _claim(record, cert, model, labels, path):
    """Re-derive the verdict of a stored claim from the (checked) labels.

    The region must lie inside the window (no cell speaks about a start beyond it). Its
    pieces are its parts in the closed cells meeting it; ``proven`` follows when every
    such cell is ``safe`` and every limit holds on every piece at t = 0 (a safe cell may
    straddle a limit: it speaks only about its starts within the limits), ``refuted``
    when one is ``doomed`` or ``outside`` or a limit is violated on a whole piece. A
    stored ``inconclusive`` is weaker than either, and true.
    """
    try:
        region = {k: (Fraction(a), Fraction(b)) for k, (a, b) in record["region"].items()}
        stored = record["verdict"]
        box = [region[s.name] for s in model.states]
    except (KeyError, TypeError, ValueError, ZeroDivisionError):
        raise CertificateError(f"{path}: key 'claim': malformed claim record") from None
    for s, (a, b), (w_lo, w_hi) in zip(model.states, box, cert.window):
        if not w_lo <= a <= b <= w_hi:
            raise CertificateError(f"{path}: key 'claim.region.{s.name}': not a range "
                                   f"inside the window")
    if record.get("expect") != "safe":
        return [_global("claim: a policy claim can only expect safe")]
    lo, hi = exact_cells(cert.window, cert.depth, cert.index)
    meets = np.ones(len(labels), bool)
    for k, (a, b) in enumerate(box):
        meets &= (lo[:, k] <= b) & (hi[:, k] >= a)
    seen = set(labels[meets].tolist())
    p_lo = np.array([[max(a, c) for (a, _), c in zip(box, row)] for row in lo[meets]],
                    dtype=object).reshape(-1, len(box))
    p_hi = np.array([[min(b, d) for (_, b), d in zip(box, row)] for row in hi[meets]],
                    dtype=object).reshape(-1, len(box))
    context = CheckContext(programs=derive_programs(model.with_parameters(cert.params), 1),
                           params=tuple(cert.params[p.name] for p in model.parameters),
                           window=cert.window, open_faces=(), grid_depth=0)
    inside, violated = _limit_signs(context, p_lo, p_hi)
    verdict = ("refuted" if seen & {"doomed", "outside"} or violated.any() else
               "proven" if seen <= {"safe"} and inside.all() else "inconclusive")
    if stored not in (verdict, "inconclusive"):
        return [_global(f"claim: the stored verdict {stored!r} does not follow from the "
                        f"cells meeting the region ({verdict})")]
    return []


def _labels(inclusion, labels, choice, n_settings, data, path):
    """Label rules between the policy and the inclusion's (checked) certificate."""
    out = []
    for c in range(len(labels)):
        label, mine = labels[c], inclusion.label[c]
        if label not in ("safe", "doomed", "outside", "undecided"):
            raise CertificateError(f"{path}: key 'cells.label': unknown label {label!r}")
        if (label == "safe") != (0 <= choice[c] < n_settings):
            out.append(_record(inclusion, c, label, "a safe cell needs a setting, and only a "
                                                    "safe cell has one"))
        elif (label == "outside") != (mine == "outside"):
            out.append(_record(inclusion, c, label, f"the inclusion's certificate says {mine}"))
        elif label == "doomed" and mine != "doomed":
            out.append(_record(inclusion, c, label, f"not doomed under the inclusion ({mine})"))
        elif label == "safe" and mine == "doomed":
            out.append(_record(inclusion, c, label, "doomed under the inclusion"))
    return out


def _context(cert, model, tree):
    """The checker's context for a certificate whose own check already passed."""
    params = tuple((p.lo, p.hi) for p in model.parameters)
    return CheckContext(programs=derive_programs(model, cert.order, cert.kinks), params=params,
                        window=cert.window, grid_depth=tree.max_depth,
                        open_faces=tuple((a, s) for a, s, kind in cert.faces if kind == "open"),
                        invariant_faces=tuple((a, s) for a, s, kind in cert.faces
                                              if kind == "invariant"),
                        frames=cert.frames)


def _safe_cells(cert, model, cells, labels, hold, jobs, k):
    """Recompute the chosen setting's steps of `cells` and check the safe rule."""
    if len(cells) == 0:
        return []
    tree, _ = _tile(cert)
    context = _context(cert, model, tree)
    K = np.diff(cert.step_start)
    facts = _Facts(cert.L, cert.n)
    problems = {}
    todo = cells
    for arithmetic in PASSES:
        tasks = _tasks(cert, todo, K)
        for number, result in _compute(context, tasks, arithmetic, jobs or 1, None).items():
            facts.store(tasks[number].cells, result)
        judge = _Judge(cert, facts, tree, {})
        problems.update({c: _safe_rule(cert, facts, judge, tree, c, labels, hold)
                         for c in todo.tolist()})
        # only a failure the arithmetic may cause is worth a finer recomputation
        todo = np.array([c for c in todo.tolist() if problems[c] and problems[c][1]], int)
        if len(todo) == 0:
            break
    return [_record(cert, c, "safe", f"under its setting {k}: {p[0]}")
            for c, p in problems.items() if p]


def _safe_rule(cert, facts, judge, tree, c, labels, hold):
    """None, or ``(reason, arithmetic may be to blame)``."""
    K = int(cert.step_start[c + 1] - cert.step_start[c])
    if not cert.image_known[c]:
        return "its image at the horizon is not known", False
    if facts.n_valid[c] < K:
        return f"step {facts.n_valid[c]} does not verify", True
    if facts.first_unkept[c] < K:
        return f"limits are not proven kept on step {facts.first_unkept[c]}", True
    if not facts.image[c]:
        return "its image is not finite", True
    if facts.escapes[c]:
        return "part of its image may leave the window where no limit is violated", True
    T = judge.time(c, K)
    if T < hold:
        return f"its horizon {float(T)!r} is shorter than the hold time {float(hold)!r}", False
    if facts.empty[c]:
        return None
    _, leaf = _leaves_meeting(tree, facts.grid_lo[c:c + 1], facts.grid_hi[c:c + 1])
    for d in leaf.tolist():
        if labels[d] not in ("safe", "outside"):
            return f"its image meets cell {d}, which is {labels[d]}", True
    return None


def _result(failures, checked, start):
    valid = not failures
    message = ("every claim of the policy holds" if valid else
               f"{len(failures)} claims of the policy do not hold: {failures[0]['reason']}")
    return CheckResult(status=0 if valid else 1, message=message, valid=valid,
                       cells_checked=checked, failures=failures,
                       seconds=time.monotonic() - start)
