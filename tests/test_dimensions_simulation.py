"""The 3D and 4D library models: proven labels agree with 20,000 simulated starts.

Each model with three or more states is proved at a coarse depth (cheap), its
certificate is written and read back, and 20,000 starts drawn uniformly in the window
(fixed random streams) are labelled through the certificate's point queries
(``Certificate.label_at``, ``Certificate.crossing_time_bounds``). All starts are then
integrated together, as one stacked system, by scipy's DOP853
(``scipy.integrate.DOP853``, rtol 1e-10, atol 1e-12) with a right-hand side and limit
margins built by ``sympy.lambdify`` from the model's expressions (not by certify's own
program compiler). Reference: scipy.integrate, an integrator outside this project.

Properties asserted:

- a start labelled ``safe`` keeps every limit over the whole simulated horizon;
- a start labelled ``doomed`` keeps every limit before its proven lower bound and has
  crossed a limit by its proven upper bound.

Margins are sampled on a fine time grid (from each step's dense output). Between two
grid times ``h`` apart a margin ``m`` with ``|m''| <= M`` lies above its chord minus
``M/2 (t - t_k)(t_k+1 - t)`` (the interpolation-error bound of linear interpolation);
the test takes the exact minimum of that bound on every grid interval, per limit, with
``m''`` the second Lie derivative of the limit along the field and ``M`` estimated as
twice the larger of its values at the interval's ends (the grid is fine enough that
``m''`` changes little within one interval). A start counts as keeping the limits only
when that bound stays above an integration-error allowance, and as having crossed only
when some grid margin is below minus the allowance; the check before a doomed start's
lower bound includes the whole grid interval in which that bound falls. These rules
only make the test fail more often than exact margins would (a safe trajectory that
grazes a limit, or a doomed one crossing within a hair of its deadline, would be
reported); they do not let a crossing between grid times pass unseen.
"""

from pathlib import Path

import numpy as np
import pytest
import sympy
from scipy.integrate import DOP853

from certify import load_model, prove
from certify.certificate import read_certificate
from certify.prove import write_proof

MODELS = sorted((Path(__file__).resolve().parent.parent / "models").glob("*.toml"))
MODELS_3D4D = [p for p in MODELS if len(load_model(p).states) >= 3]

#: Proof depth, proof time limit (s), simulated horizon (model time units) and focus per
#: model: coarse enough for CI, fine enough to decide cells of each fate where that is
#: cheap. A focus (a point: the stable state named in the model's header) refines only the cells around it and
#: those their images reach (``certify.prove(focus=...)``), which proves safe cells
#: there at a fraction of the cost of the whole window at that depth.
SETTINGS = {
    "microbial_food_chain.toml": (6, 60.0, 60.0, (0.287, 0.587, 0.135)),
    "chemostat_competition.toml": (5, 60.0, 80.0, None),
    "lake_plankton.toml": (5, 60.0, 100.0, None),
    "two_generators.toml": (3, 60.0, 20.0, None),
}
#: Half-width of the focus box, as a share of each window side.
FOCUS_RADIUS = 0.01

N_STARTS = 20_000
GRID_STEPS = 4000       # grid times over the horizon
#: Integration-error allowance on a margin, relative to the window's largest side. scipy
#: controls the error of the stacked system in the root mean square over all starts;
#: checked once against single-start DOP853 solves at rtol 1e-13 (every 1000th start,
#: at the end of the horizon), the stacked states of these models deviated by at most
#: 4e-11, far below this allowance.
ERROR_ALLOWANCE = 1e-6


class Simulation:
    """Vectorized right-hand side, margins and their Lie derivatives from sympy."""

    def __init__(self, model):
        xs = sympy.symbols(f"x0:{len(model.states)}")
        subs = {s.symbol: x for s, x in zip(model.states, xs)}
        subs.update({p.symbol: sympy.Rational(p.lo) for p in model.parameters})
        f = [sympy.sympify(e).subs(subs) for e in model.equations]
        g = [c.g.subs(subs) for c in model.constraints]
        dg = [sum(sympy.diff(gi, x) * fi for x, fi in zip(xs, f)) for gi in g]
        d2g = [sum(sympy.diff(di, x) * fi for x, fi in zip(xs, f)) for di in dg]
        self.n = len(xs)
        self._f = [sympy.lambdify(xs, fi, "numpy") for fi in f]
        self._g = [sympy.lambdify(xs, gi, "numpy") for gi in g]
        self._d2g = [sympy.lambdify(xs, di, "numpy") for di in d2g]

    @staticmethod
    def _eval(funcs, cols):
        return np.stack([np.broadcast_to(fn(*cols), cols[0].shape) for fn in funcs])

    def rhs(self, _t, y):
        """Right-hand side of the stacked system (state-major layout)."""
        return self._eval(self._f, y.reshape(self.n, -1)).ravel()

    def margins(self, y):
        """Per limit and start: the margin and its second derivative along the flow."""
        cols = y.reshape(self.n, -1)
        return self._eval(self._g, cols), self._eval(self._d2g, cols)


def _interval_minimum(a, b, curv, h):
    """Least value on [0, h] of chord(a, b) - curv/2 u (h - u): a lower bound of a function
    with these end values and |second derivative| <= curv (elementwise)."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        u = np.clip(np.nan_to_num(h / 2 - (b - a) / (curv * h)), 0.0, h)
    return np.minimum(np.minimum(a, b), a + (b - a) * u / h - curv / 2 * u * (h - u))


def _track(sim, x0, lower, upper, horizon):
    """Over the grid: least margin bound before `lower` and overall, least margin at the
    grid points and crossing bounds up to `upper` (all per start, over all limits). The
    grid interval that holds a start's `lower` is bounded up to `lower` only."""
    y0 = x0.T.ravel()
    solver = DOP853(sim.rhs, 0.0, y0, horizon, rtol=1e-10, atol=1e-12)
    grid = np.linspace(0.0, horizon, GRID_STEPS + 1)
    h = grid[1]
    m, c = sim.margins(y0)
    before = np.full(len(x0), np.inf)
    overall = np.full(len(x0), np.inf)
    upto = m.min(axis=0)
    ends = np.unique(upper[np.isfinite(upper)])
    starts = np.unique(lower[np.isfinite(lower)])
    k = 1
    while solver.status == "running":
        solver.step()
        assert solver.status != "failed"
        j = np.searchsorted(grid, solver.t, side="right")
        if k < j:
            dense = solver.dense_output()
            for t_prev, t in zip(grid[k - 1:j - 1], grid[k:j]):
                m_new, c_new = sim.margins(dense(t))
                low = _interval_minimum(m, m_new, 2 * np.maximum(np.abs(c), np.abs(c_new)),
                                        h).min(axis=0)
                overall = np.minimum(overall, low)
                before = np.where(t <= lower, np.minimum(before, low), before)
                for u in starts[(starts > t_prev) & (starts < t)]:
                    m_u, c_u = sim.margins(dense(u))
                    low_u = _interval_minimum(m, m_u, 2 * np.maximum(np.abs(c), np.abs(c_u)),
                                              u - t_prev).min(axis=0)
                    before = np.where(lower == u, np.minimum(before, low_u), before)
                upto = np.where(t <= upper, np.minimum(upto, m_new.min(axis=0)), upto)
                # the bounds themselves, which need not fall on the grid
                for u in ends[(ends > t_prev) & (ends <= t)]:
                    upto = np.where(u <= upper, np.minimum(upto, sim.margins(dense(u))[0]
                                                           .min(axis=0)), upto)
                m, c = m_new, c_new
            k = j
    return before, upto, overall


@pytest.mark.parametrize("path", MODELS_3D4D, ids=lambda p: p.name)
def test_labels_agree_with_stacked_simulation(path, tmp_path):
    depth, time_limit, horizon, centre = SETTINGS[path.name]
    model = load_model(path)
    lo = np.array([float(s.lo) for s in model.states])
    hi = np.array([float(s.hi) for s in model.states])
    focus = None if centre is None else (np.subtract(centre, FOCUS_RADIUS * (hi - lo)),
                                         np.add(centre, FOCUS_RADIUS * (hi - lo)))
    proof = prove(model, max_depth=depth, time_limit=time_limit, focus=focus)
    write_proof(proof, tmp_path, figures=False)
    cert = read_certificate(tmp_path / "certificate.json.gz")
    x0 = lo + np.random.default_rng(2026).random((N_STARTS, len(lo))) * (hi - lo)
    labels = cert.label_at(x0)
    lower, upper = cert.crossing_time_bounds(x0)
    safe, doomed = labels == "safe", labels == "doomed"
    assert safe.any() or doomed.any()
    keep = safe | doomed
    x0, lower, upper, safe, doomed = x0[keep], lower[keep], upper[keep], safe[keep], doomed[keep]
    horizon = max(horizon, float(np.max(upper[doomed], initial=0.0)))
    before, upto, overall = _track(Simulation(model), x0, lower, upper, horizon)
    err = ERROR_ALLOWANCE * float(np.max(hi - lo))
    # scipy DOP853: no start of a safe cell comes near a limit within the horizon
    bad = safe & ~(overall > err)
    assert not bad.any(), (x0[bad][:5], overall[bad][:5])
    # scipy DOP853: every start of a doomed cell keeps the limits before its lower bound ...
    bad = doomed & ~(before > err)
    assert not bad.any(), (x0[bad][:5], before[bad][:5], lower[bad][:5])
    # ... and has crossed a limit by its upper bound
    bad = doomed & ~(upto < -err)
    assert not bad.any(), (x0[bad][:5], upto[bad][:5], upper[bad][:5])


def test_every_3d_4d_model_has_settings():
    assert {p.name for p in MODELS_3D4D} == set(SETTINGS)
