"""Reference case R3 of ../shared/REFERENCES.md: a Schlogl-type cubic, 1D.

x' = -(x - 1)(x - 2)(x - 3), limits 1.5 <= x <= 3.5. Equilibria 1 and 3 are stable,
2 is unstable; safe = [2, 3.5], doomed = [1.5, 2), and the crossing time is
T = 1/2 ln[(x0 - 1)(3 - x0)/0.75] - ln[(2 - x0)/0.5].

Source: F. Schlogl, Z. Physik 253 (1972) 147 (second model, cubic rate law; roots
normalised); T exact.

The window is [1.25, 3.75], a little wider than the limits, so that both of its sides
violate a limit.
"""

import math

import numpy as np
import pytest

from reference_checks import (certify_text, contradictions, equilibria_enclose,
                              far_points_coverage)

MODEL = """
[model]
name = "R3 Schlogl-type cubic"
[states]
x = [1.25, 3.75]
[equations]
x = "-(x - 1)*(x - 2)*(x - 3)"
[constraints]
floor = "x >= 1.5"
ceiling = "x <= 3.5"
"""

#: Coverage level asserted away from the exact boundary (measured: 100 % at depth 12).
COVERAGE = 0.99


def exact_fate(points, tol=1e-9):
    """Safe = [2, 3.5], doomed = [1.5, 2) (Schlogl 1972; REFERENCES.md R3, exact)."""
    x = points[:, 0]
    fate = np.where(x >= 2, "safe", "doomed")
    fate = np.where((x < 1.5) | (x > 3.5), "outside", fate)
    near = np.min(np.abs(x[:, None] - np.array([1.5, 2.0, 3.5])), axis=1) < tol
    return np.where(near, "boundary", fate)


@pytest.fixture(scope="module")
def r3(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r3"), max_depth=12)


def test_no_certified_cell_contradicts_the_exact_fate(r3):
    bad, n_checked = contradictions(r3.cert, exact_fate, np.random.default_rng(3))
    assert n_checked > 0
    assert len(bad) == 0, bad[:5]  # exact fates (REFERENCES.md R3, Schlogl 1972)


def test_coverage_away_from_the_boundary(r3):
    decided, agree, n_far = far_points_coverage(r3.cert, exact_fate, [(1.5, 3.5)], 2001,
                                                r3.finest)
    assert n_far > 1900
    assert agree == decided  # decided far points have the exact fate (R3, exact)
    assert decided >= COVERAGE  # stated level; exact boundary x = 2 (REFERENCES.md R3)


def test_equilibria_are_enclosed():
    # 2 unstable (f' = +1), 3 stable (f' = -2); 1 lies outside the window
    # (REFERENCES.md R3, exact; Schlogl 1972)
    assert equilibria_enclose(MODEL, [([2.0], "unstable"), ([3.0], "stable")]) == []


@pytest.mark.parametrize("x0, t_exact", [
    (1.9, 1.748253780733240),    # T(1.9) (REFERENCES.md R3, exact)
    (1.99, 4.055814039153869),   # T(1.99) (REFERENCES.md R3, exact)
])
def test_crossing_time_lies_in_the_proven_bounds(r3, x0, t_exact):
    closed_form = 0.5 * math.log((x0 - 1) * (3 - x0) / 0.75) - math.log((2 - x0) / 0.5)
    assert t_exact == pytest.approx(closed_form, rel=1e-12)
    lower, upper = r3.cert.crossing_time_bounds(np.array([[x0]]))
    assert lower[0] <= t_exact <= upper[0]  # exact (REFERENCES.md R3)
    assert np.isfinite(upper[0])
