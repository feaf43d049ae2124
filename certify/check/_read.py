"""Reading a certificate for the checker: structure, types and shapes, nothing trusted.

Every problem raises :class:`certify.errors.CertificateError` naming the file and the key;
the arrays come back decoded (exact floats and integers) for :mod:`certify.check.checker`.
"""

from __future__ import annotations

import hashlib
import zlib
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from ..container import decode_array, load_certificate_json
from ..errors import CertificateError, CertifyError
from ..model import parse_model
from ._cells import FRAME_KINDS
from ._trapping import read_regions

__all__ = ["CertificateData", "read_for_check", "LABELS", "KINDS"]

LABELS = ("safe", "doomed", "outside", "undecided")
KINDS = ("limit", "inflow", "invariant", "no-outflow", "open")
#: Frame rules of the steps (docs/method.md, step 3).
FRAME_RULES = tuple(FRAME_KINDS)
#: How models with abs, min or max are stepped (docs/certificate-format.md, method.kinks).
KINK_RULES = ("order-1", "branches")
#: Largest magnitude of a window side: cells, their midpoints and widths must be floats.
WINDOW_BOUND = Fraction(2) ** 1000


class _Reader:
    """Structural reading of the raw certificate; errors name the file and the key."""

    def __init__(self, path):
        self.path = path

    def fail(self, key, problem):
        raise CertificateError(f"{self.path}: key '{key}': {problem}")

    def get(self, obj, key, where, kind=None):
        if not isinstance(obj, dict) or key not in obj:
            self.fail(where, "missing")
        value = obj[key]
        if kind is not None and (not isinstance(value, kind) or isinstance(value, bool)):
            self.fail(where, f"expected a {kind.__name__}, got {type(value).__name__}")
        return value

    def fraction(self, text, where):
        if not isinstance(text, (str, int)) or isinstance(text, bool):
            self.fail(where, "expected an exact number 'p/q'")
        try:
            return Fraction(text)
        except (ValueError, ZeroDivisionError):
            self.fail(where, f"{text!r} is not an exact number 'p/q'")

    def array(self, obj, key, where, kind, shape):
        raw = self.get(obj, key, where)
        try:
            a = decode_array(raw, where)
        except CertificateError as exc:
            self.fail(where, str(exc))
        if a.dtype.kind != kind:
            self.fail(where, f"expected {'integers' if kind == 'i' else 'floats'}")
        if len(a.shape) != len(shape) or any(s is not None and s != t
                                             for s, t in zip(shape, a.shape)):
            self.fail(where, f"shape {list(a.shape)} does not fit (expected "
                             f"{[s if s is not None else '*' for s in shape]})")
        return a


@dataclass
class CertificateData:
    path: str
    model: object
    sha_ok: bool
    states: list
    params: tuple
    window: tuple
    order: int
    faces: list
    n: int
    L: int
    depth: np.ndarray
    index: np.ndarray
    label: np.ndarray
    rank: np.ndarray
    crossing_upper: np.ndarray
    survival_lower: np.ndarray
    horizon: np.ndarray
    image_known: np.ndarray
    succ_start: np.ndarray
    succ: np.ndarray
    set0_m: np.ndarray
    step_start: np.ndarray
    h: np.ndarray
    E: np.ndarray
    m: np.ndarray
    A: np.ndarray
    version: int = 3
    frames: str = "qr"
    kinks: str = "order-1"
    claim: object = None
    regions: list = None
    trapped: np.ndarray = None
    trapped_whole: np.ndarray = None
    param_floats: np.ndarray = None


def read_for_check(path):
    """Read and structurally validate a certificate.

    Raises
    ------
    CertificateError
        For anything unreadable or malformed (never another exception).
    """
    try:
        data = load_certificate_json(path)
    except zlib.error as exc:
        raise CertificateError(f"{path}: not a readable certificate ({exc})") from None
    try:
        return _parse(path, data)
    except CertificateError:
        raise
    except (KeyError, TypeError, ValueError, IndexError, OverflowError, AttributeError) as exc:
        raise CertificateError(f"{path}: malformed certificate ({type(exc).__name__}: "
                               f"{exc})") from None


def _parse(path, data):
    rd = _Reader(path)
    model_obj = rd.get(data, "model", "model", dict)
    text = rd.get(model_obj, "text", "model.text", str)
    sha = rd.get(model_obj, "sha256", "model.sha256", str)
    file = model_obj.get("file")
    sha_ok = hashlib.sha256(text.encode("utf-8")).hexdigest() == sha
    model = None
    if sha_ok:
        try:
            model = parse_model(text, path=file if isinstance(file, str) else None)
        except CertifyError as exc:
            rd.fail("model.text", f"the stored model does not parse ({exc})")
    states = rd.get(data, "states", "states", list)
    if not states or not all(isinstance(s, str) for s in states):
        rd.fail("states", "expected a list of state names")
    n = len(states)
    raw_params = rd.get(data, "parameters", "parameters", dict)
    params = {}
    for name, pair in raw_params.items():
        where = f"parameters.{name}"
        if not isinstance(pair, list) or len(pair) != 2:
            rd.fail(where, "expected [lo, hi]")
        lo, hi = (rd.fraction(v, where) for v in pair)
        if lo > hi:
            rd.fail(where, "lo is above hi")
        params[name] = (lo, hi)
    param_floats = rd.array(data, "parameter_floats", "parameter_floats", "f",
                            (len(params), 2))
    window_raw = rd.get(data, "window", "window", list)
    if len(window_raw) != n:
        rd.fail("window", f"expected {n} sides, one per state")
    window = []
    for k, side in enumerate(window_raw):
        if not isinstance(side, list) or len(side) != 2:
            rd.fail(f"window[{k}]", "expected [lo, hi]")
        lo, hi = (rd.fraction(v, f"window[{k}]") for v in side)
        if not lo < hi:
            rd.fail(f"window[{k}]", "lo must be below hi")
        if max(abs(lo), abs(hi)) > WINDOW_BOUND:
            rd.fail(f"window[{k}]", "a side beyond 2^1000 in magnitude (cells must be floats)")
        window.append((lo, hi))
    method = rd.get(data, "method", "method", dict)
    order = rd.get(method, "order", "method.order")
    if not isinstance(order, int) or isinstance(order, bool) or not 1 <= order <= 8:
        rd.fail("method.order", "expected an integer from 1 to 8")
    # certificates written before the parallelepiped frames have no rule: QR frames
    frames = method.get("frames", "qr")
    if frames not in FRAME_RULES:
        rd.fail("method.frames", f"expected one of {', '.join(FRAME_RULES)}")
    # certificates written before steps used the smooth branches of kinks: order 1
    kinks = method.get("kinks", "order-1")
    if kinks not in KINK_RULES:
        rd.fail("method.kinks", f"expected one of {', '.join(KINK_RULES)}")
    faces = _read_faces(rd, data, n)
    cells = rd.get(data, "cells", "cells", dict)
    L = rd.get(cells, "count", "cells.count", int)
    if L < 1:
        rd.fail("cells.count", "expected at least one cell")
    arr = lambda key, kind, shape: rd.array(cells, key, f"cells.{key}", kind, shape)  # noqa: E731
    depth = arr("depth", "i", (L,))
    index = arr("index", "i", (L, n))
    if np.any(depth < 0) or np.any(depth > 62):
        rd.fail("cells.depth", "depths must be between 0 and 62")
    if np.any(index < 0) or np.any(index >= (np.int64(1) << depth)[:, None]):
        rd.fail("cells.index", "an index lies outside its depth's range 0 .. 2^depth - 1")
    labels = rd.get(cells, "label", "cells.label", list)
    if len(labels) != L or not all(x in LABELS for x in labels):
        rd.fail("cells.label", f"expected {L} labels among {', '.join(LABELS)}")
    rank = arr("rank", "i", (L,))
    crossing = arr("crossing_upper", "f", (L,))
    survival = arr("survival_lower", "f", (L,))
    horizon = arr("horizon", "f", (L, 2))
    known = rd.get(cells, "image_known", "cells.image_known", list)
    if len(known) != L or not all(isinstance(x, bool) for x in known):
        rd.fail("cells.image_known", f"expected {L} booleans")
    succ_start = arr("successor_start", "i", (L + 1,))
    succ = arr("successors", "i", (None,))
    _check_offsets(rd, "cells.successor_start", succ_start, len(succ))
    if np.any(succ < 0) or np.any(succ >= L):
        rd.fail("cells.successors", "a successor is not a leaf number")
    version = data["version"]
    step_start = arr("step_start", "i", (L + 1,))
    h = arr("step_h", "f", (None,))
    S = len(h)
    _check_offsets(rd, "cells.step_start", step_start, S)
    E = arr("step_E", "f", (S, n, 2))
    stored = {"step_h": h, "step_E": E}
    set0_m = m = A = None
    if version == 2:
        # version 2 also stores the start points and every step's frame (m, A)
        set0_m = stored["set0_m"] = arr("set0_m", "f", (L, n))
        arr("set0_r", "f", (L, n, 2))
        m = stored["step_m"] = arr("step_m", "f", (S, n))
        A = stored["step_A"] = arr("step_A", "f", (S, n, n))
    for key, a in stored.items():
        if not np.all(np.isfinite(a)):
            rd.fail(f"cells.{key}", "holds a value that is not a finite number")
    if np.any(h <= 0):
        rd.fail("cells.step_h", "step sizes must be positive")
    for key, a in (("crossing_upper", crossing), ("survival_lower", survival),
                   ("horizon", horizon)):
        if np.any(np.isnan(a)):
            rd.fail(f"cells.{key}", "holds NaN")
    regions, trapped, whole = read_regions(rd, data, cells, n, L)
    return CertificateData(path=str(path), model=model, sha_ok=sha_ok, states=states,
                        params=params, window=tuple(window), order=order, faces=faces, n=n,
                        L=L, depth=depth, index=index, label=np.array(labels), rank=rank,
                        crossing_upper=crossing, survival_lower=survival, horizon=horizon,
                        image_known=np.array(known, bool), succ_start=succ_start, succ=succ,
                        set0_m=set0_m, step_start=step_start, h=h, E=E, m=m, A=A,
                        version=version, frames=frames, kinks=kinks,
                         claim=data.get("claim"), regions=regions, trapped=trapped,
                         trapped_whole=whole, param_floats=param_floats)


def _read_faces(rd, data, n):
    faces = rd.get(data, "faces", "faces", list)
    seen = {}
    for k, face in enumerate(faces):
        where = f"faces[{k}]"
        axis = rd.get(face, "axis", f"{where}.axis")
        side = rd.get(face, "side", f"{where}.side")
        kind = rd.get(face, "kind", f"{where}.kind")
        if not isinstance(axis, int) or isinstance(axis, bool) or not 0 <= axis < n:
            rd.fail(f"{where}.axis", f"expected a state number from 0 to {n - 1}")
        if side not in ("lo", "hi"):
            rd.fail(f"{where}.side", "expected 'lo' or 'hi'")
        if kind not in KINDS:
            rd.fail(f"{where}.kind", f"expected one of {', '.join(KINDS)}")
        if (axis, side) in seen:
            rd.fail(where, "face listed twice")
        seen[(axis, side)] = kind
    if len(seen) != 2 * n:
        rd.fail("faces", f"expected the {2 * n} faces of the window")
    return [(axis, side, seen[(axis, side)]) for axis in range(n) for side in ("lo", "hi")]


def _check_offsets(rd, where, offsets, total):
    if offsets[0] != 0 or offsets[-1] != total or np.any(np.diff(offsets) < 0):
        rd.fail(where, f"offsets must rise from 0 to {total}")
