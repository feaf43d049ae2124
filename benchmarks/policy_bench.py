"""Safe operating policies: the fermenter with four dilution settings.

Run from the repository root::

    .venv/bin/python benchmarks/policy_bench.py [--depth 9] [--time-limit S] [--check]

Proves a policy map of ``models/fermenter_dilution_control.toml`` (four dilution
rates, each held at least an hour) to cells of 1/2^D of each side, writes it, and
records the time, the share of the window proven safe under each setting held constant
and under the policy, and (with ``--check``) the time of the independent check.

The section "Policies" of ``benchmarks/results.md`` is written (or replaced).
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

from results_file import measured_on, write_section
from flow_bench import machine

from certify import check_policy, load_model, prove_policy
from certify.policy_output import write_policy

ROOT = Path(__file__).resolve().parent.parent
MODEL = ROOT / "models" / "fermenter_dilution_control.toml"
SECTION = "Policies"


def _cpu():
    own = resource.getrusage(resource.RUSAGE_SELF)
    children = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--depth", type=int, default=9)
    parser.add_argument("--time-limit", type=float, default=3600.0)
    parser.add_argument("--check", action="store_true")
    args = parser.parse_args(argv)
    info = machine()
    model = load_model(MODEL)
    wall, cpu = time.perf_counter(), _cpu()
    pp = prove_policy(model, max_depth=args.depth, time_limit=args.time_limit)
    prove_wall, prove_cpu = time.perf_counter() - wall, _cpu() - cpu
    check = None
    with tempfile.TemporaryDirectory() as folder:
        summary = write_policy(pp, folder, figures=False)
        if args.check:
            wall = time.perf_counter()
            result = check_policy(folder)
            check = (result.valid, time.perf_counter() - wall)
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    depth = summary["depth_reached"]
    lines = [f"## {SECTION}", "", measured_on(info, load_end, "policy_bench.py"), "",
             f"`models/fermenter_dilution_control.toml` (the demo fermenter, dilution rate "
             f"D in {{0.05, 0.1, 0.2, 0.3}} 1/h, each held at least 1 h), "
             f"`certify.prove_policy` with `max_depth` {args.depth} (cells of "
             f"1/{2 ** args.depth} of each side) and time limit {args.time_limit:g} s: "
             f"{summary['cells']['safe'] + summary['cells']['doomed'] + summary['cells']['outside'] + summary['cells']['undecided']:,} "
             f"cells, deepest {depth}, {summary['rounds']} rounds, stop: "
             f"{summary['stop_reason']}. Proof {prove_wall:.0f} s wall, {prove_cpu:.0f} s CPU"
             + (f"; independent check {'valid' if check[0] else 'INVALID'} in "
                f"{check[1]:.0f} s wall." if check else "."),
             "", "| settings | safe share of the window |", "|---|---|"]
    for s, share in zip(summary["settings"], summary["safe_share_held_constant"]):
        lines.append(f"| D = {s['D']:g} held constant | {100 * share:.2f} % |")
    lines += [f"| policy (switching, hold 1 h) | {100 * summary['safe_share_policy']:.2f} % |",
              "", "Shares under the policy: " + ", ".join(
                  f"{k} {100 * v:.2f} %" for k, v in summary["fractions"].items()) + ".", ""]
    write_section(SECTION, "\n".join(lines))
    print("\n".join(lines))
    return 0 if check is None or check[0] else 1


if __name__ == "__main__":
    sys.exit(main())
