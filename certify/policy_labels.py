"""The labels of a model with controls, as fixpoints over one graph per setting.

``safe`` is the greatest set ``S`` of cells such that every cell of ``S`` has a setting
under which its tube keeps the limits for its whole horizon (at least the hold time),
its image is known and stays where it is harmless, and its successors under that
setting lie in ``S`` (or are outside). ``doomed`` comes unchanged from the fixpoint of
:mod:`certify.labels` on the graph of the differential inclusion over the hull of the
settings (docs/labels.md, "Models with controls").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Policy", "controlled_safe"]


@dataclass
class Policy:
    """The controlled safe set and the chosen setting per cell.

    Attributes
    ----------
    safe : ndarray of bool, shape (L,)
    choice : ndarray of int, shape (L,)
        Index of the chosen setting of each safe cell (the first in the listed order that
        keeps it safe), -1 elsewhere.
    rounds : int
        Sweeps of the fixpoint iteration.
    """

    safe: np.ndarray
    choice: np.ndarray
    rounds: int


def _candidates(facts, hold):
    """Cells whose own tube under one setting keeps the limits for at least `hold`."""
    return (~facts.outside & facts.flow_ok & facts.kept & ~facts.escapes
            & (facts.horizon_lo >= hold))


def controlled_safe(facts, hold):
    """Greatest fixpoint "there is a setting whose tube keeps the limits and whose
    successors are all safe".

    Parameters
    ----------
    facts : list of certify.labels.CellFacts
        One per setting, on the same leaves.
    hold : float
        A float at least the hold time (a horizon below it does not count).

    Returns
    -------
    Policy
    """
    L = len(facts[0].outside)
    candidate = [_candidates(f, hold) for f in facts]
    safe = np.any(candidate, axis=0)
    rounds = 0
    while True:
        rounds += 1
        works = []
        for f, cand in zip(facts, candidate):
            # an edge into an outside cell carries no trajectory of a kept tube
            bad = ~safe[f.dst] & ~f.outside[f.dst]
            has_bad = np.bincount(f.src[bad], minlength=L) > 0
            works.append(cand & ~has_bad)
        new = np.any(works, axis=0)
        if np.array_equal(new, safe):
            break
        safe = new
    works = np.array(works)
    choice = np.where(safe, np.argmax(works, axis=0), -1)
    return Policy(safe=safe, choice=choice, rounds=rounds)
