"""Which undecided leaves a followed round takes, and in which order.

A followed round (docs/proof-loop.md, "Followed tubes at the maximum depth") computes the
tubes of the undecided leaves again without stopping where they leave their cells. It is
the dearest round of a proof in three or more states, and at a default budget the time
limit often cuts it short. What the labelling just made says about a leaf tells how
likely a longer tube is to decide it:

* a leaf whose tube keeps every limit and whose decided successors are all safe needs
  only a tube that lands on safe leaves (seven in ten of them were decided on the
  library's food chain and lake at depth 6, one in six on the two generators at depth 4,
  one in two on the glucose model of benchmarks/fresh_models at depth 5);
* a leaf with no safe successor may still be decided either way, or doomed when its
  tube does not keep a limit (a quarter to two fifths of them, none on the two
  generators);
* a leaf with a safe successor and a doomed or outside one lies across the border
  between the fates, and a leaf whose tube does not keep a limit cannot be safe (its
  followed tube repeats the step that fails) while its decided successors are safe: not
  one of 12,935 such leaves was decided by its followed tube on those four proofs.
  They are left out.

The order only chooses what to compute: every label still comes from the labelling, and
the checker re-derives it from the stored steps.
"""

from __future__ import annotations

import numpy as np

from .labels import DOOMED, OUTSIDE, SAFE

__all__ = ["follow_order"]


def follow_order(tree, leaves, labelling, facts, wanted):
    """The undecided leaves `wanted` worth following, likeliest to be decided first.

    Parameters
    ----------
    tree : certify.cells.CellTree
    leaves : ndarray of int
        The leaves of the labelling (node ids).
    labelling : certify.labels.Labelling
    facts : certify.labels.CellFacts
        The facts the labelling was made from (edges between positions in `leaves`).
    wanted : ndarray of int
        Undecided leaves (node ids).

    Returns
    -------
    ndarray of int
        The leaves of `wanted` to follow: first those whose tubes keep every limit and
        whose decided successors are all safe, then those with no safe successor; leaves
        with a safe successor and either a doomed or outside one or a tube that does not
        keep a limit are left out. Within a rank, the order of `wanted`.
    """
    label = labelling.label
    safe_next = facts.has_successor_in(label == SAFE)
    against_next = facts.has_successor_in((label == DOOMED) | (label == OUTSIDE))
    # 0: kept tube, safe successors only; 1: no safe successor; 2: left out
    rank = np.where(safe_next, np.where(facts.own_failure() | against_next, 2, 0), 1)
    number = tree.leaf_numbers(leaves)
    wanted_rank = rank[number[wanted]]
    order = np.argsort(wanted_rank, kind="stable")
    return wanted[order[wanted_rank[order] < 2]]

