"""Tests of ``certify claim`` against closed forms.

References (shared/REFERENCES.md):
- R5, SIR with an infected-capacity limit: S + I - rho ln S is conserved (Kermack &
  McKendrick, Proc. R. Soc. A 115 (1927) 700), so the peak of I from (S0, I0) is
  I0 if S0 <= rho, else S0 + I0 - rho (1 + ln(S0 / rho)) (Hethcote, SIAM Rev. 42 (2000)
  599 (mem: section 2)); rho = gamma / beta = 0.5.
- R4, overdamped linear oscillator x1' = x2, x2' = -2 x1 - 3 x2 (exact matrix
  exponential): the start (p, q) keeps x1 <= 1 for all time iff q <= 2(1-p) + 2 sqrt(1-p).
- R1, exponential decay x' = -x/2 with the floor x >= 0.5: the exact crossing time is
  ln(x0 / 0.5) / 0.5 = 2 ln(2 x0).
"""

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from certify.claim import check_claim, parse_region
from certify.cli import main
from certify.errors import UsageError
from certify.model import parse_model

DATA = Path(__file__).resolve().parent / "data"
SIR = (DATA / "prove_sir_cap.toml").read_text()                 # R5
OVERDAMPED = (DATA / "prove_overdamped.toml").read_text()       # R4
DECAY = (DATA / "prove_decay.toml").read_text()                 # R1

RHO = 0.5
FERMENTER = str(Path(__file__).resolve().parent.parent / "models" / "fermenter.toml")


def sir_peak(S0, I0):
    """Exact peak of I (Kermack & McKendrick 1927; Hethcote 2000 (mem))."""
    if S0 <= RHO:
        return I0
    return S0 + I0 - RHO * (1 + math.log(S0 / RHO))


def q_star(p):
    """R4: the largest q whose trajectory keeps x1 <= 1 (exact)."""
    return 2 * (1 - p) + 2 * math.sqrt(1 - p)


def decay_crossing(x0):
    """R1: exact time at which x' = -x/2 reaches 0.5."""
    return 2 * math.log(2 * x0)


@pytest.fixture
def files():
    return {name: str(DATA / f"prove_{stem}.toml")
            for name, stem in (("sir", "sir_cap"), ("overdamped", "overdamped"),
                               ("decay", "decay"))}


def run_claim(capsys, argv):
    code = main(["claim"] + argv + ["--json"])
    return code, json.loads(capsys.readouterr().out)


def in_region(point, region):
    return all(lo <= x <= hi for x, (lo, hi) in zip(point, region))


# -- SIR (R5) ---------------------------------------------------------------------------

def test_sir_region_with_peaks_above_the_cap_is_refuted(files, tmp_path, capsys):
    region = [(0.85, 0.95), (0.05, 0.09)]
    code, out = run_claim(capsys, [files["sir"], "--region", "S=0.85:0.95, I=0.05:0.09",
                                   "--expect", "safe", "--max-depth", "6",
                                   "--out", str(tmp_path / "sir")])
    assert code == 1 and out["verdict"] == "refuted"
    c = out["counterexample"]
    assert in_region(c["point"], region)
    # Kermack & McKendrick 1927: the exact peak of this start exceeds the cap
    assert sir_peak(*c["point"]) > 0.1
    assert c["limit"] == "infected_cap"
    # the first crossing time, from a tight scipy solution, lies in the proven bounds
    event = lambda t, y: y[1] - 0.1
    event.terminal = True
    sol = solve_ivp(lambda t, y: [-2 * y[0] * y[1], 2 * y[0] * y[1] - y[1]], (0, 50),
                    c["point"], method="DOP853", rtol=1e-12, atol=1e-14, events=event)
    t_cross = sol.t_events[0][0]
    lo, hi = c["crossing_time"]
    assert lo - 1e-9 <= t_cross <= hi + 1e-9


def test_sir_region_strictly_inside_the_safe_set_is_proven(files, tmp_path, capsys):
    # The peak grows with S0 and I0 once S0 > rho, so its largest value on the region is
    # at the corner (0.7, 0.05): 0.0818 < 0.1 (Kermack & McKendrick 1927), and starts
    # with S0 <= rho peak at I0 <= 0.05. The region straddles S0 = rho, where the
    # epidemic first grows, and its trajectories end on the line I = 0 of rest states.
    region = [(0.3, 0.7), (0.01, 0.05)]
    assert max(sir_peak(s, i) for s in (0.3, 0.5, 0.7) for i in (0.01, 0.05)) < 0.09
    out_dir = tmp_path / "sir"
    code, out = run_claim(capsys, [files["sir"], "--region", "S=0.3:0.7, I=0.01:0.05",
                                   "--expect", "safe", "--max-depth", "8",
                                   "--out", str(out_dir)])
    assert (code, out["verdict"]) == (0, "proven")
    assert out["undecided_boxes"] == [] and out["counterexample"] is None
    assert main(["check", out["certificate"], "--json"]) == 0
    check = json.loads(capsys.readouterr().out)
    assert check["valid"] is True
    from certify.certificate import read_certificate
    cert = read_certificate(out["certificate"])
    grid = np.stack(np.meshgrid(np.linspace(0.301, 0.699, 9), np.linspace(0.011, 0.049, 9)),
                    -1).reshape(-1, 2)
    assert all(in_region(p, region) for p in grid)
    assert set(cert.label_at(grid)) == {"safe"}


# -- overdamped oscillator (R4) ---------------------------------------------------------

def test_overdamped_region_inside_the_safe_set_is_proven(files, tmp_path, capsys):
    # q <= 1 < q*(0.5) = 2.414 on the region: every start keeps x1 <= 1 (R4, exact)
    assert q_star(0.5) > 1
    out_dir = tmp_path / "od"
    code, out = run_claim(capsys, [files["overdamped"], "--region", "x1=-0.5:0.5, x2=-2:1",
                                   "--expect", "safe", "--max-depth", "6",
                                   "--out", str(out_dir)])
    assert (code, out["verdict"]) == (0, "proven")
    assert out["counterexample"] is None and out["undecided_boxes"] == []
    from certify.certificate import load_certificate_json, read_certificate
    data = load_certificate_json(out["certificate"])
    assert data["claim"]["verdict"] == "proven"
    assert data["claim"]["region"] == {"x1": ["-1/2", "1/2"], "x2": ["-2", "1"]}
    # the verdict is re-derived from the certified labels: every grid point is safe
    # (points off the cell faces, which may take an undecided neighbour's label)
    cert = read_certificate(out["certificate"])
    grid = np.stack(np.meshgrid(np.linspace(-0.49, 0.49, 8), np.linspace(-1.99, 0.99, 8)), -1)
    assert set(cert.label_at(grid.reshape(-1, 2))) == {"safe"}


def test_overdamped_doomed_claim_on_safe_starts_is_refuted(files, tmp_path, capsys):
    code, out = run_claim(capsys, [files["overdamped"], "--region", "x1=-0.5:0.5, x2=-2:1",
                                   "--expect", "doomed", "--max-depth", "6",
                                   "--out", str(tmp_path / "od")])
    assert (code, out["verdict"]) == (1, "refuted")
    p, q = out["counterexample"]["point"]
    assert -0.5 <= p <= 0.5 and -2 <= q <= 1
    assert q <= q_star(p)                       # R4: this start is truly safe
    assert out["counterexample"]["crossing_time"] == [None, None]


def test_overdamped_region_beyond_the_boundary_is_doomed(files):
    # q >= 4.5 > q*(p) for p in [0, 0.5] (q*(0) = 4): every start crosses x1 = 1 (R4)
    assert q_star(0.0) < 4.5
    result = check_claim(parse_model(OVERDAMPED), {"x1": (0, 0.5), "x2": (4.5, 6)}, "doomed",
                         max_depth=6)
    assert result.verdict == "proven"
    refuted = check_claim(parse_model(OVERDAMPED), {"x1": (0, 0.5), "x2": (4.5, 6)}, "safe",
                          max_depth=6)
    assert refuted.verdict == "refuted"
    p, q = refuted.counterexample["point"]
    assert q > q_star(p)


# -- exponential decay (R1): finite horizons --------------------------------------------

def test_decay_stays_until_below_the_earliest_crossing_is_proven(files, tmp_path, capsys):
    assert decay_crossing(2) == pytest.approx(2.772588722239781, rel=1e-15)  # R1 table
    code, out = run_claim(capsys, [files["decay"], "--region", "x=2:3", "--expect", "stays",
                                   "--until", "2.5", "--max-depth", "8",
                                   "--out", str(tmp_path / "d1")])
    assert (code, out["verdict"]) == (0, "proven")


def test_decay_stays_until_above_the_latest_crossing_is_refuted(files, tmp_path, capsys):
    assert decay_crossing(3) < 3.8
    code, out = run_claim(capsys, [files["decay"], "--region", "x=2:3", "--expect", "stays",
                                   "--until", "3.8", "--max-depth", "8",
                                   "--out", str(tmp_path / "d2")])
    assert (code, out["verdict"]) == (1, "refuted")
    c = out["counterexample"]
    (x0,) = c["point"]
    assert 2 <= x0 <= 3
    lo, hi = c["crossing_time"]
    assert lo <= decay_crossing(x0) <= hi <= 3.8
    assert c["limit"] == "floor"


def test_decay_doomed_until_after_the_latest_crossing_is_proven(files, tmp_path, capsys):
    assert decay_crossing(3) < 4
    code, out = run_claim(capsys, [files["decay"], "--region", "x=2:3", "--expect", "doomed",
                                   "--until", "4", "--max-depth", "8",
                                   "--out", str(tmp_path / "d3")])
    assert (code, out["verdict"]) == (0, "proven")


def test_decay_doomed_until_before_the_earliest_crossing_is_refuted(files):
    # every start of [2, 3] is within the limits up to 2 ln 4 = 2.77 > 2.5 (R1)
    result = check_claim(parse_model(DECAY), {"x": (2, 3)}, "doomed", until="2.5",
                         max_depth=8)
    assert result.verdict == "refuted"
    (x0,) = result.counterexample["point"]
    assert decay_crossing(x0) > 2.5
    assert result.counterexample["crossing_time"][0] >= 2.5


def test_outside_points_refute_stays_and_satisfy_doomed():
    # a region reaching below the floor x >= 0.5 at t = 0 (window widened for this)
    model = parse_model(DECAY.replace("x = [1, 4]", "x = [0.25, 4]"))
    stays = check_claim(model, {"x": (0.3, 0.6)}, "stays", until="0.1", max_depth=6)
    assert stays.verdict == "refuted"
    (x0,), (lo, hi) = stays.counterexample["point"], stays.counterexample["crossing_time"]
    if x0 < 0.5:
        assert (lo, hi) == (0.0, 0.0)       # violates the floor at t = 0
    else:
        assert lo <= decay_crossing(x0) <= hi <= 0.1
    doomed = check_claim(model, {"x": (0.3, 0.45)}, "doomed", until="0.1", max_depth=6)
    assert doomed.verdict == "proven"


def test_certificate_of_a_claim_passes_the_checker(files, tmp_path, capsys):
    code, out = run_claim(capsys, [files["decay"], "--region", "x=2:3", "--expect", "doomed",
                                   "--until", "4", "--max-depth", "8",
                                   "--out", str(tmp_path / "d4")])
    assert code == 0
    assert main(["check", out["certificate"], "--jobs", "1", "--quiet"]) == 0


# -- bad input ---------------------------------------------------------------------------

@pytest.mark.parametrize("argv, message", [
    (["--region", "s=13:14", "--expect", "safe"], "is not inside the window [0, 12] of s"),
    (["--region", "xx=1:2", "--expect", "safe"], "(did you mean x?)"),
    (["--region", "s=1..2", "--expect", "safe"], "'1..2' is not a number or LO:HI"),
    (["--region", "s=1:2:3", "--expect", "safe"], "write NAME=LO:HI"),
    (["--region", "s 1:2", "--expect", "safe"], "write NAME=LO:HI"),
    (["--region", "s=1:2,", "--expect", "safe"], "write NAME=LO:HI"),
    (["--region", "s=2:1", "--expect", "safe"], "LO is above HI for s"),
    (["--region", "s=1:2, s=3:4", "--expect", "safe"], "s is given twice"),
    (["--region", "s=1:2", "--expect", "stays"], "--expect stays needs --until T"),
    (["--region", "s=1:2", "--expect", "safe", "--until", "3"], "does not apply"),
    (["--region", "s=1:2", "--expect", "doomed", "--until", "-1"], "must be positive"),
    (["--region", "s=1:2", "--expect", "doomed", "--until", "soon"], "is not a number"),
    (["--region", "s=1:2", "--expect", "saf"], "(did you mean safe?)"),
    (["--region", "s=1:2", "--expect", "safe", "--max-depth", "99"], "--max-depth"),
])
def test_bad_claims_exit_2_with_one_line(capsys, argv, message):
    code = main(["claim", FERMENTER] + argv)
    err = capsys.readouterr().err
    assert code == 2
    assert message in err
    assert "Traceback" not in err and err.count("\n") == 1


def test_parse_region_reads_exact_numbers():
    from fractions import Fraction
    region = parse_region("S = 0.1 : 0.45 ,I=1/100:0.08, R=0.5")
    assert region == {"S": (Fraction(1, 10), Fraction(9, 20)),
                      "I": (Fraction(1, 100), Fraction(2, 25)),
                      "R": (Fraction(1, 2), Fraction(1, 2))}
    with pytest.raises(UsageError, match="write NAME=LO:HI"):
        parse_region("")
