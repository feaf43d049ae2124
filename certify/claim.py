"""Audit a claim about a region of starting states against a proven map.

A claim names a box of starting states (the *region*) and what every state in it does:

``safe``
    stays within the limits for all t >= 0;
``doomed``
    leaves the limits at some time (``until=T``: at some time t <= T);
``stays`` (with ``until=T``)
    stays within the limits for every t in [0, T].

``stays until T`` and ``doomed until T`` are exact negations of each other point by
point. A state that violates a limit at t = 0 is not within the limits: it refutes a
``safe`` or ``stays`` claim and satisfies a ``doomed`` one (it crossed at time 0).

The verdict is read off the certified labels and time bounds of the cells that meet
the region, so anyone holding the certificate can re-derive it:

* ``proven``: every cell meeting the region settles the claim for all its points in
  the region (for ``safe``/``stays`` the region must also satisfy the limits at t = 0);
* ``refuted``: one point of the region is proven to break the claim (it lies in a
  cell whose certified bounds break it, it violates a limit at t = 0, or, for ``safe``
  and ``stays``, its own flow enclosure proves that it crosses a limit in time);
* ``inconclusive``: neither, within the budget; the unsettled parts of the region are
  listed.

The proof loop refines only the cells whose answer matters for the region, and the
cells their flows lead to (see :func:`certify.prove.prove`, ``focus``).
"""

from __future__ import annotations

import difflib
import json
import math
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np

from . import interval as iv
from .container import encode_array
from .errors import UsageError
from .expr import format_number
from .labels import _reachable
from .evaluate import evaluate_limits, parameter_enclosures
from .prove import Method, prove
from .taylor import flow_programs

__all__ = ["EXPECTATIONS", "VERDICTS", "ClaimResult", "parse_region", "check_claim",
           "write_claim"]

EXPECTATIONS = ("safe", "doomed", "stays")
VERDICTS = ("proven", "refuted", "inconclusive")

#: Candidate points per axis searched in a piece of the region (odd: the centre is one).
GRID = 5
#: For claims with a horizon T, steps are at most T / STEPS_PER_HORIZON long: a survival
#: time is proven to within about one step.
STEPS_PER_HORIZON = 32
#: Half-width of the box a point is flown in, as a share of the window side.
POINT_SPREAD = 1e-6
#: Largest number of points whose own flow is enclosed when the map is not enough.
POINT_TRIES = 64


@dataclass(frozen=True)
class ClaimResult:
    """The verdict on a claim.

    Attributes
    ----------
    verdict : str
        ``proven``, ``refuted`` or ``inconclusive``.
    message : str
        One line saying why.
    expect : str
    region : dict
        State name -> ``(lo, hi)`` exact Fractions, for every state.
    until : Fraction or None
    counterexample : dict or None
        ``{"point": [...], "limit": str or None, "crossing_time": [lo, hi],
        "reason": str}``; a bound of None means +infinity (never, or not proven). When
        the point's own flow enclosure names the limit or proves the crossing, ``"flow"``
        holds its box and validated steps (encoded arrays, see
        docs/certificate-format.md).
    undecided_boxes : list
        The unsettled parts of the region, each a list of ``[lo, hi]`` per state.
    undecided_volume : float
        Their total volume (in the units of the states; over the region's axes of
        positive width when the region fixes some state at one value).
    proof : certify.prove.Proof
        The map the verdict is read from.
    certificate : str or None
        Path of the written certificate, once :func:`write_claim` has run.
    """

    verdict: str
    message: str
    expect: str
    region: dict
    until: Fraction | None
    counterexample: dict | None
    undecided_boxes: list
    undecided_volume: float
    proof: object
    certificate: str | None = None

    def record(self):
        """The ``claim`` record stored in the certificate (exact numbers as text), with
        the evidence of a point counterexample that ``certify check`` re-derives."""
        return {"region": {k: [_text(lo), _text(hi)] for k, (lo, hi) in self.region.items()},
                "expect": self.expect,
                "until": None if self.until is None else _text(self.until),
                "verdict": self.verdict,
                "counterexample": self.counterexample,
                "undecided_volume": self.undecided_volume}

    def to_json(self):
        """JSON-ready dictionary (what ``certify claim --json`` prints; the encoded
        point flow stays in the certificate)."""
        c = self.counterexample
        return {"verdict": self.verdict, "message": self.message, "expect": self.expect,
                "region": {k: [float(lo), float(hi)] for k, (lo, hi) in self.region.items()},
                "until": None if self.until is None else float(self.until),
                "counterexample": None if c is None else
                {k: v for k, v in c.items() if k != "flow"},
                "undecided_volume": self.undecided_volume,
                "undecided_boxes": self.undecided_boxes,
                "certificate": self.certificate}


def _text(q):
    from .certificate import fraction_text
    return fraction_text(q)


def parse_region(text):
    """Parse ``"NAME=LO:HI, NAME2=LO:HI"`` (or ``NAME=VALUE``) into exact bounds.

    Parameters
    ----------
    text : str

    Returns
    -------
    dict
        Name -> ``(lo, hi)`` Fractions, in the order written.

    Raises
    ------
    UsageError
        Malformed text, a repeated name, or ``LO`` above ``HI``.

    Examples
    --------
    >>> parse_region("S=0.1:0.45, I=0.01:0.08")["S"]
    (Fraction(1, 10), Fraction(9, 20))
    >>> parse_region("S=0.1..0.45")
    Traceback (most recent call last):
    ...
    certify.errors.UsageError: --region 'S=0.1..0.45': '0.1..0.45' is not a number or LO:HI
    """
    out = {}
    items = [t.strip() for t in text.split(",")]
    if not text.strip() or any(not t for t in items):
        raise UsageError(f"--region {text!r}: write NAME=LO:HI, NAME2=LO:HI")
    for item in items:
        name, sep, value = item.partition("=")
        name = name.strip()
        parts = value.split(":")
        if not sep or not name or len(parts) > 2:
            raise UsageError(f"--region {text!r}: write NAME=LO:HI, NAME2=LO:HI "
                             f"(not {item!r})")
        try:
            nums = [Fraction(p.strip()) for p in parts]
        except (ValueError, ZeroDivisionError):
            raise UsageError(f"--region {text!r}: {value.strip()!r} is not a number or "
                             "LO:HI") from None
        if name in out:
            raise UsageError(f"--region {text!r}: {name} is given twice")
        if nums[0] > nums[-1]:
            raise UsageError(f"--region {text!r}: LO is above HI for {name}")
        out[name] = (nums[0], nums[-1])
    return out


def _full_region(model, region):
    """Check names and window; return bounds for every state in model order."""
    names = [s.name for s in model.states]
    for name in region:
        if name not in names:
            close = difflib.get_close_matches(name, names, n=1)
            hint = f" (did you mean {close[0]}?)" if close else ""
            raise UsageError(f"region: {name!r} is not a state of the model{hint}; "
                             f"states: {', '.join(names)}")
    full = {}
    for state in model.states:
        lo, hi = region.get(state.name, (state.lo, state.hi))
        lo, hi = Fraction(lo), Fraction(hi)
        if lo > hi:
            raise UsageError(f"region: LO is above HI for {state.name}")
        if lo < state.lo or hi > state.hi:
            raise UsageError(f"region: {state.name}={format_number(lo)}:{format_number(hi)} "
                             f"is not inside the window [{format_number(state.lo)}, "
                             f"{format_number(state.hi)}] of {state.name}")
        full[state.name] = (lo, hi)
    return full


def _check_expect(expect, until):
    if expect not in EXPECTATIONS:
        close = difflib.get_close_matches(str(expect), EXPECTATIONS, n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        raise UsageError(f"--expect {expect!r}: use one of {', '.join(EXPECTATIONS)}{hint}")
    if until is None:
        if expect == "stays":
            raise UsageError("--expect stays needs --until T (stays within the limits on [0, T])")
        return None
    if expect == "safe":
        raise UsageError("--until does not apply to --expect safe (safe means for all time); "
                         "use --expect stays --until T")
    try:
        T = Fraction(until)
    except (ValueError, TypeError, ZeroDivisionError):
        raise UsageError(f"--until {until!r} is not a number") from None
    if T <= 0:
        raise UsageError(f"--until {until!r}: the horizon must be positive")
    return T


def _at_least(x, T):
    """``x >= T`` exactly (``T`` None is +infinity)."""
    if T is None or x == math.inf:
        return x == math.inf
    return math.isfinite(x) and Fraction(x) >= T


def _at_most(x, T):
    """``x <= T`` exactly for a finite ``x`` (``T`` None is +infinity)."""
    return math.isfinite(x) and (T is None or Fraction(x) <= T)


@dataclass
class _Piece:
    """The part of the region inside one leaf."""

    leaf: int
    box: list            # exact (lo, hi) per state
    label: str
    lower: float          # certified survival lower bound of the leaf
    upper: float          # certified crossing upper bound of the leaf
    good: bool = False


class _Auditor:
    """Judges a claim on any labelled tree of the model (each round, and at the end)."""

    def __init__(self, model, region, expect, until, params, programs):
        self.model = model
        self.region = [region[s.name] for s in model.states]
        self.expect = expect
        self.until = until
        self.params = params
        self.programs = programs
        self.lo = np.array([iv.enclose_fraction(a)[0] for a, _ in self.region])
        self.hi = np.array([iv.enclose_fraction(b)[1] for _, b in self.region])
        self.thick = [a < b for a, b in self.region]

    # -- pieces -----------------------------------------------------------------------
    def assess(self, tree, leaves, labelling):
        """The region's parts in the leaves, each judged, and one counterexample or None.

        Only full-dimensional parts are kept: every point of the region lies in one.
        """
        _, nodes = tree.leaves_meeting(self.lo[None], self.hi[None])
        pieces = []
        for node in nodes:
            box = []
            for (a, b), (c, d) in zip(self.region, tree.exact_box(node)):
                box.append((max(a, c), min(b, d)))
            if any(lo > hi or (thick and lo == hi)
                   for (lo, hi), thick in zip(box, self.thick)):
                continue
            leaf = int(np.searchsorted(leaves, node))
            pieces.append(_Piece(leaf=leaf, box=box, label=str(labelling.label[leaf]),
                                 lower=float(labelling.survival_lower[leaf]),
                                 upper=float(labelling.crossing_upper[leaf])))
        return pieces, self._judge(pieces)

    def _limits(self, lo, hi):
        return evaluate_limits(self.programs, lo, hi, self.params)

    def _judge(self, pieces):
        """Mark the pieces that settle the claim; return one counterexample or None.

        A crossing from within the limits is looked for first: it says more than a point
        that already violates a limit.
        """
        if not pieces:
            return None
        blo = np.array([[iv.enclose_fraction(a)[0] for a, _ in p.box] for p in pieces])
        bhi = np.array([[iv.enclose_fraction(b)[1] for _, b in p.box] for p in pieces])
        glo, ghi = self._limits(blo, bhi)
        inside = np.all(glo >= 0, axis=1)
        outside = np.any(ghi < 0, axis=1)
        T = self.until
        searches = []
        for p, p_in, p_out in zip(pieces, inside, outside):
            if self.expect == "doomed":
                p.good = bool(p_out) or _at_most(p.upper, T)
                if _at_least(p.lower, T):
                    reason = ("lies in a proven safe cell" if p.label == "safe" else
                              f"is proven within the limits up to t = {p.lower:.6g}")
                    searches.append((0, p, "in", reason))
            else:
                p.good = bool(p_in) and _at_least(p.lower, T)
                if _at_most(p.upper, T) and not p_out:
                    searches.append((0, p, "in", f"lies in a proven {p.label} cell"))
                if not p_in:
                    searches.append((1, p, "out", "violates a limit at t = 0"))
        searches.sort(key=lambda s: (s[0], s[1].upper))
        for _, p, want, reason in searches:
            found = self._find(p, want, reason)
            if found is not None:
                return found
        return None

    def _find(self, piece, want, reason):
        """A float point of the piece (exactly inside it) that certainly satisfies every
        limit (``want="in"``) or certainly violates one (``"out"``); None if not found."""
        points = _points_in(piece.box)
        if len(points) == 0:
            return None
        glo, ghi = self._limits(points, points)
        if want == "in":
            ok = np.flatnonzero(np.all(glo >= 0, axis=1))
        else:
            ok = np.flatnonzero(np.any(ghi < 0, axis=1))
        if len(ok) == 0:
            return None
        k = ok[0]
        if want == "out":
            limit = self.model.constraints[int(np.argmax(ghi[k] < 0))].name
            return {"point": points[k].tolist(), "limit": limit, "crossing_time": [0.0, 0.0],
                    "reason": reason}
        return {"point": points[k].tolist(), "limit": None,
                "crossing_time": [_bound(max(piece.lower, 0.0)), _bound(piece.upper)],
                "reason": reason}

    # -- the claim as a whole ---------------------------------------------------------
    def wanted(self, tree, leaves, labelling, facts):
        """Leaves to split next (the ``focus`` callable of :func:`certify.prove.prove`)."""
        pieces, counterexample = self.assess(tree, leaves, labelling)
        if counterexample is not None:
            return np.zeros(0, int)
        label = labelling.label
        # time bounds of doomed cells improve when cut finer; plain labels do not
        timed = self.until is not None
        movable = (label == "undecided") | ((label == "doomed") & timed)
        targets = np.zeros(len(leaves), bool)
        for p in pieces:
            if not p.good and label[p.leaf] != "safe" and label[p.leaf] != "outside":
                targets[p.leaf] = True
        if not targets.any():
            return np.zeros(0, int)
        edge = movable[facts.src] & movable[facts.dst]
        # forward reachability: nodes that reach the targets in the reversed graph
        reach = _reachable(len(leaves), facts.dst, facts.src, edge, targets)
        return leaves[(reach & movable) | targets]


def _bound(x):
    return float(x) if math.isfinite(x) else None


def _points_in(box):
    """Grid points of an exact box, as floats exactly inside it, the centre first."""
    axes = []
    for lo, hi in box:
        values = []
        for j in range(GRID):
            q = lo + (hi - lo) * Fraction(2 * j + 1, 2 * GRID)
            x = float(q)
            if lo <= Fraction(x) <= hi and x not in values:
                values.append(x)
        if not values:
            return np.zeros((0, len(box)))
        axes.append(np.array(values))
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, len(box))
    centre = np.array([float((lo + hi) / 2) for lo, hi in box])
    order = np.argsort(np.sum((grid - centre) ** 2, axis=1), kind="stable")
    return grid[order]


def _point_crossings(auditor, proof, points, horizon):
    """Enclose the flow of single points; for each, ``(limit index, time upper bound)``
    of the first step end that wholly violates a limit, or None.

    Each point is flown inside a tiny box around it (``POINT_SPREAD`` of the window
    side): the step-size control aims at a remainder relative to the set's width, so a
    box of zero width would crawl in tiny steps. The box contains the point, so its
    crossing is the point's.
    """
    from .flow import flow_boxes

    m = proof.method
    spread = POINT_SPREAD * (proof.tree.hi[0] - proof.tree.lo[0])
    lo, hi = points - spread, points + spread
    programs = flow_programs(proof.model, m.order, m.kinks)

    def crossed(ids, end_lo, end_hi, t_lo, t_hi):
        return np.any(auditor._limits(end_lo, end_hi)[1] < 0, axis=1)

    with np.errstate(all="ignore"):
        result = flow_boxes(programs, lo, hi, proof.params, min_horizon=0.0,
                            max_horizon=float(horizon), step=m.step, max_step=m.max_step,
                            min_step=m.min_step, max_steps=m.max_steps, should_stop=crossed,
                            frames="qr")  # one set: its frames are stored with the claim
        _, ghi = auditor._limits(result.end_lo, result.end_hi)
        _, t1_hi = iv.add(result.t0_lo, result.t0_hi, result.h, result.h)
    out = []
    for b in range(len(points)):
        steps = result.steps_of(b)
        hit = np.flatnonzero(np.any(ghi[steps] < 0, axis=1))
        if len(hit) == 0:
            out.append(None)
            continue
        k = steps.start + hit[0]
        out.append(_PointHit(limit=int(np.argmax(ghi[k] < 0)), time=float(t1_hi[k]),
                             flow=_flow_record(result, b, lo[b], hi[b], k)))
    return out


@dataclass(frozen=True)
class _PointHit:
    """A point's flow enclosure wholly violates limit number ``limit`` at the end of a
    step, by time ``time``; ``flow`` is the evidence stored with the counterexample."""

    limit: int
    time: float
    flow: dict


def _flow_record(result, b, lo, hi, last):
    """The box of a point and its validated steps up to step record ``last`` (the first
    whose end violates a limit), encoded exactly (docs/certificate-format.md)."""
    rows = slice(result.step_start[b], last + 1)
    return {"box": encode_array(np.stack([lo, hi], 1)),
            "set0_m": encode_array(result.set0_m[b]),
            "step_h": encode_array(result.h[rows]),
            "step_E": encode_array(np.stack([result.e_lo[rows], result.e_hi[rows]], -1)),
            "step_m": encode_array(result.m[rows]),
            "step_A": encode_array(result.A[rows])}


def _name_limit(auditor, proof, counterexample):
    """Name the limit a counterexample point crosses (and tighten its crossing bound)
    with the point's own flow enclosure."""
    upper = counterexample["crossing_time"][1]
    if counterexample["limit"] is not None or upper is None:
        return counterexample
    point = np.array([counterexample["point"]])
    hit = _point_crossings(auditor, proof, point, upper)[0]
    if hit is None:
        return counterexample
    counterexample = dict(counterexample)
    counterexample["limit"] = proof.model.constraints[hit.limit].name
    counterexample["crossing_time"] = [counterexample["crossing_time"][0], min(upper, hit.time)]
    counterexample["flow"] = hit.flow
    return counterexample


def _refute_by_points(auditor, proof, pieces):
    """For safe/stays claims: a point of an unsettled piece whose own flow enclosure
    wholly violates a limit within the horizon, or None."""
    if auditor.expect == "doomed":
        return None
    open_pieces = sorted((p for p in pieces if not p.good),
                         key=lambda p: -float(_volume(p.box)))[:POINT_TRIES]
    chosen, where = [], []
    for p in open_pieces:
        c = auditor._find(p, "in", "")
        if c is not None:
            chosen.append(c["point"])
            where.append(p)
    if not chosen:
        return None
    horizon = proof.method.max_horizon if auditor.until is None else auditor.until
    hits = _point_crossings(auditor, proof, np.array(chosen), horizon)
    for point, p, hit in zip(chosen, where, hits):
        if hit is not None and _at_most(hit.time, auditor.until):
            return {"point": point, "limit": proof.model.constraints[hit.limit].name,
                    "crossing_time": [_bound(max(p.lower, 0.0)), hit.time],
                    "reason": "its own flow enclosure wholly violates the limit",
                    "flow": hit.flow}
    return None


def _volume(box):
    out = Fraction(1)
    for lo, hi in box:
        if hi > lo:
            out *= hi - lo
    return out


def check_claim(model, region, expect, until=None, *, max_depth=None, time_limit=None,
                progress=None):
    """Prove or refute a claim about a region of starting states.

    Parameters
    ----------
    model : certify.model.Model
    region : dict
        State name -> ``(lo, hi)`` (numbers or exact Fractions); states not named span
        the window. Must lie inside the window.
    expect : {"safe", "doomed", "stays"}
    until : number, str or Fraction, optional
        The horizon T of a ``doomed`` or ``stays`` claim (required for ``stays``).
    max_depth : int, optional
        Deepest bisection level (default: the model's settings, then the prover's).
    time_limit : float, optional
        Seconds of refinement.
    progress : callable, optional
        Passed to :func:`certify.prove.prove`.

    Returns
    -------
    ClaimResult

    Raises
    ------
    UsageError
        Unknown state names, a region outside the window, an unknown expectation, or a
        horizon that is missing (``stays``), misplaced (``safe``) or not positive.

    Notes
    -----
    For claims with a horizon, every cell's flow runs at least to ``T`` (or the largest
    horizon) in steps of at most ``T / 32``, so that crossing and survival times are
    proven cell by cell to within about one step.
    """
    T = _check_expect(expect, until)
    full = _full_region(model, {k: tuple(v) for k, v in region.items()})
    params = parameter_enclosures(model)
    options = {}
    if T is not None:
        settings = model.settings
        horizon = float(settings.get("max_horizon", Method.max_horizon))
        options["min_horizon"] = min(float(T), horizon)
        options["max_step"] = min(float(T) / STEPS_PER_HORIZON,
                                  float(settings.get("max_step", Method.max_step)))
    auditor = _Auditor(model, full, expect, T, params, flow_programs(model, 1))
    proof = prove(model, focus=auditor.wanted, max_depth=max_depth, time_limit=time_limit,
                  progress=progress, **options)
    pieces, counterexample = auditor.assess(proof.tree, proof.leaves, proof.labelling)
    if counterexample is not None:
        counterexample = _name_limit(auditor, proof, counterexample)
    else:
        counterexample = _refute_by_points(auditor, proof, pieces)
    unsettled = [p for p in pieces if not p.good]
    if counterexample is not None:
        verdict = "refuted"
        message = f"refuted: the point {_fmt(counterexample['point'])} " \
                  f"{counterexample['reason']}"
        unsettled = []
    elif not unsettled:
        verdict, message = "proven", _proof_message(expect, T, pieces, model.time_unit)
    else:
        verdict = "inconclusive"
        message = (f"inconclusive: {len(unsettled)} parts of the region are not settled "
                   f"({proof.stop_reason})")
    boxes = [[[float(lo), float(hi)] for lo, hi in p.box] for p in unsettled]
    volume = float(sum((_volume(p.box) for p in unsettled), Fraction(0)))
    return ClaimResult(verdict=verdict, message=message, expect=expect, region=full,
                       until=T, counterexample=counterexample, undecided_boxes=boxes,
                       undecided_volume=volume, proof=proof)


def _proof_message(expect, T, pieces, unit):
    """One line saying what the cells meeting the region prove (times in `unit`)."""
    n = len(pieces)
    unit = f" {unit}" if unit else ""
    if expect == "safe":
        return f"proven: the region satisfies the limits and lies in {n} cells proven safe"
    if expect == "stays":
        low = min(p.lower for p in pieces)
        return (f"proven: the {n} cells meeting the region stay within the limits at least "
                f"up to t = {low:.6g}{unit}" if math.isfinite(low) else
                f"proven: the region satisfies the limits and lies in {n} cells proven safe")
    high = max((p.upper for p in pieces if math.isfinite(p.upper)), default=0.0)
    return (f"proven: every start of the region within the limits lies in one of {n} cells "
            f"proven to cross a limit by t = {high:.6g}{unit}")


def _fmt(point):
    return "(" + ", ".join(f"{x:.6g}" for x in point) + ")"


def write_claim(result, out_dir):
    """Write the certificate of the map (with the claim record) and ``claim.json``.

    Parameters
    ----------
    result : ClaimResult
    out_dir : str or Path

    Returns
    -------
    ClaimResult
        The same result with ``certificate`` set to the written path.
    """
    from dataclasses import replace

    from .certificate import certificate_data, write_certificate
    from .report import proof_summary

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = out / "certificate.json.gz"
    data = certificate_data(result.proof, proof_summary(result.proof, str(path)))
    data["claim"] = result.record()
    write_certificate(path, data)
    result = replace(result, certificate=str(path))
    (out / "claim.json").write_text(json.dumps(result.to_json(), indent=2) + "\n")
    return result
