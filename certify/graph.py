"""The transition graph of a certificate as a networkx DiGraph (docs/design.md, section 4).

The proof loop keeps its graph in arrays; this is the public form, for analyses of
one's own: which cells a region can reach, the chains behind a crossing bound, where
the undecided cells lead.
"""

from __future__ import annotations

import networkx as nx
import numpy as np

from .container import decode_array

__all__ = ["transition_graph"]


def transition_graph(cert):
    """The cells of a certificate and their successors.

    Parameters
    ----------
    cert : certify.certificate.Certificate

    Returns
    -------
    networkx.DiGraph
        One node per cell, numbered as in the certificate, with attributes ``label``,
        ``rank`` (doomed rank, -1 when not doomed), ``lo``, ``hi`` (tuples: a float box
        enclosing the cell), ``horizon`` (``(lo, hi)``: the time ``T_c`` after which the
        cell's image was taken), ``crossing_upper`` and ``survival_lower``. An edge
        ``c -> d`` means the image of ``c`` at ``T_c`` needs cell ``d`` to be covered.
    """
    cells = cert.data["cells"]
    rank = decode_array(cells["rank"], "cells.rank")
    horizon = decode_array(cells["horizon"], "cells.horizon")
    start = decode_array(cells["successor_start"], "cells.successor_start")
    successors = decode_array(cells["successors"], "cells.successors")
    graph = nx.DiGraph()
    for c in range(len(cert.labels)):
        graph.add_node(c, label=str(cert.labels[c]), rank=int(rank[c]),
                       lo=tuple(cert.lo[c].tolist()), hi=tuple(cert.hi[c].tolist()),
                       horizon=(float(horizon[c, 0]), float(horizon[c, 1])),
                       crossing_upper=float(cert.crossing_upper[c]),
                       survival_lower=float(cert.survival_lower[c]))
    owner = np.repeat(np.arange(len(cert.labels)), np.diff(start))
    graph.add_edges_from(zip(owner.tolist(), successors.tolist()))
    return graph
