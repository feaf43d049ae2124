"""Reference case R11 of ../shared/REFERENCES.md: Monod chemostat, 2D.

S' = (S0 - S) D - f(S) x/gamma, x' = x (f(S) - D), f(S) = m S/(a + S), with S0 = 1,
m = 2, a = 1, gamma = 1; washout iff D >= D_c = 1.

(a) D = 0.5: the equilibrium (1/3, 2/3) attracts every start with x > 0; with the
    limits S in [0, 1], x in [0.3, 2] there is a doomed band at small S below the
    numerical boundary x0*(S): x0*(0) = 0.367584184078, x0*(0.1) = 0.335476478358,
    x0*(0.2) = 0.312854944197, x0*(0.3) = 0.300946944083. (0, 0.35) crosses at
    T = 0.48342137636379.
(b) D = 1.2, limit x >= 0.1: every start with x0 > 0 is doomed, and since
    0 <= f(S) <= D_c on [0, S0], ln(x0/0.1)/D <= T <= ln(x0/0.1)/(D - D_c).
    T(0.5, 0.5) = 4.854529413633, T(1, 1) = 6.773000627475, T(0, 0.2) = 1.082145188874.

Source: Smith & Waltman, The Theory of the Chemostat (1995), ch. 1 (mem for the theorem
number); boundary values and times numerical (REFERENCES.md).

Windows: (a) [0, 1] x [0.25, 2.0625], (b) [0, 1] x [0.0625, 1]. Along S = 0 and S = 1
the flow points inward; the other sides violate a limit, except x = 1 in (b), where
x decreases.
"""

import math

import numpy as np
import pytest

from reference_checks import certify_text, contradictions, equilibria_enclose

MODEL = """
[model]
name = "R11 Monod chemostat"
[states]
S = [0, 1]
x = [{x_lo}, {x_hi}]
[parameters]
S0 = 1
m = 2
a = 1
gamma = 1
D = {D}
[definitions]
f = "m*S/(a + S)"
[equations]
S = "(S0 - S)*D - f*x/gamma"
x = "x*(f - D)"
[constraints]
{limits}
"""

LIMITS_A = 'x_floor = "x >= 0.3"\nx_cap = "x <= 2"'
LIMITS_B = 'x_floor = "x >= 0.1"'

#: x0*(S) on four lines (REFERENCES.md R11a, num).
X0_STAR = {0.0: 0.367584184078, 0.1: 0.335476478358, 0.2: 0.312854944197,
           0.3: 0.300946944083}

#: Coverage level asserted on those lines away from the boundary, and in case (b)
#: (measured: at least 99.9 % at depth 8, and 100 % at depth 6).
COVERAGE = 0.95


@pytest.fixture(scope="module")
def r11a(tmp_path_factory):
    text = MODEL.format(x_lo=0.25, x_hi=2.0625, D=0.5, limits=LIMITS_A)
    return certify_text(text, tmp_path_factory.mktemp("r11a"), max_depth=8)


@pytest.fixture(scope="module")
def r11b(tmp_path_factory):
    text = MODEL.format(x_lo=0.0625, x_hi=1, D=1.2, limits=LIMITS_B)
    return certify_text(text, tmp_path_factory.mktemp("r11b"), max_depth=6)


@pytest.mark.parametrize("s0", sorted(X0_STAR))
def test_a_labels_on_the_reference_lines(r11a, s0):
    x0 = np.linspace(0.3, 1.0, 1401)
    labels = r11a.cert.label_at(np.stack([np.full_like(x0, s0), x0], 1))
    boundary = X0_STAR[s0]
    tol = 1e-9
    # safe above x0*(S), doomed below (REFERENCES.md R11a, num; Smith & Waltman 1995 (mem))
    assert not np.any((labels == "doomed") & (x0 > boundary + tol))
    assert not np.any((labels == "safe") & (x0 < boundary - tol) & (x0 > 0.3 + tol))
    far = np.abs(x0 - boundary) > 2 * r11a.finest[1]
    assert np.mean(labels[far] != "undecided") >= COVERAGE  # stated level on the lines


def test_a_crossing_time_lies_in_the_proven_bounds(r11a):
    t_ref = 0.48342137636379  # (0, 0.35) (REFERENCES.md R11a, num)
    lower, upper = r11a.cert.crossing_time_bounds(np.array([[0.0, 0.35]]))
    assert lower[0] <= t_ref <= upper[0]
    assert np.isfinite(upper[0])


def test_a_equilibrium_is_enclosed():
    # (lambda, S0 - lambda) = (1/3, 2/3), stable (eigenvalues -0.75, -0.5); the washout
    # state (1, 0) lies below the window (REFERENCES.md R11a, Smith & Waltman 1995 (mem))
    text = MODEL.format(x_lo=0.25, x_hi=2.0625, D=0.5, limits=LIMITS_A)
    assert equilibria_enclose(text, [([1 / 3, 2 / 3], "stable")]) == []


def fate_b(points, tol=1e-9):
    """D = 1.2 > D_c: every start with x0 > 0 is doomed (REFERENCES.md R11b)."""
    x = points[:, 1]
    fate = np.where(x < 0.1, "outside", "doomed")
    return np.where(np.abs(x - 0.1) < tol, "boundary", fate)


def test_b_no_certified_cell_contradicts_washout(r11b):
    # 13 points per cell (corners, centre, 8 random): the cells here are few and large
    bad, n_checked = contradictions(r11b.cert, fate_b, np.random.default_rng(11), n_random=8)
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # washout for D >= D_c (R11b, Smith & Waltman 1995 (mem))


def test_b_coverage(r11b):
    rng = np.random.default_rng(111)
    points = np.stack([rng.random(4000), 0.1 + 0.9 * rng.random(4000)], 1)
    labels = r11b.cert.label_at(points)
    assert np.mean(labels == "doomed") >= COVERAGE  # stated level (R11b, all doomed)


def test_b_proven_bounds_meet_the_rigorous_bracket(r11b):
    rng = np.random.default_rng(112)
    points = np.stack([rng.random(2000), 0.1 + 0.9 * rng.random(2000)], 1)
    lower, upper = r11b.cert.crossing_time_bounds(points)
    decided = np.isfinite(upper)
    log_ratio = np.log(points[:, 1] / 0.1)
    # ln(x0/0.1)/D <= T <= ln(x0/0.1)/(D - D_c) (REFERENCES.md R11b, rigorous bracket)
    assert np.all(lower[decided] <= log_ratio[decided] / (1.2 - 1.0) * (1 + 1e-12))
    assert np.all(upper[decided] >= log_ratio[decided] / 1.2 * (1 - 1e-12))


@pytest.mark.parametrize("s0, x0, t_ref", [
    (0.5, 0.5, 4.854529413633),   # T(0.5, 0.5) (REFERENCES.md R11b, num)
    (1.0, 1.0, 6.773000627475),   # T(1, 1) (REFERENCES.md R11b, num)
    (0.0, 0.2, 1.082145188874),   # T(0, 0.2) (REFERENCES.md R11b, num)
])
def test_b_crossing_times_lie_in_the_proven_bounds(r11b, s0, x0, t_ref):
    assert math.log(x0 / 0.1) / 1.2 <= t_ref <= math.log(x0 / 0.1) / 0.2  # the bracket
    lower, upper = r11b.cert.crossing_time_bounds(np.array([[s0, x0]]))
    assert lower[0] <= t_ref <= upper[0]
    assert np.isfinite(upper[0])
