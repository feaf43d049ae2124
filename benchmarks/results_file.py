"""The shared results file of the benchmarks: one ``## section`` per benchmark."""

from __future__ import annotations

import re
from pathlib import Path

__all__ = ["RESULTS", "write_section"]

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
