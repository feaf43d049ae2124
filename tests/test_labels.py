"""The doomed ranks and the safe set with trapped cells against networkx."""

import networkx as nx
import numpy as np

from certify.labels import CellFacts, label_cells


def _random_facts(rng, L, shuffle):
    pairs = rng.integers(0, L, (2 * L, 2))
    # most edges lead to lower numbers (long chains of ranks), the others make cycles
    down = rng.random(len(pairs)) < 0.95
    pairs[down] = np.sort(pairs[down], axis=1)[:, ::-1]
    pairs = np.unique(pairs, axis=0).astype(np.int32)
    if shuffle:  # edges in any order, not sorted by source as the prover makes them
        pairs = pairs[rng.permutation(len(pairs))]
    outside = rng.random(L) < 0.15
    pairs = pairs[~outside[pairs[:, 0]]]  # outside cells have no image
    flow_ok = ~outside & (rng.random(L) < 0.95)
    kept = rng.random(L) < 0.7
    # quarters: every sum below is exact, so outward rounding changes nothing
    horizon = rng.integers(1, 9, L) / 4
    crossing = np.where(rng.random(L) < 0.1, rng.integers(1, 9, L) / 4, np.inf)
    trapped = np.where(~outside & (rng.random(L) < 0.05), 0, -1)
    return pairs, CellFacts(
        outside=outside, flow_ok=flow_ok, kept=kept, escapes=rng.random(L) < 0.05,
        crossing=crossing, horizon_lo=horizon, horizon_hi=horizon,
        first_unkept=np.where(kept, np.inf, 0.0), src=pairs[:, 0], dst=pairs[:, 1],
        trapped=trapped, trapped_whole=trapped >= 0)


def test_doomed_ranks_and_crossing_bounds_agree_with_networkx():
    # docs/design.md, section 5: rank 0 are the cells outside or with a proven crossing
    # (not safe); a cell with an image and no escape gets rank r when all its successors
    # are ranked and the largest rank is r - 1 (r = 1 without successors), and its
    # crossing bound is T_c plus the largest bound among its successors. Computed here by repeated sweeps over the
    # networkx graph until nothing changes (an outside reference for the graph).
    rng = np.random.default_rng(21)
    for shuffle in (False, True):
        pairs, facts = _random_facts(rng, 300, shuffle)
        with np.errstate(invalid="ignore"):
            labelling = label_cells(facts)
        g = nx.DiGraph()
        g.add_nodes_from(range(300))
        g.add_edges_from(map(tuple, pairs.tolist()))
        safe = labelling.label == "safe"
        rank, upper = {}, {}
        for c in range(300):
            if not safe[c] and (facts.outside[c] or np.isfinite(facts.crossing[c])):
                rank[c], upper[c] = 0, 0.0 if facts.outside[c] else facts.crossing[c]
        changed = True
        while changed:
            changed = False
            for c in range(300):
                if c in rank or safe[c] or not facts.flow_ok[c] or facts.escapes[c]:
                    continue
                succ = list(g.successors(c))
                if all(d in rank for d in succ):
                    rank[c] = 1 + max((rank[d] for d in succ), default=0)
                    upper[c] = facts.horizon_hi[c] + max([0.0] + [upper[d] for d in succ])
                    changed = True
        assert len(rank) > 60 and max(rank.values()) >= 2
        got = {int(c): (int(labelling.rank[c]), float(labelling.crossing_upper[c]))
               for c in np.flatnonzero(labelling.rank >= 0)}
        assert got == {c: (rank[c], upper[c]) for c in rank}


def test_trapped_cells_are_safe_and_their_successors_do_not_count():
    # docs/design.md, section 5 with trapping regions: a trapped cell is safe whatever
    # its successors are; any other candidate is safe unless it reaches a cell that is
    # neither a candidate nor outside along edges that leave no trapped cell and enter
    # no outside cell (networkx ancestors as the outside reference).
    rng = np.random.default_rng(22)
    pairs, facts = _random_facts(rng, 300, False)
    with np.errstate(invalid="ignore"):
        labelling = label_cells(facts)
    trapped = facts.trapped >= 0
    g = nx.DiGraph()
    g.add_nodes_from(range(300))
    g.add_edges_from((a, b) for a, b in pairs.tolist()
                     if not facts.outside[b] and not trapped[a])
    candidate = (~facts.outside & facts.flow_ok & facts.kept & ~facts.escapes) | trapped
    bad = set()
    for t in np.flatnonzero(~candidate & ~facts.outside):
        bad |= nx.ancestors(g, int(t)) | {int(t)}
    safe = {int(c) for c in np.flatnonzero(candidate) if c not in bad}
    assert any(trapped[c] and g.out_degree(c) == 0 and c in safe for c in range(300))
    assert set(np.flatnonzero(labelling.label == "safe").tolist()) == safe
