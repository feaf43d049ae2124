"""Reference case R2 of ../shared/REFERENCES.md: logistic growth with constant harvest, 1D.

x' = r x (1 - x/K) - h with r = K = 1, limits 0.1 <= x <= 1.2.

(a) h = 0.16: equilibria 0.2 (unstable) and 0.8 (stable); safe = [0.2, 1.2], doomed =
    [0.1, 0.2), T = (5/3) ln[(0.8 - x0)/(7 (0.2 - x0))].
(b) h = 0.26 > h_c = 1/4: no equilibrium, every start doomed,
    T = (1/c)[atan((x0 - 1/2)/c) - atan((m - 1/2)/c)] with c = 0.1.

Source: exact, by separation of variables and partial fractions; the model is in Clark,
Mathematical Bioeconomics (1976/1990) (mem) and Strogatz, Nonlinear Dynamics and Chaos
(1994), §3.7 (mem).

The window is [0.05, 1.25], a little wider than the limits, so that both of its sides
violate a limit (a window side where the flow may leave blocks proofs).
"""

import math

import numpy as np
import pytest

from reference_checks import certify_text, contradictions, far_points_coverage

MODEL = """
[model]
name = "R2 logistic growth with constant harvest"
[states]
x = [0.05, 1.25]
[parameters]
r = 1
K = 1
h = {h}
[equations]
x = "r*x*(1 - x/K) - h"
[constraints]
floor = "x >= 0.1"
ceiling = "x <= 1.2"
"""

#: Coverage level asserted away from the exact boundary (measured: 100 % at depth 12).
COVERAGE = 0.99


def fate_a(points, tol=1e-9):
    """Exact fate for h = 0.16: safe = [0.2, 1.2], doomed = [0.1, 0.2) (REFERENCES.md R2a)."""
    x = points[:, 0]
    fate = np.where(x >= 0.2, "safe", "doomed")
    fate = np.where((x < 0.1) | (x > 1.2), "outside", fate)
    near = np.min(np.abs(x[:, None] - np.array([0.1, 0.2, 1.2])), axis=1) < tol
    return np.where(near, "boundary", fate)


def fate_b(points, tol=1e-9):
    """Exact fate for h = 0.26: every start within the limits is doomed (REFERENCES.md R2b)."""
    x = points[:, 0]
    fate = np.where((x < 0.1) | (x > 1.2), "outside", "doomed")
    near = np.min(np.abs(x[:, None] - np.array([0.1, 1.2])), axis=1) < tol
    return np.where(near, "boundary", fate)


@pytest.fixture(scope="module")
def r2a(tmp_path_factory):
    return certify_text(MODEL.replace("{h}", "0.16"), tmp_path_factory.mktemp("r2a"),
                        max_depth=12)


@pytest.fixture(scope="module")
def r2b(tmp_path_factory):
    return certify_text(MODEL.replace("{h}", "0.26"), tmp_path_factory.mktemp("r2b"),
                        max_depth=8)


@pytest.mark.parametrize("case, fate", [("r2a", fate_a), ("r2b", fate_b)])
def test_no_certified_cell_contradicts_the_exact_fate(case, fate, request):
    cert = request.getfixturevalue(case).cert
    bad, n_checked = contradictions(cert, fate, np.random.default_rng(2))
    assert n_checked > 0
    assert len(bad) == 0, bad[:5]  # exact fates (REFERENCES.md R2, exact)


def test_a_coverage_away_from_the_boundary(r2a):
    decided, agree, n_far = far_points_coverage(r2a.cert, fate_a, [(0.1, 1.2)], 2001,
                                                r2a.finest)
    assert n_far > 1900
    assert agree == decided  # every decided far point has the exact fate (R2a, exact)
    assert decided >= COVERAGE  # stated level; exact boundary 0.2 (REFERENCES.md R2a)


def test_b_every_start_within_the_limits_is_doomed(r2b):
    x = np.linspace(0.1, 1.2, 1101)[:, None]
    assert np.all(r2b.cert.label_at(x) == "doomed")  # h > rK/4: all doomed (R2b, exact)


def time_a(x0):
    """T = (5/3) ln[(0.8 - x0)/(7 (0.2 - x0))] (REFERENCES.md R2a, exact)."""
    return 5 / 3 * math.log((0.8 - x0) / (7 * (0.2 - x0)))


def time_b(x0, m=0.1, c=0.1):
    """T = (1/c)[atan((x0 - 1/2)/c) - atan((m - 1/2)/c)] (REFERENCES.md R2b, exact)."""
    return (math.atan((x0 - 0.5) / c) - math.atan((m - 0.5) / c)) / c


@pytest.mark.parametrize("x0, t_exact", [
    (0.15, 1.0317320140103714),   # T(0.15) (REFERENCES.md R2a, exact)
    (0.19, 3.6082728585299946),   # T(0.19) (REFERENCES.md R2a, exact)
])
def test_a_crossing_time_lies_in_the_proven_bounds(r2a, x0, t_exact):
    assert t_exact == pytest.approx(time_a(x0), rel=1e-12)
    lower, upper = r2a.cert.crossing_time_bounds(np.array([[x0]]))
    assert lower[0] <= t_exact <= upper[0]  # exact (REFERENCES.md R2a)
    assert np.isfinite(upper[0])


@pytest.mark.parametrize("x0, t_exact", [
    (1.2, 27.547169358587634),   # T(1.2) (REFERENCES.md R2b, exact)
    (0.8, 25.748634360662855),   # T(0.8) (REFERENCES.md R2b, exact)
    (0.5, 13.258176636680316),   # T(0.5) (REFERENCES.md R2b, exact)
    (0.2, 0.7677189126977809),   # T(0.2) (REFERENCES.md R2b, exact)
])
def test_b_crossing_time_lies_in_the_proven_bounds(r2b, x0, t_exact):
    assert t_exact == pytest.approx(time_b(x0), rel=1e-12)
    lower, upper = r2b.cert.crossing_time_bounds(np.array([[x0]]))
    assert lower[0] <= t_exact <= upper[0]  # exact (REFERENCES.md R2b)
    assert np.isfinite(upper[0])
