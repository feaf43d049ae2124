"""Tests of the certificate container, version 3, and of reading version 2.

References named beside the checks:

* IEEE 754 binary32 and binary64 (the bytes of Python's ``struct`` module, formats ``<f``
  and ``<d``, and exact rationals ``fractions.Fraction`` of those values);
* the demo fermenter (models/fermenter.toml): the chemostat with the Andrews (1968)
  substrate-inhibition rate (mem); its trajectories are compared with scipy's
  ``solve_ivp`` (LSODA, tolerances 1e-10) from the midpoints of labelled cells.
"""

import base64
import struct
import zlib
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from certify.certificate import certificate_data, read_certificate, write_certificate
from certify.check import check_certificate
from certify.check._read import read_for_check
from certify.container import (READABLE_VERSIONS, VERSION, decode_array, encode_array,
                               load_certificate_json)
from certify.errors import CertificateError
from certify.interval import outward_single, short_bounds
from certify.model import load_model
from certify.prove import prove

#: Written by the main code before version 3 (`certify prove models/fermenter.toml
#: --max-depth 3`).
V2 = Path(__file__).resolve().parent / "data" / "fermenter_v2_depth3.certificate.json.gz"


def _bits(a):
    """The binary64 bytes of every value (struct, '<d'), to compare bit for bit."""
    return [struct.pack("<d", float(x)) for x in np.asarray(a, float).reshape(-1)]


# -- the array codecs ---------------------------------------------------------------------
def test_float_arrays_come_back_bit_for_bit():
    rng = np.random.default_rng(7)
    values = np.concatenate([
        [0.0, -0.0, np.inf, -np.inf, np.nan, 5e-324, 1e300, -1e-300, 2.0 ** 127 * 1.5],
        rng.normal(size=200),                                   # binary32 cannot hold these
        rng.normal(size=200).astype(np.float32).astype(float)])  # these it holds exactly
    a = values[:408].reshape(-1, 3, 2)
    out = decode_array(encode_array(a))
    assert out.shape == a.shape and out.dtype == np.float64
    assert _bits(out) == _bits(a)


def test_binary32_values_need_no_patches():
    # values that binary32 holds exactly (struct '<f' round trip) are stored as 4 bytes
    values = [struct.unpack("<f", struct.pack("<f", x))[0] for x in (0.1, -3.75, 1e-30)]
    enc = encode_array(np.array(values))
    assert enc["item"] == "<f4" and "patch_at" not in enc
    assert _bits(decode_array(enc)) == _bits(values)


def test_integer_arrays_come_back_exactly():
    rng = np.random.default_rng(11)
    for a in (rng.integers(-2 ** 62, 2 ** 62, size=(50, 3)), np.arange(1000) * 7,
              np.zeros((0, 2), np.int64), np.array([2 ** 63 - 1, -2 ** 63, 0, 5])):
        out = decode_array(encode_array(a, "<i8"))
        assert out.dtype == np.int64 and out.shape == a.shape
        assert [int(x) for x in out.reshape(-1)] == [int(x) for x in a.reshape(-1)]


def test_small_integer_steps_are_stored_narrow():
    enc = encode_array(np.arange(0, 3000, 3), "<i8")
    assert enc["item"] == "<i1"


@pytest.mark.parametrize("edit, message", [
    (lambda e: e.update(shape=[e["shape"][0] + 1]), "the shape needs"),
    (lambda e: e.update(data=e["data"][:len(e["data"]) // 8 * 4]), "truncated"),
    (lambda e: e.update(codec="lzma"), "codec"),
    (lambda e: e.update(item="<f2"), "item"),
    (lambda e: e.update(dtype=">f8"), "dtype"),
    (lambda e: e.update(data=base64.b64encode(
        zlib.compress(b"\0" * 4 * e["shape"][0]) + b"more").decode()), "after"),
])
def test_malformed_arrays_are_rejected(edit, message):
    enc = encode_array(np.linspace(0.1, 0.9, 40))
    edit(enc)
    with pytest.raises(CertificateError, match=message):
        decode_array(enc, "cells.step_h")


def test_a_patch_outside_the_array_is_rejected():
    enc = encode_array(np.array([0.1, 0.2, 0.3]))
    enc["patch_at"] = encode_array(np.array([0, 1, 3]), "<i8")
    with pytest.raises(CertificateError, match="patch"):
        decode_array(enc)


def test_outward_single_encloses_and_is_binary32():
    rng = np.random.default_rng(3)
    lo = rng.normal(size=500) * 10.0 ** rng.integers(-40, 40, size=500)
    hi = lo + np.abs(rng.normal(size=500))
    down, up = outward_single(lo, hi)
    for a, b, x, y in zip(lo, hi, down, up):
        assert Fraction(x) <= Fraction(a) and Fraction(y) >= Fraction(b)
        for v in (x, y):   # binary32 holds it, or it lies beyond binary32's range
            assert abs(v) > 3.4e38 or struct.unpack("<f", struct.pack("<f", v))[0] == v


def test_short_bounds_keep_the_inner_box_move_little_and_end_in_zero_bits():
    # exact rational comparison (Fraction) of IEEE 754 doubles: common practice
    rng = np.random.default_rng(4)
    lo = rng.normal(size=500) * 10.0 ** rng.integers(-30, 30, size=500)
    width = np.abs(lo) * 10.0 ** rng.uniform(-6, 0, size=500)
    hi = lo + width
    # an inner box that leaves no room on some sides and some room on others
    room = rng.choice([0.0, 0.01, 0.2], size=(2, 500))
    inner_lo, inner_hi = lo + room[0] * width, hi - room[1] * width
    down, up = short_bounds(lo, hi, inner_lo, inner_hi, bits=8)
    for a, b, c, d, x, y in zip(lo, hi, inner_lo, inner_hi, down, up):
        w = Fraction(b) - Fraction(a)
        assert Fraction(x) <= Fraction(c) and Fraction(y) >= Fraction(d)
        assert abs(Fraction(x) - Fraction(a)) <= w / 2**8 + Fraction(abs(a)) / 2**23
        assert abs(Fraction(y) - Fraction(b)) <= w / 2**8 + Fraction(abs(b)) / 2**23
        for v in (x, y):
            bits = struct.unpack("<I", struct.pack("<f", v))[0]
            assert struct.unpack("<f", struct.pack("<f", v))[0] == v
            if abs(v) < 2**6 * float(w):   # a bound within 64 widths of 0: 16 bits
                assert bits & 0xFF == 0
    # degenerate intervals are only rounded to binary32
    odd_lo, odd_hi = np.array([2.0, -np.inf, np.nan]), np.array([2.0, 1.0, 1.0])
    got = short_bounds(odd_lo, odd_hi, odd_lo, odd_hi)
    want = outward_single(odd_lo, odd_hi)
    np.testing.assert_array_equal(got[0], want[0])
    np.testing.assert_array_equal(got[1], want[1])


# -- version 3 round trip -----------------------------------------------------------------
@pytest.fixture(scope="module")
def fermenter(tmp_path_factory):
    proof = prove(load_model("models/fermenter.toml"), max_depth=4)
    path = tmp_path_factory.mktemp("format") / "fermenter.json.gz"
    write_certificate(path, certificate_data(proof, {}))
    return proof, path


def test_round_trip_of_labels_successors_steps_and_bounds(fermenter):
    proof, path = fermenter
    data = load_certificate_json(path)
    assert data["version"] == VERSION == 3
    cells = data["cells"]
    leaves = proof.leaves
    lab, facts = proof.labelling, proof.facts
    assert cells["label"] == [str(x) for x in lab.label]
    assert _bits(decode_array(cells["crossing_upper"])) == _bits(lab.crossing_upper)
    assert _bits(decode_array(cells["survival_lower"])) == _bits(lab.survival_lower)
    assert _bits(decode_array(cells["horizon"])) == _bits(
        np.stack([facts.horizon_lo, facts.horizon_hi], 1))
    assert (decode_array(cells["rank"]) == lab.rank).all()
    assert (decode_array(cells["depth"]) == proof.tree.depth[leaves]).all()
    assert (decode_array(cells["index"]) == proof.tree.index[leaves]).all()
    # successors: the same set per cell as the proof's transition facts
    start, succ = decode_array(cells["successor_start"]), decode_array(cells["successors"])
    written = {(c, int(d)) for c in range(len(leaves)) for d in succ[start[c]:start[c + 1]]}
    assert written == set(zip(facts.src.tolist(), facts.dst.tolist()))
    # steps: every step size and tube, cell after cell
    step_start = proof.steps.offsets(leaves)
    assert (decode_array(cells["step_start"]) == step_start).all()
    assert _bits(decode_array(cells["step_h"])) == _bits(proof.steps.gather(leaves, "h"))
    assert _bits(decode_array(cells["step_E"])) == _bits(proof.steps.gather(leaves, "E"))
    assert not {"set0_m", "set0_r", "step_m", "step_A"} & set(cells)
    # the checker's reader gives the same arrays
    cert = read_for_check(path)
    assert cert.version == 3 and cert.m is None and cert.A is None
    assert _bits(cert.E) == _bits(proof.steps.gather(leaves, "E"))


def test_version_3_certificate_checks_with_the_checkers_own_frames(fermenter):
    _, path = fermenter
    result = check_certificate(path, jobs=1)
    assert result.valid, result.failures[:3]


# -- version 2 ----------------------------------------------------------------------------
def _fermenter_rhs(t, y):
    """models/fermenter.toml written out again: Andrews rate (mem), chemostat balances."""
    s, x = y
    mu = 0.5 * s / (0.5 + s + s * s / 2.0)
    return [0.2 * (10 - s) - mu * x / 0.5, (mu - 0.2) * x]


def test_version_2_certificate_is_read_and_checked():
    assert 2 in READABLE_VERSIONS
    assert load_certificate_json(V2)["version"] == 2
    cert = read_for_check(V2)
    assert cert.version == 2 and cert.m is not None and cert.A.shape == (len(cert.h), 2, 2)
    result = check_certificate(V2, jobs=1)
    assert result.valid, result.failures[:3]
    assert result.cells_checked == 64


def test_version_2_claims_agree_with_an_ode_solver():
    # the labels read from the old file hold for the midpoints of their cells
    certificate = read_certificate(V2)
    mids = (certificate.lo + certificate.hi) / 2
    limits = lambda y: min(y[1] - 1, 9 - y[1], 9 - y[0])  # noqa: E731
    assert "doomed" in set(certificate.labels)
    for point, label, upper in zip(mids, certificate.labels, certificate.crossing_upper):
        if label == "safe":
            sol = solve_ivp(_fermenter_rhs, (0, 200), point, method="LSODA", rtol=1e-10,
                            atol=1e-10, dense_output=True)
            assert min(limits(y) for y in sol.sol(np.linspace(0, 200, 4001)).T) > -1e-6
        elif label == "doomed" and limits(point) > 0:
            event = lambda t, y: limits(y)  # noqa: E731
            event.terminal = True
            sol = solve_ivp(_fermenter_rhs, (0, upper + 1e-3), point, method="LSODA",
                            rtol=1e-10, atol=1e-10, events=event)
            assert len(sol.t_events[0]) == 1 and sol.t_events[0][0] <= upper + 1e-6
