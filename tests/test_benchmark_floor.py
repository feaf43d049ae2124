"""The mixed-cell floors of the benchmarks (benchmarks/mixed_floor.py, band_floor.py) on
toys with a closed-form answer: the estimate's 95 % interval must bracket the exact share,
and the floor under a proof's band must name exactly the mixed cells."""

from __future__ import annotations

import sys
from fractions import Fraction
from itertools import product
from pathlib import Path

import numpy as np
import pytest

from certify.model import parse_model
from certify.prove import prove

sys.path.append(str(Path(__file__).resolve().parent.parent / "benchmarks"))  # not a package
from band_floor import band_floor, undecided_at  # noqa: E402
from mixed_floor import clopper_pearson, mixed_floor  # noqa: E402

GROWTH_1D = """
[model]
name = "Exponential growth"
time_unit = "s"
[states]
x = { range = [-1, 2] }
[parameters]
r = 1
[equations]
x = "{sign}r*x"
[limits]
cap = "x <= 1"
"""

GROWTH_2D = """
[model]
name = "Exponential growth in the plane"
time_unit = "s"
[states]
x = { range = [-1, 2] }
y = { range = [-1, 1] }
[parameters]
r = 1
[equations]
x = "r*x"
y = "r*y"
[limits]
cap = "x + y <= 1"
"""


def test_clopper_pearson_closed_forms():
    # k = 0: upper end 1 - (alpha/2)^(1/n); k = n: lower end (alpha/2)^(1/n)
    # (Clopper & Pearson 1934; the closed form follows from the beta quantile at k = 0)
    n = 50
    low, high = clopper_pearson(0, n)
    assert low == 0.0
    assert high == pytest.approx(1 - 0.025 ** (1 / n), rel=1e-12)
    low, high = clopper_pearson(n, n)
    assert high == 1.0
    assert low == pytest.approx(0.025 ** (1 / n), rel=1e-12)


@pytest.mark.parametrize("depth", [3, 5])
def test_growth_1d_one_mixed_cell(depth):
    # x' = x, x(t) = x0 e^t (closed form): starts x0 <= 0 keep x <= 1 forever, starts in
    # (0, 1] cross at ln(1/x0). Cells of 3/2^D: 0 and 1 are never cell edges (3 does not
    # divide 2^D), so exactly the cell holding 0 is mixed: share 2^-D. The cell holding
    # x = 1 has starts outside and starts that cross: not mixed.
    model = parse_model(GROWTH_1D.replace("{sign}", ""))
    floor = mixed_floor(model, depth, horizon=25.0, dt=0.05, cells=600, stream=1)
    exact = 2.0 ** -depth
    assert floor.low <= exact <= floor.high
    assert floor.mixed > 0


def test_outside_starts_do_not_make_a_cell_mixed():
    # x' = -x: x(t) = x0 e^-t never rises, so every start with x0 <= 1 keeps x <= 1 and
    # starts above 1 are outside at time 0. A straddling cell may be safe (docs/labels.md:
    # a label speaks about the starts that keep the limits at time 0): no mixed cell.
    model = parse_model(GROWTH_1D.replace("{sign}", "-"))
    floor = mixed_floor(model, 4, horizon=25.0, dt=0.05, cells=600, stream=1)
    assert floor.mixed == 0
    assert floor.high < 0.01


def test_growth_2d_cells_on_the_separatrix():
    # x' = x, y' = y: s = x + y obeys s' = s, s(t) = s0 e^t. Starts with s0 <= 0 keep
    # x + y <= 1 forever, starts with 0 < s0 <= 1 cross. A cell [a, b] x [c, d] is mixed
    # exactly when its interior meets s = 0: a + c < 0 < b + d (cells there have
    # b + d < 1, so they lie inside the limit). Exact share counted in rationals.
    depth = 4
    model = parse_model(GROWTH_2D)
    k = 2 ** depth
    wx, wy = Fraction(3, k), Fraction(2, k)
    mixed_cells = sum(1 for i, j in product(range(k), repeat=2)
                      if -1 + i * wx + -1 + j * wy < 0 < -1 + (i + 1) * wx + -1 + (j + 1) * wy)
    exact = mixed_cells / k ** 2
    floor = mixed_floor(model, depth, horizon=25.0, dt=0.05, cells=1500, stream=2)
    assert floor.low <= exact <= floor.high
    assert floor.points_per_cell == 3 ** 2 + 13


def test_band_floor_finds_every_mixed_leaf_of_a_proof():
    # The same closed form s(t) = s0 e^t: a closed cell [a, b] x [c, d] holds a keeper
    # (s0 <= 0, for instance its corner (a, c)) and a crosser (0 < s0 <= 1) exactly when
    # a + c <= 0 < b + d. The proof must leave every such cell undecided, and the floor
    # under its band must name exactly those cells, each wholly inside the limit.
    depth = 4
    model = parse_model(GROWTH_2D)
    proof = prove(model, max_depth=depth, time_limit=None)
    tree = proof.tree
    exact = set()
    for pos, leaf in enumerate(proof.leaves):
        (a, b), (c, d) = tree.exact_box(leaf)
        if a + c <= 0 < b + d:
            exact.add(pos)
    assert {int(p) for p in np.flatnonzero(proof.labelling.label == "undecided")} >= exact
    floor = band_floor(proof, horizon=25.0, dt=0.05, grid=3)
    assert {int(p) for p in floor.mixed} == exact
    assert floor.floor == pytest.approx(len(exact) / 4 ** depth, rel=1e-12)
    assert floor.unknown == 0


def test_a_finer_map_counted_in_coarser_cells():
    # s(t) = s0 e^t as above. Counted at its own depth the share is the proof's own;
    # counted in cells of depth 4, every such cell that meets s = 0 in the sense above
    # holds both fates, so no map decides it (docs/labels.md), and the count covers at
    # least their share, all of it inside the limit.
    model = parse_model(GROWTH_2D)
    proof = prove(model, max_depth=5, time_limit=1e9)
    assert undecided_at(proof, 5) == pytest.approx(proof.fractions["undecided"], rel=1e-12)
    k = 2 ** 4
    wx, wy = Fraction(3, k), Fraction(2, k)
    mixed_cells = sum(1 for i, j in product(range(k), repeat=2)
                      if -1 + i * wx + -1 + j * wy <= 0 < -1 + (i + 1) * wx + -1 + (j + 1) * wy)
    coarse = undecided_at(proof, 4)
    assert coarse >= mixed_cells / k ** 2 - 1e-12
    assert coarse >= proof.fractions["undecided"] - 1e-12
