"""Safe operating policies for models with ``[controls]``.

One proof loop of :mod:`certify.prove` runs per setting (the model with its controls
fixed at that setting) and one for the differential inclusion ``x' in f(x, U)`` over
the hull ``U`` of the settings (order 1: the a-priori box and the first-order step
``X + [0, h] f(E, U)`` hold for every measurable control, higher Taylor terms do not).
All of them share one tree of cells, so that their graphs speak about the same leaves.
Each round computes the new cells' tubes under every setting and under the inclusion,
labels the leaves by :func:`certify.policy_labels.controlled_safe` (``safe``) and the
doomed fixpoint of :mod:`certify.labels` on the inclusion's graph (``doomed``), and
splits the undecided leaves, shallowest first, until the depth, cell or time budget
ends (a uniform refinement of the undecided cells, without the cause ordering of
:func:`certify.prove.prove`).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from fractions import Fraction
from itertools import product

import numpy as np

from .cells import CellTree
from .errors import UsageError
from .labels import DOOMED, OUTSIDE, SAFE, UNDECIDED, Labelling, label_cells
from .policy_labels import controlled_safe
from .prove import Proof, _settings, _Prover, prove, split_shallowest
from .volumes import label_fractions

__all__ = ["PolicyProof", "prove_policy", "setting_combinations", "control_hull"]


def setting_combinations(model):
    """Every combination of the controls' settings, in listed order.

    Returns
    -------
    list of dict
        ``{control name: Fraction}`` per combination (the first control varies slowest).
    """
    names = [c.name for c in model.controls]
    return [dict(zip(names, values)) for values in product(*(c.settings for c in model.controls))]


def control_hull(model):
    """``{control name: (lowest setting, highest setting)}``: the hull ``U``."""
    return {c.name: (min(c.settings), max(c.settings)) for c in model.controls}


def hold_time(model):
    """The longest hold time of the controls (a Fraction; 0 without controls)."""
    return max((c.hold for c in model.controls), default=Fraction(0))


def _float_at_least(x):
    f = float(x)
    return f if Fraction(f) >= x else float(np.nextafter(f, np.inf))


@dataclass
class PolicyProof:
    """A proven policy map.

    Attributes
    ----------
    model : certify.model.Model
    settings : list of dict
        The combinations of settings, indexed by the policy.
    hold : Fraction
    tree : certify.cells.CellTree
    leaves : ndarray of int
    per_setting : list of certify.prove.Proof
        The proof under each setting held constant (standard labels), on ``leaves``.
    inclusion : certify.prove.Proof
        The order-1 proof of the differential inclusion over the hull (standard labels).
    proof : certify.prove.Proof
        The controlled labelling (``labelling`` holds the labels with controls,
        crossing and survival bounds from the inclusion) on the inclusion's facts.
    choice : ndarray of int
        Chosen setting per leaf (-1 where not safe).
    rounds : int
    seconds : float
    stop_reason : str
    constant_shares : list of float or None
        Share of the window proven safe under each setting held constant, each by a
        proof of its own with the same budget (``compare=True``); None otherwise.
    """

    model: object
    settings: list
    hold: Fraction
    tree: CellTree
    leaves: np.ndarray
    per_setting: list
    inclusion: Proof
    proof: Proof
    choice: np.ndarray
    rounds: int
    seconds: float
    stop_reason: str
    constant_shares: list | None = None

    @property
    def fractions(self):
        """Label -> share of the window, with controls."""
        return self.proof.fractions

    @property
    def counts(self):
        """Number of leaves per label, with controls."""
        return self.proof.counts


def _provers(model, method, budget):
    """One prover per setting and one for the inclusion, sharing one tree."""
    # every tube runs for the hold time at least, and for the method's shortest horizon
    # (longer tubes re-grid less often; a model may lower min_horizon in [settings])
    held = replace(method, min_horizon=max(method.min_horizon,
                                           _float_at_least(hold_time(model))))
    # the policy checker looks successors up in image boxes alone
    provers = [_Prover(model.with_parameters(s), held, budget, None, prune_successors=False)
               for s in setting_combinations(model)]
    hull = model.with_parameters(control_hull(model))
    inclusion = _Prover(hull, replace(method, order=1, max_steps=max(method.max_steps, 2000)),
                        budget, None, prune_successors=False)
    tree = provers[0].tree
    for p in provers[1:] + [inclusion]:
        p.tree = tree
    return provers, inclusion, tree


def prove_policy(model, *, progress=None, compare=True, **options):
    """Prove a policy map for a model with controls.

    Parameters
    ----------
    model : certify.model.Model
        A model with a ``[controls]`` section.
    progress : callable, optional
        ``progress(round, n_leaves, decided_fraction, seconds)`` after every round.
    compare : bool
        Also prove the map of every setting held constant (:func:`certify.prove.prove`
        with the same budget) for ``constant_shares``: what switching buys.
    **options
        Method or budget fields by name, as for :func:`certify.prove.prove`.

    Returns
    -------
    PolicyProof
    """
    if not model.controls:
        raise UsageError(f"{model.path or model.name}: prove_policy needs a model with "
                         f"[controls]")
    method, budget = _settings(model, None, None, options)
    with np.errstate(all="ignore"):
        pp = _prove_policy(model, method, budget, progress)
    if compare:
        pp.constant_shares = [prove(model.with_parameters(s), method=method, budget=budget)
                              .fractions["safe"] for s in pp.settings]
    return pp


def _prove_policy(model, method, budget, progress):
    start = time.monotonic()
    provers, inclusion, tree = _provers(model, method, budget)
    hold = hold_time(model)
    new = np.array([0])
    for _ in range(method.start_depth):
        new = tree.split(new)
    rounds, stop_reason = 0, "nothing left undecided"
    while True:
        for p in provers + [inclusion]:
            p.analyse(new)
        rounds += 1
        labelled = _label(provers, inclusion, _float_at_least(hold))
        leaves, label = labelled.leaves, labelled.label
        for p in provers + [inclusion]:
            p.steps.forget_all_but(leaves)
        elapsed = time.monotonic() - start
        undecided = leaves[label == UNDECIDED]
        if progress is not None:
            progress(rounds, len(leaves), 1.0 - tree.volume_fraction(undecided).sum(), elapsed)
        wanted = undecided[tree.depth[undecided] < budget.max_depth]
        if len(wanted) == 0:
            if len(undecided):
                stop_reason = f"maximum depth {budget.max_depth} reached"
            break
        new, out_of_budget = split_shallowest(tree, wanted, budget, len(leaves), elapsed)
        if out_of_budget:
            stop_reason = out_of_budget
            break
    return _result(model, method, budget, provers, inclusion, tree, labelled, hold, rounds,
                   time.monotonic() - start, stop_reason)


@dataclass
class _Round:
    """The labelling of one round: leaves, per setting and for the inclusion the
    ``(facts, labelling)`` of :mod:`certify.labels`, the labels with controls, the policy."""

    leaves: np.ndarray
    per_setting: list
    inclusion: tuple
    label: np.ndarray
    policy: object


def _label(provers, inclusion, hold):
    """Label the leaves of a round (:class:`_Round`)."""
    per = [p.label()[1:] for p in provers]
    leaves, incl_facts, incl_lab = inclusion.label()
    policy = controlled_safe([facts for facts, _ in per], hold)
    doomed = incl_lab.label == DOOMED
    if np.any(policy.safe & doomed):
        raise RuntimeError("a cell is both safe under a policy and doomed under every "
                           "control: the proofs contradict each other")
    label = np.full(len(leaves), UNDECIDED, dtype=object)
    label[policy.safe] = SAFE
    label[doomed] = DOOMED
    label[incl_facts.outside] = OUTSIDE
    label = label.astype(str)
    return _Round(leaves, per, (incl_facts, incl_lab), label, policy)


def _proof(prover, leaves, facts, labelling, rounds, seconds, stop_reason):
    proof = Proof(model=prover.model, method=prover.method, budget=prover.budget,
                  params=prover.params, tree=prover.tree, leaves=leaves, labelling=labelling,
                  facts=facts, faces=prover.faces, steps=prover.steps,
                  successors=(facts.src, facts.dst), rounds=rounds, seconds=seconds,
                  interrupted=False, stop_reason=stop_reason, trapping=prover.regions)
    proof.fractions, proof.fractions_exact = label_fractions(proof)
    return proof


def _result(model, method, budget, provers, inclusion, tree, labelled, hold, rounds, seconds,
            stop_reason):
    leaves, label, policy = labelled.leaves, labelled.label, labelled.policy
    incl_facts, incl_lab = labelled.inclusion
    args = (rounds, seconds, stop_reason)
    per_setting = [_proof(p, leaves, f, lab, *args)
                   for p, (f, lab) in zip(provers, labelled.per_setting)]
    incl = _proof(inclusion, leaves, incl_facts, incl_lab, *args)
    doomed = label == DOOMED
    controlled = Labelling(label=label, rank=np.where(doomed, incl_lab.rank, -1),
                           crossing_upper=np.where(doomed | (label == OUTSIDE),
                                                   incl_lab.crossing_upper, np.inf),
                           survival_lower=np.where(label == SAFE, np.inf,
                                                   incl_lab.survival_lower))
    proof = _proof(inclusion, leaves, incl_facts, controlled, *args)
    proof.model = model
    return PolicyProof(model=model, settings=setting_combinations(model), hold=hold,
                       tree=tree, leaves=leaves, per_setting=per_setting, inclusion=incl,
                       proof=proof, choice=policy.choice, rounds=rounds, seconds=seconds,
                       stop_reason=stop_reason)
