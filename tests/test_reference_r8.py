"""Reference case R8 of ../shared/REFERENCES.md: damped pendulum, 2D.

theta' = w, w' = -0.5 w - sin theta, limits |theta| <= 2.5 and |w| <= 3.5.
E = w^2/2 + 1 - cos theta never increases, so {E <= 1 - cos 2.5, |theta| <= 2.5} is an
exact inner safe set. On the line theta0 = 0 a start is safe iff |w0| <= w* =
2.845279293864733 (numerical), and (0, 3) crosses at T = 1.4754988824002795.

Source: the energy and Lyapunov argument is standard (Khalil, Nonlinear Systems, 2002,
ch. 4 (mem); Strogatz §6.7); w* is numerical.

The window is [-2.75, 2.75] x [-3.75, 3.75]: every side violates a limit.
"""

import numpy as np
import pytest

from reference_checks import (certify_text, contradictions, equilibria_enclose,
                              far_points_coverage)

MODEL = """
[model]
name = "R8 damped pendulum"
[states]
theta = [-2.75, 2.75]
w = [-3.75, 3.75]
[equations]
theta = "w"
w = "-0.5*w - sin(theta)"
[constraints]
theta_high = "theta <= 2.5"
theta_low = "theta >= -2.5"
w_high = "w <= 3.5"
w_low = "w >= -3.5"
"""

E_MAX = 1 - np.cos(2.5)  # 1.8011436155469336 (REFERENCES.md R8, exact)
W_STAR = 2.845279293864733  # numerical (REFERENCES.md R8)

#: Coverage level asserted inside the exact inner safe set, away from its boundary, and
#: on the line theta = 0 (measured: 100 % and 99.9 % at depth 8).
COVERAGE = 0.95


def energy(theta, w):
    """E = w^2/2 + 1 - cos theta (Khalil 2002, ch. 4 (mem))."""
    return 0.5 * w * w + 1 - np.cos(theta)


def inner_fate(points, tol=1e-9):
    """``safe`` inside {E <= 1 - cos 2.5, |theta| <= 2.5}; ``boundary`` elsewhere."""
    theta, w = points[:, 0], points[:, 1]
    e = energy(theta, w)
    inside = (e <= E_MAX - tol) & (np.abs(theta) <= 2.5)
    return np.where(inside, "safe", "boundary")


def line_fate(w0, tol=1e-9):
    """On theta0 = 0: safe iff |w0| <= w*; outside for |w0| > 3.5 (REFERENCES.md R8, num)."""
    fate = np.where(np.abs(w0) <= W_STAR, "safe", "doomed")
    fate = np.where(np.abs(w0) > 3.5, "outside", fate)
    near = (np.abs(np.abs(w0) - W_STAR) < tol) | (np.abs(np.abs(w0) - 3.5) < tol)
    return np.where(near, "boundary", fate)


@pytest.fixture(scope="module")
def r8(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r8"), max_depth=8)


def test_reference_values():
    assert E_MAX == pytest.approx(1.8011436155469336, rel=1e-15)  # (R8, exact)
    assert np.sqrt(2 * E_MAX) == pytest.approx(1.897969, abs=1e-6)  # |w| bound (R8)


def test_no_certified_cell_contradicts_the_inner_safe_set(r8):
    bad, n_checked = contradictions(r8.cert, inner_fate, np.random.default_rng(8))
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # Lyapunov inner set is safe (R8, Khalil 2002 (mem))


def test_labels_on_the_line_theta_zero(r8):
    w0 = np.linspace(-3.75, 3.75, 3001)
    labels = r8.cert.label_at(np.stack([np.zeros_like(w0), w0], 1))
    fate = line_fate(w0)
    contradicting = (((labels == "safe") & (fate == "doomed"))
                     | ((labels == "doomed") & (fate == "safe")))
    assert not contradicting.any()  # safe iff |w0| <= w* (REFERENCES.md R8, num)
    far = np.abs(np.abs(w0) - W_STAR) > 2 * r8.finest[1]
    assert np.mean(labels[far] != "undecided") >= COVERAGE  # stated level on the line


def test_inner_safe_set_coverage(r8):
    decided, agree, n_far = far_points_coverage(r8.cert, inner_fate, [(-2.5, 2.5), (-2, 2)],
                                                151, r8.finest)
    assert n_far > 5000
    assert agree == decided  # decided points of the inner set are safe (R8, exact)
    assert decided >= COVERAGE  # stated level inside the Lyapunov set (R8)


def test_equilibria_are_enclosed():
    # (0, 0) stable focus, (+-pi, 0) saddles (REFERENCES.md R8; Strogatz §6.7)
    expected = [([0.0, 0.0], "stable")]
    assert equilibria_enclose(MODEL, expected) == []  # (+-pi, 0) lie outside the window


def test_crossing_time_lies_in_the_proven_bounds(r8):
    t_exact = 1.4754988824002795  # (0, 3) (REFERENCES.md R8, num)
    lower, upper = r8.cert.crossing_time_bounds(np.array([[0.0, 3.0]]))
    assert lower[0] <= t_exact <= upper[0]
    assert np.isfinite(upper[0])
