"""Reference case R1 of ../shared/REFERENCES.md: exponential decay, 1D.

x' = -k x with k = 0.5, limits 0.5 <= x <= 10. Every start in [1, 4] is doomed, and
the first crossing happens at T = ln(x0/m)/k = 2 ln(2 x0). Source: exact.

The window is [0.25, 4], wider than the reference's [1, 4] at the bottom, so that its
lower side violates the limit x >= 0.5 (a side where the flow leaves the window would
block every proof); the checks concern the reference's starts in [1, 4].
"""

import math

import numpy as np
import pytest

from reference_checks import certify_text, contradictions

MODEL = """
[model]
name = "R1 exponential decay"
[states]
x = [0.25, 4]
[parameters]
k = 0.5
[equations]
x = "-k*x"
[constraints]
floor = "x >= 0.5"
ceiling = "x <= 10"
"""


def exact_fate(points):
    """Exact: every start with x >= 0.5 is doomed (x decays to 0); below, outside."""
    x = points[:, 0]
    return np.where(x < 0.5, "outside", "doomed")


@pytest.fixture(scope="module")
def r1(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r1"), max_depth=8)


def test_no_certified_cell_contradicts_the_exact_fate(r1):
    bad, n_checked = contradictions(r1.cert, exact_fate, np.random.default_rng(1))
    assert n_checked > 0
    assert len(bad) == 0, bad[:5]  # exact: all starts doomed (REFERENCES.md R1, exact)


def test_every_reference_start_is_doomed(r1):
    x = np.linspace(1, 4, 301)[:, None]
    labels = r1.cert.label_at(x)
    assert np.all(labels == "doomed")  # exact: all doomed (REFERENCES.md R1, exact)


@pytest.mark.parametrize("x0, t_exact", [
    (1.0, 1.386294361119891),   # T(1) = 2 ln 2 (REFERENCES.md R1, exact)
    (2.0, 2.772588722239781),   # T(2) = 2 ln 4 (REFERENCES.md R1, exact)
    (4.0, 4.158883083359672),   # T(4) = 2 ln 8 (REFERENCES.md R1, exact)
])
def test_crossing_time_lies_in_the_proven_bounds(r1, x0, t_exact):
    assert t_exact == pytest.approx(2 * math.log(2 * x0), rel=1e-15)  # exact: T = ln(x0/m)/k
    lower, upper = r1.cert.crossing_time_bounds(np.array([[x0]]))
    assert lower[0] <= t_exact <= upper[0]  # exact (REFERENCES.md R1)
    assert lower[0] > 0 and np.isfinite(upper[0])  # informative bounds, not [0, inf]
