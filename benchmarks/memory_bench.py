"""Peak memory of proofs: resident set size, time and certificate size per model.

Run from the repository root::

    .venv/bin/python benchmarks/memory_bench.py [--save runs.json] [--before old.json]
                                                [--runs fermenter:10 ...] [--no-write]
                                                [--load runs.json]

Each run proves one model to one maximum depth (no time limit) and writes its
certificate, in a fresh Python process, so that the peak resident set size
(``ru_maxrss``) belongs to that proof alone. The peak is read twice: after the proof and
after the certificate is written. ``--save`` keeps the measurements as JSON;
``--before`` names such a file from an earlier commit, whose figures are shown beside
the new ones. The section "Memory" of ``benchmarks/results.md`` is written (or
replaced) unless ``--no-write`` is given.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

from results_file import measured_on, write_section
from flow_bench import machine

ROOT = Path(__file__).resolve().parent.parent
SECTION = "Memory"
RUNS = ("microbial_food_chain:6", "two_generators:4", "fermenter:10")

#: The measuring child: prove, read the peak, write the certificate, read it again.
CHILD = r"""
import json, resource, sys, tempfile, time
from pathlib import Path
from certify import load_model, prove
from certify.prove import write_proof

def peak_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0

model, depth = sys.argv[1], int(sys.argv[2])
wall, cpu = time.perf_counter(), time.process_time()
proof = prove(load_model(model), max_depth=depth, time_limit=1e9)
prove_wall, prove_cpu = time.perf_counter() - wall, time.process_time() - cpu
after_prove = peak_mb()
with tempfile.TemporaryDirectory() as out:
    write_proof(proof, out, figures=False)
    size = (Path(out) / "certificate.json.gz").stat().st_size
print(json.dumps({"cells": int(len(proof.leaves)), "prove_wall": prove_wall,
                  "prove_cpu": prove_cpu, "total_wall": time.perf_counter() - wall,
                  "total_cpu": time.process_time() - cpu, "peak_prove_mb": after_prove,
                  "peak_mb": peak_mb(), "certificate_mb": size / 2**20,
                  "undecided": proof.fractions.get("undecided")}))
"""


def measure(name, depth):
    """Run one proof in a fresh process; return its measurements."""
    model = ROOT / "models" / f"{name}.toml"
    done = subprocess.run([sys.executable, "-c", CHILD, str(model), str(depth)],
                          capture_output=True, text=True, check=True, env=os.environ.copy())
    row = json.loads(done.stdout.strip().splitlines()[-1])
    row.update(model=name, depth=depth, commit=machine()["commit"])
    return row


def table(rows, before):
    """Markdown table of the runs, with the earlier figures beside them where known."""
    old = {(r["model"], r["depth"]): r for r in before}
    head = ("| model | depth | cells | peak after proof (MB) | peak with certificate (MB) "
            "| proof wall / CPU (s) | certificate (MB) |")
    lines = [head, "|" + " --- |" * 7]
    for r in rows:
        o = old.get((r["model"], r["depth"]))

        def pair(key, fmt):
            new = format(r[key], fmt)
            return new if o is None else f"{format(o[key], fmt)} → {new}"
        times = f"{r['prove_wall']:.0f} / {r['prove_cpu']:.0f}"
        if o is not None:
            times = f"{o['prove_wall']:.0f} / {o['prove_cpu']:.0f} → {times}"
        lines.append(f"| {r['model']} | {r['depth']} | {pair('cells', 'd')} "
                     f"| {pair('peak_prove_mb', '.0f')} | {pair('peak_mb', '.0f')} "
                     f"| {times} | {pair('certificate_mb', '.1f')} |")
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", nargs="+", default=list(RUNS), metavar="MODEL:DEPTH")
    parser.add_argument("--save", type=Path, help="keep the measurements as JSON")
    parser.add_argument("--before", type=Path, help="measurements of an earlier commit")
    parser.add_argument("--load", type=Path, help="write results.md from saved measurements "
                        "instead of running (the machine line is then today's)")
    parser.add_argument("--no-write", action="store_true", help="leave results.md alone")
    args = parser.parse_args(argv)
    info = machine()
    rows = json.loads(args.load.read_text()) if args.load else []
    for run in [] if args.load else args.runs:
        name, depth = run.split(":")
        rows.append(measure(name, int(depth)))
        print(json.dumps(rows[-1]), flush=True)
    if args.save:
        args.save.write_text(json.dumps(rows, indent=1) + "\n")
    before = json.loads(args.before.read_text()) if args.before else []
    if args.no_write:
        return
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    arrow = f" (commit `{before[0].get('commit', '?')}` → this one)" if before else ""
    text = (f"## {SECTION}\n\n"
            f"Peak resident set size (`ru_maxrss`) of one proof in a fresh process, "
            f"after the proof and after writing its certificate{arrow}. What is kept per "
            f"cell, and why the numbers do not change, is in docs/proof-loop.md "
            f"(\"Memory\").\n\n"
            f"{table(rows, before)}\n\n{measured_on(info, load_end, 'memory_bench.py')}\n")
    write_section(SECTION, text)


if __name__ == "__main__":
    main()
