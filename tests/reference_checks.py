"""Shared machinery of the reference tests (``tests/test_reference_r*.py``).

Each reference test proves a small model from ../shared/REFERENCES.md, writes and reads
back its certificate, and compares the certified claims with the published or exact
answer that the test module names beside each check. The checks here are generic:

* :func:`contradictions`: points of decided cells (corners, centres and random points)
  whose exact fate contradicts the cell's label;
* :func:`far_points_coverage`: the share of grid points farther than one finest cell
  from every exact boundary that the certificate decides.

The budgets are depths, never time: every proof here stops at its depth, so the
results do not depend on the speed of the machine.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from certify import parse_model, prove, read_certificate
from certify.points import find_equilibria
from certify.prove import write_proof

__all__ = ["Certified", "certify_text", "cell_sample_points", "contradictions",
           "far_points_coverage", "equilibria_enclose", "NO_TIME_LIMIT"]

#: A time limit no reference proof reaches: the depth decides where a proof stops.
NO_TIME_LIMIT = 1e9

#: Labels an exact rule may give a point; ``boundary`` means "too close to call".
EXACT_LABELS = ("safe", "doomed", "outside", "boundary")


@dataclass
class Certified:
    """A proof and the certificate read back from disk.

    Attributes
    ----------
    proof : certify.prove.Proof
    cert : certify.Certificate
    finest : ndarray, shape (n,)
        Side lengths of the finest cells reached.
    """

    proof: object
    cert: object
    finest: np.ndarray


def certify_text(text, out_dir, **budget):
    """Prove a model given as TOML text and read its certificate back.

    Parameters
    ----------
    text : str
        The model file.
    out_dir : pathlib.Path
        Folder for the certificate.
    **budget
        Method and budget settings passed to :func:`certify.prove`; ``time_limit``
        defaults to :data:`NO_TIME_LIMIT`.

    Returns
    -------
    Certified
    """
    budget.setdefault("time_limit", NO_TIME_LIMIT)
    proof = prove(parse_model(text), **budget)
    write_proof(proof, out_dir, figures=False)
    cert = read_certificate(out_dir / "certificate.json.gz")
    window = np.array([[float(a), float(b)] for a, b in proof.model.window])
    finest = (window[:, 1] - window[:, 0]) / 2.0 ** proof.depth_reached
    return Certified(proof=proof, cert=cert, finest=finest)


def cell_sample_points(cert, labels, rng, n_random=2):
    """Corners, centres and random points of every cell with one of `labels`.

    Parameters
    ----------
    cert : certify.Certificate
    labels : sequence of str
    rng : numpy.random.Generator
    n_random : int
        Random points per cell.

    Returns
    -------
    points : ndarray, shape (N, n)
    cell_label : ndarray of str, shape (N,)
        The label of the cell each point was drawn from.
    """
    sel = np.isin(cert.labels, labels)
    lo, hi = cert.lo[sel], cert.hi[sel]
    n = lo.shape[1]
    pieces = [0.5 * (lo + hi)]
    for corner in itertools.product((0, 1), repeat=n):
        c = np.array(corner, bool)
        pieces.append(np.where(c, hi, lo))
    for _ in range(n_random):
        pieces.append(lo + rng.random(lo.shape) * (hi - lo))
    points = np.concatenate(pieces)
    cell_label = np.tile(cert.labels[sel], len(pieces))
    return points, cell_label


def contradictions(cert, exact, rng, n_random=2):
    """Points of decided cells whose exact fate contradicts the cell's label.

    A ``safe`` cell may hold ``safe`` and ``outside`` points (a cell may straddle a
    limit), a ``doomed`` cell ``doomed`` and ``outside`` points, an ``outside`` cell
    only ``outside`` points; ``boundary`` points never count.

    Parameters
    ----------
    cert : certify.Certificate
    exact : callable
        ``exact(points) -> ndarray of str`` with values in :data:`EXACT_LABELS`.
    rng : numpy.random.Generator
    n_random : int

    Returns
    -------
    points : ndarray, shape (K, n)
        The contradicting points (empty when the certificate agrees).
    n_checked : int
        Number of points checked.
    """
    points, cell_label = cell_sample_points(cert, ("safe", "doomed", "outside"), rng, n_random)
    fate = exact(points)
    allowed = {"safe": ("safe", "outside", "boundary"),
               "doomed": ("doomed", "outside", "boundary"),
               "outside": ("outside", "boundary")}
    bad = np.zeros(len(points), bool)
    for label, ok in allowed.items():
        bad |= (cell_label == label) & ~np.isin(fate, ok)
    return points[bad], len(points)


def far_points_coverage(cert, exact, region, n_per_axis, margin, stencil=5):
    """Share of grid points far from every exact boundary that the certificate decides.

    A grid point is *far* when `exact` gives one and the same label (not ``boundary``)
    on a stencil over the box of half-width `margin` around it.

    Parameters
    ----------
    cert : certify.Certificate
    exact : callable
        As in :func:`contradictions`.
    region : sequence of (float, float)
        Box of the grid, one pair per state.
    n_per_axis : int
    margin : ndarray, shape (n,)
        Half-widths of the stencil box (one finest cell).
    stencil : int
        Stencil points per axis.

    Returns
    -------
    decided : float
        Share of far points whose certified label is not ``undecided``.
    agree : float
        Share of far points whose certified label equals the exact one.
    n_far : int
    """
    axes = [np.linspace(a, b, n_per_axis) for a, b in region]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, len(region))
    offsets = np.stack(np.meshgrid(*[np.linspace(-1, 1, stencil)] * len(region),
                                   indexing="ij"), -1).reshape(-1, len(region))
    fates = np.stack([exact(grid + o * margin) for o in offsets], 1)
    far = np.all(fates == fates[:, :1], axis=1) & (fates[:, 0] != "boundary")
    labels = cert.label_at(grid[far])
    decided = float(np.mean(labels != "undecided")) if far.any() else 0.0
    agree = float(np.mean(labels == fates[far, 0])) if far.any() else 0.0
    return decided, agree, int(far.sum())


def equilibria_enclose(text, expected):
    """Prove the equilibria of a model and match them with known exact points.

    Parameters
    ----------
    text : str
        The model file.
    expected : list of (sequence of float, str)
        Exact equilibria in the window with their stability (``stable``, ``unstable``,
        ``saddle``, or ``None`` when the reference gives none the tool could prove).

    Returns
    -------
    list of str
        One message per mismatch (empty when every expected point lies in exactly one
        proven box with the expected stability, no other box was found, and the search
        covered the window).
    """
    result = find_equilibria(parse_model(text))
    problems = [] if result.complete else ["the search left boxes unresolved"]
    if len(result.equilibria) != len(expected):
        problems.append(f"{len(result.equilibria)} equilibria proven, {len(expected)} expected")
    for point, stability in expected:
        point = np.asarray(point, float)
        holders = [e for e in result.equilibria
                   if np.all((e.box[:, 0] <= point) & (point <= e.box[:, 1]))]
        if len(holders) != 1:
            problems.append(f"{point} lies in {len(holders)} proven boxes")
        elif stability is not None and holders[0].stability != stability:
            problems.append(f"{point} proven {holders[0].stability}, expected {stability}")
    return problems
