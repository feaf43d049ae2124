"""Float batch simulation of a compiled right-hand side (not rigorous).

Classic fourth-order Runge-Kutta with a fixed step, vectorized over many starting
points, running the very program the validated flow encloses (``Program.point``).
It serves cross-checks (a simulated trajectory must never contradict a proven label)
and benchmarks (the cost of a float step next to the cost of a validated step).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

__all__ = ["SimulationResult", "simulate"]


@dataclass(frozen=True)
class SimulationResult:
    """Outcome of :func:`simulate`.

    Attributes
    ----------
    t_end : float
        Time reached by every trajectory.
    h : float
        Step size used (``t_end / n_steps``).
    n_steps : int
    states : ndarray, shape (N, n)
        States at `t_end` (NaN or infinite where the float solution escaped).
    finite : ndarray of bool, shape (N,)
        The state stayed finite up to `t_end`.
    crossed : ndarray of bool, shape (N,)
        Some event output became negative at a step end in ``[0, t_end]``.
    crossing_time : ndarray, shape (N,)
        Estimate of the first time an event output is negative: linear interpolation
        of that output inside the first step whose end value is negative; ``0`` when
        negative at the start; NaN where `crossed` is False.
    crossing_limit : ndarray of int, shape (N,)
        Index of the event output that crossed first; ``-1`` where `crossed` is False.
    """

    t_end: float
    h: float
    n_steps: int
    states: np.ndarray
    finite: np.ndarray
    crossed: np.ndarray
    crossing_time: np.ndarray
    crossing_limit: np.ndarray


def _midpoint(p, k):
    """Float value of a parameter given as a number or a ``(lo, hi)`` pair."""
    if isinstance(p, (tuple, list, np.ndarray)):
        if len(p) != 2:
            raise ValueError(f"`params[{k}]` must be a number or a (lo, hi) pair.")
        lo, hi = float(Fraction(p[0])), float(Fraction(p[1]))
        if not lo <= hi:
            raise ValueError(f"`params[{k}]` must satisfy lo <= hi.")
        return 0.5 * lo + 0.5 * hi
    return float(Fraction(p)) if isinstance(p, (int, Fraction)) else float(p)


def simulate(program, x0, params, t_end, *, dt, events=None):
    """Integrate ``x' = f(x, p)`` from many starting points with classic RK4.

    Parameters
    ----------
    program : certify.program.Program
        Right-hand side: inputs are the ``n`` states followed by the parameters,
        ``n`` outputs.
    x0 : array_like, shape (N, n)
        Starting points, one per row.
    params : sequence of float, Fraction or (lo, hi) pairs
        Parameter values in program input order; an interval is replaced by its
        midpoint.
    t_end : float
        Final time (``>= 0``).
    dt : float
        Largest step size; the steps are ``t_end / ceil(t_end / dt)``.
    events : certify.program.Program or callable, optional
        Functions whose first negative value is reported per trajectory: a program
        with the same inputs as `program` (as the limits program of a model), or a
        callable ``events(states) -> ndarray, shape (N, m)``.

    Returns
    -------
    SimulationResult

    Raises
    ------
    ValueError
        When shapes or step settings are invalid.

    Notes
    -----
    Nothing here is rigorous: the result is an approximation with error
    ``O(h^4)`` in the states and ``O(h^2)`` in the crossing times, and a crossing
    that starts and ends inside one step is missed.

    Examples
    --------
    >>> import sympy
    >>> from certify.program import compile_program
    >>> x, k = sympy.symbols("x k", real=True)
    >>> decay = compile_program([-k * x], (x, k))
    >>> limit = compile_program([x - sympy.Rational(1, 2)], (x, k))
    >>> r = simulate(decay, [[1.0]], [1.0], 2.0, dt=0.01, events=limit)
    >>> round(float(r.crossing_time[0]), 3)  # ln 2 = 0.6931...
    0.693
    >>> simulate(decay, [1.0], [1.0], 2.0, dt=0.01)
    Traceback (most recent call last):
    ...
    ValueError: `x0` must have shape (N, 1).
    """
    n = program.n_outputs
    x = np.array(x0, dtype=float)
    if x.ndim != 2 or x.shape[1] != n:
        raise ValueError(f"`x0` must have shape (N, {n}).")
    n_params = len(program.inputs) - n
    if len(params) != n_params:
        raise ValueError(f"`params` must have {n_params} entries, one per parameter.")
    t_end = float(t_end)
    dt = float(dt)
    if not (math.isfinite(t_end) and t_end >= 0):
        raise ValueError("`t_end` must be finite and >= 0.")
    if not (math.isfinite(dt) and dt > 0):
        raise ValueError("`dt` must be positive and finite.")
    n_steps = math.ceil(t_end / dt) if t_end > 0 else 0
    h = t_end / n_steps if n_steps else 0.0

    N = len(x)
    buffer = np.empty((N, n + n_params))
    buffer[:, n:] = [_midpoint(p, k) for k, p in enumerate(params)]

    def with_states(state):
        buffer[:, :n] = state
        return buffer

    def field(state):
        return program.point(with_states(state))

    if events is None:
        event = None
    elif hasattr(events, "point"):
        def event(state):
            return np.asarray(events.point(with_states(state)), float)
    else:
        def event(state):
            return np.asarray(events(state), float)

    crossed = np.zeros(N, bool)
    crossing_time = np.full(N, np.nan)
    crossing_limit = np.full(N, -1)
    if event is not None:
        g = event(x)
        _record(g < 0, np.zeros_like(g), g, 0.0, 0.0, crossed, crossing_time, crossing_limit)

    with np.errstate(all="ignore"):
        for step in range(n_steps):
            k1 = field(x)
            k2 = field(x + (0.5 * h) * k1)
            k3 = field(x + (0.5 * h) * k2)
            k4 = field(x + h * k3)
            x = x + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
            if event is not None and not crossed.all():
                g_new = event(x)
                _record(g_new < 0, g, g_new, step * h, h, crossed, crossing_time,
                        crossing_limit)
                g = g_new
    return SimulationResult(t_end=t_end, h=h, n_steps=n_steps, states=x,
                            finite=np.all(np.isfinite(x), axis=1), crossed=crossed,
                            crossing_time=crossing_time, crossing_limit=crossing_limit)


def _record(negative, g_old, g_new, t0, h, crossed, crossing_time, crossing_limit):
    """Store the first crossing of rows that cross in this step (in place)."""
    rows = np.flatnonzero(negative.any(axis=1) & ~crossed)
    if len(rows) == 0:
        return
    old, new = g_old[rows], g_new[rows]
    with np.errstate(all="ignore"):
        frac = np.where(old > 0, old / (old - new), 0.0)
    frac = np.where(negative[rows], np.clip(frac, 0.0, 1.0), np.inf)
    j = np.argmin(frac, axis=1)
    crossed[rows] = True
    crossing_limit[rows] = j
    crossing_time[rows] = t0 + h * frac[np.arange(len(rows)), j]
