"""Throughput of validated flow steps on the demo fermenter, next to float RK4.

Run from the repository root::

    .venv/bin/python benchmarks/flow_bench.py [--quick]

For Taylor orders 2, 4 and 6 and batches of 10^3, 10^4 and 10^5 boxes (side 1/256 of
the window [0, 12] x [0, 10], random positions, a fixed random stream), it times
``certify.flow.flow_boxes`` over a fixed number of steps and reports box-steps per
second; then it times ``certify.simulate.simulate`` (classic RK4 on the same right-hand
side program) on the box centres for the same number of steps, and reports how many
times more one validated box-step costs than one float RK4 step.

The section "Flow enclosures" of benchmarks/results.md is written (or replaced) with
the numbers and the machine they were measured on.
"""

from __future__ import annotations

import argparse
import datetime
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

from results_file import write_section
import numpy as np

from certify import interval as iv
from certify.flow import flow_boxes
from certify.model import load_model
from certify.simulate import simulate
from certify.taylor import flow_programs

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "models" / "fermenter.toml"
RESULTS = ROOT / "benchmarks" / "results.md"
SECTION = "Flow enclosures"
ORDERS = (2, 4, 6)
BATCHES = (1_000, 10_000, 100_000)
STEPS = {1_000: 10, 10_000: 6, 100_000: 3}   # validated steps per box in each batch
HORIZON = 1e9                                # never reached: every box takes STEPS steps


def machine():
    """Plain-words description of the machine and the code measured."""
    cpu = "unknown CPU"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                                capture_output=True, text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        commit = "unknown"
    load = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    return {
        "date": datetime.date.today().isoformat(),
        "commit": commit,
        "cpu": cpu,
        "nproc": os.cpu_count(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "load": load,
    }


def parameter_bounds(model):
    """Float intervals enclosing the model's (exact rational) parameters."""
    return [(iv.enclose_fraction(p.lo)[0], iv.enclose_fraction(p.hi)[1])
            for p in model.parameters]


def grid_centres(model, depth):
    """Centres of the 2^depth cells per side of the window, shape (2^(n depth), n)."""
    axes = []
    for lo, hi in model.window:
        edges = np.linspace(float(lo), float(hi), 2 ** depth + 1)
        axes.append(0.5 * (edges[:-1] + edges[1:]))
    return np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, len(axes))


def random_boxes(model, n_boxes, rng):
    """Boxes of side 1/256 of the window at random positions inside it."""
    (s0, s1), (x0, x1) = [(float(a), float(b)) for a, b in model.window]
    side = np.array([(s1 - s0) / 256, (x1 - x0) / 256])
    lo = np.column_stack([rng.uniform(s0, s1 - side[0], n_boxes),
                          rng.uniform(x0, x1 - side[1], n_boxes)])
    return lo, lo + side


def _clock():
    return time.perf_counter(), time.process_time()


def _since(start):
    wall, cpu = _clock()
    return wall - start[0], cpu - start[1]


def time_flow(programs, params, lo, hi, n_steps):
    """(wall, CPU) seconds, box-steps and failed boxes of one flow_boxes call."""
    start = _clock()
    result = flow_boxes(programs, lo, hi, params, min_horizon=HORIZON, max_horizon=HORIZON,
                        max_steps=n_steps)
    return _since(start), int(result.n_steps.sum()), int(np.sum(result.status < 0))


def time_rk4(programs, params, lo, hi, n_steps, dt=0.1):
    """(wall, CPU) seconds and point-steps of float RK4 from the box centres."""
    start = _clock()
    simulate(programs.field, 0.5 * (lo + hi), params, n_steps * dt, dt=dt)
    return _since(start), len(lo) * n_steps


def measure(orders, batches):
    model = load_model(MODEL)
    params = parameter_bounds(model)
    rng = np.random.default_rng(2024)
    rows = []
    for order in orders:
        start = time.perf_counter()
        programs = flow_programs(model, order)
        derive = time.perf_counter() - start
        warm_lo, warm_hi = random_boxes(model, 50, rng)
        time_flow(programs, params, warm_lo, warm_hi, 2)
        for n_boxes in batches:
            lo, hi = random_boxes(model, n_boxes, rng)
            n_steps = STEPS[n_boxes]
            (wall, cpu), box_steps, failed = time_flow(programs, params, lo, hi, n_steps)
            (_, rk_cpu), point_steps = time_rk4(programs, params, lo, hi, n_steps)
            row = dict(order=order, derive=derive, boxes=n_boxes, steps=n_steps,
                       box_steps=box_steps, failed=failed, wall=wall, cpu=cpu,
                       rate=box_steps / cpu, wall_rate=box_steps / wall,
                       us=1e6 * cpu / box_steps, rk_rate=point_steps / rk_cpu,
                       ratio=(cpu / box_steps) / (rk_cpu / point_steps),
                       rss=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)
            rows.append(row)
            print(f"order {order} boxes {n_boxes:>6}: {row['rate']:>9.0f} box-steps/CPU-s "
                  f"({row['us']:.1f} us each; {row['wall_rate']:.0f}/s wall), "
                  f"RK4 {row['rk_rate']:>10.0f} point-steps/CPU-s, ratio {row['ratio']:.0f}, "
                  f"failed {failed}, peak RSS {row['rss']:.0f} MB", flush=True)
    return rows


def render(rows, info):
    lines = [
        f"## {SECTION}",
        "",
        f"Measured {info['date']} at commit `{info['commit']}` on {info['cpu']} "
        f"({info['nproc']} logical CPUs), Python {info['python']}, numpy {info['numpy']}; "
        f"load average at the start {info['load']} (a shared machine: other jobs ran "
        f"alongside; rates are per second of this process's CPU time, which contention "
        f"inflates less than wall time, also shown).",
        "",
        "Demo fermenter (`models/fermenter.toml`), boxes of side 1/256 of the window at "
        "random positions, `flow_boxes` with its default step settings for a fixed number "
        "of steps per box; RK4 is `certify.simulate` (classic fourth-order Runge-Kutta, one "
        "step = 4 evaluations of the same right-hand side program) from the box centres, "
        "same batch and step count. Ratio = CPU seconds per validated box-step / CPU "
        "seconds per float RK4 point-step. Derivation = sympy time to build the order's programs. "
        "Produced by `benchmarks/flow_bench.py`.",
        "",
        "| order | derivation (s) | boxes | steps each | box-steps/s (CPU) "
        "| us per box-step (CPU) | box-steps/s (wall) | RK4 point-steps/s (CPU) | ratio "
        "| failed boxes | peak RSS (MB) |",
        "|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        lines.append(f"| {r['order']} | {r['derive']:.1f} | {r['boxes']:,} | {r['steps']} "
                     f"| {r['rate']:,.0f} | {r['us']:.1f} | {r['wall_rate']:,.0f} "
                     f"| {r['rk_rate']:,.0f} | {r['ratio']:.0f} | {r['failed']} "
                     f"| {r['rss']:,.0f} |")
    return "\n".join(lines) + "\n"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help="orders 2 and 4, batches of 10^3 and 10^4; results.md untouched")
    args = parser.parse_args(argv)
    info = machine()
    if args.quick:
        measure((2, 4), (1_000, 10_000))
        return 0
    rows = measure(ORDERS, BATCHES)
    write_section(SECTION, render(rows, info))
    print(f"wrote section '{SECTION}' of {RESULTS.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
