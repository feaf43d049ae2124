"""Reference case R7 of ../shared/REFERENCES.md: single-machine infinite-bus swing, 2D.

delta' = w, w' = Pm - Pmax sin delta with Pm = 0.5, Pmax = 1, M = 1, D = 0; limits
delta in [-1.5, 3.0] and w in [-2, 2]. With V = w^2/2 - Pm delta - Pmax cos delta and
V_u = -5 pi/12 + sqrt(3)/2 at the saddle delta_u = 5 pi/6, a start is safe iff
V <= V_u and delta_L <= delta <= delta_u (delta_L = -0.6752092625030875); every other
start is doomed. Equal-area criterion for a fault with Pe = 0 from delta0 = pi/6:
critical clearing angle 1.3886181348715647 rad, critical clearing time
t_c = 1.8601283388769343.

Source: Kundur, Power System Stability and Control (1994), §13.1; Saadat, Power System
Analysis (1999), §11.5 (mem for the equation numbers).

Without damping the system is conservative: the safe side (the closed orbits inside
the saddle's loop) cannot be proven, because no set of cells maps into itself with
room to spare. The test checks soundness everywhere, coverage on the doomed side,
and crossing times.

The window is [-1.75, 3.25] x [-2.25, 2.25]: every side violates a limit.
"""

import math

import numpy as np
import pytest

from reference_checks import (certify_text, contradictions, equilibria_enclose,
                              far_points_coverage)

MODEL = """
[model]
name = "R7 single-machine infinite-bus swing"
[states]
delta = [-1.75, 3.25]
w = [-2.25, 2.25]
[parameters]
Pm = 0.5
Pmax = 1
[equations]
delta = "w"
w = "Pm - Pmax*sin(delta)"
[constraints]
angle_low = "delta >= -1.5"
angle_high = "delta <= 3.0"
speed_low = "w >= -2"
speed_high = "w <= 2"
"""

V_U = -5 * math.pi / 12 + math.sqrt(3) / 2   # -0.4429715352113085 (REFERENCES.md R7)
DELTA_L = -0.6752092625030875                 # root of V(delta, 0) = V_u (REFERENCES.md R7)
DELTA_U = 5 * math.pi / 6

#: Coverage level asserted on the doomed side away from the exact boundary
#: (measured: 91.0 % at depth 7).
DOOMED_COVERAGE = 0.85


def energy(delta, w):
    """V = w^2/2 - Pm delta - Pmax cos delta (Kundur 1994, §13.1)."""
    return 0.5 * w * w - 0.5 * delta - np.cos(delta)


def exact_fate(points, tol=1e-9):
    """Safe iff V <= V_u and delta_L <= delta <= delta_u (REFERENCES.md R7, exact)."""
    d, w = points[:, 0], points[:, 1]
    v = energy(d, w)
    safe = (v <= V_U) & (d >= DELTA_L) & (d <= DELTA_U)
    fate = np.where(safe, "safe", "doomed")
    fate = np.where((d < -1.5) | (d > 3.0) | (np.abs(w) > 2), "outside", fate)
    near = (np.abs(v - V_U) < tol) | (np.min(np.abs(np.stack(
        [d + 1.5, d - 3.0, np.abs(w) - 2])), axis=0) < tol)
    return np.where(near, "boundary", fate)


@pytest.fixture(scope="module")
def r7(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r7"), max_depth=7)


def test_reference_values():
    assert V_U == pytest.approx(-0.4429715352113085, rel=1e-15)  # V_u (R7, Kundur 1994)
    assert energy(DELTA_L, 0.0) == pytest.approx(V_U, abs=1e-13)  # delta_L (R7)
    # critical clearing angle: cos delta_c = (pi - 2 delta0) sin delta0 - cos delta0
    delta0 = math.pi / 6
    delta_c = math.acos((math.pi - 2 * delta0) * math.sin(delta0) - math.cos(delta0))
    assert delta_c == pytest.approx(1.3886181348715647, rel=1e-14)  # (R7, Kundur 1994)
    assert math.sqrt(2 * (delta_c - delta0) / 0.5) == pytest.approx(1.8601283388769343,
                                                                   rel=1e-14)


def test_no_certified_cell_contradicts_the_exact_fate(r7):
    bad, n_checked = contradictions(r7.cert, exact_fate, np.random.default_rng(7))
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # separatrix rule (REFERENCES.md R7, Kundur 1994)


def test_doomed_side_coverage_away_from_the_boundary(r7):
    def doomed_or_boundary(points):
        fate = exact_fate(points)
        return np.where(fate == "doomed", "doomed", "boundary")

    decided, agree, n_far = far_points_coverage(r7.cert, doomed_or_boundary,
                                                [(-1.5, 3.0), (-2, 2)], 151, r7.finest)
    assert n_far > 5000
    assert agree == decided  # decided far doomed points are doomed (R7, Kundur 1994)
    assert decided >= DOOMED_COVERAGE  # stated level on the doomed side (R7)


def test_equilibria_are_enclosed():
    # delta_s = pi/6 (a centre: no stability can be proven without damping) and the
    # saddle delta_u = 5 pi/6 (REFERENCES.md R7; Kundur 1994, §13.1)
    expected = [([math.pi / 6, 0.0], None), ([DELTA_U, 0.0], "saddle")]
    assert equilibria_enclose(MODEL, expected) == []


@pytest.mark.parametrize("dt, fate", [(-1e-3, "safe"), (1e-3, "doomed")])
def test_equal_area_clearing_states_are_not_contradicted(r7, dt, fate):
    # Clearing at t_c - 1e-3 is safe, at t_c + 1e-3 doomed (REFERENCES.md R7, equal-area
    # criterion, Kundur 1994 §13.1; Saadat 1999 §11.5 (mem))
    t = 1.8601283388769343 + dt
    state = np.array([[math.pi / 6 + 0.5 * t * t / 2, 0.5 * t]])
    assert exact_fate(state)[0] == fate
    label = r7.cert.label_at(state)[0]
    assert label in (fate, "undecided")


def test_crossing_times_lie_in_the_proven_bounds(r7):
    lower, upper = r7.cert.crossing_time_bounds(np.array([[0.0, 1.2], [2.7, 0.0]]))
    t_exact = 3.368320312161215  # (0, 1.2) (REFERENCES.md R7, scipy and mpmath)
    assert lower[0] <= t_exact <= upper[0]
    assert np.isfinite(upper[0])
    # (2.7, 0): T = 2.3457 to the 4 decimals given (REFERENCES.md R7)
    assert lower[1] <= 2.34575 and 2.34565 <= upper[1]
