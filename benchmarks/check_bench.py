"""Checking against proving: the independent checker on the demo map.

Run from the repository root::

    .venv/bin/python benchmarks/check_bench.py [--depths 8 10] [--jobs N] [--no-profile]
                                               [--no-revision]

For each maximum depth D it proves the demo fermenter from scratch (``certify.prove``, one
process), writes the certificate, and checks it with ``check_certificate`` using N worker
processes (default: all cores). It records wall and CPU time of both (the checker's CPU
time includes its workers), the number of cells, and how many cells the float pass could
not verify and the arb passes re-checked (balls, finer pieces, and the exact-endpoint
fallback).

At the last depth it also profiles the check in one process (cProfile; the top lines by
own time go into the section), and times a regression check (``check_certificate(...,
model=REVISED)``, N workers) of the certificate against the model with one parameter
changed (``D = 0.2`` to ``0.21``) beside a new proof of the revised model to the same depth.

The section "Checker" of ``benchmarks/results.md`` is written (or replaced); the other
sections are kept.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import pstats
import resource
import sys
import tempfile
import time
from pathlib import Path

from results_file import measured_on, write_section
from flow_bench import machine

from certify import check_certificate, load_model, prove
from certify.certificate import certificate_data, write_certificate

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "models" / "fermenter.toml"
RESULTS = ROOT / "benchmarks" / "results.md"
SECTION = "Checker"
DEPTHS = (8, 10)
#: Issue 17: checking takes at most the proving time (wall, 2 cores).
TARGET_RATIO = 1.0
#: The revision of the regression check: one parameter of the demo changed.
REVISION = ("D = 0.2\n", "D = 0.21\n")
PROFILE_LINES = 14


def _cpu():
    own = resource.getrusage(resource.RUSAGE_SELF)
    children = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def measure(depth, jobs, folder):
    """Prove to `depth`, write the certificate, check it; return the timings."""
    model = load_model(MODEL)
    wall, cpu = time.perf_counter(), _cpu()
    proof = prove(model, max_depth=depth, time_limit=3600.0)
    prove_wall, prove_cpu = time.perf_counter() - wall, _cpu() - cpu
    path = Path(folder) / f"certificate-{depth}.json.gz"
    data = certificate_data(proof, {})
    steps = data["cells"]["step_h"]["shape"][0]
    write_certificate(path, data)
    wall, cpu = time.perf_counter(), _cpu()
    result = check_certificate(path, jobs=jobs)
    check_wall, check_cpu = time.perf_counter() - wall, _cpu() - cpu
    return {"depth": depth, "path": path, "cells": result.cells_checked, "valid": result.valid,
            "ball": result.ball_cells, "refined": result.refined_cells,
            "fallback": result.fallback_cells,
            "prove_wall": prove_wall,
            "prove_cpu": prove_cpu, "check_wall": check_wall, "check_cpu": check_cpu,
            "steps": steps, "size": path.stat().st_size}


def profile(path):
    """The top lines (own time) of a one-process cProfile of checking `path`."""
    profiler = cProfile.Profile()
    profiler.runcall(check_certificate, path, jobs=1)
    text = io.StringIO()
    stats = pstats.Stats(profiler, stream=text)
    stats.strip_dirs().sort_stats("tottime").print_stats(PROFILE_LINES)
    lines = text.getvalue().splitlines()
    start = next(k for k, line in enumerate(lines) if line.lstrip().startswith("ncalls"))
    total = next(line for line in lines if "function calls" in line).strip()
    return [total, ""] + lines[start:start + PROFILE_LINES + 1]


def revision(path, depth, jobs, folder):
    """Regression check of `path` against the revised demo, and a new proof of it."""
    text = MODEL.read_text()
    assert REVISION[0] in text
    revised = Path(folder) / "fermenter_revised.toml"
    revised.write_text(text.replace(*REVISION))
    wall, cpu = time.perf_counter(), _cpu()
    result = check_certificate(path, model=revised, jobs=jobs)
    check_wall, check_cpu = time.perf_counter() - wall, _cpu() - cpu
    wall, cpu = time.perf_counter(), _cpu()
    prove(load_model(revised), max_depth=depth, time_limit=3600.0)
    prove_wall, prove_cpu = time.perf_counter() - wall, _cpu() - cpu
    return {"claims": result.claims, "check_wall": check_wall, "check_cpu": check_cpu,
            "prove_wall": prove_wall, "prove_cpu": prove_cpu}


def render(rows, jobs, info, load_end, profile_lines=None, revised=None):
    lines = [
        f"## {SECTION}",
        "",
        measured_on(info, load_end, "check_bench.py"),
        "",
        f"Demo fermenter (`models/fermenter.toml`), proved from scratch to depth D in one "
        f"process, then `check_certificate` with {jobs} worker processes. The checker "
        f"recomputes every stored step of every cell whose claims need it with "
        f"outward-rounded float64 intervals (`certify/check/_floats.py`, numpy arrays); "
        f"cells whose claims do not verify that way are recomputed with arb balls (wide "
        f"boxes in pieces; ball cells), then with finer pieces (refined), and those that "
        f"still do not with exact-endpoint arithmetic (the fallback). Check CPU includes "
        f"the workers. Ratio = check time / proof time.",
        "",
        "| D | cells | stored steps | certificate (MB) | valid | ball cells | refined cells | "
        "fallback cells | fallback % | prove wall (s) | prove CPU (s) | check wall (s) | "
        "check CPU (s) | ratio wall | ratio CPU |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        lines.append(
            f"| {r['depth']} | {r['cells']:,} | {r['steps']:,} | {r['size'] / 1e6:.1f} | "
            f"{'yes' if r['valid'] else 'NO'} | {r['ball']:,} | {r['refined']:,} | "
            f"{r['fallback']:,} | "
            f"{100 * r['fallback'] / r['cells']:.2f} | {r['prove_wall']:.1f} | "
            f"{r['prove_cpu']:.1f} | {r['check_wall']:.1f} | {r['check_cpu']:.1f} | "
            f"{r['check_wall'] / r['prove_wall']:.2f} | {r['check_cpu'] / r['prove_cpu']:.2f} |")
    last = rows[-1]
    word = {True: "met", False: "NOT met"}
    lines += [
        "",
        f"Target of issue 17 at depth {last['depth']}: checking takes at most the proving "
        f"time: {word[last['check_wall'] <= TARGET_RATIO * last['prove_wall']]} in wall "
        f"time ({last['check_wall'] / last['prove_wall']:.2f}x); CPU ratio "
        f"{last['check_cpu'] / last['prove_cpu']:.2f}x (checking runs in {jobs} worker "
        f"processes and proving in one, so on an idle machine the wall ratio is about the "
        f"CPU ratio divided by {jobs}; other jobs on the cores skew it either way).",
        "",
        "Where the time goes: the first pass used to evaluate about 1,050 arb-ball "
        "operations per cell-step, each a Python object per element (about 0.2 us); at "
        "commit `9020866` (arb balls first) depth 10 took 21.6 s wall and 39.7 s CPU to "
        "check (2.06x and 3.79x the proof), with 580 cells refined and 3 in the fallback. "
        "The float pass does the same operations on float64 arrays (a few ns per element "
        "and operation) in one chunk of cells per worker, so numpy gets thousands of "
        "elements per call and the fixed cost per call is paid once per step of the "
        "chunk's longest cell; every basic operation is correctly "
        "rounded by IEEE 754 and stepped outward, elementary functions and constants come "
        "from python-flint. What is left is mostly Python: exact rationals for the cells, "
        "the images on the grid and the claims' time sums, and the per-call cost of the "
        "program loop.",
        "",
    ]
    if profile_lines:
        lines += [f"cProfile of the check at depth {last['depth']} in one process (top "
                  f"{PROFILE_LINES} by own time; `_sum`, `_step`, `mul`, `reduce` (its "
                  f"min and max) are the float interval kernels, `fractions.py` the exact "
                  f"rationals of the cells, images and time sums, `_at_most` the claims' "
                  f"time comparisons):", "", "```", *profile_lines, "```", ""]
    if revised:
        held = revised["claims"]["held"] if revised["claims"] else {}
        failed = revised["claims"]["failed"] if revised["claims"] else {}
        lines += [
            f"Regression check at depth {last['depth']}: the certificate against the demo "
            f"with `{REVISION[0].strip()}` changed to `{REVISION[1].strip()}` "
            f"(`certify check CERT --model REVISED`, {jobs} workers) beside a new proof of "
            f"the revised model to the same depth (one process). Against a different model "
            f"the float pass evaluates wide boxes in the ball pass's pieces and is the only "
            f"pass (at commit `9020866` the ball pass was: 22.6 s wall, 42.8 s CPU, claims "
            f"still holding: safe 96, doomed 14, outside 256):",
            "",
            "| | wall (s) | CPU (s) |",
            "|---|---|---|",
            f"| check --model | {revised['check_wall']:.1f} | {revised['check_cpu']:.1f} |",
            f"| new proof | {revised['prove_wall']:.1f} | {revised['prove_cpu']:.1f} |",
            "",
            f"Claims that still hold: {held}; not re-verified with the stored steps: "
            f"{failed}. At least as fast as a new proof: "
            f"{word[revised['check_wall'] <= revised['prove_wall']]} in wall time "
            f"({revised['check_wall'] / revised['prove_wall']:.2f}x; CPU "
            f"{revised['check_cpu'] / revised['prove_cpu']:.2f}x).",
            ""]
    return "\n".join(lines + [""])


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Returns
    -------
    int
        0 when every certificate checked valid, 1 otherwise.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--depths", type=int, nargs="+", default=list(DEPTHS))
    parser.add_argument("--jobs", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--no-profile", action="store_true")
    parser.add_argument("--no-revision", action="store_true")
    args = parser.parse_args(argv)
    info = machine()
    rows = []
    profile_lines = revised = None
    with tempfile.TemporaryDirectory() as folder:
        for depth in args.depths:
            rows.append(measure(depth, args.jobs, folder))
            print({k: v for k, v in rows[-1].items() if k != "path"}, flush=True)
        if not args.no_revision:
            revised = revision(rows[-1]["path"], rows[-1]["depth"], args.jobs, folder)
            print(revised, flush=True)
        if not args.no_profile:
            profile_lines = profile(rows[-1]["path"])
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    write_section(SECTION, render(rows, args.jobs, info, load_end, profile_lines, revised))
    print(f"wrote section '{SECTION}' of {RESULTS.relative_to(ROOT)}")
    return 0 if all(r["valid"] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
