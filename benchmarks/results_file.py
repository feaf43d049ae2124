"""The shared results file of the benchmarks: one ``## section`` per benchmark."""

from __future__ import annotations

import re
from pathlib import Path

__all__ = ["RESULTS", "write_section", "measured_on"]

RESULTS = Path(__file__).resolve().parent / "results.md"


def write_section(section, text, path=RESULTS):
    """Replace the section titled `section` in `path` (or append it), keeping the others.

    Parameters
    ----------
    section : str
        Title after ``## `` (the text must start with that heading).
    text : str
    path : Path
    """
    path = Path(path)
    old = path.read_text() if path.exists() else "# Benchmark results\n"
    pattern = re.compile(rf"^## {re.escape(section)}\n.*?(?=^## |\Z)", re.S | re.M)
    text = text.rstrip("\n") + "\n\n"
    new = pattern.sub(lambda _: text, old) if pattern.search(old) \
        else old.rstrip("\n") + "\n\n" + text
    path.write_text(new.rstrip("\n") + "\n")


def measured_on(info, load_end, script):
    """The sentence naming date, commit, machine and load of a benchmark run.

    Parameters
    ----------
    info : dict
        From ``flow_bench.machine()`` (date, commit, cpu, nproc, python, numpy, load).
    load_end : str
        Load average when the run ended.
    script : str
        File name of the benchmark, e.g. ``"prove_bench.py"``.
    """
    return (f"Measured {info['date']} at commit `{info['commit']}` on {info['cpu']} "
            f"({info['nproc']} logical CPUs), Python {info['python']}, numpy {info['numpy']}; "
            f"load average {info['load']} at the start and {load_end} at the end (a shared "
            f"machine: other jobs ran alongside, so wall times are inflated; CPU times are "
            f"shown too). Produced by `benchmarks/{script}`.")
