"""Reference case R12 (a) of ../shared/REFERENCES.md: Lorenz system, 3D, inner bound.

x' = sigma (y - x), y' = rho x - y - x z, z' = x y - beta z with sigma = 10,
beta = 8/3, rho = 0.5, limits |x|, |y|, |z| <= 1. V = x^2/sigma + y^2 + z^2 strictly
decreases (rho < 1), so {V <= 0.1} is invariant and lies inside the limits: an exact
inner safe set. Numerically none of 2000 random starts in the cube was doomed; the
doomed starts that do exist (near two corners of the cube, where y or z leaves at
once) fill too small a volume for such a sample to hit.

Source: Lorenz, J. Atmos. Sci. 20 (1963) 130; Strogatz §9.2.

A coarse depth (cells of 1/16 of the window side) keeps this 3D case quick; the test
checks that no certified cell contradicts the inner safe set, that most of the inner
set, away from its boundary, is certified safe, and that the few doomed cells are
doomed indeed (scipy's DOP853 from points inside them crosses a limit within the
proven bounds) and fill a volume that a sample of 2000 starts would likely miss.
The window is [-1.125, 1.125]^3: every side violates a limit.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from reference_checks import certify_text, contradictions, far_points_coverage

MODEL = """
[model]
name = "R12 Lorenz system"
[states]
x = [-1.125, 1.125]
y = [-1.125, 1.125]
z = [-1.125, 1.125]
[parameters]
sigma = 10
rho = 0.5
[equations]
x = "sigma*(y - x)"
y = "rho*x - y - x*z"
z = "x*y - 8/3*z"
[constraints]
x_high = "x <= 1"
x_low = "x >= -1"
y_high = "y <= 1"
y_low = "y >= -1"
z_high = "z <= 1"
z_low = "z >= -1"
"""

#: Coverage level asserted inside {V <= 0.1}, away from its boundary (measured: 100 %
#: at depth 4).
COVERAGE = 0.95


def inner_fate(points, tol=1e-9):
    """``safe`` inside {V <= 0.1} (Strogatz §9.2), ``boundary`` elsewhere."""
    x, y, z = points.T
    v = x * x / 10 + y * y + z * z
    return np.where(v <= 0.1 - tol, "safe", "boundary")


@pytest.fixture(scope="module")
def r12(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r12"), max_depth=4)


def test_the_inner_set_lies_inside_the_limits():
    # V <= 0.1 gives |x| <= 1, |y| <= 0.32, |z| <= 0.32 (REFERENCES.md R12a, exact)
    assert np.sqrt(0.1 * 10) <= 1 and np.sqrt(0.1) <= 1


def test_doomed_cells_are_rare_and_confirmed_by_simulation(r12):
    doomed = np.flatnonzero(r12.cert.labels == "doomed")
    inside = np.clip(r12.cert.hi[doomed], -1, 1) - np.clip(r12.cert.lo[doomed], -1, 1)
    volume = np.prod(inside, axis=1).sum() / 8  # share of the cube of starts
    assert volume < 1 / 2000  # none of 2000 random starts was doomed (R12a, num)

    def rhs(_, u):
        x, y, z = u
        return [10 * (y - x), 0.5 * x - y - x * z, x * y - 8 / 3 * z]

    def leaves(_, u):
        return 1 - np.max(np.abs(u))

    leaves.terminal = True
    rng = np.random.default_rng(120)
    for i in doomed:
        lo, hi = np.maximum(r12.cert.lo[i], -1), np.minimum(r12.cert.hi[i], 1)
        point = lo + rng.random(3) * (hi - lo)
        sol = solve_ivp(rhs, (0, 20), point, method="DOP853", rtol=1e-10, atol=1e-12,
                        events=leaves)
        assert sol.status == 1  # the simulated trajectory crosses a limit
        lower, upper = r12.cert.crossing_time_bounds(point[None])
        assert lower[0] <= sol.t[-1] <= upper[0]


def test_no_certified_cell_contradicts_the_inner_safe_set(r12):
    bad, n_checked = contradictions(r12.cert, inner_fate, np.random.default_rng(12))
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # V decreases (Lorenz 1963; Strogatz §9.2)


def test_inner_set_coverage(r12):
    decided, agree, n_far = far_points_coverage(
        r12.cert, inner_fate, [(-1, 1), (-0.32, 0.32), (-0.32, 0.32)], 21, r12.finest,
        stencil=3)
    assert n_far > 200
    assert agree == decided  # decided points of {V <= 0.1} are safe (Strogatz §9.2)
    assert decided >= COVERAGE  # stated level inside the invariant ellipsoid
