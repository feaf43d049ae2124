"""Reference case R5 of ../shared/REFERENCES.md: SIR with an infected-capacity limit, 2D.

S' = -beta S I, I' = beta S I - gamma I with beta = 2, gamma = 1 (rho = 1/2), limit
I <= 0.1 on the window [0, 1] x [0, 0.1]. S + I - rho ln S is conserved, so the peak is
I0 if S0 <= rho and S0 + I0 - rho(1 + ln(S0/rho)) otherwise: safe iff S0 <= 1/2 or
I0 <= I*(S0) = 0.1 - S0 + 0.5(1 + ln 2 S0).

Source: Kermack & McKendrick, Proc. R. Soc. A 115 (1927) 700; the peak formula in
Hethcote, SIAM Rev. 42 (2000) 599 (mem: §2).

Every safe start ends on the line I = 0, which consists of equilibria; the sides S = 0
and I = 0 carry no normal flow, so the prover classifies them as invariant faces and
caps images along S, which never increases, by the drift bound (docs/proof-loop.md).
The test checks soundness everywhere and coverage on both sides away from the exact
boundary (boxes touching I = 0 for S0 > 0.886 hold both rest states and doomed starts,
and stay undecided, as REFERENCES.md R5 expects).

The window is [0, 1.0625] x [0, 0.125] with the extra limit S <= 1, which no start in
[0, 1] x [0, 0.1] can violate (S never increases); the sides S = 1.0625 and
I = 0.125 then violate a limit, so images crossing them are harmless.
"""

import math

import numpy as np
import pytest

from reference_checks import certify_text, contradictions, far_points_coverage

MODEL = """
[model]
name = "R5 SIR with an infected-capacity limit"
[states]
S = [0, 1.0625]
I = [0, 0.125]
[parameters]
beta = 2
gamma = 1
[equations]
S = "-beta*S*I"
I = "beta*S*I - gamma*I"
[constraints]
capacity = "I <= 0.1"
susceptible_share = "S <= 1"
"""

#: Coverage levels asserted away from the exact boundary (measured at depth 7:
#: 97.2 % on the doomed side, 98.3 % on the safe side).
DOOMED_COVERAGE = 0.9
SAFE_COVERAGE = 0.9


def i_star(s):
    """I*(S0) = 0.1 - S0 + 0.5(1 + ln 2 S0) (REFERENCES.md R5, Hethcote 2000 (mem))."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return 0.1 - s + 0.5 * (1 + np.log(2 * s))


def exact_fate(points, tol=1e-9):
    """Safe iff S0 <= 1/2 or I0 <= I*(S0); I = 0 is a line of equilibria (safe)."""
    s, i = points[:, 0], points[:, 1]
    safe = (s <= 0.5) | (i <= i_star(s)) | (i == 0)
    fate = np.where(safe, "safe", "doomed")
    fate = np.where((i > 0.1) | (s > 1), "outside", fate)
    near = (((s > 0.5) & (np.abs(i - i_star(s)) < tol)) | (np.abs(i - 0.1) < tol)
            | (np.abs(s - 1) < tol))
    return np.where(near, "boundary", fate)


@pytest.fixture(scope="module")
def r5(tmp_path_factory):
    return certify_text(MODEL, tmp_path_factory.mktemp("r5"), max_depth=7)


def test_reference_boundary_values():
    # I*(0.6), I*(0.7), I*(0.8) and the root of I* (REFERENCES.md R5)
    assert i_star(0.6) == pytest.approx(0.09116077839698, abs=1e-13)
    assert i_star(0.7) == pytest.approx(0.06823611831061, abs=1e-13)
    assert i_star(0.8) == pytest.approx(0.03500181462287, abs=1e-13)
    assert i_star(0.8861249148046152) == pytest.approx(0.0, abs=1e-15)


def test_no_certified_cell_contradicts_the_exact_fate(r5):
    bad, n_checked = contradictions(r5.cert, exact_fate, np.random.default_rng(5))
    assert n_checked > 1000
    assert len(bad) == 0, bad[:5]  # K-McK 1927 peak rule (REFERENCES.md R5)


@pytest.mark.parametrize("side, level", [("doomed", DOOMED_COVERAGE), ("safe", SAFE_COVERAGE)])
def test_coverage_away_from_the_boundary(r5, side, level):
    def side_or_boundary(points):
        fate = exact_fate(points)
        return np.where(fate == side, side, "boundary")

    decided, agree, n_far = far_points_coverage(r5.cert, side_or_boundary,
                                                [(0, 1), (0, 0.1)], 201, r5.finest)
    assert n_far > 2000
    assert agree == decided  # decided far points have the exact fate (R5, K-McK 1927)
    assert decided >= level  # stated level on that side (R5)


def test_crossing_time_lies_in_the_proven_bounds(r5):
    t_exact = 3.745720545478378  # (0.9, 0.01) crosses I = 0.1 (REFERENCES.md R5, scipy/mpmath)
    lower, upper = r5.cert.crossing_time_bounds(np.array([[0.9, 0.01]]))
    assert lower[0] <= t_exact <= upper[0]
    assert np.isfinite(upper[0])
    peak = 0.9 + 0.01 - 0.5 * (1 + math.log(0.9 / 0.5))
    assert peak > 0.1  # the start is doomed by the peak rule (Hethcote 2000 (mem))
