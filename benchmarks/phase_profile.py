"""Where a proof spends its time: exclusive seconds per phase of the proof loop.

Run from the worktree root::

    PYTHONPATH=$PWD .venv/bin/python benchmarks/phase_profile.py MODEL --depth 4 \
        [--out DIR]

Proves MODEL with ``Budget(max_depth=DEPTH, time_limit=1e9)`` (the other budget and
method fields as the model file sets them) in this process, with timers around the
functions of each phase. A phase's seconds exclude the timed phases it calls (a
labelling inside the pruning counts as labelling), so the rows add up to the whole;
likewise the megabytes by which the peak resident set size rose during a phase.
With ``--out`` it writes the certificate (no figures, the summary's seconds set to 0)
and prints its sha256, to compare two versions of the code on the same proof.
"""

from __future__ import annotations

import argparse
import functools
import hashlib
import resource
import time
from pathlib import Path

from importlib import import_module

from certify.model import load_model

# import_module: `certify.prove` names the function once the package is imported
cells = import_module("certify.cells")
image_sets = import_module("certify.image_sets")
prove = import_module("certify.prove")
steps = import_module("certify.steps")

#: Phase name -> (owner, attribute) of the functions timed for it.
PHASES = {
    "flows": [(prove._Prover, "_flows")],
    "tube facts: step verdicts": [(prove._Prover, "_step_verdicts")],
    "tube facts: drift": [(prove._Prover, "_drift")],
    "tube facts: rest": [(prove._Prover, "_tube_facts")],
    "stop tests (outside the flow)": [(prove._Tubes, "stops")],
    "successor lookup (leaves_meeting)": [(cells.CellTree, "leaves_meeting")],
    "labelling (label_cells)": [(prove, "label_cells")],
    "trapped cells": [(prove, "trapped_cells")],
    "image-set pruning": [(prove._Prover, "_prune_successors"),
                          (prove._Prover, "_centres_held_back")],
    "image-set tests (misses_that_help)": [(image_sets.ImageSetStore, "misses_that_help")],
    "image-set store (put/take/keep)": [(image_sets.ImageSetStore, "put"),
                                        (image_sets.ImageSetStore, "keep_only")],
    "label(): edges and facts": [(prove._Prover, "label")],
    "choosing leaves (_causes_first)": [(prove, "_causes_first")],
    "step store": [(steps.StepStore, "add"), (steps.StepStore, "forget_all_but"),
                   (steps.StepStore, "snapshot")],
    "followed round: step ends, cuts": [(prove._Prover, "_step_ends"),
                                        (prove._Prover, "_decisive_ends"),
                                        (prove._Prover, "_try_tubes")],
    "setup (faces, regions, programs)": [(prove._Prover, "__init__")],
    "label fractions": [(prove, "label_fractions")],
}

_seconds = {name: 0.0 for name in PHASES}
#: Megabytes by which the peak resident set size rose while the phase ran (not in a
#: timed callee): where the peak of a proof is set.
_raised = {name: 0.0 for name in PHASES}
_stack = []
_peak = [0.0]


def _max_rss():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _note_peak():
    """Count the rise of the peak since the last note to the phase running."""
    peak = _max_rss()
    if _stack:
        _raised[_stack[-1][0]] += peak - _peak[0]
    _peak[0] = peak


def _timed(name, fn):
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        _note_peak()
        _stack.append([name, 0.0])  # seconds of timed callees
        start = time.perf_counter()
        try:
            return fn(*args, **kwargs)
        finally:
            spent = time.perf_counter() - start
            _note_peak()
            inner = _stack.pop()[1]
            _seconds[name] += spent - inner
            if _stack:
                _stack[-1][1] += spent
    return wrapper


def install():
    """Wrap every function of :data:`PHASES` with its phase's timer."""
    for name, targets in PHASES.items():
        for owner, attr in targets:
            fn = owner.__dict__[attr] if isinstance(owner, type) else getattr(owner, attr)
            if isinstance(fn, staticmethod):
                setattr(owner, attr, staticmethod(_timed(name, fn.__func__)))
            else:
                setattr(owner, attr, _timed(name, fn))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("model")
    ap.add_argument("--depth", type=int, required=True)
    ap.add_argument("--out", default=None)
    args = ap.parse_args(argv)
    install()
    model = load_model(args.model)
    _peak[0] = _max_rss()
    budget = prove.Budget(max_depth=args.depth, time_limit=1e9,
                          max_cells=int(model.settings.get("max_cells", 400_000)))
    wall0, cpu0 = time.perf_counter(), time.process_time()
    proof = prove.prove(model, budget=budget)
    wall, cpu = time.perf_counter() - wall0, time.process_time() - cpu0
    timed = sum(_seconds.values())
    print(f"model {args.model}, depth {args.depth}: {len(proof.leaves):,} leaves, "
          f"{proof.rounds} rounds, undecided {100 * proof.fractions.get('undecided', 0):.2f} %, "
          f"stop: {proof.stop_reason}")
    print(f"wall {wall:.1f} s, CPU {cpu:.1f} s, peak RSS "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")
    print("| phase | seconds | share | peak RSS raised (MB) |")
    print("|---|---|---|---|")
    for name, s in sorted(_seconds.items(), key=lambda kv: -kv[1]):
        print(f"| {name} | {s:.1f} | {100 * s / wall:.1f} % | {_raised[name]:.0f} |")
    print(f"| other (loop, split, volumes) | {wall - timed:.1f} | "
          f"{100 * (wall - timed) / wall:.1f} % | |")
    if args.out:
        # the summary's seconds would differ between runs: the certificate compared is
        # the proof's alone
        proof.seconds = 0.0
        prove.write_proof(proof, args.out, figures=False)
        digest = hashlib.sha256(Path(args.out, "certificate.json.gz").read_bytes()).hexdigest()
        print(f"sha256 certificate.json.gz {digest}")


if __name__ == "__main__":
    main()
