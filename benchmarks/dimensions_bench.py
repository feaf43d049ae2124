"""Three and four states: the library's 3D and 4D models proved at their own budgets.

Run from the repository root::

    .venv/bin/python benchmarks/dimensions_bench.py [--models lake_plankton] \\
        [--time-limit 120] [--max-depth 5] [--repeat 3]

For each model of ``models/`` with three or more states (or those named by
``--models``) it runs ``certify.prove`` from scratch with the model's own ``[settings]``
(``--time-limit`` and ``--max-depth`` override the budget), each run in a fresh Python
process so that its peak resident memory (``resource.getrusage``) belongs to that proof
alone. It records the label fractions, wall and CPU seconds, the certificate size and
the stop reason. With ``--repeat N`` every model is proved N times and the median wall
and CPU times are shown (the fractions of one deterministic run do not change).

Plain simulation of the same resolution is classic RK4 (``certify.simulate``, the same
right-hand side program, limits checked after every step) from the centres of the
2^D cells per side (D the deepest level the proof reached), over a horizon long enough
for those starts to settle or cross; every step costs the same, so the grid is timed
over a fixed number of steps and scaled (as in ``library_bench.py``).

Beside each row stands the mixed floor at the depth reached (``mixed_floor.py``): the
share of the window in cells that plain simulation shows to hold a start that keeps the
limits and one that crosses, undecided by any sound method at that cell size; the RK4
horizon below is its T (fates are checked again at 2T).

The section "Three and four states" of ``benchmarks/results.md`` is written (or
replaced) with the rows of this run; the other sections are kept.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
from pathlib import Path

from results_file import measured_on, write_section

from flow_bench import machine
from library_bench import Case, time_proof, time_simulation
from mixed_floor import floor_note, floor_text, mixed_floor, sample_text

from certify import load_model

ROOT = Path(__file__).resolve().parent.parent
SECTION = "Three and four states"

#: Horizon and RK4 step of the plain simulation per model (model time units).
CASES = {
    "microbial_food_chain.toml": Case("microbial_food_chain.toml", horizon=60.0, dt=0.01),
    "chemostat_competition.toml": Case("chemostat_competition.toml", horizon=80.0, dt=0.01),
    "lake_plankton.toml": Case("lake_plankton.toml", horizon=100.0, dt=0.01),
    "two_generators.toml": Case("two_generators.toml", horizon=10.0, dt=0.002),
}


def library_models():
    """File names of the library models with three or more states."""
    return [p.name for p in sorted((ROOT / "models").glob("*.toml"))
            if len(load_model(p).states) >= 3]


def prove_once(name, depth, time_limit):
    """Prove one model in a fresh process; the row of :func:`library_bench.time_proof`."""
    command = [sys.executable, __file__, "--one", name]
    if time_limit is not None:
        command += ["--time-limit", repr(time_limit)]
    if depth is not None:
        command += ["--max-depth", str(depth)]
    out = subprocess.run(command, capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONPATH": os.pathsep.join(
                             filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))})
    return json.loads(out.stdout.strip().splitlines()[-1])


def _one(name, depth, time_limit):
    """Child process: prove `name` and print the row as one JSON line."""
    model = load_model(ROOT / "models" / name)
    depth = depth if depth is not None else model.settings.get("max_depth", 10)
    if time_limit is None:
        time_limit = model.settings.get("time_limit", 300.0)
    row = time_proof(model, depth, time_limit)
    row["time_limit"] = time_limit
    print(json.dumps(row))


def measure(name, depth, time_limit, repeat, floor_cells=2000):
    """One row per model: medians of wall and CPU over `repeat` proofs, RK4 at the same
    resolution, the mixed floor of `floor_cells` sampled cells (none when 0)."""
    runs = [prove_once(name, depth, time_limit) for _ in range(repeat)]
    row = dict(runs[-1])
    row["wall"] = statistics.median(r["wall"] for r in runs)
    row["cpu"] = statistics.median(r["cpu"] for r in runs)
    row["peak_mb"] = max(r["peak_mb"] for r in runs)
    model = load_model(ROOT / "models" / name)
    case = CASES.get(name, Case(name, horizon=100.0, dt=0.01))
    row["sim_wall"], row["sim_cpu"] = time_simulation(model, case, row["depth_reached"])
    row["floor"] = (mixed_floor(model, row["depth_reached"], case.horizon, case.dt,
                                cells=floor_cells) if floor_cells else None)
    row.update(model=name, dim=len(model.states), horizon=case.horizon, repeat=repeat)
    f = row["fractions"]
    print(f"{name}: D {row['depth_reached']}, {row['cells']:,} cells, undecided "
          f"{100 * f['undecided']:.1f} %, safe {100 * f['safe']:.1f} %, doomed "
          f"{100 * f['doomed']:.1f} %; proof {row['wall']:.1f} s wall / {row['cpu']:.1f} s "
          f"CPU, {row['peak_mb']:,.0f} MB; RK4 grid {row['sim_cpu']:.1f} s CPU ({row['stop']})",
          flush=True)
    return row


def render(rows, info, load_end):
    """The markdown section."""
    lines = [
        f"## {SECTION}",
        "",
        measured_on(info, load_end, "dimensions_bench.py"),
        "",
        "Each model proved from scratch by `certify.prove` with its own `[settings]` "
        "(budget: time limit and `max_depth` as shown), in a fresh process; times are "
        "medians over the repeats shown. Fractions are of the window's volume. Peak memory = "
        "peak resident set of the proving process. Plain simulation: classic RK4 "
        "(`certify.simulate`) with limit checks after every step from the 2^D cell centres "
        "per side (D = depth reached), over the horizon shown, timed over a fixed number "
        "of steps and scaled. Ratio = RK4 grid CPU time / proof CPU time. "
        + floor_note("the depth reached"),
        "",
        "| model | dim | max depth | depth reached | time limit (s) | cells | undecided % "
        "| safe % | doomed % | outside % | proof wall (s) | proof CPU (s) | repeats "
        "| peak memory (MB) | certificate (MB) | RK4 horizon | RK4 grid CPU (s) | ratio "
        "| stopped because | mixed floor % (95 % CI) | floor sample |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        f = r["fractions"]
        lines.append(
            f"| {r['model']} | {r['dim']} | {r['depth']} | {r['depth_reached']} "
            f"| {r['time_limit']:g} | {r['cells']:,} | {100 * f['undecided']:.1f} "
            f"| {100 * f['safe']:.1f} | {100 * f['doomed']:.1f} | {100 * f['outside']:.1f} "
            f"| {r['wall']:.1f} | {r['cpu']:.1f} | {r['repeat']} | {r['peak_mb']:,.0f} "
            f"| {r['cert_mb']:.1f} | {r['horizon']:g} | {r['sim_cpu']:,.1f} "
            f"| {r['sim_cpu'] / r['cpu']:.2f} | {r['stop']} | "
            + (f"{floor_text(r['floor'])} | {sample_text(r['floor'])} |" if r["floor"]
               else "not measured | |"))
    return "\n".join(lines) + "\n"


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Parameters
    ----------
    argv : list of str, optional
        ``--models NAME ...`` (file names in models/, ``.toml`` optional; default: every
        model with three or more states), ``--time-limit S`` and ``--max-depth D``
        (override each model's budget), ``--repeat N`` (proofs per model, default 1).

    Returns
    -------
    int
        0.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--models", nargs="+", help="model files in models/ (default: 3D/4D)")
    parser.add_argument("--time-limit", type=float, help="time limit of each proof (s)")
    parser.add_argument("--max-depth", type=int, help="maximum depth of each proof")
    parser.add_argument("--repeat", type=int, default=1, help="proofs per model (median)")
    parser.add_argument("--floor-cells", type=int, default=2000,
                        help="cells sampled for the mixed floor (default 2000, 0 to skip)")
    parser.add_argument("--one", help=argparse.SUPPRESS)  # child process: one proof
    args = parser.parse_args(argv)
    if args.one:
        _one(args.one, args.max_depth, args.time_limit)
        return 0
    names = [m if m.endswith(".toml") else m + ".toml" for m in args.models or []]
    names = names or library_models()
    info = machine()
    rows = [measure(name, args.max_depth, args.time_limit, args.repeat, args.floor_cells)
            for name in names]
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    write_section(SECTION, render(rows, info, load_end))
    print(f"wrote section '{SECTION}' of benchmarks/results.md")
    return 0


if __name__ == "__main__":
    sys.exit(main())
