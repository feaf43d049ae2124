"""Red team on the checker's arithmetic: values beyond what floats or arb bound.

A certificate states its own model, so a forger chooses the model too. These tests forge
certificates whose model or tube boxes push the checker's float pass and its python-flint
functions past their ranges, and assert that nothing false is accepted and nothing
crashes (exit 1 for a claim that does not hold, never a traceback).

References named beside the checks:

* IEEE 754-2008 binary64 (common practice): the largest float ``(2 - 2^-52) 2^1023``, the
  smallest subnormal ``2^-1074``;
* mpmath at 50 digits for ``exp`` and ``cosh`` of huge arguments (mpmath's exponents are
  unbounded);
* the comparison principle for scalar ODEs (common practice): where ``x' <= -1`` holds
  for every ``x`` in ``[-1/2, x0]``, the solution from ``x0`` reaches ``-1/2`` by
  ``t = x0 + 1/2``.
"""

import ctypes
import ctypes.util
import hashlib

import mpmath
import numpy as np
import pytest

from certify.certificate import certificate_data
from certify.check import check_certificate
from certify.check._arith import ARITHMETICS, BallArith, EndpointArith
from certify.check._floats import FloatArith, ieee_defaults
from certify.container import encode_array, load_certificate_json, write_certificate
from certify.model import parse_model
from certify.prove import prove
from test_forgery import _check_cli

MAX = np.finfo(float).max

#: ``x' = 1 - cosh(K min(x, 0))`` with ``K = 1e300``: below 0 the field is
#: ``1 - cosh(huge)``, far below -1, so every start in ``[-1/4, 0)`` crosses ``x = -1/2``
#: (comparison principle); only the rest state ``x = 0`` stays.
STEEP = """\
[model]
name = "steep well"
[states]
x = [-1, 1]
[parameters]
K = 1e300
[equations]
x = "1 - cosh(K*min(x, 0))"
[limits]
floor = "x >= -0.5"
"""

#: The cell ``[-1/4, 0]`` of the depth-3 map of the window ``[-1, 1]``.
CELL = 3


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    """An honest certificate with the states, window and parameters of STEEP (its field
    without K), to forge from."""
    path = tmp_path_factory.mktemp("well") / "certificate.json.gz"
    benign = parse_model(STEEP.replace("K*min(x, 0)", "min(x, 0)"))
    write_certificate(path, certificate_data(prove(benign, max_depth=3), {}))
    return path


def _one_safe_cell(template, tmp_path, text, tube):
    """The template with model `text`, every cell undecided without claims but CELL,
    claimed safe by one step of size 1/2 in the tube box `tube`, its own successor."""
    data = load_certificate_json(template)
    cells = data["cells"]
    L = cells["count"]
    assert L == 8
    data["model"]["text"] = text
    data["model"]["sha256"] = hashlib.sha256(text.encode()).hexdigest()
    data["method"]["order"] = 1
    data["regions"] = []
    for face in data["faces"]:
        face["kind"] = "open"

    def put(key, values):
        values = np.asarray(values)
        cells[key] = encode_array(values, "<i8" if values.dtype.kind == "i" else "<f8")
    cells["label"] = ["safe" if c == CELL else "undecided" for c in range(L)]
    cells["image_known"] = [c == CELL for c in range(L)]
    cells["trapped_whole"] = [False] * L
    put("trapped", np.full(L, -1))
    put("rank", np.full(L, -1))
    put("crossing_upper", np.full(L, np.inf))
    put("survival_lower", np.where(np.arange(L) == CELL, np.inf, 0.0))
    put("horizon", np.where(np.arange(L)[:, None] == CELL, 0.5, 0.0) * np.ones((L, 2)))
    one = np.where(np.arange(L + 1) > CELL, 1, 0)
    put("successor_start", one)
    put("successors", np.array([CELL]))
    put("step_start", one)
    put("step_h", np.array([0.5]))
    put("step_E", np.array([[tube]], float))
    out = tmp_path / "forged.json.gz"
    write_certificate(out, data)
    return out


def test_the_steep_well_really_leaves_the_cell():
    # reference: mpmath; at x = -1e-290 the field is 1 - cosh(1e10) < -1, and it only
    # falls further below x (cosh grows with |K x|), so the comparison principle sends
    # every start in [-1/4, -1e-290] across x = -1/2 by t = 1/2
    mpmath.mp.dps = 50
    K = mpmath.mpf(10) ** 300
    for x in ("-1e-290", "-0.125", "-0.5"):
        assert 1 - mpmath.cosh(K * mpmath.mpf(x)) < -1


def test_a_safe_cell_resting_on_a_dropped_nan_is_rejected(template, tmp_path, capsys):
    # cosh(K min(x, 0)) on the tube [-0.27, 0.016] spans [1, cosh(2.7e299)]; arb's cosh
    # of 2.7e299 is NaN, and numpy's object maximum dropped it: both the float and the
    # endpoint pass saw the field [0, 0] and accepted the cell as a rest set
    forged = _one_safe_cell(template, tmp_path, STEEP, [-0.25 - 1 / 64, 1 / 64])
    result = check_certificate(forged, jobs=1)
    assert not result.valid
    assert "step 0 does not verify" in result.failures[0]["reason"]
    assert _check_cli(forged, capsys) == 1


def test_a_tube_reaching_far_beyond_the_float_range_is_rejected_not_a_crash(
        template, tmp_path, capsys):
    # cosh of 1e12 is a finite arb number with a 1.4e12-bit exponent: turned into a
    # Fraction it raised MemoryError in the float pass (OverflowError from 1e20 on);
    # cosh of 1e300 is NaN in arb, and the endpoint pass had 1 - cosh on the tube as
    # [NaN, 0], whose product with h lost the NaN end: it accepted the cell
    text = STEEP.replace("K*min(x, 0)", "x")
    for top in (1e12, 1e20, 1e300):
        forged = _one_safe_cell(template, tmp_path, text, [-0.25 - 1 / 64, top])
        result = check_certificate(forged, jobs=1)
        assert not result.valid
        assert "step 0 does not verify" in result.failures[0]["reason"]
    assert _check_cli(forged, capsys) == 1


@pytest.mark.parametrize("arithmetic", [FloatArith, EndpointArith])
@pytest.mark.parametrize("name", ["cosh", "sinh", "exp"])
def test_functions_of_huge_arguments_are_unusable_or_enclose(arithmetic, name):
    # reference: mpmath at 50 digits; each end is NaN or a true bound, and NaN comes at
    # both ends, so a product with [1, 2] cannot lose it (numpy's object minimum and
    # maximum keep the second operand when the first is NaN)
    mpmath.mp.dps = 50
    ar = arithmetic()
    ar.enter()
    lo_in = np.array([-1e300, -1e300, -1e100, 0.0, 1e12])
    hi_in = np.array([0.0, 3.0, -1e90, 1e300, 1e20])
    with np.errstate(all="ignore"):
        value = ar.function(name, ar.box(lo_in, hi_in))
        product = ar.mul(value, ar.box(np.ones(5), np.full(5, 2.0)))
    f = getattr(mpmath, name)
    for out, scale in ((value, 1), (product, 2)):
        for j, (a, b) in enumerate(zip(lo_in, hi_in)):
            lo, hi = _number(out[0][j]), _number(out[1][j])
            assert np.isnan(float(lo)) == np.isnan(float(hi))
            if np.isnan(float(lo)):
                continue
            samples = [f(mpmath.mpf(a)), f(mpmath.mpf(b))] + \
                ([mpmath.mpf(1)] if name == "cosh" and a <= 0 <= b else [])
            for v in samples:
                for s in (1, scale):
                    assert lo <= s * v <= hi


def _number(x):
    """An end as an mpmath number (floats, exact arb numbers, NaN and infinities)."""
    if isinstance(x, (float, np.floating)):
        return mpmath.mpf(float(x))
    if x.is_nan():
        return mpmath.mpf("nan")
    if not x.is_finite():
        return mpmath.mpf("inf") if x > 0 else mpmath.mpf("-inf")
    m, e = x.man_exp()
    return mpmath.ldexp(mpmath.mpf(int(m)), int(e))


def test_exp_beyond_the_float_range_rounds_to_the_extreme_floats():
    # reference: IEEE 754 binary64 and mpmath: exp(1e12) is above the largest float,
    # 0 < exp(-1e20) < 2^-1074 (the smallest subnormal)
    mpmath.mp.dps = 50
    assert mpmath.exp(mpmath.mpf(1e12)) > MAX
    assert 0 < mpmath.exp(mpmath.mpf(-1e20)) < mpmath.mpf(2) ** -1074
    ar = FloatArith()
    lo, hi = ar.function("exp", ar.box(np.array([1e12, -1e20]), np.array([1e12, -1e20])))
    assert lo[0] == MAX and hi[0] == np.inf
    assert lo[1] == 0.0 and hi[1] == 2.0 ** -1074


@pytest.mark.parametrize("mode", [0x400, 0x800, 0xC00])
def test_the_float_pass_gives_way_to_balls_under_another_rounding_mode(mode):
    # reference: IEEE 754-2008 defaults (round to nearest, ties to even; subnormals),
    # which TwoSum's exact error term and the outward step rely on; glibc's fesetround
    # with x86's FE_DOWNWARD, FE_UPWARD, FE_TOWARDZERO (0x400, 0x800, 0xC00) changes the
    # mode for the whole process, as a library could
    libm = ctypes.CDLL(ctypes.util.find_library("m"))
    assert ieee_defaults() and isinstance(ARITHMETICS["float"](), FloatArith)
    assert libm.fesetround(mode) == 0
    try:
        defaults, first = ieee_defaults(), ARITHMETICS["float"]()
    finally:
        libm.fesetround(0)
    assert not defaults and isinstance(first, BallArith)
    assert ieee_defaults()
