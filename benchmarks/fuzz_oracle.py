"""The simulation oracle of the forgery fuzzer (benchmarks/forgery_fuzz.py).

It decides whether the claims of a certificate are true at sample points of its cells, by
integrating the model with scipy's ``solve_ivp`` (DOP853, rtol 1e-10, atol 1e-12) and
events on the limits. It speaks about the model only: nothing of the proof code or of the
checker is used, only the model reader (the stored text, with the stored parameter boxes).

A start's fate is summed up by three numbers: ``g0`` the smallest limit value at t = 0,
``touch`` the first time some limit falls to ``+EPS`` and ``cross`` the first time some
limit falls to ``-EPS`` (``inf`` when it does not happen before the long horizon). A claim
is judged false only beyond these margins, so a rounding of the integrator near a
tangency is never mistaken for a soundness bug.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import sympy
from scipy.integrate import solve_ivp

from certify.model import parse_model

#: Margin on limit values: a limit is surely violated below -EPS, surely kept above EPS.
EPS = 1e-7
#: Relative and absolute margins on times compared with simulated crossing times.
TIME_RTOL, TIME_ATOL = 1e-6, 1e-6


@dataclass(frozen=True)
class Fate:
    """The simulated fate of one start (see the module docstring)."""

    g0: float
    touch: float
    cross: float


class Oracle:
    """Simulated fates of a model (its stored text and parameter boxes), cached by point.

    Parameters
    ----------
    text : str
        The model text.
    params : dict
        Parameter name -> ``(lo, hi)`` exact; an interval parameter is simulated at both
        ends (every corner of the parameter box), and a claim must hold at each.
    horizon : float
        The long horizon: a start that keeps the limits up to it counts as staying.
    """

    def __init__(self, text, params, horizon):
        model = parse_model(text)
        self.horizon = horizon
        self.n = len(model.states)
        states = model.state_symbols
        names = [p.name for p in model.parameters]
        corners = itertools.product(*[sorted({params[k][0], params[k][1]}) for k in names])
        self.systems = []
        for corner in corners:
            values = {sympy.Symbol(k, real=True): sympy.Rational(v.numerator, v.denominator)
                      for k, v in zip(names, corner)}
            f = [sympy.lambdify(states, e.subs(values), "math") for e in model.equations]
            g = [sympy.lambdify(states, c.g.subs(values), "math") for c in model.constraints]
            self.systems.append((f, g))
        self.cache = {}

    def starts(self, point):
        """The smallest limit value at a start, per corner of the parameter box."""
        return [min(gi(*map(float, point)) for gi in g) for _, g in self.systems]

    def fates(self, point):
        """Fates of a start under every corner of the parameter box (cached)."""
        key = tuple(float(v) for v in point)
        if key not in self.cache:
            self.cache[key] = [self._simulate(f, g, np.array(key)) for f, g in self.systems]
        return self.cache[key]

    def _simulate(self, f, g, x0):
        g0 = min(gi(*x0) for gi in g)
        if g0 <= EPS:   # on or beyond a limit at t = 0: no claim speaks of its times
            return Fate(g0, 0.0, 0.0)

        def rhs(t, x):
            return [fi(*x) for fi in f]

        def event(shift):
            def e(t, x):
                return min(gi(*x) for gi in g) - shift
            e.terminal = shift < 0
            e.direction = -1
            return e

        sol = solve_ivp(rhs, (0.0, self.horizon), x0, method="DOP853", rtol=1e-10,
                        atol=1e-12, events=[event(EPS), event(-EPS)])
        # after a failed integration nothing is known beyond the last event (NaN)
        unknown = np.nan if sol.status == -1 else np.inf
        touch = sol.t_events[0][0] if len(sol.t_events[0]) else unknown
        cross = sol.t_events[1][0] if len(sol.t_events[1]) else unknown
        return Fate(g0, touch, cross)


def later(t, bound):
    """True when a simulated time `t` lies beyond `bound` by more than the margins."""
    return t > bound + TIME_RTOL * abs(bound) + TIME_ATOL


def claims_time(label, crossing_upper, survival_lower):
    """Whether a claim says anything about times (else the start alone decides it)."""
    return label == "safe" or crossing_upper < np.inf or survival_lower > 0


def false_claims(oracle, label, crossing_upper, survival_lower, point):
    """What is false about a cell's claims at one of its points.

    Parameters
    ----------
    oracle : Oracle
    label : str
    crossing_upper, survival_lower : float
    point : sequence of float

    Returns
    -------
    list of str
        Empty when every claim holds at the point (or the simulation cannot tell).
    """
    out = []
    starts = oracle.starts(point)
    if label == "outside":
        out += [f"outside, yet every limit holds at t = 0 (min g = {g0:.3g})"
                for g0 in starts if g0 > EPS]
    if label == "outside" or not claims_time(label, crossing_upper, survival_lower) \
            or all(g0 <= EPS for g0 in starts):
        return out
    for fate in oracle.fates(point):
        if fate.g0 <= EPS or np.isnan(fate.cross):
            continue    # no claim about a start on or beyond a limit; or nothing known
        if label == "safe" and np.isfinite(fate.cross):
            out.append(f"safe, yet it leaves the limits at t = {fate.cross:.6g}")
        if later(fate.touch, crossing_upper):
            out.append(f"crossing bound {crossing_upper!r}, yet it reaches a limit only at "
                       f"t = {fate.touch:.6g}")
        if survival_lower > 0 and later(survival_lower, fate.cross):
            out.append(f"survival bound {survival_lower!r}, yet it leaves the limits at "
                       f"t = {fate.cross:.6g}")
    return out


def cell_points(window, depth, index, rng_seed, extra=2):
    """Sample starts of a cell: its centre, its corners moved inwards by a millionth of
    the side, and `extra` random points (seeded by the cell's address)."""
    lo = np.array([float(a + (b - a) * Fraction(int(i), 1 << int(depth)))
                   for (a, b), i in zip(window, index)])
    hi = np.array([float(a + (b - a) * Fraction(int(i) + 1, 1 << int(depth)))
                   for (a, b), i in zip(window, index)])
    inset = (hi - lo) * 1e-6
    points = [(lo + hi) / 2]
    for corner in itertools.product((0, 1), repeat=len(lo)):
        c = np.array(corner, bool)
        points.append(np.where(c, hi - inset, lo + inset))
    rng = np.random.default_rng([rng_seed, int(depth)] + [int(i) for i in index])
    points += list(lo + (hi - lo) * rng.random((extra, len(lo))))
    return points
