"""Volume fractions of the labels, splitting cells that straddle a limit.

A ``safe``, ``doomed`` or ``undecided`` cell that straddles a limit contributes the part
of it that satisfies the limits to its label and the rest to ``outside``. The split is
exact when every limit that cuts the cell is affine in a single state with numeric
coefficients (the part is a box); otherwise it is estimated on a sub-grid of each cell
(the midpoint between the proven-inside and possibly-inside sub-boxes) and the result
says ``fractions_exact: false``.
"""

from __future__ import annotations

import numpy as np
import sympy

__all__ = ["label_fractions", "inside_shares", "axis_threshold"]

LABELS = ("safe", "doomed", "outside", "undecided")
SUBGRID = 8


def axis_threshold(g, states):
    """For ``g = a x_k + b`` with numbers a != 0, b: ``(k, -b/a, a > 0)``; else None."""
    used = [k for k, s in enumerate(states) if g.has(s)]
    if len(used) != 1 or not (g.free_symbols <= {states[used[0]]}):
        return None
    k = used[0]
    poly = sympy.Poly(g, states[k])
    if poly.degree() != 1:
        return None
    a, b = poly.all_coeffs()
    return k, float(-b / a), bool(a > 0)


def _inside_fraction_exact(lo, hi, thresholds):
    clo, chi = lo.copy(), hi.copy()
    for k, c, above in thresholds:
        if above:
            clo[:, k] = np.maximum(clo[:, k], c)
        else:
            chi[:, k] = np.minimum(chi[:, k], c)
    part = np.prod(np.clip(chi - clo, 0, None), axis=1)
    return part / np.prod(hi - lo, axis=1)


def _inside_fraction_estimate(proof, lo, hi):
    from .evaluate import evaluate_limits

    n = lo.shape[1]
    grid = np.array(np.meshgrid(*[np.arange(SUBGRID)] * n, indexing="ij")).reshape(n, -1).T
    out = np.empty(len(lo))
    programs = _programs(proof)
    for i in range(len(lo)):
        w = (hi[i] - lo[i]) / SUBGRID
        slo = lo[i] + grid * w
        shi = slo + w
        glo, ghi = evaluate_limits(programs, slo, shi, proof.params)
        certain = np.all(glo >= 0, axis=1).sum()
        possible = (~np.any(ghi < 0, axis=1)).sum()
        out[i] = 0.5 * (certain + possible) / len(grid)
    return out


def label_fractions(proof):
    """Fractions of the window volume per label.

    Parameters
    ----------
    proof : certify.prove.Proof

    Returns
    -------
    fractions : dict
        Label -> fraction; the four sum to 1.
    exact : bool
        False when a straddling cell's split was estimated.
    """
    tree, leaves = proof.tree, proof.leaves
    labels = proof.labelling.label
    vol = tree.volume_fraction(leaves)
    scored = labels != "outside"
    frac_in = np.zeros(len(leaves))
    frac_in[scored], exact = inside_shares(proof, tree.lo[leaves[scored]],
                                           tree.hi[leaves[scored]])
    fractions = {k: 0.0 for k in LABELS}
    for k in ("safe", "doomed", "undecided"):
        sel = labels == k
        fractions[k] = float(np.sum(vol[sel] * frac_in[sel]))
    fractions["outside"] = float(1.0 - fractions["safe"] - fractions["doomed"]
                                 - fractions["undecided"])
    return fractions, exact


def inside_shares(proof, lo, hi):
    """Share of each box's volume that keeps the limits at time 0.

    Parameters
    ----------
    proof : certify.prove.Proof
        Gives the model's limits and the parameter enclosures.
    lo, hi : ndarray, shape (N, n)
        The boxes.

    Returns
    -------
    shares : ndarray, shape (N,)
        1 for boxes proven inside every limit; for the others the exact share when every
        limit that cuts them is affine in one state, else an estimate on a sub-grid.
    exact : bool
        False when some share was estimated.
    """
    from .evaluate import evaluate_limits

    glo, _ = evaluate_limits(_programs(proof), lo, hi, proof.params)
    shares = np.ones(len(lo))
    straddle = np.flatnonzero(~np.all(glo >= 0, axis=1))
    if len(straddle) == 0:
        return shares, True
    states = proof.model.state_symbols
    thresholds = [axis_threshold(c.g, states) for c in proof.model.constraints]
    if all(t is not None for t in thresholds):
        shares[straddle] = _inside_fraction_exact(lo[straddle], hi[straddle], thresholds)
        return shares, True
    shares[straddle] = _inside_fraction_estimate(proof, lo[straddle], hi[straddle])
    return shares, False


def _programs(proof):
    from .taylor import flow_programs
    return flow_programs(proof.model, 1)
