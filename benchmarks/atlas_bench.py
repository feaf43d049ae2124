"""Benchmark of the adaptive atlas: where the demo fermenter has a safe state, proven.

The rectangle D in [0.05, 0.35] 1/h, s_in in [3, 13] g/L of the demo fermenter
(`models/fermenter.toml`) holds the washout zone past the fold of the Andrews rate
(D > max mu = 0.25 1/h: no safe state), the bistable zone (s_in above the saddle's
substrate s2(D): the operating point and the washout state are both stable) and the
zone where only the operating point is stable. `certify sweep --adaptive` runs on it at
a resolution of 1/64 of each range with 2 local workers and a time budget; the share of
the area classified is measured. In the same run, plain simulation answers the same
question per parameter pixel: RK4 (`certify.simulate.simulate`) from a grid of starts
inside the limits, "a safe state exists" when some start keeps the limits up to the
horizon. The simulation is timed on every `stride`-th pixel per axis and scaled to all
pixels. Writes the section "Parameter atlas" (with ``--no-structure``) or "Parameter
atlas with structure" of ``benchmarks/results.md`` and, with ``--figure``, copies the
picture to ``docs/atlas-fermenter.png``.

Run ``python benchmarks/atlas_bench.py --help`` for the options.
"""

import argparse
import dataclasses
import datetime
import json
import os
import platform
import shutil
import sys
import tempfile
import time
from fractions import Fraction
from pathlib import Path

import numpy as np

from results_file import write_section
from sweep_bench import _commit, _cpu_name

ROOT = Path(__file__).resolve().parent.parent
FERMENTER = ROOT / "models" / "fermenter.toml"
FIGURE = ROOT / "docs" / "atlas-fermenter.png"
SECTION = "Parameter atlas"
RECTANGLE = {"D": ("0.05", "0.35"), "s_in": ("3", "13")}
RECTANGLE_NOTE = (
    "Why this rectangle: the Andrews rate mu(s) = 0.5 s/(0.5 + s + s^2/2) peaks at "
    "mu(1) = 0.25 1/h, so for D > 0.25 only the washout state is left (a third of the "
    "rectangle, no safe state). For D < 0.25, mu(s) = D has two roots s1 < 1 < s2: the "
    "operating point (s1, 0.5 (s_in - s1)) is stable, and where s_in > s2(D) the washout "
    "state is stable as well (bistable, the upper left part: s2 = 2.62 at D = 0.2, 7.87 at "
    "D = 0.1). s_in starts at 3 so that the operating point keeps the biomass floor "
    "(0.5 (s_in - s1) >= 1) up to the fold and stays below the aeration cap up to "
    "s_in = 13. The column of 1/64 boxes through the fold (D in [0.246875, 0.2515625]) "
    "holds parameter values with a safe state and values without one, so no verdict "
    "can cover it: at most 98.44 % of the area can be classified at this resolution.")


def run_atlas(resolution, workers, budget, out, structure=True):
    """The atlas of the rectangle; returns ``(result, seconds, cpu seconds, loads)``.

    The CPU time is the main process's plus the sum of ``cpu_seconds`` over every box
    analysed (in the workers); ``loads`` are the 1-minute load averages before and after.
    """
    from certify.atlas import atlas
    from certify.model import load_model

    model = load_model(FERMENTER)
    # the model file gives no units; name them for the picture's axes
    units = {"D": "1/h", "s_in": "g/L"}
    model = dataclasses.replace(model, parameters=tuple(
        dataclasses.replace(p, unit=units.get(p.name, p.unit)) for p in model.parameters))
    load = os.getloadavg()[0]
    start, cpu = time.perf_counter(), time.process_time()
    result = atlas(model, RECTANGLE, resolution=resolution, start=4,
                   time_budget=budget, use_map=False, structure=structure, workers=workers,
                   out=out)
    seconds = time.perf_counter() - start
    cpu = time.process_time() - cpu + sum(
        json.loads(path.read_text())["cpu_seconds"]
        for path in (Path(out) / "atlas-boxes").glob("*.json"))
    return result, seconds, cpu, (load, os.getloadavg()[0])


def _pixels(resolution, stride):
    (dlo, dhi), (slo, shi) = [(float(Fraction(a)), float(Fraction(b)))
                              for a, b in RECTANGLE.values()]
    k = (np.arange(0, resolution, stride) + 0.5) / resolution
    return [(dlo + (dhi - dlo) * a, slo + (shi - slo) * b) for a in k for b in k]


def run_simulation(resolution, stride, starts, t_end, dt):
    """Simulated verdicts on every `stride`-th pixel; returns ``(verdicts, seconds)``."""
    from certify.model import load_model
    from certify.program import compile_program
    from certify.simulate import simulate

    model = load_model(FERMENTER)
    # every parameter an input (the proof programs have the numbers built in)
    inputs = tuple(model.state_symbols) + tuple(model.parameter_symbols)
    field = compile_program(list(model.equations), inputs)
    limits = compile_program([c.g for c in model.constraints], inputs)
    names = [p.name for p in model.parameters]
    base = [float(p.lo) for p in model.parameters]
    # starts strictly inside the limits s <= 9, 1 <= x <= 9
    grid = np.stack(np.meshgrid(np.linspace(0, 9, starts + 2)[1:-1],
                                np.linspace(1, 9, starts + 2)[1:-1], indexing="ij"), -1)
    x0 = grid.reshape(-1, 2)
    verdicts = {}
    start = time.perf_counter()
    for D, s_in in _pixels(resolution, stride):
        params = list(base)
        params[names.index("D")], params[names.index("s_in")] = D, s_in
        run = simulate(field, x0, params, t_end, dt=dt, events=limits)
        verdicts[(D, s_in)] = "safe" if np.any(~run.crossed & run.finite) else "none"
    return verdicts, time.perf_counter() - start


def _verdict_at(boxes, D, s_in):
    for e in boxes:
        (a, b), (c, d) = e["params"]["D"], e["params"]["s_in"]
        if a <= D <= b and c <= s_in <= d:
            return e["verdict"]
    return None


def section_text(args, result, seconds, cpu, loads, sim, sim_seconds, commit):
    """The markdown of the section (heading included)."""
    n_pixels = args.resolution ** 2
    sampled = len(sim)
    scaled = sim_seconds * n_pixels / sampled
    agree = disagree = 0
    for (D, s_in), verdict in sim.items():
        proven = _verdict_at(result.boxes, D, s_in)
        if proven in ("safe", "none"):
            agree += proven == verdict
            disagree += proven != verdict
    by = {}
    for e in result.boxes:
        key = (e["verdict"], e["by"] or "-")
        by[key] = by.get(key, 0) + 1
    classified = result.areas["safe"] + result.areas["none"]
    shown = [e for e in result.boxes if e["structure"] is not None]
    lines = [
        f"## {_section(args)}",
        "",
        f"`benchmarks/atlas_bench.py`: `certify sweep --adaptive` on the demo fermenter over "
        f"D in [{RECTANGLE['D'][0]}, {RECTANGLE['D'][1]}] 1/h and s_in in "
        f"[{RECTANGLE['s_in'][0]}, {RECTANGLE['s_in'][1]}] g/L, resolution 1/{args.resolution} "
        f"of each range, starting grid 4 x 4, {args.workers} local workers, time budget "
        f"{args.budget:.0f} s, no maps (the cheap tests only), "
        + ("no equilibrium structure (`--no-structure`)." if args.no_structure
           else "equilibrium structure proven for every leaf."),
        "",
        f"- machine: {_cpu_name()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"{platform.system()}; load average {loads[0]:.1f} before the atlas and "
        f"{loads[1]:.1f} after it (shared machine: other jobs ran at the same time)",
        f"- date: {datetime.date.today().isoformat()}, commit {commit}",
        "",
        "| | value |",
        "| --- | --- |",
        f"| wall time of the atlas | {seconds:.1f} s |",
        f"| CPU time of the atlas (main process and every box, all workers) | {cpu:.1f} s |",
        f"| CPU time / (wall time x workers) (near 1 on an otherwise idle machine; lower: "
        f"the wall time is inflated by other jobs) | {cpu / (seconds * args.workers):.2f} |",
        f"| status | {result.message} |",
        f"| area: a safe state exists (proven) | {100 * result.areas['safe']:.2f} % |",
        f"| area: no safe state (proven) | {100 * result.areas['none']:.2f} % |",
        f"| area: undetermined | {100 * result.areas['undetermined']:.2f} % |",
        f"| area classified | {100 * classified:.2f} % |",
        f"| leaves / boxes analysed | {len(result.boxes)} / {result.n_analysed} |",
        *([] if args.no_structure else [
            f"| leaves with their equilibrium structure proven (their area) | {len(shown)} of "
            f"{len(result.boxes)} ({100 * sum(e['area'] for e in shown):.1f} %) |"]),
        f"| simulation, {sampled} of {n_pixels} pixels ({args.starts} x {args.starts} starts, "
        f"RK4 dt {args.dt} h to {args.horizon:.0f} h) | {sim_seconds:.1f} s |",
        f"| simulation scaled to all {n_pixels} pixels | {scaled:.1f} s |",
        f"| atlas time / simulation time (all pixels) | {seconds / scaled:.2f} |",
        f"| sampled pixels where a proven verdict and the simulation agree / disagree | "
        f"{agree} / {disagree} |",
        "",
        "Leaves by verdict and proof: " + ", ".join(
            f"{verdict} by {how}: {count}" for (verdict, how), count in sorted(by.items())) + ".",
        "",
        "The simulation proves nothing: a start that keeps the limits up to the horizon may "
        "still cross later, and a grid of starts can miss a small safe set. The atlas "
        "verdicts hold for every parameter value of each box.",
        "",
        RECTANGLE_NOTE,
        "",
        f"Target (at least 95 % of the area classified within 10 minutes on 2 cores): "
        f"{'met' if classified >= 0.95 and seconds <= 600 else 'not met'} "
        f"({100 * classified:.1f} % in {seconds:.0f} s).",
        "",
    ]
    return "\n".join(lines)


def _section(args):
    return SECTION if args.no_structure else f"{SECTION} with structure"


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Returns
    -------
    int
        0.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--resolution", type=int, default=64)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--budget", type=float, default=540.0,
                        help="time budget of the atlas in seconds (default 540)")
    parser.add_argument("--stride", type=int, default=8,
                        help="simulate every STRIDE-th pixel per axis (default 8)")
    parser.add_argument("--starts", type=int, default=8, help="starts per state (default 8)")
    parser.add_argument("--horizon", type=float, default=200.0, help="hours (default 200)")
    parser.add_argument("--dt", type=float, default=0.15,
                        help="RK4 step in hours (default 0.15)")
    parser.add_argument("--no-structure", action="store_true",
                        help="verdicts only (the structure proofs cost most of the time)")
    parser.add_argument("--keep", metavar="DIR",
                        help="write the atlas folder to DIR (a new folder) and keep it")
    parser.add_argument("--figure", action="store_true",
                        help=f"copy atlas.png to {FIGURE.relative_to(ROOT)}")
    args = parser.parse_args(argv)
    commit = _commit()
    with tempfile.TemporaryDirectory(prefix="certify-atlas-bench-") as tmp:
        out = Path(args.keep) if args.keep else Path(tmp) / "atlas"
        result, seconds, cpu, loads = run_atlas(args.resolution, args.workers, args.budget,
                                                out, not args.no_structure)
        print(f"atlas: {seconds:.1f} s wall, {cpu:.1f} s CPU, {result.areas}", file=sys.stderr)
        if args.figure:
            shutil.copyfile(result.out / "atlas.png", FIGURE)
    sim, sim_seconds = run_simulation(args.resolution, args.stride, args.starts, args.horizon,
                                      args.dt)
    write_section(_section(args), section_text(args, result, seconds, cpu, loads, sim,
                                               sim_seconds, commit))
    print(f"wrote the section '{_section(args)}' of benchmarks/results.md", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
