"""Tests of parameter sweeps (certify/sweep.py, ``certify sweep``), issue 8.

The reference model is the harvested logistic stock in tests/data/sweep_fishery.toml
(Schaefer 1954 (mem)): x' = x (1 - x) - H with the floor x >= m = 0.1 on the window
[0.1, 1.2]. Closed forms by the quadratic formula: for H < 1/4 the equilibria are
x- = (1 - sqrt(1 - 4H))/2 (unstable) and x+ = (1 + sqrt(1 - 4H))/2 (stable), and the
states that keep the floor forever are [max(x-, m), 1.2]; for H > 1/4, x' <= 1/4 - H < 0,
so no state keeps it. Budgets are depth-only so that results are reproducible.
"""

import json
import math
from fractions import Fraction
from pathlib import Path

import pytest

from certify.cli import main
from certify.errors import UsageError
from certify.model import load_model, parse_model
from certify.sweep import SWEEP_FORMAT, sweep

FISHERY = Path(__file__).resolve().parent / "data" / "sweep_fishery.toml"
VARY = {"H": ("0.05", "0.41", 6)}
DEPTH = 7
WINDOW = (0.1, 1.2)
FLOOR = 0.1


def _low_root(h):
    return (1 - math.sqrt(1 - 4 * h)) / 2


def _high_root(h):
    return (1 + math.sqrt(1 - 4 * h)) / 2


def _true_safe_fraction(h):
    """Closed form: the part of the window that keeps the floor forever at harvest h."""
    if h > 0.25:
        return 0.0
    start = max(_low_root(h), FLOOR)
    return (WINDOW[1] - start) / (WINDOW[1] - WINDOW[0])


def _without_times(path):
    data = json.loads(Path(path).read_text())
    for entry in data["entries"]:
        entry.pop("seconds")
    return data


@pytest.fixture(scope="module")
def fishery():
    return load_model(FISHERY)


@pytest.fixture(scope="module")
def local_run(fishery, tmp_path_factory):
    """One uninterrupted sweep of H on the local process pool."""
    out = tmp_path_factory.mktemp("local") / "sweep"
    return sweep(fishery, VARY, max_depth=DEPTH, workers=2, out=out)


def test_local_sweep_writes_every_box(local_run):
    assert local_run.success and local_run.status == 0
    assert local_run.n_boxes == 6 and local_run.n_resumed == 0
    data = json.loads((local_run.out / "sweep.json").read_text())
    assert data["format"] == SWEEP_FORMAT and data["varied"] == ["H"]
    assert (local_run.out / "sweep.png").stat().st_size > 0
    # the boxes tile [0.05, 0.41] exactly, in order
    edges = [Fraction(e["params_exact"]["H"][0]) for e in data["entries"]]
    edges.append(Fraction(data["entries"][-1]["params_exact"]["H"][1]))
    assert edges == [Fraction(5, 100) + k * Fraction(6, 100) for k in range(7)]
    assert [e["index"] for e in data["entries"]] == [[k] for k in range(6)]


def test_harvest_above_msy_has_no_safe_state(local_run):
    # Schaefer 1954 (mem): above rK/4 = 0.25 every stock falls; margin: whole box above 0.26
    above = [e for e in local_run.entries if e["params"]["H"][0] > 0.26]
    assert len(above) == 2
    for entry in above:
        assert entry["no_safe_state"] and not entry["safe_state_exists"]
        assert entry["safe_bounds"] == [0.0, 0.0]
        # no real root of x(1 - x) = H: no equilibrium, and the search says so
        assert entry["equilibria"]["count"] == 0 and entry["equilibria"]["complete"]


def test_harvest_well_below_msy_has_safe_states(local_run):
    below = [e for e in local_run.entries if e["params"]["H"][1] < 0.2]
    assert len(below) == 2
    for entry in below:
        assert FLOOR < _high_root(entry["params"]["H"][1])  # the floor is below x+
        assert entry["safe_state_exists"] and not entry["no_safe_state"]
        # quadratic formula: one stable (x+) and one unstable (x-) equilibrium
        assert entry["equilibria"]["by_stability"]["stable"] == 1
        assert entry["equilibria"]["by_stability"]["unstable"] == 1


def test_safe_bounds_enclose_closed_form(local_run):
    # the lower bound holds for every H of the box, the upper bound for some H of it
    for entry in local_run.entries:
        h_lo, h_hi = entry["params"]["H"]
        lower, upper = entry["safe_bounds"]
        assert 0 <= lower <= upper <= 1
        assert lower <= _true_safe_fraction(h_hi) + 1e-12
        assert upper >= _true_safe_fraction(h_lo) - 1e-12
        assert upper - lower >= entry["fractions"]["undecided"] - 1e-12


def test_dask_cluster_gives_the_same_sweep(fishery, local_run, tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        result = sweep(fishery, VARY, max_depth=DEPTH, executor="dask",
                       scheduler=cluster.scheduler_address, out=tmp_path / "dask")
    assert result.success
    assert _without_times(result.out / "sweep.json") == _without_times(local_run.out / "sweep.json")


def test_interrupted_then_resumed_sweep_equals_uninterrupted(fishery, local_run, tmp_path):
    out = tmp_path / "resumed"

    def interrupt_after_two(n_done, n_boxes):
        if n_done >= 2:
            raise KeyboardInterrupt

    first = sweep(fishery, VARY, max_depth=DEPTH, workers=2, out=out, progress=interrupt_after_two)
    assert first.status == 1 and not first.success
    assert 2 <= len(first.entries) < 6
    assert not (out / "sweep.json").exists()
    second = sweep(fishery, VARY, max_depth=DEPTH, workers=2, out=out)
    assert second.success and second.n_resumed == len(first.entries)
    assert _without_times(out / "sweep.json") == _without_times(local_run.out / "sweep.json")


def test_rerun_redoes_only_missing_boxes(fishery, local_run, tmp_path):
    import shutil

    out = tmp_path / "copy"
    shutil.copytree(local_run.out, out)
    (out / "sweep.json").unlink()
    (out / "boxes" / "0003.json").unlink()
    calls = []
    result = sweep(fishery, VARY, max_depth=DEPTH, workers=1, out=out,
                   progress=lambda n_done, n_boxes: calls.append(n_done))
    assert result.n_resumed == 5 and calls == [5, 6]
    assert _without_times(out / "sweep.json") == _without_times(local_run.out / "sweep.json")


def test_other_settings_in_the_same_folder_are_refused(fishery, local_run):
    with pytest.raises(UsageError, match=r"holds a sweep with other settings \(max_depth\)"):
        sweep(fishery, VARY, max_depth=DEPTH + 1, out=local_run.out)
    with pytest.raises(UsageError, match=r"other settings \(vary\)"):
        sweep(fishery, {"H": ("0.05", "0.41", 5)}, max_depth=DEPTH, out=local_run.out)


def test_two_parameters_with_certificates(fishery, tmp_path):
    from certify.certificate import read_certificate

    result = sweep(fishery, {"H": ("0.05", "0.35", 2), "m": ("0.1", "0.3", 2)}, max_depth=4,
                   workers=2, out=tmp_path / "two", keep_certificates=True)
    assert result.success and result.names == ("H", "m")
    assert [e["index"] for e in result.entries] == [[0, 0], [0, 1], [1, 0], [1, 1]]
    assert (result.out / "sweep.png").stat().st_size > 0
    for entry in result.entries:
        certificate = read_certificate(result.out / "boxes" / entry["key"] / "certificate.json.gz")
        boxes = {p.name: [p.lo, p.hi] for p in certificate.model.parameters}
        for name in ("H", "m"):
            assert boxes[name] == [Fraction(b) for b in entry["params_exact"][name]]


def test_dask_local_cluster_started_by_sweep(fishery, local_run, tmp_path):
    pytest.importorskip("distributed")
    result = sweep(fishery, {"H": ("0.29", "0.41", 2)}, max_depth=DEPTH, executor="dask",
                   workers=1, out=tmp_path / "own-cluster")
    assert result.success
    # the same boxes as the last two of the local run (same edges, same budget)
    expected = [{k: v for k, v in e.items() if k not in ("seconds", "key", "index")}
                for e in local_run.entries[4:]]
    assert [{k: v for k, v in e.items() if k not in ("seconds", "key", "index")}
            for e in result.entries] == expected


INTERVAL_MODEL = """\
[model]
name = "stock with an uncertain growth rate"
[states]
x = [0.1, 1.2]
[parameters]
r = { range = [0.9, 1.1] }
H = 0.1
[equations]
x = "r*x*(1 - x) - H"
[constraints]
floor = "x >= 0.1"
"""


@pytest.mark.parametrize("argv, message", [
    (["--vary", "HH=0.1:0.2:3"], "unknown parameter 'HH' (did you mean 'H'?)"),
    (["--vary", "H=0.3:0.2:3"], "parameter 'H': lo 0.3 is above hi 0.2"),
    (["--vary", "H=0.2:0.2:3"], "parameter 'H': the sweep range is empty"),
    (["--vary", "H=0.1:0.2:0"], "N must be a whole number of boxes, at least 1"),
    (["--vary", "H=0.1:0.2:2.5"], "N must be a whole number of boxes, at least 1"),
    (["--vary", "H=0.1:0.2"], "write NAME=LO:HI:N"),
    (["--vary", "H0.1:0.2:3"], "write NAME=LO:HI:N"),
    (["--vary", "H=a:0.2:3"], "LO and HI must be numbers"),
    (["--vary", "H=0:0.1:2", "--vary", "m=0:0.1:2", "--vary", "r=1:2:2"],
     "at most 2 parameters can be swept, got 3"),
    (["--vary", "H=0:0.1:2", "--vary", "H=0.1:0.2:2"], "parameter 'H' is given twice"),
    ([], "give the parameter to sweep with --vary"),
    (["--vary", "H=0:0.1:2", "--scheduler", "tcp://127.0.0.1:8786"],
     "needs the dask executor (--executor dask)"),
    (["--vary", "H=0:0.1:2", "--workers", "0"], "workers (--workers) must be a whole number"),
    (["--vary", "H=0:0.1:2", "--max-depth", "-1"], "max_depth (--max-depth) must be"),
])
def test_bad_input_exits_2_with_one_line(argv, message, capsys, tmp_path):
    code = main(["sweep", str(FISHERY), "--out", str(tmp_path / "never"), *argv])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("certify: error: ") and err.count("\n") == 1
    assert message in err
    assert not (tmp_path / "never").exists()


def test_sweeping_an_interval_parameter_is_refused(tmp_path, capsys):
    path = tmp_path / "uncertain.toml"
    path.write_text(INTERVAL_MODEL)
    code = main(["sweep", str(path), "--vary", "r=0.8:1.2:2", "--out", str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert code == 2
    assert "parameter 'r' is already the interval [0.9, 1.1] in the model" in err


def test_api_refuses_bad_box_counts():
    model = parse_model(INTERVAL_MODEL)
    with pytest.raises(UsageError, match="number of boxes must be a whole number"):
        sweep(model, {"H": (0, 1, 2.0)})
    with pytest.raises(UsageError, match="at most 10,000 are allowed"):
        sweep(model, {"H": (0, 1, 20_000)})


def test_cli_prints_table_and_json(local_run, capsys):
    # rerunning the finished sweep resumes every box: nothing is recomputed
    argv = ["sweep", str(FISHERY), "--vary", "H=0.05:0.41:6", "--max-depth", str(DEPTH),
            "--out", str(local_run.out), "--quiet"]
    assert main(argv) == 0
    assert capsys.readouterr().out == ""
    assert main(argv[:-1] + ["--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed == json.loads((local_run.out / "sweep.json").read_text())
    assert main(argv[:-1]) == 0
    table = capsys.readouterr().out
    assert "no safe state" in table and "safe states exist" in table
    assert "6 boxes (6 resumed)" in table
