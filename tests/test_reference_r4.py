"""Reference case R4 of ../shared/REFERENCES.md: overdamped linear oscillator, 2D.

x1' = x2, x2' = -2 x1 - 3 x2 (eigenvalues -1 and -2), limits x1 <= 1, x1 >= -10 and
|x2| <= 10; only x1 <= 1 binds. From (p, q): x1(t) = (2p + q) e^-t - (p + q) e^-2t, and
the start is safe iff q <= q*(p) = 2(1 - p) + 2 sqrt(1 - p). Doomed starts cross at
T = -ln u, u = [(2p + q) + sqrt((2p + q)^2 - 4(p + q))]/(2(p + q)). Source: exact.

The window is [-2, 1.25] x [-3, 10.25]: its right side violates x1 <= 1 and its top
side x2 <= 10, and along its bottom side the flow points inward; it holds the
reference's window [-1, 1] x [-3, 6] and its crossing-time points. Along its left
side the flow may leave, which only leaves cells there undecided (no trajectory from
the reference window comes near it: x1 >= -1.5625 there).
"""

import math

import numpy as np
import pytest

from reference_checks import certify_text, contradictions, far_points_coverage

MODEL = """
[model]
name = "R4 overdamped linear oscillator"
[states]
x1 = [-2, 1.25]
x2 = [-3, 10.25]
[equations]
x1 = "x2"
x2 = "-2*x1 - 3*x2"
[constraints]
right = "x1 <= 1"
left = "x1 >= -10"
up = "x2 <= 10"
down = "x2 >= -10"
"""

#: Coverage level asserted on the reference window away from the exact boundary
#: (measured: 99.7 % at depth 8).
COVERAGE = 0.95


def q_star(p):
    """q*(p) = 2(1 - p) + 2 sqrt(1 - p) (REFERENCES.md R4, exact)."""
    return 2 * (1 - p) + 2 * np.sqrt(np.maximum(1 - p, 0))


def exact_fate(points, tol=1e-9):
    """Safe iff q <= q*(p); outside where x1 > 1 or x2 > 10 (REFERENCES.md R4, exact)."""
    p, q = points[:, 0], points[:, 1]
    fate = np.where(q <= q_star(p), "safe", "doomed")
    fate = np.where((p > 1) | (q > 10), "outside", fate)
    near = (np.abs(q - q_star(p)) < tol) | (np.abs(p - 1) < tol) | (np.abs(q - 10) < tol)
    return np.where(near, "boundary", fate)


def crossing_time(p, q):
    """T = -ln u (REFERENCES.md R4, exact)."""
    a, b = 2 * p + q, p + q
    return -math.log((a + math.sqrt(a * a - 4 * b)) / (2 * b))


@pytest.fixture(scope="module")
def r4(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r4"), max_depth=8)


def test_reference_boundary_values():
    # q*(-1), q*(0), q*(0.5) (REFERENCES.md R4, exact)
    assert q_star(-1.0) == pytest.approx(6.828427124746190, rel=1e-14)
    assert q_star(0.0) == 4.0
    assert q_star(0.5) == pytest.approx(2.414213562373095, rel=1e-14)


def test_no_certified_cell_contradicts_the_exact_fate(r4):
    bad, n_checked = contradictions(r4.cert, exact_fate, np.random.default_rng(4))
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # safe iff q <= q*(p) (REFERENCES.md R4, exact)


def test_coverage_away_from_the_boundary(r4):
    decided, agree, n_far = far_points_coverage(r4.cert, exact_fate, [(-1, 1), (-3, 6)],
                                                121, r4.finest)
    assert n_far > 10000
    assert agree == decided  # decided far points have the exact fate (R4, exact)
    assert decided >= COVERAGE  # stated level (REFERENCES.md R4, exact boundary)


@pytest.mark.parametrize("p, q, t_exact", [
    (0.0, 5.0, 0.3235071311574468),     # T(0, 5) (REFERENCES.md R4, exact)
    (0.5, 4.0, 0.1630744679552557),     # T(0.5, 4) (REFERENCES.md R4, exact)
    (-1.0, 8.0, 0.46108045943398307),   # T(-1, 8) (REFERENCES.md R4, exact)
    (0.9, 1.0, 0.1441445211119434),     # T(0.9, 1) (REFERENCES.md R4, exact)
    (-1.0, 6.9, 0.7560486381250298),    # T(-1, 6.9) (REFERENCES.md R4, exact)
])
def test_crossing_time_lies_in_the_proven_bounds(r4, p, q, t_exact):
    assert t_exact == pytest.approx(crossing_time(p, q), rel=1e-12)
    lower, upper = r4.cert.crossing_time_bounds(np.array([[p, q]]))
    assert lower[0] <= t_exact <= upper[0]  # exact (REFERENCES.md R4)
