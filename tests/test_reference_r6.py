"""Reference case R6 of ../shared/REFERENCES.md: Lotka-Volterra, 2D.

x' = x(1 - y), y' = y(x - 1), limits and window x, y in [0.1, 3]. H = x - ln x + y - ln y
is conserved; a start is safe iff H <= h* = 4 - ln 3, and every other start is doomed
within one period. Source: Lotka (1925), Volterra (1926); the conserved H in Murray,
Mathematical Biology I, §3.1 (mem); the Lambert-W orbit extremes are exact.

A conservative system: nothing contracts, so no set of cells maps into itself with
room to spare and the safe side stays undecided; that is expected. This test checks
soundness only (no certified cell contradicts the exact rule), plus the proven
crossing-time bound at the reference's doomed example.

The window is [0, 3.2]^2: its sides x = 0, y = 0 (invariant lines) and x = 3.2,
y = 3.2 all violate a limit.
"""

import numpy as np
import pytest
from scipy.special import lambertw

from reference_checks import certify_text, contradictions

MODEL = """
[model]
name = "R6 Lotka-Volterra"
[states]
x = [0, 3.2]
y = [0, 3.2]
[equations]
x = "x*(1 - y)"
y = "y*(x - 1)"
[constraints]
x_floor = "x >= 0.1"
x_ceiling = "x <= 3"
y_floor = "y >= 0.1"
y_ceiling = "y <= 3"
"""

H_STAR = 4 - np.log(3)  # 2.9013877113318902 (REFERENCES.md R6, exact)


def energy(x, y):
    """H = x - ln x + y - ln y (Murray §3.1 (mem))."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return x - np.log(x) + y - np.log(y)


def exact_fate(points, tol=1e-9):
    """Safe iff H <= h* = 4 - ln 3, else doomed (REFERENCES.md R6, exact)."""
    x, y = points[:, 0], points[:, 1]
    fate = np.where(energy(x, y) <= H_STAR, "safe", "doomed")
    out = (x < 0.1) | (x > 3) | (y < 0.1) | (y > 3)
    fate = np.where(out, "outside", fate)
    near = (np.abs(energy(x, y) - H_STAR) < tol) | (np.min(np.abs(
        np.stack([x - 0.1, x - 3, y - 0.1, y - 3])), axis=0) < tol)
    return np.where(near, "boundary", fate)


@pytest.fixture(scope="module")
def r6(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r6"), max_depth=7)


def test_reference_values():
    assert H_STAR == pytest.approx(2.9013877113318902, rel=1e-15)  # h* (R6, exact)
    x_max = -lambertw(-np.exp(1 - H_STAR), -1).real
    x_min = -lambertw(-np.exp(1 - H_STAR), 0).real
    assert x_max == pytest.approx(3.0, rel=1e-12)  # at h*, x_max = 3 (R6, exact)
    assert x_min == pytest.approx(0.17856062787792118, rel=1e-12)  # x_min at h* (R6, exact)
    assert energy(2.5, 2.5) > H_STAR > energy(1.0, 0.25)  # the doomed and safe examples


def test_no_certified_cell_contradicts_the_exact_fate(r6):
    bad, n_checked = contradictions(r6.cert, exact_fate, np.random.default_rng(6))
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # safe iff H <= 4 - ln 3 (REFERENCES.md R6, exact)


def test_doomed_example_is_not_certified_safe(r6):
    # (2.5, 2.5): H = 3.16742 > h*, doomed (REFERENCES.md R6, exact)
    label = r6.cert.label_at(np.array([[2.5, 2.5]]))[0]
    assert label in ("doomed", "undecided")
    lower, upper = r6.cert.crossing_time_bounds(np.array([[2.5, 2.5]]))
    assert lower[0] <= upper[0]
