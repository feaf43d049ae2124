"""The model library: proof time and undecided area next to plain simulation.

Run from the repository root::

    .venv/bin/python benchmarks/library_bench.py [--depths 8 9] [--depth-3d 6] [--repeat 3] [--no-3d]

For each 2D model of the library and each maximum depth D (cells of 1/2^D of each
window side) it runs ``certify.prove`` from scratch with the model's own method
settings, records the label fractions, the wall and CPU time, and how that time
splits between the flow enclosures (``flow_boxes``), the graph work (the successor
lookup and the label fixpoints) and the rest of the loop; it then writes the
certificate (I/O, timed on its own). Plain simulation of the same resolution is
classic RK4 (``certify.simulate``, the same right-hand side program, limits checked
after every step) from the 2^D x 2^D cell centres over the model's settling horizon;
every fixed step costs the same, so the grid is timed over SIM_STEPS steps and scaled.
The 3D model is proved once, at a coarser depth, with the same measurements (its
grid simulation is scaled the same way).

Beside each row stands the mixed floor at depth D (``mixed_floor.py``, ``--floor-cells``
sampled cells, 0 to skip): the share of the window in cells that plain simulation shows
to hold a start that keeps the limits and one that crosses, undecided by any sound
method at that cell size; the RK4 horizon is its T (fates are checked again at 2T).

Peak memory is the process's peak resident set size so far (``resource.getrusage``),
so it never decreases from one row to the next.

The section "Model library" of ``benchmarks/results.md`` is written (or replaced); the
other sections are kept.
"""

from __future__ import annotations

import argparse
import importlib
import os
import resource
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from results_file import measured_on, write_section
import numpy as np

from flow_bench import grid_centres, machine, parameter_bounds
from mixed_floor import floor_note, floor_text, mixed_floor, sample_text

from certify import load_model, prove
from certify.cells import CellTree
from certify.prove import write_proof
from certify.simulate import simulate
from certify.taylor import flow_programs

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results.md"
SECTION = "Model library"
DEPTHS = (8, 9)
DEPTH_3D = 6
SIM_STEPS = 100


@dataclass(frozen=True)
class Case:
    """A library model with the horizon and step of its plain simulation."""

    file: str
    horizon: float    # model time units: long enough for every start to settle or cross
    dt: float         # RK4 step, model time units


CASES_2D = (
    Case("stirred_reactor.toml", horizon=30.0, dt=0.01),
    Case("generator_swing.toml", horizon=10.0, dt=0.002),
    Case("crane_load.toml", horizon=60.0, dt=0.01),
    Case("epidemic_ward.toml", horizon=1000.0, dt=0.1),
    Case("greenhouse_biocontrol.toml", horizon=400.0, dt=0.05),
)
#: The module itself (``certify.prove`` the attribute is the function ``prove``).
prove_module = importlib.import_module("certify.prove")

CASE_3D = Case("microbial_food_chain.toml", horizon=40.0, dt=0.01)


class PhaseTimer:
    """Wall seconds spent inside wrapped functions, by phase name."""

    def __init__(self):
        self.seconds = {}

    def wrap(self, owner, name, phase):
        """Replace ``owner.name`` by a timed wrapper; returns the original."""
        original = getattr(owner, name)

        def timed(*args, **kwargs):
            start = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                self.seconds[phase] = self.seconds.get(phase, 0.0) + time.perf_counter() - start

        setattr(owner, name, timed)
        return original


def time_proof(model, depth, time_limit):
    """Prove `model` to `depth`; fractions, times per phase, certificate I/O, peak memory."""
    timer = PhaseTimer()
    originals = [
        (prove_module, "flow_boxes", timer.wrap(prove_module, "flow_boxes", "flow")),
        (prove_module, "label_cells", timer.wrap(prove_module, "label_cells", "graph")),
        (CellTree, "leaves_meeting", timer.wrap(CellTree, "leaves_meeting", "graph")),
    ]
    try:
        wall, cpu = time.perf_counter(), time.process_time()
        proof = prove(model, max_depth=depth, time_limit=time_limit)
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    finally:
        for owner, name, original in originals:
            setattr(owner, name, original)
    with tempfile.TemporaryDirectory() as folder:
        start = time.perf_counter()
        write_proof(proof, folder, figures=False)
        io = time.perf_counter() - start
        size = os.path.getsize(Path(folder) / "certificate.json.gz")
    return {"depth": depth, "wall": wall, "cpu": cpu, "fractions": dict(proof.fractions),
            "cells": sum(proof.counts.values()), "depth_reached": proof.depth_reached,
            "stop": proof.stop_reason, "flow": timer.seconds.get("flow", 0.0),
            "graph": timer.seconds.get("graph", 0.0), "io": io, "cert_mb": size / 2 ** 20,
            "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


def time_simulation(model, case, depth):
    """Wall and CPU seconds of RK4 from every cell centre over the case's horizon (scaled)."""
    programs = flow_programs(model, 1)
    params = parameter_bounds(model)
    x0 = grid_centres(model, depth)
    wall, cpu = time.perf_counter(), time.process_time()
    simulate(programs.field, x0, params, SIM_STEPS * case.dt, dt=case.dt,
             events=programs.limits)
    scale = case.horizon / (SIM_STEPS * case.dt)
    return (time.perf_counter() - wall) * scale, (time.process_time() - cpu) * scale


def median_proof(model, depth, time_limit, repeat):
    """:func:`time_proof` `repeat` times: medians of the times, the rest of the last run."""
    runs = [time_proof(model, depth, time_limit) for _ in range(repeat)]
    row = dict(runs[-1])
    for key in ("wall", "cpu", "flow", "graph", "io"):
        row[key] = statistics.median(r[key] for r in runs)
    row["repeat"] = repeat
    return row


def measure(case, depths, time_limit, repeat=1, floor_cells=2000):
    """One row per depth for one model (times: medians over `repeat` proofs), with the
    mixed floor of `floor_cells` sampled cells (none when 0)."""
    model = load_model(ROOT / "models" / case.file)
    simulate(flow_programs(model, 1).field, grid_centres(model, 2), parameter_bounds(model),
             case.dt, dt=case.dt)  # warm-up: program compilation
    rows = []
    for depth in depths:
        row = median_proof(model, depth, time_limit, repeat)
        row["sim_wall"], row["sim_cpu"] = time_simulation(model, case, depth)
        row["model"] = case.file
        row["dim"] = len(model.states)
        row["horizon"] = case.horizon
        row["ratio_wall"] = row["sim_wall"] / row["wall"]
        row["ratio_cpu"] = row["sim_cpu"] / row["cpu"]
        row["floor"] = (mixed_floor(model, depth, case.horizon, case.dt, cells=floor_cells)
                        if floor_cells else None)
        print(f"{case.file} depth {depth}: {row['cells']} cells, "
              f"{100 * row['fractions']['undecided']:.2f} % undecided, proof "
              f"{row['wall']:.1f} s wall / {row['cpu']:.1f} s CPU (flow {row['flow']:.1f} s, "
              f"graph {row['graph']:.1f} s), write {row['io']:.1f} s; RK4 grid "
              f"{row['sim_wall']:.0f} s wall; ratio {row['ratio_wall']:.1f}", flush=True)
        rows.append(row)
    return rows


def render(rows, info, load_end):
    """The markdown section."""
    lines = [
        f"## {SECTION}",
        "",
        measured_on(info, load_end, "library_bench.py"),
        "",
        "Each model proved from scratch by `certify.prove` with its own `[settings]` and "
        f"`max_depth` D (cells of 1/2^D of each window side), {rows[0]['repeat']} times per "
        "row: proof, flow, graph and write times are medians. Undecided is the share of the "
        "window's volume. Plain simulation: classic RK4 (`certify.simulate`) with limit "
        "checks after every step, one start per cell (the 2^D cell centres per side), over "
        "the horizon shown, timed over "
        f"{SIM_STEPS} steps and scaled. Ratio = simulation wall time / proof wall time "
        "(CPU ratio in brackets). Flow = wall time inside `flow_boxes`; graph = successor "
        "lookup and label fixpoints; write = writing the certificate (I/O). Peak memory = "
        "peak resident set of the benchmark process so far. "
        + floor_note("depth D"),
        "",
        "| model | dim | D | cell side | cells | undecided % | proof wall (s) "
        "| proof CPU (s) | flow (s) | graph (s) | write (s) | certificate (MB) "
        "| RK4 horizon | RK4 grid wall (s) | ratio | peak memory (MB) "
        "| mixed floor % (95 % CI) | floor sample |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        lines.append(
            f"| {r['model']} | {r['dim']} | {r['depth']} | 1/{2 ** r['depth']} "
            f"| {r['cells']:,} | {100 * r['fractions']['undecided']:.2f} | {r['wall']:.1f} "
            f"| {r['cpu']:.1f} | {r['flow']:.1f} | {r['graph']:.1f} | {r['io']:.1f} "
            f"| {r['cert_mb']:.1f} | {r['horizon']:g} | {r['sim_wall']:,.0f} "
            f"| {r['ratio_wall']:.1f} ({r['ratio_cpu']:.1f}) | {r['peak_mb']:,.0f} "
            + (f"| {floor_text(r['floor'])} | {sample_text(r['floor'])} |" if r["floor"]
               else "| not measured | |"))
    flow = sum(r["flow"] for r in rows)
    graph = sum(r["graph"] for r in rows)
    io = sum(r["io"] for r in rows)
    total = sum(r["wall"] for r in rows) + io
    rest = total - flow - graph - io
    lines += [
        "",
        "Where the time goes (all rows together):",
        "",
        f"- flow enclosures: {100 * flow / total:.0f} % of the wall time (validated Taylor "
        f"steps of every new cell, batched per round);",
        f"- graph: {100 * graph / total:.0f} % (successor lookup of the image boxes and "
        f"the label fixpoints, recomputed every round);",
        f"- I/O: {100 * io / total:.0f} % (writing the gzip-compressed certificate);",
        f"- the rest of the loop: {100 * rest / total:.0f} % (limit checks on the "
        f"tubes, face analysis, volume fractions, bookkeeping).",
    ]
    return "\n".join(lines) + "\n"


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Parameters
    ----------
    argv : list of str, optional
        ``--depths D ...`` for the 2D models (default 8 9), ``--depth-3d D`` (default 6),
        ``--time-limit S`` per proof (default 900 s), ``--repeat N`` proofs per row
        (medians of the times), ``--no-3d`` (2D models only), ``--floor-cells K``
        cells sampled for the mixed floor (default 2000, 0 to skip).

    Returns
    -------
    int
        0.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--depths", type=int, nargs="+", default=list(DEPTHS),
                        help="maximum depths of the 2D proofs (default: 8 9)")
    parser.add_argument("--depth-3d", type=int, default=DEPTH_3D,
                        help=f"maximum depth of the 3D proof (default: {DEPTH_3D})")
    parser.add_argument("--time-limit", type=float, default=900.0,
                        help="time limit of each proof in seconds (default: 900)")
    parser.add_argument("--repeat", type=int, default=1,
                        help="proofs per row; times are medians (default: 1)")
    parser.add_argument("--no-3d", action="store_true",
                        help="measure the 2D models only (no row for the 3D model)")
    parser.add_argument("--floor-cells", type=int, default=2000,
                        help="cells sampled for the mixed floor (default: 2000; 0: skip)")
    args = parser.parse_args(argv)
    info = machine()
    rows = []
    for case in CASES_2D:
        rows += measure(case, args.depths, args.time_limit, args.repeat, args.floor_cells)
    if not args.no_3d:
        rows += measure(CASE_3D, [args.depth_3d], args.time_limit, args.repeat,
                        args.floor_cells)
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    write_section(SECTION, render(rows, info, load_end))
    print(f"wrote section '{SECTION}' of {RESULTS.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
