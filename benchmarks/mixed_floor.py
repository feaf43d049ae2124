"""A floor under the undecided share: cells that plain simulation shows to hold two fates.

Run from the repository root::

    .venv/bin/python benchmarks/mixed_floor.py --models two_generators --depths 4 5 6

A label is a statement about every start of a cell that keeps the limits at time 0
(docs/labels.md): ``safe`` needs all of them to keep the limits forever, ``doomed`` needs
all of them to cross. A cell holding one start of each fate is therefore undecided by
any sound method at that cell size, and so is every coarser cell around it. The share of
the window in such *mixed* cells of depth D (cells of 1/2^D of each side) is a floor
under the undecided share of a proof whose cells are no finer than depth D.

The estimate: draw K points u uniformly in the window (numpy's default generator, a
fixed stream), take the depth-D cell of each, and simulate a fixed set of starts in that
cell (a grid of ``grid`` points per axis, corners included, plus ``random`` uniform
points) with classic RK4 (``certify.simulate``, the model's own right-hand side
program, interval parameters at their midpoints). A start that keeps the limits at time 0 is

- a *crosser* when some limit value falls below ``-tol`` by the horizon T;
- a *keeper* when every limit value stays above ``+tol`` up to 2T and the state stays
  finite;
- *unknown* otherwise (its fate flips between T and 2T, it grazes a limit, or the float
  solution escapes): it counts for neither side.

A cell is mixed when it holds a crosser and a keeper. The sampled point counts when its
cell is mixed and u itself keeps the limits at time 0 (the part of a straddling cell
beyond a limit counts as ``outside`` in a proof's fractions, not as undecided). Each
count is then a Bernoulli trial whose mean is the share of the window in the inside
parts of mixed cells (as detected), so the Clopper-Pearson interval (Clopper & Pearson
1934) is an exact 95 % interval for it. Starts that violate a limit at time 0 are left
out: a label says nothing about them, so a cell with such a start and a keeper can be
``safe``.

This is a float judgement, not a proof: "keeps the limits" means "over 2T", with T
chosen several times the model's settling time, and the RK4 error is not bounded.
Detection only ever misses mixed cells (few starts per cell), so apart from those float
caveats the figure errs low.
"""

from __future__ import annotations

import argparse
import itertools
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.stats import beta

from certify import load_model
from certify.simulate import simulate
from certify.taylor import flow_programs

__all__ = ["MixedFloor", "mixed_floor", "cell_offsets", "clopper_pearson", "floor_text",
           "floor_note", "sample_text", "describe"]

ROOT = Path(__file__).resolve().parent.parent


@dataclass(frozen=True)
class MixedFloor:
    """Outcome of :func:`mixed_floor`.

    Attributes
    ----------
    depth : int
        Cells of 1/2^depth of each window side.
    cells : int
        Cells sampled (one per uniform point of the window).
    points_per_cell : int
        Starts simulated per cell (grid with corners plus random points).
    mixed : int
        Sampled points that keep the limits at time 0 and lie in a mixed cell.
    share, low, high : float
        ``mixed / cells`` and its 95 % Clopper-Pearson interval.
    horizon : float
        T: crossers cross by T, keepers keep the limits up to 2T.
    dt : float
        Largest RK4 step.
    unknown : int
        Starts inside the limits at time 0 whose fate was judged unknown (among those
        simulated to 2T; starts of cells that cannot be mixed stop at T).
    starts : int
        Starts inside the limits at time 0.
    """

    depth: int
    cells: int
    points_per_cell: int
    mixed: int
    share: float
    low: float
    high: float
    horizon: float
    dt: float
    unknown: int
    starts: int


def clopper_pearson(k, n, level=0.95):
    """Exact binomial confidence interval for a success probability.

    Parameters
    ----------
    k, n : int
        Successes and trials (``0 <= k <= n``, ``n >= 1``).
    level : float
        Coverage, default 0.95.

    Returns
    -------
    tuple of float
        ``(low, high)`` (Clopper & Pearson 1934, beta-quantile form).
    """
    a = 1.0 - level
    low = beta.ppf(a / 2, k, n - k + 1) if k > 0 else 0.0
    high = beta.ppf(1 - a / 2, k + 1, n - k) if k < n else 1.0
    return float(low), float(high)


def cell_offsets(n, grid, random=0, rng=None):
    """Positions of starts inside a unit cell: a grid of `grid` points per axis with the
    corners, then `random` uniform points from `rng`; shape (grid^n + random, n)."""
    ticks = np.linspace(0.0, 1.0, grid)
    lattice = np.array(list(itertools.product(ticks, repeat=n)), float).reshape(-1, n)
    if random == 0:
        return lattice
    return np.vstack([lattice, rng.uniform(0.0, 1.0, (random, n))])


class _LimitWatch:
    """Event callable for :func:`certify.simulate.simulate` that records, per start, the
    least value of each limit seen at a step end (NaN values are skipped)."""

    def __init__(self, limits, params, first):
        self.limits = limits
        self.buffer = np.empty((len(first), len(limits.inputs)))
        self.n = first.shape[1]
        self.buffer[:, self.n:] = params
        self.least = np.full((len(first), limits.n_outputs), np.inf)
        self.finite = np.ones(len(first), bool)

    def __call__(self, state):
        self.buffer[:, :self.n] = state
        g = np.asarray(self.limits.point(self.buffer), float)
        self.least = np.fmin(self.least, g)
        self.finite &= np.all(np.isfinite(state), axis=1)
        return g


def _run(programs, params, x0, t_end, dt):
    """RK4 from `x0` over `t_end`; the final states and the :class:`_LimitWatch`."""
    watch = _LimitWatch(programs.limits, params, x0)
    result = simulate(programs.field, x0, list(params), t_end, dt=dt, events=watch)
    return result.states, watch


def mixed_floor(model, depth, horizon, dt, *, cells=2000, grid=None, random=None, stream=0,
                rel_tol=1e-6):
    """Estimate the share of the window in cells of `depth` that hold two fates.

    Parameters
    ----------
    model : certify.model.Model
    depth : int
        Cells of 1/2^depth of each window side.
    horizon : float
        T, several times the model's settling time: crossers cross by T, keepers keep
        every limit up to 2T.
    dt : float
        Largest RK4 step.
    cells : int
        Uniform points of the window drawn (one cell each).
    grid : int, optional
        Grid points per axis inside each cell, corners included (default 3 up to three
        states, 2 above).
    random : int, optional
        Uniform random starts per cell besides the grid (default 13 up to three states,
        16 above).
    stream : int
        Number of the random stream: the draws come from
        ``numpy.random.default_rng(stream)``.
    rel_tol : float
        Margin of the fate judgements, relative to the largest magnitude of each limit
        over the starts: a crosser goes below ``-tol``, a keeper stays above ``+tol``.

    Returns
    -------
    MixedFloor
    """
    n = len(model.states)
    grid = grid if grid is not None else (3 if n <= 3 else 2)
    random = random if random is not None else (13 if n <= 3 else 16)
    rng = np.random.default_rng(stream)
    lo = np.array([float(a) for a, _ in model.window])
    side = (np.array([float(b) for _, b in model.window]) - lo) / 2 ** depth
    u = lo + rng.uniform(0.0, 1.0, (cells, n)) * side * 2 ** depth
    corner = lo + np.minimum(np.floor((u - lo) / side), 2 ** depth - 1) * side
    offsets = cell_offsets(n, grid, random, rng)
    starts = (corner[:, None, :] + offsets[None, :, :] * side).reshape(-1, n)
    cell_of = np.repeat(np.arange(cells), len(offsets))

    programs = flow_programs(model, 1)
    params = np.array([0.5 * float(p.lo) + 0.5 * float(p.hi) for p in model.parameters])
    watch0 = _LimitWatch(programs.limits, params, np.vstack([u, starts]))
    g0 = watch0(np.vstack([u, starts]))
    tol = rel_tol * np.max(np.abs(g0[np.isfinite(g0).all(axis=1)]), axis=0)
    u_inside = np.all(g0[:cells] >= 0, axis=1)
    inside = np.all(g0[cells:] > tol, axis=1)

    # to T: who crosses
    x0 = starts[inside]
    owner = cell_of[inside]
    states, watch = _run(programs, params, x0, horizon, dt)
    crosser = np.any(watch.least < -tol, axis=1)
    has_crosser = np.bincount(owner[crosser], minlength=cells) > 0
    # from T to 2T, only starts that have not crossed, in cells that hold a crosser
    go_on = ~crosser & has_crosser[owner] & watch.finite
    states2, watch2 = _run(programs, params, states[go_on], horizon, dt)
    keeper = np.zeros(len(x0), bool)
    keeper[go_on] = (np.all(np.fmin(watch.least[go_on], watch2.least) > tol, axis=1)
                     & watch2.finite & np.all(np.isfinite(states2), axis=1))
    has_keeper = np.bincount(owner[keeper], minlength=cells) > 0
    mixed = int(np.sum(has_crosser & has_keeper & u_inside))
    low, high = clopper_pearson(mixed, cells)
    return MixedFloor(depth=depth, cells=cells, points_per_cell=len(offsets), mixed=mixed,
                      share=mixed / cells, low=low, high=high, horizon=float(horizon),
                      dt=float(dt), unknown=int(np.sum(go_on & ~keeper)),
                      starts=int(inside.sum()))


def floor_text(floor):
    """The floor in % with its interval, e.g. ``"5.2 (4.3-6.3)"``."""
    return f"{100 * floor.share:.1f} ({100 * floor.low:.1f}-{100 * floor.high:.1f})"


def floor_note(cells_of):
    """The sentence explaining the mixed-floor column of a results table.

    Parameters
    ----------
    cells_of : str
        Which cells, e.g. ``"depth D"`` or ``"the depth reached"``.
    """
    return (f"Mixed floor = share of the window (with its 95 % Clopper-Pearson interval) "
            f"inside the limits at time 0 and in cells of {cells_of} that hold a start "
            f"crossing a limit by the RK4 horizon T and a start keeping every limit up to "
            f"2T (RK4 from a grid with corners plus random starts in each sampled cell, "
            f"`benchmarks/mixed_floor.py`): no sound method labels such a cell, so the "
            f"undecided share cannot fall below it at that depth (a float estimate).")


def sample_text(floor):
    """The sample of the estimate, e.g. ``"2,000 cells x 40 starts"``."""
    return f"{floor.cells:,} cells x {floor.points_per_cell} starts"


def describe(floor):
    """One line: the floor in % with its interval and sample."""
    return (f"mixed floor {floor_text(floor)} % (95 % CI) at depth {floor.depth}: "
            f"{sample_text(floor)}, RK4 dt {floor.dt:g} "
            f"to T = {floor.horizon:g} and 2T; {floor.unknown:,} of {floor.starts:,} starts "
            f"unknown")


def main(argv=None):
    """Print the floor per model and depth.

    Parameters
    ----------
    argv : list of str, optional
        ``--models NAME ...`` (files in models/), ``--depths D ...``, ``--horizon T`` and
        ``--dt H`` (default: the model's case in ``dimensions_bench.CASES`` or
        ``library_bench.CASES_2D``),
        ``--cells K``, ``--stream S`` (random stream, default 0).

    Returns
    -------
    int
        0.
    """
    from dimensions_bench import CASES  # the benches import this module, not the reverse
    from library_bench import CASES_2D
    cases = {**{case.file: case for case in CASES_2D}, **CASES}
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--models", nargs="+", required=True)
    parser.add_argument("--depths", type=int, nargs="+", required=True)
    parser.add_argument("--horizon", type=float)
    parser.add_argument("--dt", type=float)
    parser.add_argument("--cells", type=int, default=2000)
    parser.add_argument("--stream", type=int, default=0)
    args = parser.parse_args(argv)
    for name in args.models:
        name = name if name.endswith(".toml") else name + ".toml"
        model = load_model(ROOT / "models" / name)
        case = cases.get(name)
        if case is None and not (args.horizon and args.dt):
            parser.error(f"{name}: no RK4 case in the benches; give --horizon and --dt")
        horizon = args.horizon or case.horizon
        dt = args.dt or case.dt
        for depth in args.depths:
            floor = mixed_floor(model, depth, horizon, dt, cells=args.cells,
                                stream=args.stream)
            print(f"{name}: {describe(floor)}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
