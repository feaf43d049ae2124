"""Why the undecided leaves of a proof stay undecided: a breakdown by cause.

Run from the repository root::

    .venv/bin/python benchmarks/undecided_causes.py models/lake_plankton.toml --depth 6

It proves the model at the given maximum depth (the model's other settings, default
budget) and splits the undecided share of the window (by cell volume, not split at the
limits) by the first cause that applies, from the proof's facts (certify.labels.CellFacts):

- flow failed: no image;
- not kept: some limit is not proven kept on a step of the tube (``at the start``: the
  first step already, mostly cells that straddle a limit);
- escapes: part of the image lies beyond an open window side;
- waiting: the tube is kept and the image known, but a successor is undecided; split by
  whether some successor is safe, some doomed, or all are undecided.

For the waiting leaves it prints the quantiles of the horizon, of the number of
successors and, with ``--simulate K``, the share of K sampled waiting leaves whose
sampled starts (centre and 8 uniform points, scipy ``solve_ivp`` LSODA at rtol 1e-8,
parameters at their midpoints, horizon ``--horizon``) all keep the limits, all cross
one, or do both (a float judgement, not a proof).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from certify import load_model  # noqa: E402
from certify.prove import prove  # noqa: E402
from certify.taylor import flow_programs  # noqa: E402


def causes(proof):
    """Masks of the undecided leaves by cause (dict of name -> bool array)."""
    f, label = proof.facts, proof.labelling.label
    und = label == "undecided"
    L = len(label)
    has = {}
    for fate in ("safe", "doomed", "undecided"):
        mask = np.zeros(L, bool)
        mask[f.src[label[f.dst] == fate]] = True
        has[fate] = mask
    failed = und & ~f.flow_ok
    unkept = und & f.flow_ok & ~f.kept
    escapes = und & f.flow_ok & f.kept & f.escapes
    waiting = und & f.flow_ok & f.kept & ~f.escapes
    return {"flow failed": failed, "not kept": unkept,
            "  not kept at the start": unkept & (f.first_unkept == 0),
            "escapes": escapes, "waiting on successors": waiting,
            "  some successor safe": waiting & has["safe"],
            "  some successor doomed": waiting & has["doomed"],
            "  all successors undecided": waiting & ~has["safe"] & ~has["doomed"]}


def simulate_fates(model, proof, leaves, horizon, rng):
    """Per sampled leaf: (all starts keep, all starts cross), float simulation."""
    from scipy.integrate import solve_ivp

    programs = flow_programs(model, 1)
    params = np.array([0.5 * (p.lo + p.hi) for p in model.parameters], float)

    def rhs(_, x):
        return programs.field.point(np.concatenate([x, params])[None])[0]

    def margin(_, x):
        return float(programs.limits.point(np.concatenate([x, params])[None])[0].min())

    margin.terminal = True
    out = []
    for node in leaves:
        lo, hi = proof.tree.lo[node], proof.tree.hi[node]
        starts = np.vstack([0.5 * (lo + hi), lo + rng.random((8, len(lo))) * (hi - lo)])
        fates = [len(solve_ivp(rhs, (0.0, horizon), x, method="LSODA", rtol=1e-8,
                               atol=1e-10, events=margin).t_events[0]) > 0
                 for x in starts if margin(0, x) > 0]
        if fates:
            out.append((not any(fates), all(fates)))
    return np.array(out, bool).reshape(-1, 2)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("model")
    parser.add_argument("--depth", type=int, default=6)
    parser.add_argument("--simulate", type=int, default=0, metavar="K")
    parser.add_argument("--horizon", type=float, default=150.0)
    args = parser.parse_args(argv)
    model = load_model(args.model)
    start = time.process_time()
    proof = prove(model, max_depth=args.depth)
    cpu = time.process_time() - start
    volume = proof.tree.volume_fraction(proof.leaves)
    print(f"{args.model} depth {args.depth}: {cpu:.1f} s CPU, {len(proof.leaves)} leaves, "
          f"{proof.stop_reason}; undecided {100 * proof.fractions['undecided']:.2f} %")
    for name, mask in causes(proof).items():
        print(f"  {name:30s} {100 * volume[mask].sum():6.2f} % ({int(mask.sum())} leaves)")
    waiting = causes(proof)["waiting on successors"]
    if waiting.any():
        f = proof.facts
        successors = np.bincount(f.src, minlength=len(waiting))[waiting]
        print("  waiting: horizon q10/50/90", np.quantile(f.horizon_lo[waiting], [.1, .5, .9]),
              "successors q10/50/90", np.quantile(successors, [.1, .5, .9]))
    if args.simulate and waiting.any():
        rng = np.random.default_rng(0)
        picked = rng.choice(proof.leaves[waiting], min(args.simulate, int(waiting.sum())),
                            replace=False)
        fates = simulate_fates(model, proof, picked, args.horizon, rng)
        keep, cross = fates[:, 0].mean(), fates[:, 1].mean()
        print(f"  simulated {len(fates)} waiting leaves: all keep {keep:.2f}, "
              f"all cross {cross:.2f}, both {1 - keep - cross:.2f}")


if __name__ == "__main__":
    main()
