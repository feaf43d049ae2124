"""Successors that a cell's image sets miss (docs/design.md, section 5, "Successors").

References named beside the checks:

* exact rational arithmetic (Python's ``fractions``): the coordinates ``A^-1 (x - m)`` of
  a box's corners under the exact inverse of a float frame, whose range over the box is
  attained at corners (a linear map, common practice);
* scipy's linear programming (``scipy.optimize.linprog``, HiGHS) as an independent
  judge of whether a box and a parallelepiped share a point;
* the damped rotation of tests/data/prove_rotation_open_side.toml and its closed form
  (tests/test_kept_rules.py), whose images turn, so that their box hulls meet leaves
  the images themselves miss.
"""

from __future__ import annotations

import gzip
import itertools
import json
from fractions import Fraction
from importlib import import_module
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import linprog

from certify import load_model, prove
from certify.check import check_certificate
from certify.check._apart import sets_miss as checker_miss
from certify.container import decode_array, encode_array
from certify.image_sets import sets_miss as prover_miss

from test_kept_rules import ROTATION, assert_safe_starts_keep_the_limits

prove_module = import_module("certify.prove")


def _exact_inverse(A):
    """The inverse of a float matrix in exact rationals (Gauss-Jordan)."""
    n = len(A)
    M = [[Fraction(float(A[i][j])) for j in range(n)] + [Fraction(int(i == j))
                                                         for j in range(n)] for i in range(n)]
    for col in range(n):
        pivot = next(r for r in range(col, n) if M[r][col] != 0)
        M[col], M[pivot] = M[pivot], M[col]
        scale = M[col][col]
        M[col] = [v / scale for v in M[col]]
        for r in range(n):
            if r != col and M[r][col] != 0:
                factor = M[r][col]
                M[r] = [a - factor * b for a, b in zip(M[r], M[col])]
    return [row[n:] for row in M]


def _exact_gap(m, A, r_lo, r_hi, lo, hi):
    """How far the exact coordinates of the box lie beyond ``[r]``, over the axes (<= 0:
    no axis separates them)."""
    C = _exact_inverse(A)
    n = len(m)
    corners = [[Fraction(float(c)) for c in corner]
               for corner in itertools.product(*zip(lo, hi))]
    gap = None
    for i in range(n):
        values = [sum(C[i][j] * (x[j] - Fraction(float(m[j]))) for j in range(n))
                  for x in corners]
        beyond = max(min(values) - Fraction(float(r_hi[i])),
                     Fraction(float(r_lo[i])) - max(values))
        gap = beyond if gap is None else max(gap, beyond)
    return gap


def _share_a_point(m, A, r_lo, r_hi, lo, hi):
    """scipy's LP: is there an r in [r] with m + A r in the box?"""
    n = len(m)
    result = linprog(np.zeros(n), A_ub=np.vstack([A, -A]),
                     b_ub=np.concatenate([np.asarray(hi) - m, m - np.asarray(lo)]),
                     bounds=list(zip(r_lo, r_hi)), method="highs")
    return result.status == 0


def _cases(seed, count, n=3):
    """Random frames (rotations and shears), coordinate boxes and dyadic boxes nearby."""
    generator = np.random.default_rng(seed)
    for _ in range(count):
        A = generator.normal(size=(n, n)) + 2 * np.eye(n)
        m = generator.uniform(-1, 1, n)
        r_lo = -generator.uniform(0.05, 0.5, n)
        r_hi = generator.uniform(0.05, 0.5, n)
        centre = m + generator.uniform(-1.5, 1.5, n)
        half = 2.0 ** -generator.integers(2, 6, n)
        lo = np.floor(centre * 64) / 64
        yield m, A, r_lo, r_hi, lo, lo + 2 * half


def test_a_miss_is_proven_and_found_wherever_exact_coordinates_show_one():
    cases = list(_cases(seed=3, count=400))
    m, A, r_lo, r_hi, lo, hi = (np.array(x) for x in zip(*cases))
    prover = prover_miss(m, A[:, None], r_lo[:, None], r_hi[:, None], lo, hi)
    exact_lo = np.array([[Fraction(float(v)) for v in row] for row in lo], dtype=object)
    exact_hi = np.array([[Fraction(float(v)) for v in row] for row in hi], dtype=object)
    checker = checker_miss(m, A[:, None], r_lo[:, None], r_hi[:, None], exact_lo, exact_hi)
    gaps = [_exact_gap(*case) for case in cases]
    for k, (gap, case) in enumerate(zip(gaps, cases)):
        if prover[k] or checker[k]:
            assert gap > 0, case
            assert not _share_a_point(*case), case
        if gap > 1e-9:
            assert prover[k] and checker[k], case
    # the cases are not all on one side: both outcomes occur often
    assert 40 < sum(g > 0 for g in gaps) < 360


def test_a_box_meeting_the_set_is_never_missed():
    # boxes around points of the set itself: they share that point
    generator = np.random.default_rng(11)
    for m, A, r_lo, r_hi, _, _ in _cases(seed=5, count=200):
        r = generator.uniform(r_lo, r_hi)
        point = m + A @ r
        lo, hi = np.nextafter(point, -np.inf), np.nextafter(point, np.inf)
        exact = [np.array([[Fraction(float(v)) for v in side]], dtype=object)
                 for side in (lo, hi)]
        args = (m[None], A[None, None], r_lo[None, None], r_hi[None, None])
        assert not prover_miss(*args, lo[None], hi[None])[0]
        assert not checker_miss(*args, *exact)[0]


def test_sets_with_no_frame_miss_nothing():
    m, A = np.zeros((1, 2)), np.full((1, 1, 2, 2), np.nan)
    r = np.ones((1, 1, 2))
    far = np.array([[5.0, 5.0]]), np.array([[6.0, 6.0]])
    exact = [np.array([[Fraction(5), Fraction(5)]], dtype=object),
             np.array([[Fraction(6), Fraction(6)]], dtype=object)]
    assert not prover_miss(m, A, -r, r, *far)[0]
    assert not checker_miss(m, A, -r, r, *exact)[0]


@pytest.fixture(scope="module")
def rotation(tmp_path_factory):
    """The damped rotation at depth 6 with successors pruned by the image sets, and with
    every leaf meeting the image box kept. With the unscaled lengths of time: the tubes
    then end near their cells, where the pruning matters (with three time constants most
    end in the trapping region)."""
    model = load_model(ROTATION)
    pruned = prove(model, method=prove_module.Method(), max_depth=6)
    out = tmp_path_factory.mktemp("pruned")
    prove_module.write_proof(pruned, out, figures=False)
    patch = pytest.MonkeyPatch()
    patch.setattr(prove_module.ImageSetStore, "misses_that_help",
                  lambda self, src, dst, lo, hi, holds: np.zeros(len(src), bool))
    try:
        whole = prove(model, method=prove_module.Method(), max_depth=6)
    finally:
        patch.undo()
    return pruned, whole, out / "certificate.json.gz"


def test_pruned_successors_decide_more_and_the_checker_agrees(rotation):
    pruned, whole, path = rotation
    assert len(pruned.successors[0]) < len(whole.successors[0])
    assert pruned.fractions["undecided"] < whole.fractions["undecided"]
    result = check_certificate(path, jobs=1)
    assert result.valid, result.failures[:3]


def test_safe_starts_of_the_pruned_map_keep_the_limits_in_closed_form(rotation):
    assert_safe_starts_keep_the_limits(rotation[0], seed=17)


def test_a_safe_cell_stripped_of_the_successors_its_sets_meet_is_rejected(rotation, tmp_path):
    pruned, whole, path = rotation
    with gzip.open(path, "rb") as f:
        data = json.loads(f.read())
    cells = data["cells"]
    start = decode_array(cells["successor_start"])
    succ = decode_array(cells["successors"])
    trapped = decode_array(cells["trapped"])
    safe = [c for c, label in enumerate(cells["label"]) if label == "safe" and trapped[c] < 0]
    # the safe cell with the most successors keeps its first one only
    c = max(safe, key=lambda c: start[c + 1] - start[c])
    keep = np.ones(len(succ), bool)
    keep[start[c] + 1:start[c + 1]] = False
    removed = int(start[c + 1] - start[c] - 1)
    cells["successors"] = encode_array(succ[keep], "<i8")
    cells["successor_start"] = encode_array(
        start - np.concatenate([[0] * (c + 1), [removed] * (len(start) - c - 1)]), "<i8")
    forged = tmp_path / "certificate.json.gz"
    with gzip.open(forged, "wb") as f:
        f.write(json.dumps(data).encode())
    assert removed >= 3
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    assert "not among its successors" in " ".join(f["reason"] for f in result.failures)
