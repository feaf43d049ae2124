"""Reference case R10 (a) of ../shared/REFERENCES.md: Brusselator, 2D.

x' = a - (b + 1) x + x^2 y, y' = b x - x^2 y with a = 1, b = 1.5; limits and window
[0, 4]^2. The equilibrium (1, 1.5) is a stable focus (eigenvalues -0.25 +- 0.968246i;
Hopf at b = 1 + a^2 = 2). The boundary between fates is only known numerically: a
10 x 10 grid over [0.2, 2]^2 is all safe, and 56 of the 196 points of a 14 x 14 grid
over the window are doomed, all in the upper right; (3.5, 3.5) crosses x = 4 at
T = 0.013533470431887.

Source: Prigogine & Lefever, J. Chem. Phys. 48 (1968) 1695; the Hopf condition in
Strogatz, Exercise 8.3.1 (mem); the grid fates are numerical (scipy, REFERENCES.md).

The window is [-0.25, 4.25]^2: every side violates a limit.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from reference_checks import certify_text, contradictions, equilibria_enclose

MODEL = """
[model]
name = "R10 Brusselator"
[states]
x = [-0.25, 4.25]
y = [-0.25, 4.25]
[parameters]
a = 1
b = 1.5
[equations]
x = "a - (b + 1)*x + x^2*y"
y = "b*x - x^2*y"
[constraints]
x_low = "x >= 0"
x_high = "x <= 4"
y_low = "y >= 0"
y_high = "y <= 4"
"""

#: Share of the 10 x 10 all-safe grid that must be certified safe (measured: 100 % at
#: depth 8).
COVERAGE = 0.95


def simulated_fate(points, t_end=60.0):
    """Fate by scipy's DOP853 up to `t_end` (the equilibrium attracts well before)."""

    def rhs(_, z):
        x, y = z
        return [1 - 2.5 * x + x * x * y, 1.5 * x - x * x * y]

    def leaves(_, z):
        return min(z[0], 4 - z[0], z[1], 4 - z[1])

    leaves.terminal = True
    fate = []
    for p in points:
        sol = solve_ivp(rhs, (0, t_end), p, method="DOP853", rtol=1e-10, atol=1e-12,
                        events=leaves)
        fate.append("doomed" if sol.status == 1 else "safe")
    return np.array(fate)


@pytest.fixture(scope="module")
def r10(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r10"), max_depth=8)


@pytest.fixture(scope="module")
def grid14():
    """The centres of a 14 x 14 partition of the window (REFERENCES.md does not say
    which 14 x 14 grid it used; this one has 53 doomed points, the others tried 49-55
    inside the limits)."""
    axis = (np.arange(14) + 0.5) * 4 / 14
    points = np.stack(np.meshgrid(axis, axis, indexing="ij"), -1).reshape(-1, 2)
    return points, simulated_fate(points)


def test_the_simulation_matches_the_reference_grid(grid14):
    points, fate = grid14
    # about 56 of 196 doomed, all in the upper right (REFERENCES.md R10a, num)
    assert 49 <= np.sum(fate == "doomed") <= 60
    assert np.all(points[fate == "doomed"].sum(axis=1) > 4)


def test_grid_points_are_not_contradicted(r10, grid14):
    points, fate = grid14
    labels = r10.cert.label_at(points)
    inside = np.all((points > 0) & (points < 4), axis=1)  # points on a limit are closed calls
    wrong = inside & (((labels == "safe") & (fate == "doomed"))
                      | ((labels == "doomed") & (fate == "safe")))
    assert not wrong.any(), points[wrong]  # num fates (REFERENCES.md R10a)


def test_decided_cells_agree_with_simulation(r10):
    rng = np.random.default_rng(10)
    decided = np.flatnonzero(np.isin(r10.cert.labels, ("safe", "doomed")))
    pick = rng.choice(decided, size=min(200, len(decided)), replace=False)
    lo, hi = r10.cert.lo[pick], r10.cert.hi[pick]
    points = lo + rng.random(lo.shape) * (hi - lo)
    inside = np.all((points >= 0) & (points <= 4), axis=1)
    fate = simulated_fate(points[inside])
    assert np.all(fate == r10.cert.labels[pick][inside])  # num (REFERENCES.md R10a)


def test_the_safe_grid_is_certified_safe(r10):
    axis = np.linspace(0.2, 2, 10)
    points = np.stack(np.meshgrid(axis, axis, indexing="ij"), -1).reshape(-1, 2)
    labels = r10.cert.label_at(points)
    assert not np.any(labels == "doomed")  # all safe (REFERENCES.md R10a, num)
    assert np.mean(labels == "safe") >= COVERAGE  # stated level


def test_equilibrium_is_enclosed():
    # (a, b/a) = (1, 1.5), stable (eigenvalues -0.25 +- 0.968246i) (REFERENCES.md R10a;
    # Prigogine & Lefever 1968)
    assert equilibria_enclose(MODEL, [([1.0, 1.5], "stable")]) == []


def test_crossing_time_lies_in_the_proven_bounds(r10):
    t_ref = 0.013533470431887  # (3.5, 3.5) reaches x = 4 (REFERENCES.md R10a, num)
    lower, upper = r10.cert.crossing_time_bounds(np.array([[3.5, 3.5]]))
    assert lower[0] <= t_ref <= upper[0]
    assert np.isfinite(upper[0])
