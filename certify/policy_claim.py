"""Claims about a region of a model with controls: is there a policy for the region?

``certify claim MODEL --expect safe`` on a model with ``[controls]`` proves a policy map
(:func:`certify.policy.prove_policy`) and reads the verdict off the cells whose closed
boxes meet the closed region (the checker re-derives it, ``check/_policy.py``):

* ``proven``: every such cell is ``safe`` under the policy and every limit holds at
  time 0 on every piece of the region (its part in one of those cells): the policy
  stored with the verdict keeps every start of the region within the limits forever. A
  safe cell speaks only about its starts within the limits, and a cell that straddles a
  limit can be safe, so the second test is needed;
* ``refuted``: one of them is ``doomed`` (no control of any kind keeps its starts) or
  ``outside`` (its starts violate a limit at time 0), or a limit is violated on a whole
  piece of the region at time 0;
* ``inconclusive``: neither, within the budget.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from . import interval as iv
from .claim import _full_region
from .container import fraction_text
from .errors import UsageError
from .evaluate import evaluate_limits
from .taylor import flow_programs

__all__ = ["PolicyClaim", "claim_policy", "write_policy_claim"]


@dataclass(frozen=True)
class PolicyClaim:
    """The verdict on "there is a policy for this region".

    Attributes
    ----------
    verdict : str
        ``proven``, ``refuted`` or ``inconclusive``.
    message : str
    region : dict
        State name -> ``(lo, hi)`` exact Fractions, every state.
    counts : dict
        Label -> number of cells meeting the region.
    policy : certify.policy.PolicyProof
    certificate : str or None
        The written ``policy.json.gz``, once :func:`write_policy_claim` has run.
    """

    verdict: str
    message: str
    region: dict
    counts: dict
    policy: object
    certificate: str | None = None

    def record(self):
        """The ``claim`` record stored in ``policy.json.gz``."""
        return {"region": {k: [fraction_text(lo), fraction_text(hi)]
                           for k, (lo, hi) in self.region.items()},
                "expect": "safe", "verdict": self.verdict}

    def to_json(self):
        """JSON-ready dictionary (``claim.json``, ``certify claim --json``)."""
        return {"verdict": self.verdict, "message": self.message, "expect": "safe",
                "region": {k: [float(lo), float(hi)] for k, (lo, hi) in self.region.items()},
                "cells_meeting_region": self.counts, "certificate": self.certificate}


def cells_meeting(pp, region):
    """Leaf numbers whose exact closed box meets the closed region."""
    lo = np.array([float(region[s.name][0]) for s in pp.model.states])
    hi = np.array([float(region[s.name][1]) for s in pp.model.states])
    leaves = pp.tree.leaves_meeting(np.nextafter(lo, -np.inf)[None], np.nextafter(hi, np.inf)[None])[1]
    number = pp.tree.leaf_numbers(pp.leaves)
    out = []
    for node in np.unique(leaves).tolist():
        box = pp.tree.exact_box(node)
        if all(a <= region[s.name][1] and region[s.name][0] <= b
               for (a, b), s in zip(box, pp.model.states)):
            out.append(int(number[node]))
    return np.array(sorted(out), int)


def _piece_limits(pp, region, meeting):
    """Whether every limit holds on every piece of the region (its part in one of the
    cells `meeting`) at t = 0, and whether some limit is violated on a whole piece
    (outward-rounded float enclosures at the hull of the settings)."""
    if len(meeting) == 0:
        return False, False
    states = pp.model.states
    lo, hi = [], []
    for leaf in meeting.tolist():
        box = pp.tree.exact_box(int(pp.leaves[leaf]))
        lo.append([iv.enclose_fraction(max(a, region[s.name][0]))[0]
                   for (a, _), s in zip(box, states)])
        hi.append([iv.enclose_fraction(min(b, region[s.name][1]))[1]
                   for (_, b), s in zip(box, states)])
    programs = flow_programs(pp.inclusion.model, 1)
    glo, ghi = evaluate_limits(programs, np.array(lo), np.array(hi), pp.inclusion.params)
    return bool(np.all(glo >= 0)), bool(np.any(ghi < 0))


def claim_policy(model, region, expect, until=None, *, max_depth=None, time_limit=None,
                 progress=None):
    """Is there a policy keeping every start of the region within the limits forever?

    Parameters
    ----------
    model : certify.model.Model
        A model with ``[controls]``.
    region : dict
        State name -> ``(lo, hi)``; states not named span the window.
    expect : str
        Must be ``"safe"`` (the only claim about policies).
    until : None
    max_depth, time_limit, progress
        As for :func:`certify.policy.prove_policy`.

    Returns
    -------
    PolicyClaim
    """
    from .policy import prove_policy

    if expect != "safe" or until is not None:
        raise UsageError("a model with [controls] answers one claim: --expect safe (is there "
                         "a policy keeping the region within the limits), without --until")
    full = _full_region(model, {k: tuple(v) for k, v in region.items()})
    pp = prove_policy(model, max_depth=max_depth, time_limit=time_limit, progress=progress,
                      compare=False)
    meeting = cells_meeting(pp, full)
    labels = pp.proof.labelling.label[meeting]
    counts = {k: int(np.sum(labels == k)) for k in ("safe", "doomed", "outside", "undecided")}
    inside, violated = _piece_limits(pp, full, meeting)
    if counts["doomed"] or counts["outside"] or violated:
        verdict = "refuted"
        message = (f"refuted: the region meets {counts['doomed']} cells doomed under every "
                   f"control and {counts['outside']} outside the limits"
                   + (", and a part of it violates a limit at t = 0" if violated else ""))
    elif counts["undecided"] == 0 and not inside:
        verdict = "inconclusive"
        message = ("inconclusive: the region lies in safe cells, but a part of it is not "
                   "proven to satisfy the limits at t = 0")
    elif counts["undecided"] == 0:
        verdict = "proven"
        message = (f"proven: the region lies in {counts['safe']} cells that the stored policy "
                   f"keeps within the limits forever")
    else:
        verdict = "inconclusive"
        message = (f"inconclusive: {counts['undecided']} cells meeting the region are "
                   f"undecided ({pp.stop_reason})")
    return PolicyClaim(verdict=verdict, message=message, region=full, counts=counts, policy=pp)


def write_policy_claim(result, out_dir):
    """Write the policy certificate with the claim record, and ``claim.json``.

    Returns
    -------
    PolicyClaim
        With ``certificate`` set.
    """
    from .policy_output import write_policy

    out = Path(out_dir)
    write_policy(result.policy, out, claim=result.record())
    result = replace(result, certificate=str(out / "policy.json.gz"))
    (out / "claim.json").write_text(json.dumps(result.to_json(), indent=2) + "\n")
    return result
