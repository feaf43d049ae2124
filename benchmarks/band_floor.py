"""The mixed floor under a proof's undecided band, over every undecided cell.

Run from the repository root::

    .venv/bin/python benchmarks/band_floor.py --model microbial_food_chain --depth 6

`mixed_floor.py` estimates the share of the window in cells that hold two fates from a
uniform sample of cells. This script asks the same question of a proof's own band: it
proves the model to `depth` (``certify.prove``, the model's settings otherwise), takes
*every* undecided leaf, and simulates a grid of starts in each (``grid`` points per axis,
corners included) with classic RK4 (the model's own right-hand side program, interval
parameters at their midpoints). Only undecided leaves can be mixed: a safe or doomed
leaf is a theorem about all its starts. A start that keeps the limits at time 0 is

- a *crosser* when a limit value falls below ``-tol``, or when its float solution lies
  in a leaf the proof labels ``doomed`` (every start of that leaf crosses);
- a *keeper* when its float solution lies in a leaf the proof labels ``safe``, or when
  every limit value stays above ``+tol`` up to the horizon;
- *unknown* otherwise.

A leaf is mixed when it holds a crosser and a keeper; the floor is the share of the
window inside the limits at time 0 in mixed leaves (``certify.volumes.inside_shares``).
No sampling of cells is involved, so there is no confidence interval; detection only
misses mixed leaves (a grid of starts can miss a sliver of the other fate), so apart
from float caveats (RK4 errors are not bounded; a float solution read in a decided leaf
near its side may belong to the neighbour) the figure errs low. Raising ``grid`` shows
how far it has converged.

``--count-at C`` also counts a proof made at a finer depth in cells of depth ``C``
(:func:`undecided_at`): what a map of finer cells decides, said at the coarser cells'
resolution.
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from certify import load_model
from certify.prove import prove
from certify.simulate import simulate
from certify.taylor import flow_programs
from certify.volumes import inside_shares
from mixed_floor import _LimitWatch, cell_offsets

__all__ = ["BandFloor", "band_floor", "label_grid", "undecided_at"]

ROOT = Path(__file__).resolve().parent.parent
CODES = {"undecided": 0, "safe": 1, "doomed": 2, "outside": 3}


@dataclass(frozen=True)
class BandFloor:
    """Outcome of :func:`band_floor`.

    Attributes
    ----------
    undecided : float
        The proof's undecided share of the window.
    floor : float
        Share of the window inside the limits at time 0 in undecided leaves found mixed.
    leaves : int
        Undecided leaves.
    mixed : ndarray of int
        Positions (in ``proof.leaves``) of the undecided leaves found mixed.
    one_fate_leaves : int
        Undecided leaves whose judged starts all share one fate (and none is unknown).
    starts, unknown : int
        Starts inside the limits at time 0, and those whose fate stayed unknown.
    grid : int
        Starts per axis in each leaf.
    horizon, dt : float
        RK4 horizon and step.
    """

    undecided: float
    floor: float
    leaves: int
    mixed: np.ndarray
    one_fate_leaves: int
    starts: int
    unknown: int
    grid: int
    horizon: float
    dt: float


def label_grid(proof):
    """Label codes (:data:`CODES`) on the grid of the proof's finest cells.

    Returns
    -------
    ndarray of int8, shape (2^D,) * n
        Entry ``i`` is the code of the leaf holding the finest cell of index ``i``
        (D the depth reached).
    """
    tree, depth = proof.tree, proof.depth_reached
    grid = np.full((2 ** depth,) * tree.n, CODES["undecided"], np.int8)
    codes = np.array([CODES[k] for k in proof.labelling.label], np.int8)
    for leaf, code in zip(proof.leaves, codes):
        scale = 2 ** (depth - int(tree.depth[leaf]))
        first = tree.index[leaf] * scale
        grid[tuple(slice(int(a), int(a) + scale) for a in first)] = code
    return grid


def band_floor(proof, horizon, dt, *, grid=4, look_every=5, rel_tol=1e-6):
    """Find the mixed leaves among every undecided leaf of a proof.

    Parameters
    ----------
    proof : certify.prove.Proof
    horizon : float
        Keepers that never reach a safe leaf must keep every limit up to here.
    dt : float
        RK4 step.
    grid : int
        Starts per axis in each undecided leaf, corners included.
    look_every : int
        RK4 steps between look-ups of the leaf each solution lies in.
    rel_tol : float
        Margin of the limit judgements, relative to each limit's largest magnitude over
        the starts.

    Returns
    -------
    BandFloor
    """
    tree, model = proof.tree, proof.model
    n = tree.n
    band = np.flatnonzero(proof.labelling.label == "undecided")
    lo, hi = tree.lo[proof.leaves[band]], tree.hi[proof.leaves[band]]
    offsets = cell_offsets(n, grid)
    starts = (lo[:, None, :] + offsets[None, :, :] * (hi - lo)[:, None, :]).reshape(-1, n)
    owner = np.repeat(np.arange(len(band)), len(offsets))

    programs = flow_programs(model, 1)
    params = np.array([0.5 * (lo_p + hi_p) for lo_p, hi_p in proof.params])
    g0 = _LimitWatch(programs.limits, params, starts)(starts)
    tol = rel_tol * np.max(np.abs(g0[np.isfinite(g0).all(axis=1)]), axis=0)
    inside = np.all(g0 > tol, axis=1)
    x, who = starts[inside], np.flatnonzero(inside)
    fate = np.zeros(len(starts), np.int8)           # 0 unknown, 1 keeper, 2 crosser
    least = np.full((len(x), len(tol)), np.inf)
    codes = label_grid(proof)
    wlo = np.array([float(a) for a, _ in model.window])
    side = (np.array([float(b) for _, b in model.window]) - wlo) / codes.shape[0]

    chunks = int(np.ceil(horizon / (dt * look_every)))
    for _ in range(chunks):
        watch = _LimitWatch(programs.limits, params, x)
        x = simulate(programs.field, x, list(params), horizon / chunks, dt=dt,
                     events=watch).states
        least = np.fmin(least, watch.least)
        crossed = np.any(least < -tol, axis=1)
        index = np.floor((x - wlo) / side).astype(np.int64)
        within = np.all((index >= 0) & (index < codes.shape[0]), axis=1) & ~crossed
        code = np.full(len(x), -1, np.int8)
        code[within] = codes[tuple(index[within].T)]
        fate[who[crossed | (code == CODES["doomed"])]] = 2
        fate[who[code == CODES["safe"]]] = 1
        keep = (fate[who] == 0) & watch.finite
        x, who, least = x[keep], who[keep], least[keep]
        if len(x) == 0:
            break
    fate[who[np.all(least > tol, axis=1)]] = 1

    judged = inside & (fate > 0)
    has = [np.bincount(owner[judged & (fate == f)], minlength=len(band)) > 0 for f in (1, 2)]
    mixed = np.flatnonzero(has[0] & has[1])
    unknown = np.bincount(owner[inside & (fate == 0)], minlength=len(band)) > 0
    shares, _ = inside_shares(proof, lo[mixed], hi[mixed])
    volume = tree.volume_fraction(proof.leaves[band[mixed]])
    return BandFloor(undecided=proof.fractions["undecided"],
                     floor=float(np.sum(volume * shares)), leaves=len(band),
                     mixed=band[mixed],
                     one_fate_leaves=int(np.sum((has[0] ^ has[1]) & ~unknown)),
                     starts=int(inside.sum()), unknown=int(np.sum(inside & (fate == 0))),
                     grid=grid, horizon=float(horizon), dt=float(dt))


def undecided_at(proof, depth):
    """The proof's undecided share counted in the cells of a coarser depth.

    A cell of `depth` counts as decided when every leaf inside it carries one decided
    label (or is outside); otherwise its whole share inside the limits at time 0 counts
    as undecided. Leaves not deeper than `depth` count with their own label.

    Parameters
    ----------
    proof : certify.prove.Proof
    depth : int

    Returns
    -------
    float
        Share of the window.
    """
    tree, labels = proof.tree, proof.labelling.label
    leaf_depth = tree.depth[proof.leaves]
    shares, _ = inside_shares(proof, tree.lo[proof.leaves], tree.hi[proof.leaves])
    weight = tree.volume_fraction(proof.leaves) * shares * (labels != "outside")
    shallow = leaf_depth <= depth
    total = float(np.sum(weight[shallow & (labels == "undecided")]))
    deep = np.flatnonzero(~shallow)
    if len(deep) == 0:
        return total
    parents = tree.index[proof.leaves[deep]] >> (leaf_depth[deep] - depth)[:, None]
    _, group = np.unique(parents, axis=0, return_inverse=True)
    group = group.ravel()
    codes = np.array([CODES[k] for k in labels[deep]])
    groups = group.max() + 1
    holds = [np.bincount(group[codes == CODES[k]], minlength=groups) > 0
             for k in ("undecided", "safe", "doomed")]
    undecided = holds[0] | (holds[1] & holds[2])
    return total + float(np.sum(weight[deep][undecided[group]]))


def describe(result):
    """One line with the floor and its counts."""
    return (f"undecided {100 * result.undecided:.2f} %, mixed floor {100 * result.floor:.2f} % "
            f"({len(result.mixed):,} of {result.leaves:,} undecided leaves mixed, "
            f"{result.one_fate_leaves:,} of one fate; grid {result.grid}^n, "
            f"{result.starts:,} starts, {result.unknown:,} unknown; RK4 dt {result.dt:g} "
            f"to {result.horizon:g})")


def main(argv=None):
    """Prove one model and print the floor under its band for each grid given.

    Parameters
    ----------
    argv : list of str, optional
        ``--model NAME`` (a file in models/), ``--depth D``, ``--grids G ...``,
        ``--horizon T``, ``--dt H``, ``--count-at C``.

    Returns
    -------
    int
        0.
    """
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", required=True)
    parser.add_argument("--depth", type=int, required=True)
    parser.add_argument("--grids", type=int, nargs="*", default=[4])
    parser.add_argument("--count-at", type=int, metavar="C",
                        help="also count the proof's undecided share in cells of depth C")
    parser.add_argument("--horizon", type=float, default=120.0)
    parser.add_argument("--dt", type=float, default=0.01)
    args = parser.parse_args(argv)
    name = args.model if args.model.endswith(".toml") else args.model + ".toml"
    model = load_model(ROOT / "models" / name)
    started = time.process_time()
    proof = prove(model, max_depth=args.depth, time_limit=1e9)
    print(f"{name} depth {args.depth}: proof {time.process_time() - started:.1f} s CPU, "
          f"undecided {100 * proof.fractions['undecided']:.2f} %", flush=True)
    if args.count_at is not None:
        print(f"  counted in cells of depth {args.count_at}: "
              f"{100 * undecided_at(proof, args.count_at):.2f} % undecided", flush=True)
    for grid in args.grids:
        started = time.process_time()
        result = band_floor(proof, args.horizon, args.dt, grid=grid)
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print(f"  {describe(result)}; {time.process_time() - started:.0f} s CPU, "
              f"peak {peak:.0f} MB", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
