"""The forgery fuzzer (benchmarks/forgery_fuzz.py) on its smallest subject, a few seeds.

Each mutant is one random edit of a VALID certificate; the independent checker must
reject it, or every claim it keeps must be true by simulation (scipy ``solve_ivp``,
rtol 1e-10, atol 1e-12), and the checker must never raise anything but a CertifyError.

References named beside the checks:

* the damped rotation ``x' = -a x - w y, y' = w x - a y`` has the closed form
  ``x(t) = e^(-a t) (x0 cos wt - y0 sin wt)``, ``y(t) = e^(-a t) (x0 sin wt + y0 cos wt)``
  (linear ODE, common practice): the radius shrinks as ``e^(-a t)``, so a start inside
  the disc stays inside, and the first root of ``x(t) = xmax`` is when it meets the wall.
"""

from __future__ import annotations

import copy
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

sys.path.append(str(Path(__file__).resolve().parent.parent / "benchmarks"))  # not a package
from forgery_fuzz import fuzz, judge, make_subject  # noqa: E402
from fuzz_mutations import Cells  # noqa: E402
from fuzz_oracle import EPS  # noqa: E402

#: Fixed seeds, and mutants per family and seed: about 100 mutants per seed.
SEEDS = (11, 12)
MUTANTS = 4
CLAIM_MUTANTS = 20


@pytest.fixture(scope="module")
def rotation(tmp_path_factory):
    """The damped rotation by a wall, proven at depth 3; its claims agree with simulation
    (make_subject raises otherwise)."""
    return make_subject("rotation", tmp_path_factory.mktemp("fuzz"))


def _first_wall_time(x0, y0, xmax, a=0.25, w=1.0):
    """First t with x(t) = xmax in the closed form (grid of 1e-3, then brentq)."""
    def x(t):
        return np.exp(-a * t) * (x0 * np.cos(w * t) - y0 * np.sin(w * t)) - xmax
    grid = np.arange(0, 20, 1e-3)
    values = x(grid)
    k = int(np.flatnonzero(values >= 0)[0])
    return brentq(x, grid[k - 1], grid[k], xtol=1e-14)


def test_oracle_agrees_with_the_closed_form(rotation):
    # a start at radius sqrt(0.61) inside the disc moving right: it meets the wall
    key = rotation.claims.model_key[:2]
    fates = rotation.oracle(key).fates((0.5, -0.6))
    walls = sorted([0.58, 0.6])       # the parameter box of xmax, simulated at both ends
    assert len(fates) == 2
    for fate, xmax in zip(fates, walls):
        # touch: g = xmax - x reaches EPS, cross: reaches -EPS (x' > 0 there: close times)
        assert fate.touch == pytest.approx(_first_wall_time(0.5, -0.6, xmax - EPS), abs=1e-7)
        assert fate.cross == pytest.approx(_first_wall_time(0.5, -0.6, xmax + EPS), abs=1e-7)
    # a start near the origin never reaches the wall nor the disc's rim (radius shrinks)
    assert all(f.touch == np.inf and f.cross == np.inf for f in rotation.oracle(key).fates(
        (0.1, 0.05)))


def test_the_oracle_refutes_a_forged_claim(rotation):
    # the judge, asked directly (no checker): a doomed cell relabelled safe is false, as
    # each of its starts within the limits crosses (the original says so, proven)
    data = copy.deepcopy(rotation.data)
    cells = Cells(data)
    doomed = cells.cells_with(lambda j: cells.cols["label"][j] == "doomed")
    assert doomed
    j = doomed[0]
    cells.cols["label"][j], cells.cols["rank"][j] = "safe", -1
    cells.cols["crossing_upper"][j] = np.inf
    cells.write(data)
    outcome, note = judge(rotation, data, seed=0)
    assert outcome == "accepted-false", note
    assert "safe, yet it leaves the limits" in note


@pytest.mark.parametrize("seed", SEEDS)
def test_no_mutant_is_accepted_with_a_false_claim_nor_crashes(rotation, seed):
    # every family, then more of the edits of labels and bounds (cheap: mostly refused)
    for tally in (fuzz(rotation, MUTANTS, seed),
                  fuzz(rotation, CLAIM_MUTANTS, seed, families=["label", "claims"])):
        bad = [(family, outcome, note) for family, outcome, note in tally.notes
               if outcome in ("accepted-false", "crash", "query-crash")]
        assert not bad
        # the fuzzer reached the checker's rules: forged relabellings are refused
        assert tally.counts["label"]["rejected"] > 0
