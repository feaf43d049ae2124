"""A mutation fuzzer for certificates, with a simulation oracle (soundness red team).

Run from the repository root::

    .venv/bin/python benchmarks/forgery_fuzz.py [--subjects rotation prey ...]
                                                [--families label claims ...]
                                                [--mutants 100] [--seed 1] [--show 5]

For each subject (:data:`SUBJECTS`: four models proven at low depth, two claim
certificates of ``certify claim``, and a version-2 certificate from the tests' data) it
writes the certificate, checks it VALID, and checks its own claims against simulation at
sample points of every cell (a cross-check of the prover and of the oracle). Then, per
mutant, it makes ONE random edit of a family of :data:`FAMILIES` to a copy of the
certificate (decoded, edited, encoded again), and runs the independent checker
(``check_certificate``, one process). The outcome of a mutant is one of

* ``malformed``: the checker refused the file as malformed (CertificateError);
* ``rejected``: the checker reported INVALID;
* ``accepted-same``: VALID, and every claim equals the original's (an edit of evidence
  or information only: the claims were checked against simulation once, on the original);
* ``accepted-weaker``: VALID, claims a subset of the original's (a label dropped to
  undecided, a bound moved the safe way), all true since the original's are;
* ``accepted-stronger``: VALID, some claim beyond the original's (or the model changed):
  those claims (and a changed claim record's verdict) are checked against simulation
  at sample points, and pass;
* ``accepted-false``: VALID with a claim that simulation refutes (a soundness bug);
* ``crash``: the checker raised something other than a CertifyError (a bug);
* ``query-crash``: VALID, but reading it for point queries raised (a bug).

Claims are compared per cell address: the label, ``crossing_upper`` and
``survival_lower``, and the point queries ``label_at`` / ``crossing_time_bounds`` of
:func:`certify.certificate.read_certificate` at every sample point. This is a script (it
may run minutes); ``tests/test_forgery_fuzz.py`` runs a few fixed seeds.
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import io
import shutil
import signal
import sys
import tempfile
import time
import traceback
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))  # the fuzzer's own modules
from fuzz_claims import claim_edit, false_verdict  # noqa: E402
from fuzz_mutations import FAMILIES as EDITS  # noqa: E402
from fuzz_oracle import EPS, Oracle, cell_points, claims_time, false_claims, later  # noqa: E402

from certify.certificate import certificate_data, read_certificate  # noqa: E402
from certify.check import check_certificate  # noqa: E402
from certify.cli import main as cli  # noqa: E402
from certify.container import decode_array, load_certificate_json, write_certificate  # noqa: E402
from certify.errors import CertifyError  # noqa: E402
from certify.model import parse_model  # noqa: E402
from certify.prove import prove  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
#: Subjects: model text, proof options, the oracle's long horizon. Each a scenario of
#: our own, with fates known in closed form or by solve_ivp.
SUBJECTS = {
    # x(t) = e^(-a t) (x0 cos wt - y0 sin wt): every start spirals into the origin, and
    # those whose spiral reaches the wall x = xmax first cross it (closed form)
    "rotation": ("""\
[model]
name = "damped rotation by a wall"
[states]
x = [-1, 1]
y = [-1, 1]
[parameters]
a = 0.25
w = 1
xmax = { range = [0.58, 0.6] }
[equations]
x = "-a*x - w*y"
y = "w*x - a*y"
[limits]
disc = "x^2 + y^2 <= 0.9"
wall = "x <= xmax"
""", {"max_depth": 3}, 100.0),
    # logistic prey and a predator: a stable focus at (c, 1 - c) (linearisation:
    # trace -c, determinant c (1 - c)); large predator numbers drive the prey below 0.1
    "prey": ("""\
[model]
name = "prey and predator"
[states]
x = [0, 1.25]
y = [0, 1.25]
[parameters]
c = 0.5
[equations]
x = "x*(1 - x) - x*y"
y = "y*(x - c)"
[limits]
prey = "x >= 0.1"
predator = "y <= 1"
""", {"max_depth": 4}, 100.0),
    # three tanks in a cascade, linear: x(t) = expm(A t) x0 (closed form)
    "tanks": ("""\
[model]
name = "three tanks in a cascade"
[states]
x = [-1, 1]
y = [-1, 1]
z = [-1, 1]
[equations]
x = "-0.5*x + y"
y = "-0.5*y"
z = "0.2*x - 0.3*z"
[limits]
xcap = "x <= 0.8"
zfloor = "z >= -0.6"
""", {"max_depth": 2, "start_depth": 2}, 100.0),
    # three coupled relaxations with products of states, nonlinear in three states (the
    # checker's centered and product forms of the Jacobians at work): a stable node at
    # the origin (eigenvalues -1, -1, -1.5) with a trapping region; a large y z drives
    # x over its cap
    "relaxations": ("""\
[model]
name = "three coupled relaxations"
[states]
x = [-1, 1]
y = [-1, 1]
z = [-1, 1]
[equations]
x = "-x + 2*y*z"
y = "-y + 0.5*x*z"
z = "-1.5*z + x*y/(1 + x^2)"
[limits]
cap = "x <= 0.6"
""", {"max_depth": 4, "start_depth": 2}, 100.0),
    # a version-2 certificate (stored frames m, A per step) of the demo fermenter at
    # depth 3, read from the tests' data instead of proven: its model is the stored text
    # claim certificates (``certify claim``) on the damped rotation: a safe region near the
    # origin (proven), and one whose starts run into the wall (refuted by a point)
    "claim-proven": ("rotation", {"claim": ["--region", "x=-0.3:0.3,y=-0.3:0.3", "--expect",
                                            "safe", "--max-depth", "3"]}, 100.0),
    "claim-refuted": ("rotation", {"claim": ["--region", "x=0.4:0.55,y=-0.7:-0.5",
                                             "--expect", "safe", "--max-depth", "3"]}, 100.0),
    "fermenter-v2": (None, {"file": ROOT / "tests" / "data" /
                            "fermenter_v2_depth3.certificate.json.gz"}, 100.0),
}

#: The edit families: those of fuzz_mutations, and the claim record's.
FAMILIES = {**EDITS, "claim": claim_edit}
OUTCOMES = ("malformed", "rejected", "accepted-same", "accepted-weaker", "accepted-stronger",
            "accepted-false", "crash", "query-crash")
#: Seconds a single check may take before it counts as a hang (reported as a crash).
CHECK_TIMEOUT = 120


@dataclass
class Claims:
    """The claims of a certificate, per cell address."""

    model_key: tuple
    window: tuple
    cells: dict          # (depth, index tuple) -> (label, crossing_upper, survival_lower)


@dataclass
class Subject:
    """A proven model, its certificate and the oracle of its model."""

    name: str
    path: Path
    data: dict
    claims: Claims
    horizon: float
    oracles: dict = field(default_factory=dict)

    def oracle(self, key):
        if key not in self.oracles:
            self.oracles[key] = Oracle(key[0], dict(key[1]), self.horizon)
        return self.oracles[key]


@dataclass
class Tally:
    """Counts per family and outcome, and the notable mutants."""

    counts: dict = field(default_factory=lambda: defaultdict(Counter))
    notes: list = field(default_factory=list)
    seconds: float = 0.0

    def add(self, family, outcome, note=None):
        self.counts[family][outcome] += 1
        if note is not None:
            self.notes.append((family, outcome, note))

    def total(self, outcome):
        return sum(c[outcome] for c in self.counts.values())


def read_claims(data):
    """The claims of a raw certificate (None when its cells cannot be read as claims)."""
    cells = data["cells"]
    depth = decode_array(cells["depth"]).tolist()
    index = decode_array(cells["index"]).tolist()
    cu = decode_array(cells["crossing_upper"]).tolist()
    sl = decode_array(cells["survival_lower"]).tolist()
    params = tuple(sorted((k, (Fraction(v[0]), Fraction(v[1])))
                          for k, v in data["parameters"].items()))
    floats = decode_array(data["parameter_floats"]).tobytes()
    window = tuple((Fraction(a), Fraction(b)) for a, b in data["window"])
    return Claims(model_key=(data["model"]["text"], params, floats), window=window,
                  cells={(d, tuple(i)): (lab, c, s) for d, i, lab, c, s in
                         zip(depth, index, cells["label"], cu, sl)})


def stronger(claim, base):
    """Whether a cell's claim says more than the original's (None: no original)."""
    if base is None:
        return claim[0] != "undecided" or claim[2] > 0 or claim[1] < np.inf
    label, cu, sl = claim
    if label != base[0] and label != "undecided":
        return True
    return cu < base[1] or sl > base[2]


def judge(subject, data, seed):
    """The outcome of a VALID mutant: ``accepted-*``, and a note for notable ones."""
    claims = read_claims(data)
    base = subject.claims
    same_model = claims.model_key == base.model_key and claims.window == base.window
    record = data.get("claim")
    same_record = record == subject.data.get("claim")
    if same_model and claims.cells == base.cells and same_record:
        return "accepted-same", None
    check = {addr for addr, claim in claims.cells.items()
             if not same_model or stronger(claim, base.cells.get(addr))}
    if not check and same_record:
        return "accepted-weaker", None
    oracle = subject.oracle(claims.model_key[:2])
    problems = []
    if record is not None and (not same_model or not same_record):
        problems += false_verdict(oracle, record, data["states"], seed)
    points = []
    for (depth, index), claim in claims.cells.items():
        # the original's sample points everywhere (their fates are cached), and more of
        # them in the cells that claim more
        cell = cell_points(claims.window, depth, index, 0, extra=2 if same_model else 0)
        if (depth, index) in check:
            if same_model:
                cell += cell_points(claims.window, depth, index, seed)[-2:]
            for p in cell:
                problems += [f"cell {depth}/{list(index)} at {list(p)}: {x}"
                             for x in false_claims(oracle, *claim, p)]
        points += cell
    try:
        problems += _query_problems(subject, data, oracle, np.array(points))
    except Exception:     # noqa: BLE001 - a VALID certificate must be readable for queries
        return "query-crash", traceback.format_exc(limit=4)
    if problems:
        return "accepted-false", "; ".join(problems[:3])
    return "accepted-stronger", (f"{len(check)} cells claim more" if check else
                                 "the claim record changed") + "; simulation agrees"


def _query_problems(subject, data, oracle, points):
    """False answers of the point queries of a certificate at `points`."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "q.json.gz"
        write_certificate(path, data)
        cert = read_certificate(path)
        labels = cert.label_at(points)
        lower, upper = cert.crossing_time_bounds(points)
    out = []
    for p, label, lo, hi in zip(points, labels, lower, upper):
        starts = oracle.starts(p)
        if label == "outside" and max(starts) > EPS:
            out.append(f"label_at({list(p)}) = outside, yet the limits hold")
        if label not in ("outside", "undecided") and min(starts) < -EPS:
            out.append(f"label_at({list(p)}) = {label}, yet it violates a limit at t = 0")
        if min(starts) <= EPS or not claims_time(label, hi, lo):
            continue
        for fate in oracle.fates(p):
            if np.isnan(fate.cross):
                continue
            if label == "safe" and np.isfinite(fate.cross):
                out.append(f"label_at({list(p)}) = safe, yet it crosses at {fate.cross:.6g}")
            if later(fate.touch, hi) or later(lo, fate.cross):
                out.append(f"crossing_time_bounds({list(p)}) = [{lo!r}, {hi!r}], simulated "
                           f"[{fate.touch:.6g}, {fate.cross:.6g}]")
    return out


def _alarm(signum, frame):
    raise TimeoutError(f"the check took more than {CHECK_TIMEOUT} s")


def run_mutant(subject, data, seed, folder):
    """Check one mutated certificate and judge it; returns ``(outcome, note)``."""
    path = Path(folder) / "mutant.json.gz"
    try:
        write_certificate(path, data)
    except (TypeError, ValueError) as exc:      # not serialisable: not a file at all
        return None, str(exc)
    previous = signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(CHECK_TIMEOUT)
    try:
        result = check_certificate(path, jobs=1)
    except CertifyError as exc:
        return "malformed", None
    except Exception:     # noqa: BLE001 - any other exception is a crash of the checker
        return "crash", traceback.format_exc(limit=6)
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)
    if not result.valid:
        return "rejected", None
    return judge(subject, data, seed)


def make_subject(name, folder):
    """Prove a subject, write and check its certificate, and check its claims against
    simulation (the original must be VALID and true, or the fuzzer means nothing)."""
    text, options, horizon = SUBJECTS[name]
    path = Path(folder) / f"{name}.json.gz"
    if "file" in options:
        write_certificate(path, load_certificate_json(options["file"]))
    elif "claim" in options:
        model = Path(folder) / f"{name}.toml"
        model.write_text(SUBJECTS[text][0])
        out = Path(folder) / name
        with contextlib.redirect_stdout(io.StringIO()):
            cli(["claim", str(model), *options["claim"], "--out", str(out), "--quiet"])
        shutil.copy(out / "certificate.json.gz", path)
    else:
        write_certificate(path, certificate_data(prove(parse_model(text), **options), {}))
    result = check_certificate(path, jobs=1)
    if not result.valid:
        raise RuntimeError(f"{name}: the original certificate does not check: {result.message}")
    data = load_certificate_json(path)
    subject = Subject(name=name, path=path, data=data, claims=read_claims(data),
                      horizon=horizon)
    oracle = subject.oracle(subject.claims.model_key[:2])
    problems = []
    points = []
    for (depth, index), claim in subject.claims.cells.items():
        for p in cell_points(subject.claims.window, depth, index, 0):
            problems += false_claims(oracle, *claim, p)
            points.append(p)
    problems += _query_problems(subject, data, oracle, np.array(points))
    if data.get("claim") is not None:
        problems += false_verdict(oracle, data["claim"], data["states"], 0)
    if problems:
        raise RuntimeError(f"{name}: the original certificate claims something false: "
                           f"{problems[:3]}")
    return subject


def fuzz(subject, mutants, seed, families=None, folder=None):
    """Try `mutants` random single edits of a subject's certificate.

    Parameters
    ----------
    subject : Subject
    mutants : int
        Per family.
    seed : int
    families : sequence of str, optional
        Default: every family of :data:`fuzz_mutations.FAMILIES`.
    folder : str or Path, optional
        Where mutants are written (default: a temporary folder).

    Returns
    -------
    Tally
    """
    rng = np.random.default_rng(seed)
    tally = Tally()
    start = time.monotonic()
    with tempfile.TemporaryDirectory() as tmp:
        folder = folder or tmp
        for family in families or FAMILIES:
            edit = FAMILIES[family]
            done = tries = 0
            while done < mutants and tries < 20 * mutants:
                tries += 1
                data = copy.deepcopy(subject.data)
                what = edit(rng, data)
                if what is None:
                    continue
                outcome, note = run_mutant(subject, data, seed, folder)
                if outcome is None:
                    continue
                done += 1
                keep = outcome.startswith("accepted") or outcome.endswith("crash") or note
                tally.add(family, outcome, f"{what}: {note}" if keep else None)
    tally.seconds = time.monotonic() - start
    return tally


def report(name, tally, show):
    """Text table of a subject's tally, and up to `show` notes per outcome."""
    lines = [f"## {name}  ({tally.seconds:.0f} s)", "",
             "| family | " + " | ".join(OUTCOMES) + " |",
             "| --- |" + " --- |" * len(OUTCOMES)]
    for family, counts in tally.counts.items():
        lines.append(f"| {family} | " + " | ".join(str(counts[o]) for o in OUTCOMES) + " |")
    lines.append("| total | " + " | ".join(str(tally.total(o)) for o in OUTCOMES) + " |")
    by_outcome = defaultdict(list)
    for family, outcome, note in tally.notes:
        by_outcome[outcome].append(f"- [{family}] {note}")
    for outcome in ("accepted-false", "crash", "query-crash", "accepted-stronger",
                    "accepted-weaker", "accepted-same", "malformed"):
        if by_outcome[outcome]:
            lines += ["", f"{outcome}:"] + by_outcome[outcome][:show]
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--subjects", nargs="+", default=list(SUBJECTS), choices=SUBJECTS)
    parser.add_argument("--families", nargs="+", default=list(FAMILIES), choices=FAMILIES)
    parser.add_argument("--mutants", type=int, default=100, help="mutants per family")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--show", type=int, default=5, help="notes shown per outcome")
    args = parser.parse_args(argv)
    bad = 0
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.subjects:
            subject = make_subject(name, tmp)
            tally = fuzz(subject, args.mutants, args.seed, args.families)
            print(report(name, tally, args.show), "\n", flush=True)
            bad += sum(tally.total(o) for o in ("accepted-false", "crash", "query-crash"))
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
