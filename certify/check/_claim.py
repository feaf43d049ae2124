"""Re-deriving the verdict of a claim record from the certificate alone.

A certificate written by ``certify claim`` holds a ``claim`` record: a region of starting
states, an expectation (``safe``, ``doomed``, ``stays``, with a horizon ``until``), the
stored verdict and, for ``refuted``, a counterexample point. The rules below are the
prover's (:mod:`certify.claim`, docs/auditing.md), restated with the checker's own
arithmetic over the cells whose claims the checker verified:

* the region is cut into *pieces*, its full-dimensional parts in the leaves
  (:func:`certify.check._cells.grid_bounds` names the leaves); a piece *settles* the
  claim when, for ``safe``/``stays``, it satisfies every limit at t = 0 and its leaf's
  survival bound is at least T (``safe``: infinite), and, for ``doomed``, the whole piece
  violates a limit at t = 0 or its leaf's crossing bound is at most T (``doomed``
  without T: finite);
* ``proven`` follows when every piece settles the claim;
* ``refuted`` follows when the stored counterexample point lies in the region and
  breaks the claim: for ``safe``/``stays`` it violates a limit at t = 0, or a leaf
  containing it has a crossing bound at most T, or its own stored flow (a box around the
  point and its validated steps, recomputed like a cell's) violates the limit it names
  at a step end no later than T; for ``doomed`` it satisfies the limits at t = 0 and a
  leaf containing it has a survival bound at least T (no T: infinite);
* ``inconclusive`` follows otherwise.

The reported numbers of a counterexample must be proven too: the limit it names, and
its crossing-time bounds ``[lo, hi]`` (``lo`` at most a survival bound of a leaf holding
the point, ``hi`` at least a proven crossing time).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from fractions import Fraction

import numpy as np

from ..container import decode_array
from ..errors import CertificateError
from ._arith import ARITHMETICS, PASSES, evaluate
from ._cells import CellTask, cell_facts, exact_cells, grid_bounds
from ._programs import with_one_limit

__all__ = ["ClaimRecord", "ClaimCheck", "read_claim", "rederive_claim"]

EXPECTATIONS = ("safe", "doomed", "stays")
VERDICTS = ("proven", "refuted", "inconclusive")


@dataclass(frozen=True)
class PointFlow:
    """A box around a counterexample point and its validated steps (as stored)."""

    lo: np.ndarray
    hi: np.ndarray
    m0: np.ndarray
    h: np.ndarray
    E: np.ndarray
    m: np.ndarray
    A: np.ndarray


@dataclass(frozen=True)
class Counterexample:
    """A stored counterexample; a time bound of None is +infinity."""

    point: tuple
    limit: str | None
    lower: Fraction | None
    upper: Fraction | None
    flow: PointFlow | None


@dataclass(frozen=True)
class ClaimRecord:
    """The ``claim`` record of a certificate, read exactly."""

    region: tuple
    expect: str
    until: Fraction | None
    verdict: str
    counterexample: Counterexample | None
    undecided_volume: float


@dataclass(frozen=True)
class ClaimCheck:
    """What the checker re-derives from a claim record.

    Attributes
    ----------
    stored : str
        The verdict stored in the certificate.
    derived : str
        The verdict that follows from the verified cells (and the counterexample).
    problems : list of str
        Why the stored record does not follow (empty: it does).
    undecided_volume : Fraction
        Exact volume of the pieces that do not settle the claim.
    """

    stored: str
    derived: str
    problems: list
    undecided_volume: Fraction

    @property
    def follows(self):
        """The stored record follows from the certificate."""
        return not self.problems

    def summary(self):
        """One line: ``refuted: re-derived`` or what differs."""
        if self.problems:
            return f"{self.stored}: does not follow ({'; '.join(self.problems)})"
        if self.derived != self.stored:
            return (f"{self.stored}: re-derived, and the certificate proves more: "
                    f"{self.derived} follows")
        return f"{self.stored}: re-derived"

    def to_json(self):
        """JSON-ready dictionary (``certify check --json``, key ``claim``)."""
        return {"stored": self.stored, "derived": self.derived, "follows": self.follows,
                "problems": list(self.problems),
                "undecided_volume": float(self.undecided_volume)}


# -- reading -----------------------------------------------------------------------------
class _Fail:
    def __init__(self, path):
        self.path = path

    def __call__(self, key, problem):
        raise CertificateError(f"{self.path}: key 'claim.{key}': {problem}")


def _fraction(fail, key, text):
    if not isinstance(text, (str, int)) or isinstance(text, bool):
        fail(key, "expected an exact number 'p/q'")
    try:
        return Fraction(text)
    except (ValueError, ZeroDivisionError):
        fail(key, f"{text!r} is not an exact number 'p/q'")


def _number(fail, key, value, allow_none=False):
    if value is None and allow_none:
        return None
    if not isinstance(value, (int, float)) or isinstance(value, bool) \
            or not np.isfinite(value):
        fail(key, "expected a finite number" + (" or null" if allow_none else ""))
    return Fraction(value)


def read_claim(raw, path, states, window):
    """Read a certificate's ``claim`` record exactly.

    Parameters
    ----------
    raw : dict or None
        The record as stored (None: the certificate holds no claim).
    path : str
    states : list of str
    window : tuple of (Fraction, Fraction)

    Returns
    -------
    ClaimRecord or None

    Raises
    ------
    CertificateError
        A malformed record (the message names the key).
    """
    if raw is None:
        return None
    fail = _Fail(path)
    if not isinstance(raw, dict):
        fail("", "expected an object")
    region = raw.get("region")
    if not isinstance(region, dict) or sorted(region) != sorted(states):
        fail("region", f"expected [lo, hi] for each state {states}")
    bounds = []
    for name, (a, b) in zip(states, window):
        pair = region[name]
        if not isinstance(pair, list) or len(pair) != 2:
            fail(f"region.{name}", "expected [lo, hi]")
        lo, hi = (_fraction(fail, f"region.{name}", v) for v in pair)
        if not a <= lo <= hi <= b:
            fail(f"region.{name}", "not a range inside the window")
        bounds.append((lo, hi))
    expect = raw.get("expect")
    if expect not in EXPECTATIONS:
        fail("expect", f"expected one of {', '.join(EXPECTATIONS)}")
    until = raw.get("until")
    if until is not None:
        until = _fraction(fail, "until", until)
        if until <= 0 or expect == "safe":
            fail("until", "a positive horizon of a doomed or stays claim")
    elif expect == "stays":
        fail("until", "a stays claim needs a horizon")
    verdict = raw.get("verdict")
    if verdict not in VERDICTS:
        fail("verdict", f"expected one of {', '.join(VERDICTS)}")
    volume = raw.get("undecided_volume")
    if not isinstance(volume, (int, float)) or isinstance(volume, bool) or not volume >= 0:
        fail("undecided_volume", "expected a number >= 0")
    counterexample = _read_counterexample(fail, raw.get("counterexample"), len(states))
    return ClaimRecord(region=tuple(bounds), expect=expect, until=until, verdict=verdict,
                       counterexample=counterexample, undecided_volume=float(volume))


def _read_counterexample(fail, raw, n):
    if raw is None:
        return None
    if not isinstance(raw, dict):
        fail("counterexample", "expected an object or null")
    point = raw.get("point")
    if not isinstance(point, list) or len(point) != n:
        fail("counterexample.point", f"expected {n} numbers")
    point = tuple(float(_number(fail, "counterexample.point", x)) for x in point)
    limit = raw.get("limit")
    if limit is not None and not isinstance(limit, str):
        fail("counterexample.limit", "expected a limit name or null")
    times = raw.get("crossing_time")
    if not isinstance(times, list) or len(times) != 2:
        fail("counterexample.crossing_time", "expected [lo, hi]")
    lower, upper = (_number(fail, "counterexample.crossing_time", t, allow_none=True)
                    for t in times)
    flow = raw.get("flow")
    if flow is not None:
        flow = _read_flow(fail, flow, n)
    return Counterexample(point=point, limit=limit, lower=lower, upper=upper, flow=flow)


def _read_flow(fail, raw, n):
    if not isinstance(raw, dict):
        fail("counterexample.flow", "expected an object")
    arrays = {}
    for key in ("box", "set0_m", "step_h", "step_E", "step_m", "step_A"):
        where = f"counterexample.flow.{key}"
        if key not in raw:
            fail(where, "missing")
        try:
            a = decode_array(raw[key], where)
        except CertificateError as exc:
            fail(where, str(exc))
        if a.dtype.kind != "f" or not np.all(np.isfinite(a)):
            fail(where, "expected finite floats")
        arrays[key] = a
    S = len(arrays["step_h"])
    shapes = {"box": (n, 2), "set0_m": (n,), "step_h": (S,), "step_E": (S, n, 2),
              "step_m": (S, n), "step_A": (S, n, n)}
    for key, shape in shapes.items():
        if arrays[key].shape != shape:
            fail(f"counterexample.flow.{key}", f"expected shape {list(shape)}")
    if S == 0 or np.any(arrays["step_h"] <= 0):
        fail("counterexample.flow.step_h", "expected positive step sizes")
    box = arrays["box"]
    return PointFlow(lo=box[:, 0], hi=box[:, 1], m0=arrays["set0_m"], h=arrays["step_h"],
                     E=arrays["step_E"], m=arrays["step_m"], A=arrays["step_A"])


# -- re-deriving -------------------------------------------------------------------------
@dataclass
class _Map:
    """The verified map the verdict is read from."""

    cert: object
    model: object
    context: object
    holds: np.ndarray
    leaves_at: object

    def leaves(self, lo, hi):
        """Leaves (whose claims hold) meeting the exact box ``[lo, hi]`` in full
        dimension along its thick axes (every point of the box lies in one)."""
        depth = int(self.cert.depth.max())
        first, last = grid_bounds(self.context.window, depth, lo, hi)
        found = np.unique(self.leaves_at(first[None], last[None]))
        return found[self.holds[found]], found[~self.holds[found]]


def rederive_claim(record, cert, model, context, holds, leaves_at):
    """Re-derive the verdict of a claim record and compare it with the stored one.

    Parameters
    ----------
    record : ClaimRecord
    cert : certify.check._read.CertificateData
    model : certify.model.Model
        The model the claims were checked against.
    context : certify.check._cells.CheckContext
        The context the cells were checked in.
    holds : ndarray of bool, shape (L,)
        Cells whose claims the checker verified; other cells settle nothing.
    leaves_at : callable
        ``leaves_at(first, last) -> leaf numbers`` meeting a box on the finest grid.

    Returns
    -------
    ClaimCheck
        A stored verdict stronger than what follows (``proven`` or ``refuted`` that does
        not follow), a counterexample or reported number that is not proven, or a stored
        undecided volume below the re-derived one are problems; a stored
        ``inconclusive`` where more follows is not.
    """
    the_map = _Map(cert=cert, model=model, context=context, holds=holds,
                   leaves_at=leaves_at)
    settled, volume, why_not = _pieces(the_map, record)
    problems = []
    refutes = False
    if record.counterexample is not None:
        refutes, wrong = _counterexample(the_map, record, record.counterexample)
        problems += wrong
    if settled and refutes:
        problems.append("the certificate proves the claim and its counterexample")
    derived = "proven" if settled else "refuted" if refutes else "inconclusive"
    if record.verdict == "proven" and not settled:
        problems.append(f"proven does not follow: {why_not}")
    if record.verdict == "refuted" and record.counterexample is None:
        problems.append("refuted without a counterexample")
    elif record.verdict == "refuted" and not refutes and not problems:
        problems.append("the counterexample does not break the claim")
    if record.verdict == "inconclusive" and record.undecided_volume < float(volume):
        problems.append(f"the stored undecided volume {record.undecided_volume!r} is below "
                        f"the unsettled volume {float(volume)!r}")
    return ClaimCheck(stored=record.verdict, derived=derived, problems=problems,
                      undecided_volume=volume)


def _pieces(the_map, record):
    """Whether every piece of the region settles the claim; the unsettled volume; why
    not (one reason)."""
    lo = [a for a, _ in record.region]
    hi = [b for _, b in record.region]
    good_leaves, lost = the_map.leaves(lo, hi)
    cert = the_map.cert
    leaves = np.concatenate([good_leaves, lost]).astype(int)
    c_lo, c_hi = exact_cells(the_map.context.window, cert.depth[leaves], cert.index[leaves])
    p_lo = np.array([[max(a, c) for a, c in zip(lo, row)] for row in c_lo], dtype=object)
    p_hi = np.array([[min(b, d) for b, d in zip(hi, row)] for row in c_hi], dtype=object)
    inside, violated = _limit_signs(the_map.context, p_lo, p_hi)
    T = record.until
    volume = Fraction(0)
    why = None
    for k, c in enumerate(leaves.tolist()):
        if k >= len(good_leaves):
            good, reason = False, "its claims do not hold"
        elif record.expect == "doomed":
            good = bool(violated[k].any()) or _at_most(cert.crossing_upper[c], T)
            reason = (f"its crossing bound {float(cert.crossing_upper[c])!r} is not at most "
                      f"{_horizon(T, 'a finite time')}")
        else:
            good = bool(inside[k]) and _at_least(cert.survival_lower[c], T)
            reason = ("the part may violate a limit at t = 0" if not inside[k] else
                      f"its survival bound {float(cert.survival_lower[c])!r} is below "
                      f"{_horizon(T, 'infinity')}")
        if not good:
            volume += _volume(p_lo[k], p_hi[k])
            if why is None:
                why = f"the part of the region in cell {c} ({cert.label[c]}): {reason}"
    return why is None and len(leaves) > 0, volume, why


def _counterexample(the_map, record, c):
    """Whether the counterexample breaks the claim; the problems with what it reports.

    Time bounds are Fractions, None standing for +infinity.
    """
    cert, T = the_map.cert, record.until
    point = [Fraction(x) for x in c.point]
    if not all(a <= x <= b for x, (a, b) in zip(point, record.region)):
        return False, ["the counterexample point lies outside the region"]
    row = np.array([point], dtype=object)
    inside, violated = _limit_signs(the_map.context, row, row)
    inside, violated = bool(inside[0]), violated[0]
    cells, _ = the_map.leaves(point, point)
    # every claim of a leaf holding the point holds for the point
    lowers = [_bound(max(cert.survival_lower[k], 0.0)) for k in cells.tolist()]
    survival = None if None in lowers else max(lowers, default=Fraction(0))
    crossing = min((t for t in (_bound(cert.crossing_upper[k]) for k in cells.tolist())
                    if t is not None), default=None)
    names = [g.name for g in the_map.model.constraints]
    problems = []
    flow_time = None
    if c.limit is not None and c.limit not in names:
        problems.append(f"the limit {c.limit!r} is not a limit of the model")
    elif c.flow is not None:
        flow_time = None if c.limit is None else \
            _flow_crossing(the_map, c, names.index(c.limit), point)
        if flow_time is None:
            problems.append(f"the stored flow of the point does not verify a crossing of "
                            f"{c.limit or 'a named limit'}")
    elif c.limit is not None and not violated[names.index(c.limit)]:
        problems.append(f"the point is not proven to cross {c.limit}")
    times = [t for t in (Fraction(0) if violated.any() else None, crossing, flow_time)
             if t is not None]
    if c.lower is None:
        if not (inside and survival is None):
            problems.append("the point is not proven to stay within the limits for all time")
    elif c.lower > 0 and not (inside and (survival is None or c.lower <= survival)):
        problems.append(f"the crossing time lower bound {float(c.lower)!r} is not proven")
    if c.upper is not None and not any(t <= c.upper for t in times):
        problems.append(f"the crossing time upper bound {float(c.upper)!r} is not proven")
    if record.expect == "doomed":
        refutes = inside and (survival is None or (T is not None and T <= survival))
    else:
        refutes = any(T is None or t <= T for t in times)
    return refutes, problems


def _bound(x):
    """A finite certificate bound as a Fraction; +inf as None."""
    return None if float(x) == np.inf else Fraction(float(x))


def _flow_crossing(the_map, c, j, point):
    """Exact time of the first verified step end of the stored point flow that violates
    limit `j`, or None. The box must contain the point."""
    flow = c.flow
    if not all(Fraction(a) <= x <= Fraction(b) for a, x, b in zip(flow.lo, point, flow.hi)):
        return None
    programs = with_one_limit(the_map.context.programs, the_map.model, j)
    window = tuple((Fraction(a), Fraction(b)) for a, b in zip(flow.lo, flow.hi))
    context = replace(the_map.context, programs=programs, window=window, open_faces=(),
                      invariant_faces=(), grid_depth=0)
    n, S = len(point), len(flow.h)
    task = CellTask(cells=np.array([0]), depth=np.array([0]),
                    index=np.zeros((1, n), np.int64), n_steps=np.array([S]),
                    image_known=np.array([False]), m0=flow.m0[None], h=flow.h, E=flow.E,
                    m=flow.m, A=flow.A)
    for arithmetic in PASSES:
        step = int(cell_facts(context, task, arithmetic)["crossing_step"][0])
        if step >= 0:
            return sum((Fraction(float(h)) for h in flow.h[:step + 1]), Fraction(0))
    return None


def _limit_signs(context, lo, hi):
    """Per row of exact boxes: every limit certainly holds (bool, shape (N,)), and which
    limits are certainly violated on the whole box (bool, shape (N, m)). Rows the balls
    leave open are evaluated again with exact-endpoint arithmetic."""
    N, n = lo.shape
    m = context.programs.n_limits
    inside = np.zeros(N, bool)
    violated = np.zeros((N, m), bool)
    rows = np.arange(N)
    for arithmetic in ("ball", "endpoint"):
        if len(rows) == 0:
            break
        ar = ARITHMETICS[arithmetic]()
        ar.enter()
        X = [ar.rationals(lo[rows, k], hi[rows, k]) for k in range(n)]
        params = [ar.rational(a, b) for a, b in context.params]
        g = evaluate(context.programs.limits, ar, X + params)
        ok = np.ones(len(rows), bool)
        for j, gj in enumerate(g):
            ok &= _true(ar.lower(gj) >= 0, len(rows))
            violated[rows, j] |= _true(ar.upper(gj) < 0, len(rows))
        inside[rows] |= ok
        rows = rows[~inside[rows] & ~violated[rows].any(axis=1)]
    return inside, violated


def _true(a, N):
    return np.broadcast_to(np.asarray(a, dtype=object).astype(bool), (N,))


def _at_most(x, T):
    """A crossing bound at most the horizon (no horizon: finite)."""
    x = float(x)
    return np.isfinite(x) and (T is None or Fraction(x) <= T)


def _at_least(x, T):
    """A survival bound at least the horizon (no horizon: infinite)."""
    x = float(x)
    if x == np.inf:
        return True
    return T is not None and np.isfinite(x) and Fraction(x) >= T


def _horizon(T, none):
    return none if T is None else repr(float(T))


def _volume(lo, hi):
    out = Fraction(1)
    for a, b in zip(lo, hi):
        if b > a:
            out *= b - a
    return out
