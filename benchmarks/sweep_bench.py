"""Benchmark of parameter sweeps: wall time of a 16 x 16 sweep of the demo fermenter.

The sweep varies the dilution rate D and the feed concentration s_in in narrow ranges
around the demo values at a coarse depth, once with 1 and once with 2 local worker
processes, each into a fresh folder (nothing resumed). It checks that both runs give
the same ``sweep.json`` apart from the wall times and writes the section
"Parameter sweeps" of ``benchmarks/results.md`` (other sections are kept).

Run ``python benchmarks/sweep_bench.py --help`` for the options; ``benchmarks/run.py``
runs it with the defaults.
"""

import argparse
import datetime
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from results_file import write_section

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results.md"
FERMENTER = ROOT / "models" / "fermenter.toml"
SECTION = "Parameter sweeps"
#: Narrow ranges around the demo values D = 0.2 and s_in = 10.
VARY = {"D": ("0.19", "0.21"), "s_in": ("9.5", "10.5")}


def _cpu_name():
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _commit():
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, check=True,
                              capture_output=True, text=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def _without_times(path):
    data = json.loads(Path(path).read_text())
    for entry in data["entries"]:
        entry.pop("seconds")
    return data


def run_sweeps(n, depth, worker_counts):
    """Run the sweep once per worker count; return one row per run and the agreement.

    Parameters
    ----------
    n : int
        Boxes per parameter.
    depth : int
        ``max_depth`` of each box's proof.
    worker_counts : sequence of int

    Returns
    -------
    rows : list of dict
        ``workers``, ``seconds``, ``load`` (1-minute load average before the run).
    same : bool
        True when every run gave the same ``sweep.json`` apart from wall times.
    summary : dict
        Counts over the boxes of the first run, and the sum of its per-box times.
    """
    from certify.model import load_model
    from certify.sweep import sweep

    model = load_model(FERMENTER)
    vary = {name: (lo, hi, n) for name, (lo, hi) in VARY.items()}
    rows, outputs, box_seconds = [], [], []
    with tempfile.TemporaryDirectory(prefix="certify-sweep-bench-") as tmp:
        for workers in worker_counts:
            load = os.getloadavg()[0]
            start = time.perf_counter()
            result = sweep(model, vary, max_depth=depth, workers=workers,
                           out=Path(tmp) / f"workers-{workers}")
            rows.append({"workers": workers, "seconds": time.perf_counter() - start, "load": load})
            outputs.append(_without_times(result.out / "sweep.json"))
            box_seconds.append(sum(e["seconds"] for e in result.entries))
            print(f"{workers} worker(s): {rows[-1]['seconds']:.1f} s", file=sys.stderr)
    entries = outputs[0]["entries"]
    summary = {
        "boxes": len(entries),
        "safe_state_exists": sum(e["safe_state_exists"] for e in entries),
        "no_safe_state": sum(e["no_safe_state"] for e in entries),
        "mean_undecided": sum(e["fractions"]["undecided"] for e in entries) / len(entries),
        "box_seconds": box_seconds[0],
    }
    return rows, all(out == outputs[0] for out in outputs), summary


def section_text(n, depth, rows, same, summary, commit):
    """The markdown of the section (heading included)."""
    base = rows[0]["seconds"]
    lines = [
        f"## {SECTION}",
        "",
        f"`benchmarks/sweep_bench.py`: a {n} x {n} sweep of the demo fermenter "
        f"(`models/fermenter.toml`) over D in [{VARY['D'][0]}, {VARY['D'][1]}] and s_in in "
        f"[{VARY['s_in'][0]}, {VARY['s_in'][1]}] ({summary['boxes']} parameter boxes), "
        f"`max_depth` {depth}, local process pool, each run into a fresh folder.",
        "",
        f"- machine: {_cpu_name()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"{platform.system()}",
        f"- date: {datetime.date.today().isoformat()}, commit {commit}",
        "",
        "| workers | wall time [s] | speed-up | load average before the run |",
        "| --- | --- | --- | --- |",
    ]
    for row in rows:
        lines.append(f"| {row['workers']} | {row['seconds']:.1f} | {base / row['seconds']:.2f} "
                     f"| {row['load']:.1f} |")
    lines += [
        "",
        f"Same `sweep.json` (apart from wall times) with every worker count: "
        f"{'yes' if same else 'NO'}. Over the boxes: {summary['safe_state_exists']} with a "
        f"proven safe state, {summary['no_safe_state']} proven to have none, "
        f"{100 * summary['mean_undecided']:.1f} % of the window undecided on average "
        f"(at this depth nothing near the operating point is proven safe yet). The per-box "
        f"times of the first run add up to {summary['box_seconds']:.1f} s.",
        "",
        "The machine is shared with other jobs: the load average before each run says how "
        "busy it was, so compare the speed-up with care.",
        "",
    ]
    return "\n".join(lines)


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Parameters
    ----------
    argv : list of str, optional
        ``--boxes N`` per parameter (default 16), ``--max-depth D`` (default 3),
        ``--workers 1 2`` (the worker counts to time).

    Returns
    -------
    int
        0.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--boxes", type=int, default=16, help="boxes per parameter (default 16)")
    parser.add_argument("--max-depth", type=int, default=3, help="max_depth per box (default 3)")
    parser.add_argument("--workers", type=int, nargs="+", default=[1, 2],
                        help="worker counts to time (default: 1 2)")
    args = parser.parse_args(argv)
    commit = _commit()
    rows, same, summary = run_sweeps(args.boxes, args.max_depth, args.workers)
    write_section(SECTION, section_text(args.boxes, args.max_depth, rows, same, summary, commit))
    print(f"wrote the section '{SECTION}' of {RESULTS}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
