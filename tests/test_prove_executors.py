"""Where a proof's flow batches run (issue 14, item 6): the certificate must not change.

Each cell's flow depends on that cell alone, so a round's batch cut into pieces and run
in other processes (a local process pool, a dask.distributed ``LocalCluster``) must give
the certificate of the proof run in one process, byte for byte apart from the run
summary (wall times). The reference is the in-process run; the model is the SIR
epidemic with an infected cap (Kermack & McKendrick 1927, tests/data/prove_sir_cap.toml),
small enough that the proof takes seconds and large enough that its rounds are cut into
several pieces.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import pytest

from certify import load_model, prove
from certify.certificate import certificate_data
from certify.cli import main
from certify.errors import UsageError
from certify import executors
from certify.executors import DeadlineReached, open_runner
from certify.flow import flow_boxes, join_results
from certify.prove import MIN_PIECE
from certify.taylor import flow_programs
from certify.evaluate import parameter_enclosures

prove_module = sys.modules["certify.prove"]  # the package exports a function of that name

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data"
SIR = DATA / "prove_sir_cap.toml"
DEPTH = 6


def _same(a, b, where="certificate"):
    """Assert two certificate dictionaries are equal, arrays element for element."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), where
        for key in a:
            _same(a[key], b[key], f"{where}.{key}")
    elif isinstance(a, (list, tuple)) and not isinstance(a, str):
        assert len(a) == len(b), where
        for k, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{where}[{k}]")
    elif isinstance(a, np.ndarray):
        assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), where
    else:
        assert a == b, where


def _certificate(proof):
    # the summary holds wall times; everything the checker reads is compared
    return certificate_data(proof, summary={})


@pytest.fixture(scope="module")
def sir():
    return load_model(SIR)


@pytest.fixture(scope="module")
def in_process(sir):
    proof = prove(sir, max_depth=DEPTH, time_limit=1e6)
    # the comparison must cover rounds cut into several pieces
    assert len(proof.leaves) > 4 * MIN_PIECE
    return proof


def test_local_process_pool_gives_the_same_certificate(sir, in_process):
    proof = prove(sir, max_depth=DEPTH, time_limit=1e6, executor="local", workers=2)
    assert proof.rounds == in_process.rounds
    _same(_certificate(proof), _certificate(in_process))


def test_dask_local_cluster_gives_the_same_certificate(sir, in_process):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        proof = prove(sir, max_depth=DEPTH, time_limit=1e6, executor="dask",
                      scheduler=cluster.scheduler_address)
    assert proof.rounds == in_process.rounds
    assert np.array_equal(proof.labelling.label, in_process.labelling.label)
    assert np.array_equal(proof.facts.src, in_process.facts.src)
    assert np.array_equal(proof.facts.dst, in_process.facts.dst)
    _same(_certificate(proof), _certificate(in_process))


def test_rounds_taken_in_small_pieces_give_the_same_certificate(sir, in_process):
    # a round's flows are taken piece by piece (facts, image sets, steps of each piece);
    # pieces of 100 cells must give the proof of the default pieces
    piece = prove_module.MAX_PIECE
    prove_module.MAX_PIECE = 100
    try:
        proof = prove(sir, max_depth=DEPTH, time_limit=1e6)
    finally:
        prove_module.MAX_PIECE = piece
    _same(_certificate(proof), _certificate(in_process))


def test_results_come_in_order_and_the_deadline_cancels_the_rest():
    with open_runner("local", workers=2) as runner:
        assert list(runner.in_order(pow, [(2, k) for k in range(9)])) == \
            [2 ** k for k in range(9)]
        with pytest.raises(DeadlineReached):
            list(runner.in_order(time.sleep, [(1.0,)] * 6, deadline=time.monotonic() + 0.2))


@pytest.mark.parametrize("cores, workers", [(1, None), (2, 2), (None, None), (64, 4)])
def test_flow_workers_are_the_cores_up_to_a_cap(monkeypatch, cores, workers):
    monkeypatch.setattr(executors.os, "cpu_count", lambda: cores)
    assert executors.flow_workers() == workers


@pytest.mark.parametrize("model, states", [(ROOT / "models" / "microbial_food_chain.toml", 3),
                                           (SIR, 2)])
def test_cli_flows_models_of_three_states_on_a_pool_by_default(monkeypatch, tmp_path, model,
                                                               states):
    asked = []

    def record(model, **options):
        asked.append(options)
        return prove(model, **options)

    monkeypatch.setattr(prove_module, "prove", record)
    assert main(["prove", str(model), "--max-depth", "2", "--out", str(tmp_path / "o"),
                 "--quiet"]) == 0
    expected = executors.flow_workers() if states >= 3 else None
    assert asked[0]["workers"] == expected and asked[0]["executor"] == "local"


def test_pieces_joined_equal_the_batch_flowed_whole(sir):
    programs = flow_programs(sir, 4)
    params = parameter_enclosures(sir)
    rng = np.random.default_rng(3)
    lo = rng.uniform([0.0, 0.0], [0.9, 0.09], size=(50, 2))
    hi = lo + [0.05, 0.005]
    whole = flow_boxes(programs, lo, hi, params, min_horizon=0.0, max_horizon=3.0)
    parts = [flow_boxes(programs, lo[k], hi[k], params, min_horizon=0.0, max_horizon=3.0)
             for k in np.array_split(np.arange(50), 3)]
    joined = join_results(parts)
    assert whole.n_steps.sum() > 50  # several steps per box
    for name in ("status", "n_steps", "step_start", "t_lo", "t_hi", "image_lo", "image_hi",
                 "set0_m", "set0_r_lo", "set0_r_hi", "h", "t0_lo", "x_lo", "e_lo", "e_hi",
                 "m", "A", "r_lo", "r_hi", "end_lo", "end_hi"):
        assert np.array_equal(getattr(joined, name), getattr(whole, name), equal_nan=True), name


@pytest.mark.parametrize("options, message", [
    ({"executor": "gpu"}, "executor must be one of local, dask, got 'gpu'"),
    ({"scheduler": "tcp://127.0.0.1:8786"}, "needs the dask executor (--executor dask)"),
    ({"workers": 0}, "workers (--workers) must be a whole number of at least 1"),
    ({"workers": 1.5}, "workers (--workers) must be a whole number of at least 1"),
    ({"executor": "dask", "scheduler": "tcp://127.0.0.1:8786", "workers": 2},
     "a running Dask scheduler brings its own workers"),
])
def test_api_refuses_bad_executor_options(sir, options, message):
    with pytest.raises(UsageError) as error:
        prove(sir, max_depth=3, **options)
    assert message in str(error.value)


@pytest.mark.parametrize("argv, message", [
    (["--scheduler", "tcp://127.0.0.1:8786"], "needs the dask executor (--executor dask)"),
    (["--workers", "0"], "workers (--workers) must be a whole number of at least 1"),
    (["--executor", "dask", "--scheduler", "tcp://127.0.0.1:8786", "--workers", "2"],
     "a running Dask scheduler brings its own workers"),
    (["--executor", "gpu"], "invalid choice: 'gpu'"),
])
def test_cli_bad_executor_options_exit_2(argv, message, tmp_path, capsys):
    code = main(["prove", str(SIR), "--out", str(tmp_path / "never"), "--quiet", *argv])
    err = capsys.readouterr().err
    assert code == 2
    assert message in err
    assert not (tmp_path / "never").exists()
