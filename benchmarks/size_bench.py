"""Certificate size: what each key costs, in version 3 and in version 2's layout.

Run from the repository root::

    .venv/bin/python benchmarks/size_bench.py [--only fermenter]

For the demo fermenter at depth 10 and the 3D library model at its own budget it proves
the model (``certify.prove``, one process), writes the certificate (version 3), and
reports the file size, the compressed size of each key of ``cells`` (zlib level 6 of the
key's JSON text, close to what it adds to the gzip file), and an estimate of the size of
the same proof written in version 2's layout (every array in the plain base64 form, plus
the start sets and the frames ``m``, ``A`` of every step, which version 3 leaves out).
The proof no longer keeps the start sets and frames (certify/steps.py), so their part of
the estimate is measured on a fresh flow of a sample of the leaves
(:data:`SAMPLE` cells, each to its own horizon) and scaled by the number of cells and
steps.

The section "Certificate size" of ``benchmarks/results.md`` is written (or replaced).
"""

from __future__ import annotations

import argparse
import base64
import json
import os
import sys
import tempfile
import time
import zlib
from pathlib import Path

import numpy as np
from results_file import measured_on, write_section
from flow_bench import machine

from certify import load_model, prove
from certify.certificate import certificate_data, write_certificate
from certify.container import decode_array
from certify.flow import flow_boxes
from certify.taylor import flow_programs

ROOT = Path(__file__).resolve().parent.parent
SECTION = "Certificate size"
#: (model file, max depth or None for the model's own [settings], target in MB)
CASES = {"fermenter": ("models/fermenter.toml", 10, 5.0),
         "microbial_food_chain": ("models/microbial_food_chain.toml", None, 20.0)}
#: Leaves flowed afresh for the start sets and frames of version 2's layout.
SAMPLE = 2000


def _plain(a, dtype):
    """Version 2's array form: base64 of the raw little-endian bytes."""
    a = np.ascontiguousarray(a, dtype=dtype)
    return {"dtype": dtype, "shape": list(a.shape),
            "data": base64.b64encode(a.tobytes()).decode("ascii")}


def _version2(data):
    """The proof's certificate with its arrays in version 2's plain form (without the
    start sets and frames, see :func:`_version2_extra`)."""
    old = json.loads(json.dumps(data))
    old["version"] = 2
    cells = old["cells"]
    for key, value in list(cells.items()):
        if isinstance(value, dict) and "codec" in value:
            cells[key] = _plain(decode_array(value), value["dtype"])
    return old


def _version2_extra(proof, n_steps):
    """Estimated compressed bytes of version 2's start sets and frames: measured on a
    fresh flow of a sample of the leaves that have steps, scaled up."""
    facts, m = proof.facts, proof.method
    flowed = np.flatnonzero(facts.flow_ok & ~facts.outside)
    rng = np.random.default_rng(0)
    sample = np.sort(rng.choice(flowed, min(SAMPLE, len(flowed)), replace=False))
    nodes = proof.leaves[sample]
    horizon = facts.horizon_hi[sample]
    result = flow_boxes(flow_programs(proof.model, m.order), proof.tree.lo[nodes],
                        proof.tree.hi[nodes], proof.params, min_horizon=horizon,
                        max_horizon=horizon, step=m.step, max_step=m.max_step,
                        min_step=m.min_step, max_steps=m.max_steps)

    def packed(**arrays):
        text = json.dumps({k: _plain(a, "<f8") for k, a in arrays.items()})
        return len(zlib.compress(text.encode(), 6))
    sets = packed(set0_m=result.set0_m,
                  set0_r=np.stack([result.set0_r_lo, result.set0_r_hi], -1))
    frames = packed(step_m=result.m, step_A=result.A)
    return (sets * len(proof.leaves) / len(sample)
            + frames * n_steps / max(len(result.h), 1))


def measure(name, folder):
    path_model, depth, target = CASES[name]
    model = load_model(ROOT / path_model)
    options = {} if depth is None else {"max_depth": depth}
    wall = time.perf_counter()
    proof = prove(model, **options)
    prove_wall = time.perf_counter() - wall
    data = certificate_data(proof, {})
    v3 = Path(folder) / f"{name}-v3.json.gz"
    write_certificate(v3, data)
    keys = {key: len(zlib.compress(json.dumps(value).encode(), 6))
            for key, value in data["cells"].items()}
    v2 = Path(folder) / f"{name}-v2.json.gz"
    write_certificate(v2, _version2(data))
    steps = int(data["cells"]["step_h"]["shape"][0])
    return {"name": name, "depth": int(proof.tree.depth[proof.leaves].max()),
            "cells": len(proof.leaves), "steps": steps, "v3": v3.stat().st_size,
            "v2": v2.stat().st_size + _version2_extra(proof, steps), "keys": keys,
            "target": target, "prove_wall": prove_wall}


def render(rows, info, load_end):
    lines = [f"## {SECTION}", "", measured_on(info, load_end, "size_bench.py"), "",
             "Each model proved once (one process); its certificate written in version 3 "
             "and, for comparison, in version 2's layout (plain base64 arrays, start sets "
             "and every step's frame `m`, `A`). The proof no longer keeps the start sets "
             f"and frames, so their share of version 2 is estimated from a fresh flow of "
             f"{SAMPLE:,} sampled leaves (each to its own horizon), scaled by the cells "
             "and steps. Both from the same proof, whose tubes are "
             "widened to binary32 bounds and whose step sizes have 8 significant bits "
             "(which also helps version 2's gzip a little). Issue 17's targets: the demo "
             "at 1/1024 at most 5 MB, the 3D library model at its default budget at most "
             "20 MB.", "",
             "| model | D | cells | stored steps | version 2, est. (MB) | version 3 (MB) | "
             "bytes per step (v3) | target (MB) | met |",
             "|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        lines.append(f"| {r['name']} | {r['depth']} | {r['cells']:,} | {r['steps']:,} | "
                     f"{r['v2'] / 1e6:.1f} | {r['v3'] / 1e6:.2f} | "
                     f"{r['v3'] / max(r['steps'], 1):.1f} | {r['target']:g} | "
                     f"{'yes' if r['v3'] <= r['target'] * 1e6 else 'NO'} |")
    lines += ["", "What each key of `cells` adds in version 3 (kB, zlib of its JSON text):",
              "", "| model | " + " | ".join(k for k in rows[0]["keys"]) + " |",
              "|---|" + "---|" * len(rows[0]["keys"])]
    for r in rows:
        lines.append(f"| {r['name']} | " + " | ".join(
            f"{r['keys'].get(k, 0) / 1e3:.0f}" for k in rows[0]["keys"]) + " |")
    lines += ["", "The tubes `step_E` dominate what is left; version 2's frames "
              "(`step_m`, `step_A`) and start sets, about half of its bytes, are gone "
              "(the checker chooses its own frames, docs/certificate-format.md).", "", ""]
    return "\n".join(lines)


def main(argv=None):
    """Run the benchmark and write its section of ``benchmarks/results.md``.

    Returns
    -------
    int
        0 when every target is met, 1 otherwise.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", nargs="+", choices=list(CASES), default=list(CASES))
    args = parser.parse_args(argv)
    info = machine()
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        for name in args.only:
            rows.append(measure(name, folder))
            print({k: v for k, v in rows[-1].items() if k != "keys"}, flush=True)
    load_end = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    write_section(SECTION, render(rows, info, load_end))
    return 0 if all(r["v3"] <= r["target"] * 1e6 for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
