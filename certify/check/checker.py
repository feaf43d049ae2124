"""Independent re-verification of a certificate: ``check_certificate(path) -> CheckResult``.

The checker trusts only the model parser, sympy's derivatives, python-flint's arb and
its own short graph checks. It never imports the proof code: it reads the certificate
file, re-derives the Taylor coefficients from the stored model text, recomputes every
step of every cell whose claims need it (:mod:`certify.check._cells`), and checks each
cell's claims locally against its own facts and its successors' claims
(docs/design.md, section 5). When every local check holds, every claim holds by induction
over ranks (doomed) and horizons (safe, survival bounds).

Arithmetic: each cell is first recomputed with outward-rounded float64 intervals
(:mod:`certify.check._floats`), vectorized over chunks of cells; a cell whose claims do
not verify that way is recomputed with arb balls evaluating wide boxes in pieces, then
with finer pieces, then with exact-endpoint arithmetic (:mod:`certify.check._arith`),
before it is declared invalid.
"""

from __future__ import annotations

import itertools
import multiprocessing
import os
import time
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np

from ..container import parameter_differences
from ..errors import CertificateError, CertifyError
from ..model import load_model
from ._apart import sets_miss
from ._arith import PASSES
from ._cells import CellTask, CheckContext, _end_sets, cell_facts, exact_cells
from ._claim import read_claim, rederive_claim
from ._faces import confirm_face
from ._programs import derive_programs
from ._read import LABELS, read_for_check
from ._trapping import in_region, verify_region

__all__ = ["CheckResult", "check_certificate"]

#: Steps per chunk of work (cells are grouped by their number of steps).
CHUNK_STEPS = 8000
#: The float pass takes larger chunks (:func:`_float_chunk`), up to this many steps (the
#: memory of a chunk grows with it: tens of arrays over its cells per program).
FLOAT_CHUNK_STEPS = 250_000
#: Time unit of the exact step-time sums: every double is a multiple of 2**-1074.
TIME_SCALE = 1074
#: Range of cell numbers whose images' leaves are looked up and tested together when judging.
JUDGE_BLOCK = 16_384


@dataclass(frozen=True)
class CheckResult:
    """Verdict of :func:`check_certificate`.

    Attributes
    ----------
    status : int
        0 every claim holds, 1 some claim does not hold.
    message : str
    valid : bool
    cells_checked : int
    failures : list of dict
        ``{"cell": leaf number, "address": [depth, [i_1, ...]], "label": ..., "reason": ...}``;
        problems of the whole certificate have ``cell``, ``address`` and ``label`` None.
    seconds : float
    refined_cells : int
        Cells whose claims did not verify with floats nor with arb balls and were
        recomputed with finer pieces.
    fallback_cells : int
        Cells whose claims did not verify with arb balls at all and were recomputed with
        exact-endpoint arithmetic.
    ball_cells : int
        Cells whose claims did not verify in the first pass (float intervals) and were
        recomputed with arb balls.
    model : str or None
        The revised model file for a regression check (``model=``), else None.
    claims : dict or None
        For a regression check: ``{"held": {label: count}, "failed": {label: count}}``
        after propagating failures along the successors the claims rely on.
    parameters_narrowed : list of dict
        The parameters whose proven box (the certificate's ``parameters``) differs from
        the box of the model file (the stored model text, or ``model=``), as
        ``{"name", "proven": ["lo", "hi"], "model": ["lo", "hi"]}`` exact text.
    claim : certify.check._claim.ClaimCheck or None
        For a certificate written by ``certify claim``: the stored verdict, the one
        re-derived from the verified cells, and why the stored one does not follow.
    """

    status: int
    message: str
    valid: bool
    cells_checked: int
    failures: list
    seconds: float
    refined_cells: int = 0
    fallback_cells: int = 0
    model: str | None = None
    claims: dict | None = field(default=None)
    parameters_narrowed: list = field(default_factory=list)
    claim: object = None
    ball_cells: int = 0


# -- tiling ------------------------------------------------------------------------------
@dataclass
class _Tree:
    depth: np.ndarray
    index: np.ndarray
    first_child: np.ndarray
    leaf: np.ndarray
    max_depth: int


def _tile(cert):
    """Verify exactly that the leaves tile the window; build the cell tree.

    Returns
    -------
    tree : _Tree or None
    problems : list of str
    """
    n = cert.n
    keys = {}
    problems = []
    for j, (d, i) in enumerate(zip(cert.depth.tolist(), map(tuple, cert.index.tolist()))):
        if (d, i) in keys:
            problems.append(f"cells {keys[(d, i)]} and {j} have the same address")
        keys[(d, i)] = j
    max_depth = int(cert.depth.max())
    # every node the descent expands is an ancestor of a leaf: a node that is neither a
    # leaf nor an ancestor is a gap, found without descending into it
    inner = set()
    for d, i in keys:
        for up in range(1, d + 1):
            parent = (d - up, tuple(v >> up for v in i))
            if parent in inner:
                break
            inner.add(parent)
    offsets = list(itertools.product((0, 1), repeat=n))
    node_depth, node_index, first_child, leaf = [0], [(0,) * n], [-1], [-1]
    reached = np.zeros(cert.L, bool)
    frontier = [0]
    while frontier and not problems:
        nxt = []
        for node in frontier:
            key = (node_depth[node], node_index[node])
            if key in keys:
                leaf[node] = keys[key]
                reached[keys[key]] = True
                continue
            if key not in inner:
                problems.append(f"no cell covers the part of the window at depth {key[0]}, "
                                f"index {list(key[1])} (a gap)")
                break
            first_child[node] = len(node_depth)
            for off in offsets:
                node_depth.append(key[0] + 1)
                node_index.append(tuple(2 * a + b for a, b in zip(key[1], off)))
                first_child.append(-1)
                leaf.append(-1)
                nxt.append(len(node_depth) - 1)
        frontier = nxt
    if not problems and not reached.all():
        j = int(np.flatnonzero(~reached)[0])
        problems.append(f"cell {j} lies inside another cell (an overlap)")
    if problems:
        return None, problems
    tree = _Tree(depth=np.array(node_depth), index=np.array(node_index, np.int64).reshape(-1, n),
                 first_child=np.array(first_child), leaf=np.array(leaf), max_depth=max_depth)
    return tree, []


def _leaves_meeting(tree, first, last):
    """Pairs (query, leaf) where a leaf meets a query box given on the finest grid."""
    q = np.arange(len(first))
    node = np.zeros(len(first), int)
    out_q, out_leaf = [], []
    k = 1 << tree.index.shape[1]
    while len(q):
        shift = (tree.max_depth - tree.depth[node])[:, None]
        lo = tree.index[node] << shift
        hi = (tree.index[node] + 1) << shift
        meet = np.all((lo <= last[q]) & (hi >= first[q]), axis=1)
        q, node = q[meet], node[meet]
        child = tree.first_child[node]
        is_leaf = child < 0
        out_q.append(q[is_leaf])
        out_leaf.append(tree.leaf[node[is_leaf]])
        q = np.repeat(q[~is_leaf], k)
        node = (child[~is_leaf][:, None] + np.arange(k)[None]).reshape(-1)
    return np.concatenate(out_q), np.concatenate(out_leaf)


# -- facts in parallel -------------------------------------------------------------------
_WORKER = {}
#: Forked workers inherit the modules already imported (and need no ``__main__`` guard
#: in the caller's script); elsewhere fresh interpreters are spawned.
_START_METHOD = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"


def _init_worker(context):
    _WORKER["context"] = context


def _work(job):
    number, arithmetic, task = job
    return number, cell_facts(_WORKER["context"], task, arithmetic)


def _float_chunk(n_steps, jobs):
    """Steps per chunk of the float pass: one chunk per worker, at most FLOAT_CHUNK_STEPS.

    Its cost is mostly a fixed cost per numpy call, paid once per step of the chunk's
    longest cell whatever the number of cells; one chunk per worker keeps the number of
    such rounds smallest (cells are grouped by their number of steps)."""
    share = int(np.maximum(n_steps, 1).sum()) // jobs + 1
    return min(max(CHUNK_STEPS, share), FLOAT_CHUNK_STEPS)


def _tasks(cert, cells, n_steps, chunk=CHUNK_STEPS):
    """Chunks of cells with similar step counts, of about `chunk` steps each."""
    order = cells[np.argsort(-n_steps[cells], kind="stable")]
    tasks, current, steps = [], [], 0
    for c in order:
        current.append(c)
        steps += max(int(n_steps[c]), 1)
        if steps >= chunk:
            tasks.append(np.array(current))
            current, steps = [], 0
    if current:
        tasks.append(np.array(current))
    return [_task(cert, np.sort(t), n_steps) for t in tasks]


def _task(cert, cells, n_steps):
    start = cert.step_start[cells]
    K = n_steps[cells]
    rows = np.concatenate([np.arange(s, s + k) for s, k in zip(start, K)]) if len(cells) \
        else np.zeros(0, int)
    rows = rows.astype(int)
    stored = cert.m is not None     # version 2: start points and frames stored
    return CellTask(cells=cells, depth=cert.depth[cells], index=cert.index[cells],
                    n_steps=K, image_known=cert.image_known[cells],
                    m0=cert.set0_m[cells] if stored else None, h=cert.h[rows], E=cert.E[rows],
                    m=cert.m[rows] if stored else None, A=cert.A[rows] if stored else None)


def _compute(context, tasks, arithmetic, jobs, progress):
    """Run the tasks; returns per-cell fact arrays keyed by leaf number."""
    results = []
    jobs_list = [(k, arithmetic, t) for k, t in enumerate(tasks)]
    if jobs <= 1 or len(tasks) <= 1:
        for job in jobs_list:
            results.append(_work_local(context, job))
            if progress is not None:
                progress(len(job[2].cells))
    else:
        mp = multiprocessing.get_context(_START_METHOD)
        with mp.Pool(min(jobs, len(tasks)), initializer=_init_worker,
                     initargs=(context,)) as pool:
            for number, facts in pool.imap_unordered(_work, jobs_list):
                results.append((number, facts))
                if progress is not None:
                    progress(len(tasks[number].cells))
    return {number: facts for number, facts in results}


def _work_local(context, job):
    number, arithmetic, task = job
    return number, cell_facts(context, task, arithmetic)


class _Facts:
    """Per-leaf facts gathered from the chunks."""

    def __init__(self, L, n):
        self.computed = np.zeros(L, bool)
        self.outside = np.zeros(L, bool)
        self.n_valid = np.zeros(L, int)
        self.first_unkept = np.zeros(L, int)
        self.crossing_step = np.full(L, -1)
        self.image = np.zeros(L, int)
        self.escapes = np.zeros(L, bool)
        self.empty = np.zeros(L, bool)
        self.grid_lo = np.zeros((L, n), np.int64)
        self.grid_hi = np.full((L, n), -1, np.int64)
        self.image_lo = np.full((L, n), None, dtype=object)
        self.image_hi = np.full((L, n), None, dtype=object)
        for key, value in _end_sets(L, n).items():
            setattr(self, key, value)

    def store(self, cells, facts):
        self.computed[cells] = True
        for key in ("outside", "n_valid", "first_unkept", "image", "escapes", "empty",
                    "grid_lo", "grid_hi", "image_lo", "image_hi", "set_m", "set_A", "set_r_lo",
                    "set_r_hi"):
            getattr(self, key)[cells] = facts[key]
        self.crossing_step[cells] = facts["crossing_step"]


# -- claims ------------------------------------------------------------------------------
class _Judge:
    """Local checks of each cell's claims (docs/design.md, section 5)."""

    def __init__(self, cert, facts, tree, succ_missing, unproven_regions=()):
        self.unproven_regions = set(unproven_regions)
        self.cert = cert
        self.facts = facts
        self.tree = tree
        self.missing = succ_missing
        units = [0]
        for x in cert.h.tolist():
            p, q = x.as_integer_ratio()
            units.append(units[-1] + (p << (TIME_SCALE - q.bit_length() + 1)))
        self.units = units

    def time(self, c, j):
        """Exact time at the end of step ``j - 1`` of cell c (``j = 0``: 0)."""
        s = int(self.cert.step_start[c])
        return Fraction(self.units[s + j] - self.units[s], 1 << TIME_SCALE)

    def steps(self, c):
        return int(self.cert.step_start[c + 1] - self.cert.step_start[c])

    def successors(self, c):
        return self.cert.succ[self.cert.succ_start[c]:self.cert.succ_start[c + 1]]

    def check(self, c):
        """Reasons why the claims of cell c fail; each ``(reason, arithmetic)``."""
        cert, f = self.cert, self.facts
        label = cert.label[c]
        out = []
        if label == "outside":
            if not f.outside[c]:
                out.append(("no limit is proven violated on the whole cell", True))
            if not cert.survival_lower[c] <= 0:
                out.append(("an outside cell claims a survival time above 0", False))
            if not cert.crossing_upper[c] >= 0:
                out.append(("an outside cell claims a negative crossing time", False))
            return out
        K = self.steps(c)
        T = self.time(c, K)
        lo, hi = cert.horizon[c]
        if not _at_most(lo, T) or not _at_most(T, hi):
            out.append((f"the horizon [{_num(lo)}, {_num(hi)}] does not enclose the sum "
                        f"of the step sizes", False))
        if label in ("safe", "undecided") and cert.crossing_upper[c] != np.inf:
            out.append((f"a {label} cell claims a crossing time bound", False))
        if label == "safe":
            out += self._safe(c, K)
        elif label == "doomed":
            out += self._doomed(c, K, T)
        if label in ("doomed", "undecided"):
            out += self._survival(c, K, T)
        return out

    def _image(self, c, K):
        """Problems with using the image of cell c at its horizon."""
        cert, f = self.cert, self.facts
        if not cert.image_known[c]:
            return [("its image at the horizon is not known", False)]
        out = []
        if f.n_valid[c] < K:
            out.append((f"step {f.n_valid[c]} does not verify (Picard inclusion or "
                        f"enclosure)", True))
        elif not f.image[c]:
            out.append(("its image is not finite", True))
        elif f.escapes[c]:
            out.append(("part of its image may leave the window where no limit is "
                        "proven violated", True))
        if c in self.missing:
            out.append((f"its image meets cell {self.missing[c]}, which is not among its "
                        f"successors", True))
        return out

    def _safe(self, c, K):
        cert, f = self.cert, self.facts
        if cert.trapped[c] >= 0:
            return self._trapped(c, K)
        out = self._image(c, K)
        if f.first_unkept[c] < K:
            out.append((f"limits are not proven kept on step {f.first_unkept[c]}", True))
        succ = self.successors(c)
        labels = cert.label[succ]
        bad = np.flatnonzero((labels != "safe") & (labels != "outside"))
        if len(bad):
            out.append((f"successor {succ[bad[0]]} is {labels[bad[0]]}", False))
        return out

    def _trapped(self, c, K):
        """A safe cell that lies in, or whose kept tube ends in, a trapping region."""
        cert, f = self.cert, self.facts
        k = int(cert.trapped[c])
        region = cert.regions[k]
        if k in self.unproven_regions:
            return [(f"its trapping region {k} is not proven", False)]
        if cert.trapped_whole[c]:
            lo, hi = exact_cells(cert.window, cert.depth[c:c + 1], cert.index[c:c + 1])
            if not in_region(region, lo[0], hi[0]):
                return [(f"the cell does not lie in trapping region {k}", False)]
            return []
        out = self._image(c, K)
        if f.first_unkept[c] < K:
            out.append((f"limits are not proven kept on step {f.first_unkept[c]}", True))
        if not out and (f.empty[c] or not in_region(region, f.image_lo[c], f.image_hi[c])):
            out.append((f"its image is not proven to lie in trapping region {k}", True))
        return out

    def _doomed(self, c, K, T):
        cert, f = self.cert, self.facts
        rank = int(cert.rank[c])
        bound = cert.crossing_upper[c]
        if rank < 0:
            return [("a doomed cell without a rank", False)]
        if rank == 0:
            if f.outside[c]:
                evidence = Fraction(0)
            elif f.crossing_step[c] >= 0:
                evidence = self.time(c, int(f.crossing_step[c]) + 1)
            else:
                return [("rank 0 without a proven crossing (no step end box violates a "
                         "limit)", True)]
            if not _at_most(evidence, bound):
                return [(f"crossing bound {_num(bound)} is below the proven crossing time "
                         f"{_num(evidence)}", True)]
            return []
        out = self._image(c, K)
        succ = self.successors(c)
        succ = succ[cert.label[succ] != "outside"]
        ranks = cert.rank[succ]
        bad = np.flatnonzero((cert.label[succ] != "doomed") | ~((0 <= ranks) & (ranks < rank)))
        if len(bad):
            d = succ[bad[0]]
            out.append((f"successor {d} is {cert.label[d]} with rank {cert.rank[d]}, "
                        f"not doomed with a rank below {rank}", False))
            return out
        bounds = cert.crossing_upper[succ]
        bad = np.flatnonzero(~np.isfinite(bounds))
        if len(bad):
            return out + [(f"successor {succ[bad[0]]} has no finite crossing bound", False)]
        # the largest float is the largest exact bound
        latest = Fraction(float(bounds.max())) if len(bounds) else Fraction(0)
        latest = max(latest, Fraction(0))
        if not _at_most(T + latest, bound):
            out.append((f"crossing bound {_num(bound)} is below the horizon plus the "
                        f"successors' bounds ({_num(T + latest)})", False))
        return out

    def _survival(self, c, K, T):
        cert, f = self.cert, self.facts
        claim = cert.survival_lower[c]
        if claim <= 0:
            return []
        u = int(f.first_unkept[c])
        if u < K:
            limit = self.time(c, u)
            if not _at_most(claim, limit):
                return [(f"survival bound {_num(claim)} exceeds the start {_num(limit)} of "
                         f"step {u}, whose limits are not proven kept", True)]
            return []
        image = self._image(c, K)
        if image:
            if not _at_most(claim, T):
                return [(f"survival bound {_num(claim)} exceeds the horizon {_num(T)}, "
                         f"and the image is not usable: {image[0][0]}", image[0][1])]
            return []
        succ = self.successors(c)
        succ = succ[cert.label[succ] != "outside"]
        others = cert.survival_lower[succ].astype(float)
        if len(succ) == 0:
            return []
        # T + other grows with other: the smallest bound decides (NaN fails)
        nan = np.flatnonzero(np.isnan(others))
        weakest = int(nan[0]) if len(nan) else int(np.argmin(others))
        other = others[weakest]
        if other == np.inf:
            return []
        if np.isnan(other) or other == -np.inf or not _at_most(claim, T + Fraction(other)):
            return [(f"survival bound {_num(claim)} exceeds the horizon plus successor "
                     f"{succ[weakest]}'s bound", False)]
        return []

    def needs(self, c):
        """Successors whose claims the claims of cell c rely on."""
        cert = self.cert
        label = cert.label[c]
        if label == "outside" or (label == "doomed" and cert.rank[c] == 0) or \
                (label == "safe" and cert.trapped[c] >= 0):
            return []
        if label in ("safe", "doomed"):
            return list(self.successors(c))
        return [d for d in self.successors(c) if cert.label[d] != "outside"]


# -- the check ---------------------------------------------------------------------------
def _needs_steps(cert):
    """Number of steps to recompute per cell (0: only the outside test)."""
    K = np.diff(cert.step_start)
    label = cert.label
    claims = (label == "safe") | (label == "doomed") | \
             ((label == "undecided") & (cert.survival_lower > 0))
    # the flag skips the flow only behind a trapping region (else its steps are needed)
    claims &= ~((label == "safe") & cert.trapped_whole & (cert.trapped >= 0))
    return np.where(claims & (label != "outside"), K, 0)


def _at_most(a, b):
    """Exact ``a <= b`` for floats (possibly infinite) and Fractions."""
    if isinstance(a, float) and np.isinf(a):
        return a < 0
    if isinstance(b, float) and np.isinf(b):
        return b > 0
    return Fraction(a) <= Fraction(b)


def _num(x):
    """A number for a message."""
    return repr(float(x))


def _record(cert, c, label, reason):
    return {"cell": int(c), "address": [int(cert.depth[c]), [int(v) for v in cert.index[c]]],
            "label": str(label), "reason": reason}


def _global(reason):
    return {"cell": None, "address": None, "label": None, "reason": reason}


def check_certificate(path, model=None, jobs=None, progress=None):
    """Re-verify every claim of a certificate.

    Parameters
    ----------
    path : str or Path
        A ``certificate.json.gz`` written by ``certify prove``.
    model : str or Path, optional
        A revised model file with the same states: check the certificate's claims
        against it instead of the stored model (a regression check).
    jobs : int, optional
        Worker processes (default: all cores; 1 runs in this process).
    progress : callable, optional
        ``progress(n_cells)`` after each chunk of cells is recomputed;
        ``progress.total(n)`` is called first when present.

    Returns
    -------
    CheckResult

    Raises
    ------
    CertificateError
        When the file is unreadable or malformed (the message names the file and key).
    ModelError
        When the revised model file is malformed.
    """
    start = time.monotonic()
    cert = read_for_check(path)
    record = read_claim(cert.claim, cert.path, cert.states, cert.window)
    failures = []
    revised = None
    if model is not None:
        revised = load_model(model)
        if [s.name for s in revised.states] != cert.states:
            raise CertificateError(f"{model}: its states {[s.name for s in revised.states]} "
                                   f"differ from the certificate's {cert.states}")
        the_model = revised
        stated = revised
    else:
        if not cert.sha_ok:
            return _verdict(cert, [_global("the model text does not match its sha256 "
                                           "(the model or the hash was changed)")],
                            start, 0, {})
        the_model = _with_parameters(cert)
        stated = cert.model
        if [s.name for s in the_model.states] != cert.states:
            raise CertificateError(f"{path}: key 'states': {cert.states} differ from the "
                                   f"model's states")
        if tuple(the_model.window) != cert.window:
            failures.append(_global("the window differs from the model's state ranges"))
    if cert.model is not None and sorted(p.name for p in cert.model.parameters) == \
            sorted(cert.params):
        failures += _parameter_floats(cert)
    narrowed = parameter_differences(cert.params, {p.name: (p.lo, p.hi)
                                                   for p in stated.parameters})
    tree, problems = _tile(cert)
    if problems:
        return _verdict(cert, failures + [_global(f"the cells do not tile the window: {p}")
                                          for p in problems], start, 0, {}, revised, model,
                        narrowed=narrowed)
    programs = derive_programs(the_model, cert.order, cert.kinks)
    params = tuple((p.lo, p.hi) for p in the_model.parameters)
    open_faces, invariant_faces = [], []
    base = CheckContext(programs=programs, params=params, window=cert.window, open_faces=(),
                        grid_depth=tree.max_depth)
    for axis, side, kind in cert.faces:
        if kind == "open":
            open_faces.append((axis, side))
        elif not confirm_face(base, axis, side, kind):
            open_faces.append((axis, side))
            failures.append(_global(f"face {cert.states[axis]} {side} is not proven to be of "
                                    f"kind {kind!r}"))
        elif kind == "invariant":
            invariant_faces.append((axis, side))
    context = CheckContext(programs=programs, params=params, window=cert.window,
                           open_faces=tuple(open_faces), grid_depth=tree.max_depth,
                           invariant_faces=tuple(invariant_faces),
                           search_tubes=revised is not None, frames=cert.frames)
    unproven = []
    for k, region in enumerate(cert.regions):
        for problem in verify_region(region, programs, params):
            unproven.append(k)
            failures.append(_global(f"trapping region {k}: {problem}"))
    jobs = (os.cpu_count() or 1) if jobs is None else max(1, int(jobs))
    n_steps = _needs_steps(cert)
    if progress is not None and hasattr(progress, "total"):
        progress.total(cert.L)
    facts = _Facts(cert.L, cert.n)
    tasks = _tasks(cert, np.arange(cert.L), n_steps, _float_chunk(n_steps, jobs))
    first = PASSES[0] if revised is None else "float-pieces"
    for number, result in _compute(context, tasks, first, jobs, progress).items():
        facts.store(tasks[number].cells, result)
    judge, local = _judge_all(cert, facts, tree, np.arange(cert.L), unproven)
    recomputed = {}
    for arithmetic in _later_passes(cert, revised):
        retry = np.array(sorted(c for c, reasons in local.items()
                                if any(arith for _, arith in reasons)), int)
        recomputed[arithmetic] = len(retry)
        if len(retry) == 0:
            break
        tasks = _tasks(cert, retry, n_steps)
        for number, result in _compute(context, tasks, arithmetic, jobs, None).items():
            facts.store(tasks[number].cells, result)
        _, again = _judge_all(cert, facts, tree, retry, unproven)
        for c in retry:
            local.pop(c, None)
            if c in again:
                local[c] = again[c]
    for c in sorted(local):
        failures.append(_record(cert, c, cert.label[c], "; ".join(r for r, _ in local[c])))
    claims = None
    if revised is not None or record is not None:
        claims = _propagate(cert, judge, set(local))
        inherited = claims.pop("inherited")
    if revised is not None:
        failures += [_record(cert, c, cert.label[c], "a successor's claim does not hold")
                     for c in inherited]
    claim = None
    if record is not None:
        holds = np.ones(cert.L, bool)
        holds[list(local) + inherited] = False
        claim = rederive_claim(record, cert, the_model, context, holds,
                               lambda first, last: _leaves_meeting(tree, first, last)[1])
        failures += [_global(f"claim: {p}") for p in claim.problems]
    return _verdict(cert, failures, start, cert.L, recomputed, revised, model,
                    claims if revised is not None else None, narrowed, claim)


def _later_passes(cert, revised):
    """The passes after the first for cells whose claims did not verify in it.

    They recompute with arb balls (wide boxes in pieces), with finer pieces and then in
    the prover's order of operations, so that what the prover proved for its model
    verifies. A regression check against a different model (text or parameter boxes)
    reproduces nothing the prover did: there the first pass evaluates wide boxes in the
    ball pass's pieces and a claim it does not re-verify is reported as not
    re-verified, which keeps the check cheaper than a new proof (docs/auditing.md).
    """
    if revised is None:
        return PASSES[1:]
    # the reader hashed the stored text once (cert.model exists only when it matched)
    same = cert.sha_ok and revised.sha256 == cert.model.sha256 and cert.params == {
        p.name: (p.lo, p.hi) for p in revised.parameters}
    return PASSES[1:] if same else ()


def _with_parameters(cert):
    model = cert.model
    names = [p.name for p in model.parameters]
    if sorted(names) != sorted(cert.params):
        raise CertificateError(f"{cert.path}: key 'parameters': expected the model's "
                               f"parameters {names}")
    try:
        return model.with_parameters(cert.params)
    except CertifyError as exc:
        raise CertificateError(f"{cert.path}: key 'parameters': {exc}") from None


def _parameter_floats(cert):
    """Problems with ``parameter_floats`` (rows in the stored model's parameter order):
    each interval parameter's row must enclose its exact box, as the point queries of
    the certificate (``label_at``) decide with these floats whether a point violates a
    limit. Number parameters are substituted exactly there, so their rows are not used."""
    out = []
    for k, p in enumerate(cert.model.parameters):
        p_lo, p_hi = cert.params[p.name]
        lo, hi = (float(v) for v in cert.param_floats[k])
        if p_lo < p_hi and (np.isnan(lo) or np.isnan(hi)
                            or not (_at_most(lo, p_lo) and _at_most(p_hi, hi))):
            out.append(_global(f"parameter_floats row {k} does not enclose the box of "
                               f"parameter {p.name}"))
    return out


def _judge_all(cert, facts, tree, cells, unproven_regions=()):
    """Local checks of `cells`; returns the judge and ``{cell: [(reason, arithmetic)]}``."""
    use = facts.image.astype(bool) & ~facts.empty
    sel = np.asarray(cells)[use[cells]]
    missing = {}
    # by ranges of cell numbers: in four states an image meets hundreds of leaves, and
    # the pairs of every cell at once, with their image sets, filled 20 GB on 400,000 cells
    for first in range(0, cert.L, JUDGE_BLOCK):
        last = min(first + JUDGE_BLOCK, cert.L)
        block = sel[(sel >= first) & (sel < last)]
        if len(block) == 0:
            continue
        q, leaf = _leaves_meeting(tree, facts.grid_lo[block], facts.grid_hi[block])
        src = block[q]
        owner = np.repeat(np.arange(first, last), np.diff(cert.succ_start[first:last + 1]))
        listed = cert.succ[cert.succ_start[first]:cert.succ_start[last]]
        unlisted = ~np.isin(src.astype(np.int64) * cert.L + leaf,
                            owner.astype(np.int64) * cert.L + listed)
        src, leaf = src[unlisted], leaf[unlisted]
        for s, d in zip(*_met(cert, facts, src, leaf)):
            missing.setdefault(s, d)
    judge = _Judge(cert, facts, tree, missing, unproven_regions)
    local = {}
    for c in np.asarray(cells).tolist():
        reasons = judge.check(c)
        if reasons:
            local[c] = reasons
    return judge, local


def _met(cert, facts, src, leaf):
    """The pairs (cell, leaf) whose leaf the cell's image sets are not proven to miss
    (an unlisted leaf is allowed where they miss it), as two lists."""
    if len(src) == 0:
        return [], []
    leaves, where = np.unique(leaf, return_inverse=True)
    lo, hi = exact_cells(cert.window, cert.depth[leaves], cert.index[leaves])
    met = ~sets_miss(facts.set_m[src], facts.set_A[src], facts.set_r_lo[src],
                     facts.set_r_hi[src], lo, hi, where.reshape(-1))
    return src[met].tolist(), leaf[met].tolist()


def _propagate(cert, judge, failed):
    """Claims that still hold once failures spread to the cells relying on them."""
    failed = set(failed)
    users = {}
    for c in range(cert.L):
        for d in judge.needs(c):
            users.setdefault(int(d), []).append(c)
    stack = list(failed)
    inherited = []
    while stack:
        d = stack.pop()
        for c in users.get(d, ()):
            if c not in failed:
                failed.add(c)
                inherited.append(c)
                stack.append(c)
    held = {k: 0 for k in LABELS}
    lost = {k: 0 for k in LABELS}
    for c in range(cert.L):
        (lost if c in failed else held)[str(cert.label[c])] += 1
    return {"held": held, "failed": lost, "inherited": sorted(inherited)}


def _verdict(cert, failures, start, checked, recomputed, revised=None, model=None,
             claims=None, narrowed=(), claim=None):
    valid = not failures
    if valid:
        message = "every claim of the certificate holds"
    else:
        cells = len({f["cell"] for f in failures if f["cell"] is not None})
        whole = [f["reason"] for f in failures if f["cell"] is None]
        parts = whole + ([f"{cells} of {cert.L} cells have claims that do not hold"]
                         if cells else [])
        message = "; ".join(parts)
    if revised is not None:
        message += f" (claims checked against {model})"
    return CheckResult(status=0 if valid else 1, message=message, valid=valid,
                       cells_checked=checked, failures=failures,
                       seconds=time.monotonic() - start,
                       refined_cells=recomputed.get("fine", 0),
                       fallback_cells=recomputed.get("endpoint", 0),
                       ball_cells=recomputed.get("ball", 0),
                       model=str(model) if model is not None else None, claims=claims,
                       parameters_narrowed=list(narrowed), claim=claim)
