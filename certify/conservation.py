"""Upper caps on species from conservation laws of a reaction network.

A vector ``c`` with ``c^T N = 0`` (``N``: net stoichiometry, species by reactions, in
amounts) makes ``sum_j c_j n_j`` constant in time. When ``c`` has no negative entry and
the amounts stay nonnegative, ``n_i`` with ``c_i = 1`` stays at most
``sum_j c_j n_j(0)``; the smallest such total is a linear program. ``certify import``
uses these caps to guess state ranges; they are guesses (the ranges are marked so),
rounded to six digits, and part of no proof.
"""

from dataclasses import dataclass
from fractions import Fraction

import numpy as np
from scipy.optimize import linprog

__all__ = ["Cap", "conserved_caps"]

_TINY = 1e-9


@dataclass(frozen=True)
class Cap:
    """A cap on one species' state and the conservation law giving it.

    ``law`` maps species indices to their coefficients ``c_j * weight_j`` (rounded), so
    that ``sum law[j] * state_j`` is conserved.
    """

    value: Fraction
    law: dict


def conserved_caps(stoichiometry, weights, starts):
    """The smallest cap each species gets from a nonnegative conservation law.

    Parameters
    ----------
    stoichiometry : list of list of Fraction
        ``N[i][r]``: net change of species ``i``'s amount per unit of reaction ``r``.
    weights : list of Fraction or None
        Amount per unit of each species' state (its compartment size for a
        concentration, 1 for an amount); None when unknown.
    starts : list of Fraction or None
        Each species' initial state; None when unknown.

    Returns
    -------
    dict[int, Cap]
        For each species in a conservation law of two or more species whose weights and
        starts are known, with a positive cap.

    Examples
    --------
    >>> from fractions import Fraction as F
    >>> caps = conserved_caps([[-1], [1]], [F(1), F(1)], [F(3), F(1)])  # A -> B
    >>> caps[0].value, caps[1].value, caps[1].law
    (Fraction(4, 1), Fraction(4, 1), {0: Fraction(1, 1), 1: Fraction(1, 1)})
    """
    n = len(stoichiometry)
    if n == 0 or not stoichiometry[0]:
        return {}
    known = [weights[j] is not None and starts[j] is not None for j in range(n)]
    cost = np.array([float(weights[j] * starts[j]) if known[j] else 0.0 for j in range(n)])
    balance = np.array(stoichiometry, dtype=float).T
    caps = {}
    for i in range(n):
        if not known[i] or weights[i] <= 0:
            continue
        pin = np.zeros((1, n))
        pin[0, i] = 1.0
        bounds = [(0, None) if known[j] else (0, 0) for j in range(n)]
        result = linprog(cost, A_eq=np.vstack([balance, pin]),
                         b_eq=np.append(np.zeros(len(balance)), 1.0), bounds=bounds,
                         method="highs")
        if result.status != 0:
            continue
        support = [j for j in range(n) if result.x[j] > _TINY]
        value = _rounded(result.fun / float(weights[i]))
        if len(support) >= 2 and value > 0:
            caps[i] = Cap(value, {j: _rounded(result.x[j] * float(weights[j]))
                                  for j in support})
    return caps


def _rounded(number):
    """``number`` to six significant digits, as an exact decimal."""
    return Fraction(f"{number:.6g}")
