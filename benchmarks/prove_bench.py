"""Proving the demo map: decided fraction and wall time per depth, next to plain simulation.

Run from the repository root::

    .venv/bin/python benchmarks/prove_bench.py [--depths 6 7 8 9 10]

For each maximum depth D (cells of 1/2^D of each window side) it runs ``certify.prove``
on the demo fermenter from scratch and records the label fractions, the wall and CPU
time. It then times plain simulation of a grid of the same resolution: classic RK4
(``certify.simulate``, the same right-hand side program, limits checked after every step)
from the 2^D x 2^D cell centres with a step of 0.01 h over 60 h, long enough for every
start to settle or cross. Fixed-step RK4 costs the same for every step, so the grids of
depth above 6 are timed over their first SIM_STEPS steps and scaled to the 6000 steps of
the horizon; at depth 6 the whole horizon is run as well, to check the scaling.

The section "Proving the demo map" of ``benchmarks/results.md`` is written (or replaced);
the other sections are kept.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

from results_file import measured_on, write_section
import numpy as np

from flow_bench import grid_centres, machine, parameter_bounds

from certify import load_model, prove
from certify.simulate import simulate
from certify.taylor import flow_programs

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "models" / "fermenter.toml"
RESULTS = ROOT / "benchmarks" / "results.md"
SECTION = "Proving the demo map"
DEPTHS = (6, 7, 8, 9, 10)
HORIZON = 60.0      # h
DT = 0.01           # h
SIM_STEPS = 100     # RK4 steps timed on the larger grids
TARGET = {"depth": 10, "seconds": 60.0, "undecided": 0.01, "speedup": 20.0}


def time_proof(model, depth):
    """Prove the model to `depth`; return fractions, cell counts and times."""
    wall, cpu = time.perf_counter(), time.process_time()
    proof = prove(model, max_depth=depth, time_limit=3600.0)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    return {"depth": depth, "wall": wall, "cpu": cpu, "fractions": dict(proof.fractions),
            "cells": sum(proof.counts.values()), "depth_reached": proof.depth_reached,
            "stop": proof.stop_reason}


def time_simulation(model, depth, n_steps):
    """Wall and CPU seconds of RK4 with limit checks from the grid centres, `n_steps` steps."""
    programs = flow_programs(model, 1)
    params = parameter_bounds(model)
    x0 = grid_centres(model, depth)
    wall, cpu = time.perf_counter(), time.process_time()
    simulate(programs.field, x0, params, n_steps * DT, dt=DT, events=programs.limits)
    return time.perf_counter() - wall, time.process_time() - cpu


def measure(depths):
    """One row per depth: the proof and the simulation of the same resolution."""
    model = load_model(MODEL)
    full_steps = round(HORIZON / DT)
    time_simulation(model, 4, 10)  # warm-up: program compilation
    rows = []
    check = None
    for depth in depths:
        row = time_proof(model, depth)
        wall, cpu = time_simulation(model, depth, SIM_STEPS)
        row["sim_wall"] = wall * full_steps / SIM_STEPS
        row["sim_cpu"] = cpu * full_steps / SIM_STEPS
        if depth == min(depths):
            check = {"depth": depth, "full": time_simulation(model, depth, full_steps)[0],
                     "scaled": row["sim_wall"]}
        row["speedup_wall"] = row["sim_wall"] / row["wall"]
        row["speedup_cpu"] = row["sim_cpu"] / row["cpu"]
        undecided = row["fractions"]["undecided"]
        print(f"depth {depth:>2} (1/{2 ** depth}): {row['cells']:>7} cells, "
              f"{100 * (1 - undecided):.2f} % decided, {100 * undecided:.2f} % undecided, "
              f"proof {row['wall']:.1f} s wall / {row['cpu']:.1f} s CPU; RK4 grid "
              f"{row['sim_wall']:.0f} s wall / {row['sim_cpu']:.0f} s CPU; ratio "
              f"{row['speedup_wall']:.1f} wall / {row['speedup_cpu']:.1f} CPU", flush=True)
        rows.append(row)
    return rows, check


def verdicts(rows):
    """Plain-words verdicts on the issue's targets at the target depth."""
    row = next((r for r in rows if r["depth"] == TARGET["depth"]), None)
    if row is None:
        return [f"Depth {TARGET['depth']} was not run: no verdict on the targets."]
    undecided = row["fractions"]["undecided"]

    def word(ok):
        return "met" if ok else "NOT met"

    return [
        f"- at most {TARGET['seconds']:.0f} s at 1/{2 ** TARGET['depth']} of the side: "
        f"{word(row['wall'] <= TARGET['seconds'])} in wall time ({row['wall']:.1f} s), "
        f"{word(row['cpu'] <= TARGET['seconds'])} in CPU time ({row['cpu']:.1f} s)",
        f"- at most {100 * TARGET['undecided']:.0f} % undecided: "
        f"{word(undecided <= TARGET['undecided'])} ({100 * undecided:.2f} %)",
        f"- at least {TARGET['speedup']:.0f}x faster than plain simulation: "
        f"{word(row['speedup_wall'] >= TARGET['speedup'])} in wall time "
        f"({row['speedup_wall']:.1f}x), {word(row['speedup_cpu'] >= TARGET['speedup'])} "
        f"in CPU time ({row['speedup_cpu']:.1f}x)",
    ]


def render(rows, check, info, load_end):
    """The markdown section."""
    lines = [
        f"## {SECTION}",
        "",
        measured_on(info, load_end, "prove_bench.py"),
        "",
        "Demo fermenter (`models/fermenter.toml`, window [0, 12] g/L x [0, 10] g/L), "
        "`certify.prove` from scratch with `max_depth` D and its other defaults. "
        "Fractions are of the window's area; decided = safe + doomed + outside. "
        f"Plain simulation: classic RK4 (`certify.simulate`) with limit checks after every "
        f"step from the centres of the 2^D x 2^D cells, step {DT} h over {HORIZON:.0f} h "
        f"({round(HORIZON / DT)} steps), timed over {SIM_STEPS} steps and scaled "
        f"(every step costs the same). Ratios = simulation time / proof time, in wall and in "
        f"CPU seconds.",
        "",
        "| D | cell side | cells | safe % | doomed % | outside % | decided % | undecided % "
        "| proof wall (s) | proof CPU (s) | RK4 grid wall (s) | RK4 grid CPU (s) "
        "| ratio wall | ratio CPU |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        f = r["fractions"]
        lines.append(
            f"| {r['depth']} | 1/{2 ** r['depth']} | {r['cells']:,} | {100 * f['safe']:.2f} "
            f"| {100 * f['doomed']:.2f} | {100 * f['outside']:.2f} "
            f"| {100 * (1 - f['undecided']):.2f} | {100 * f['undecided']:.2f} "
            f"| {r['wall']:.1f} | {r['cpu']:.1f} | {r['sim_wall']:,.0f} | {r['sim_cpu']:,.0f} "
            f"| {r['speedup_wall']:.1f} | {r['speedup_cpu']:.1f} |")
    if check is not None:
        lines += ["", f"Scaling check at D = {check['depth']}: the whole horizon took "
                  f"{check['full']:.1f} s wall, the scaled estimate was {check['scaled']:.1f} s."]
    lines += ["", "Targets of issue 4:", ""] + verdicts(rows)
    return "\n".join(lines) + "\n"


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Parameters
    ----------
    argv : list of str, optional
        ``--depths D ...`` (default 6 7 8 9 10).

    Returns
    -------
    int
        0.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--depths", type=int, nargs="+", default=list(DEPTHS),
                        help="maximum depths to prove (default: 6 7 8 9 10)")
    args = parser.parse_args(argv)
    info = machine()
    rows, check = measure(args.depths)
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    write_section(SECTION, render(rows, check, info, load_end))
    print(f"wrote section '{SECTION}' of {RESULTS.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
