"""The time scale of a model, for the default lengths of steps and horizons.

The method's lengths of time (the first step, the largest and smallest step, the
shortest and longest horizon of a cell) have defaults in :class:`certify.prove.Method`
for a model whose rates are of order one per time unit. The same model written in
seconds instead of hours, or in days with rates of a tenth per day, needs them scaled:
otherwise tubes run for many of its time constants (their enclosures blow up, and the
steps they store fill the memory) or stop before anything has happened.

The *rate* of a model is the 90th percentile, over points drawn uniformly in the window
that keep the limits (all points when none does), of the spectral radius of the
Jacobian of the right-hand side (central differences of the float program, parameters at
the midpoints of their boxes). The lengths are then scaled so that the shortest horizon
is a few time constants ``1 / rate`` (:data:`TIME_CONSTANTS_PLANE` for models of one or
two states, :data:`TIME_CONSTANTS_SPACE` for more, where enclosures widen faster), and
every other length keeps its ratio to it. A change of time unit therefore changes no map
(up to rounding).

None of this touches soundness: the lengths only steer the method; the certificate
records them and the checker re-derives every step it relies on.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .taylor import flow_programs

__all__ = ["TimeScale", "time_scale", "TIME_KEYS", "TIME_CONSTANTS_PLANE",
           "TIME_CONSTANTS_SPACE"]

#: Method fields that are lengths of time.
TIME_KEYS = ("step", "max_step", "min_step", "min_horizon", "max_horizon")
#: Points drawn in the window (a fixed random stream).
SAMPLES = 2000
#: Percentile of the spectral radius taken as the rate.
PERCENTILE = 90
#: The shortest horizon of a cell, in time constants ``1 / rate``, for models of one or
#: two states and of three or more (measured on the library's models with their lengths
#: of time taken out: docs/proof-loop.md, "Lengths of time").
TIME_CONSTANTS_PLANE = 3.0
TIME_CONSTANTS_SPACE = 1.0


@dataclass(frozen=True)
class TimeScale:
    """The rate of a model and the factor its default lengths of time are scaled by.

    Attributes
    ----------
    rate : float
        90th percentile of the Jacobian's spectral radius over the window (per time
        unit); NaN when it could not be estimated.
    scale : float
        ``TIME_CONSTANTS_PLANE / rate`` for one or two states,
        ``TIME_CONSTANTS_SPACE / rate`` for more (1 when the rate is NaN, zero or
        infinite).
    """

    rate: float
    scale: float


def time_scale(model, samples=SAMPLES):
    """Estimate the time scale of a model (a float judgement, not a proof).

    Parameters
    ----------
    model : certify.model.Model
    samples : int
        Points drawn uniformly in the window (``numpy.random.default_rng(0)``).

    Returns
    -------
    TimeScale

    Examples
    --------
    A damped oscillator ``x'' + 2 zeta w x' + w^2 x = 0`` with ``w = 8`` per second:
    both eigenvalues have modulus ``w`` (common practice), so the shortest horizon is
    3/8 s.

    >>> from certify.model import parse_model
    >>> model = parse_model('''
    ... [model]
    ... name = "oscillator"
    ... time_unit = "s"
    ... [states]
    ... x = { range = [-1, 1] }
    ... v = { range = [-8, 8] }
    ... [parameters]
    ... w = 8
    ... zeta = 0.2
    ... [equations]
    ... x = "v"
    ... v = "-w^2*x - 2*zeta*w*v"
    ... [limits]
    ... reach = "x <= 0.9"
    ... ''')
    >>> found = time_scale(model)
    >>> round(found.rate, 6), round(found.scale, 6)
    (8.0, 0.375)
    """
    programs = flow_programs(model, 1)
    n = len(model.states)
    lo = np.array([float(a) for a, _ in model.window])
    hi = np.array([float(b) for _, b in model.window])
    points = lo + np.random.default_rng(0).uniform(size=(samples, n)) * (hi - lo)
    params = [0.5 * (float(q.lo) + float(q.hi)) for q in model.parameters]

    with np.errstate(all="ignore"):
        inside = np.all(programs.limits.point_at(points, params) >= 0, axis=1)
        if inside.any():
            points = points[inside]
        jacobian = programs.field.point_jacobian(points, params, 1e-6 * (hi - lo))
        usable = np.all(np.isfinite(jacobian), axis=(1, 2))
        radius = (np.max(np.abs(np.linalg.eigvals(jacobian[usable])), axis=1)
                  if usable.any() else np.array([np.nan]))
    rate = float(np.percentile(radius, PERCENTILE))
    if not (math.isfinite(rate) and rate > 0):
        return TimeScale(rate=rate, scale=1.0)
    constants = TIME_CONSTANTS_PLANE if n <= 2 else TIME_CONSTANTS_SPACE
    return TimeScale(rate=rate, scale=constants / rate)
