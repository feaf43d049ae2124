"""Writing and reading certificates (``certificate.json.gz``).

The format is documented in docs/certificate-format.md. Exact numbers are stored as
rational strings ``"p/q"``; arrays exactly in the compact binary form of
:func:`certify.container.encode_array` (version 3; version 2 files are still read).
Files are written atomically (temporary file, then rename).
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from .container import (FORMAT, LABELS, VERSION, decode_array, encode_array, fraction_text,
                        load_certificate_json, write_certificate)
from .errors import CertificateError
from .graph import transition_graph
from .steps import STEP_KEYS
from .trapping import regions_data, trapping_cells

__all__ = ["FORMAT", "VERSION", "LABELS", "encode_array", "decode_array", "write_certificate",
           "load_certificate_json", "read_certificate", "Certificate"]

@dataclass
class Certificate:
    """The claims of a certificate, for queries at points.

    Attributes
    ----------
    data : dict
        The raw certificate.
    model : certify.model.Model
        The model rebuilt from the stored text (with the stored parameter boxes).
    labels : ndarray of str, shape (L,)
    lo, hi : ndarray, shape (L, n)
        Float boxes enclosing the cells.
    crossing_upper, survival_lower : ndarray, shape (L,)
    """

    data: dict
    model: object
    labels: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    crossing_upper: np.ndarray
    survival_lower: np.ndarray
    tree: object

    def _locate(self, points):
        """The points as floats, and for each a leaf node whose exact cell holds it (-1
        if none: outside the window). The float boxes of cells are rounded outward, so a
        point within a rounding of a shared side may lie in a float box only: the exact
        sides decide (a cell's claims speak about its exact points)."""
        points = np.atleast_2d(np.asarray(points, float))
        if points.shape[1] != self.lo.shape[1]:
            raise ValueError(f"points must have {self.lo.shape[1]} columns")
        query, nodes = self.tree.leaves_meeting(points, points)
        unique, inverse = np.unique(nodes, return_inverse=True)
        # per candidate: the smallest float not below each exact lower side and the
        # largest not above each upper side (a float point is in the cell iff between)
        first = np.empty((len(unique), points.shape[1]))
        last = np.empty((len(unique), points.shape[1]))
        for r, candidate in enumerate(unique.tolist()):
            for k, (a, b) in enumerate(self.tree.exact_box(candidate)):
                first[r, k], last[r, k] = _float_at_least(a), _float_at_most(b)
        inverse = inverse.reshape(-1)
        held = np.all((points[query] >= first[inverse]) & (points[query] <= last[inverse]),
                      axis=1)
        node = np.full(len(points), -1)
        node[query[held][::-1]] = nodes[held][::-1]
        return points, node

    def _violates(self, points):
        """Per point: -1 certainly violates a limit, 1 certainly satisfies all, 0 unknown."""
        from .taylor import flow_programs

        programs = flow_programs(self.model, 1)
        params = [p for p in self.data["_param_floats"]]
        cols_lo = list(points.T) + [np.full(len(points), p[0]) for p in params]
        cols_hi = list(points.T) + [np.full(len(points), p[1]) for p in params]
        out = programs.limits.interval_columns(cols_lo, cols_hi)
        glo = np.stack([o[0] for o in out], -1)
        ghi = np.stack([o[1] for o in out], -1)
        res = np.zeros(len(points), int)
        res[np.all(glo >= 0, axis=1)] = 1
        res[np.any(ghi < 0, axis=1)] = -1
        return res

    def label_at(self, points):
        """Proven label of each point (``outside`` where a limit is violated at t = 0).

        Parameters
        ----------
        points : ndarray, shape (N, n)

        Returns
        -------
        ndarray of str, shape (N,)
            ``undecided`` outside the window or where the limits cannot be evaluated
            with certainty at the point.
        """
        points, node = self._locate(points)
        leaf = self._leaf_of_node(node)
        out = np.where(leaf >= 0, self.labels[np.maximum(leaf, 0)], "undecided").astype(object)
        v = self._violates(points)
        out[v < 0] = "outside"
        out[(v == 0) & (out != "outside")] = "undecided"
        return out.astype(str)

    def crossing_time_bounds(self, points):
        """Proven bounds of the first time each point's trajectory leaves the limits.

        Returns
        -------
        lower, upper : ndarray, shape (N,)
            ``lower`` is 0 for outside points and ``inf`` for safe ones; ``upper`` is
            ``inf`` where no crossing is proven.
        """
        points, node = self._locate(points)
        leaf = self._leaf_of_node(node)
        ok = leaf >= 0
        lower = np.where(ok, self.survival_lower[np.maximum(leaf, 0)], 0.0)
        upper = np.where(ok, self.crossing_upper[np.maximum(leaf, 0)], np.inf)
        v = self._violates(points)
        lower = np.where(v < 0, 0.0, np.where(v == 0, 0.0, lower))
        upper = np.where(v < 0, 0.0, np.where(v == 0, np.inf, upper))
        return lower, upper

    def transition_graph(self):
        """The cells and their successors as a networkx DiGraph (see
        :func:`certify.graph.transition_graph`)."""
        return transition_graph(self)

    def _leaf_of_node(self, node):
        lookup = self.data["_node_to_leaf"]
        return np.where(node >= 0, lookup[np.maximum(node, 0)], -1)


def _float_at_least(q):
    """The smallest float not below the Fraction `q`."""
    v = float(q)
    return v if Fraction(v) >= q else float(np.nextafter(v, np.inf))


def _float_at_most(q):
    """The largest float not above the Fraction `q`."""
    v = float(q)
    return v if Fraction(v) <= q else float(np.nextafter(v, -np.inf))


def read_certificate(path):
    """Read a certificate for queries (no verification: use ``check_certificate``).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Certificate
    """
    from .cells import CellTree
    from .model import parse_model

    data = load_certificate_json(path)
    try:
        model = parse_model(data["model"]["text"], path=data["model"].get("file"))
        window = [(Fraction(a), Fraction(b)) for a, b in data["window"]]
        params = {k: (Fraction(v[0]), Fraction(v[1])) for k, v in data["parameters"].items()}
        model = model.with_parameters(params)
        cells = data["cells"]
        depth = decode_array(cells["depth"], "cells.depth").astype(int)
        index = decode_array(cells["index"], "cells.index").astype(np.int64)
        labels = np.array(cells["label"], dtype=object)
        crossing = decode_array(cells["crossing_upper"], "cells.crossing_upper")
        survival = decode_array(cells["survival_lower"], "cells.survival_lower")
        param_floats = decode_array(data["parameter_floats"], "parameter_floats")
    except (KeyError, TypeError, ValueError, ZeroDivisionError) as exc:
        raise CertificateError(f"{path}: malformed certificate ({exc})") from None
    tree = CellTree(window)
    node_to_leaf = _rebuild_tree(tree, depth, index)
    data["_node_to_leaf"] = node_to_leaf
    data["_param_floats"] = [tuple(p) for p in param_floats]
    leaf_nodes = np.full(len(depth), -1)
    leaf_nodes[node_to_leaf[node_to_leaf >= 0]] = np.flatnonzero(node_to_leaf >= 0)
    return Certificate(data=data, model=model, labels=labels.astype(str),
                       lo=tree.lo[leaf_nodes], hi=tree.hi[leaf_nodes],
                       crossing_upper=crossing, survival_lower=survival, tree=tree)


def _rebuild_tree(tree, depth, index):
    """Split `tree` until the given leaves exist; returns node -> leaf-number map."""
    key_to_leaf = {(int(d), tuple(int(v) for v in i)): j for j, (d, i) in enumerate(zip(depth, index))}
    frontier = [0]
    max_depth = int(depth.max(initial=0))
    while frontier:
        split = []
        for node in frontier:
            key = (int(tree.depth[node]), tuple(int(v) for v in tree.index[node]))
            if key not in key_to_leaf:
                if key[0] >= max_depth:
                    raise CertificateError("the cells do not tile the window")
                split.append(node)
        frontier = tree.split(split).tolist() if split else []
    node_to_leaf = np.full(len(tree), -1)
    for node in tree.leaves():
        key = (int(tree.depth[node]), tuple(int(v) for v in tree.index[node]))
        if key not in key_to_leaf:
            raise CertificateError("the cells do not tile the window")
        node_to_leaf[node] = key_to_leaf[key]
    return node_to_leaf


def certificate_data(proof, summary):
    """Build the certificate dictionary of a proof (see docs/certificate-format.md).

    Parameters
    ----------
    proof : certify.prove.Proof
    summary : dict
        The run summary (stored for information; the checker ignores it).

    Returns
    -------
    dict
    """
    from dataclasses import asdict

    model = proof.model
    lab, facts = proof.labelling, proof.facts
    leaves = proof.leaves
    start = proof.steps.offsets(leaves)
    src, dst = facts.src, facts.dst
    if np.any(src[1:] < src[:-1]):  # the prover's edges come sorted: no copies then
        succ_order = np.argsort(src, kind="stable")
        src, dst = src[succ_order], dst[succ_order]
        del succ_order
    succ_start = np.searchsorted(src, np.arange(len(leaves) + 1))
    return {
        "format": FORMAT,
        "version": VERSION,
        "model": {"name": model.name, "file": model.path, "text": model.text,
                  "sha256": model.sha256},
        "states": [s.name for s in model.states],
        "parameters": {p.name: [fraction_text(p.lo), fraction_text(p.hi)]
                       for p in model.parameters},
        "parameter_floats": encode_array(np.array(proof.params, float).reshape(-1, 2)),
        "window": [[fraction_text(a), fraction_text(b)] for a, b in model.window],
        "method": asdict(proof.method),
        "faces": [{"axis": f["axis"], "side": f["side"], "kind": f["kind"],
                   "cover_lo": encode_array(f["lo"]), "cover_hi": encode_array(f["hi"]),
                   "cover_reason": encode_array(f["reason"], "<i8")} for f in proof.faces],
        "cells": {
            "count": int(len(leaves)),
            "depth": encode_array(proof.tree.depth[leaves], "<i8"),
            "index": encode_array(proof.tree.index[leaves], "<i8"),
            "label": [str(x) for x in lab.label],
            "rank": encode_array(lab.rank, "<i8"),
            "crossing_upper": encode_array(lab.crossing_upper),
            "survival_lower": encode_array(lab.survival_lower),
            "horizon": encode_array(np.stack([facts.horizon_lo, facts.horizon_hi], 1)),
            "image_known": [bool(x) for x in facts.flow_ok],
            "successor_start": encode_array(succ_start, "<i8"),
            "successors": encode_array(dst, "<i8"),
            "step_start": encode_array(start, "<i8"),
            # one gathered array at a time: each is freed once encoded (version 3 stores
            # no frames m, A: the checker chooses its own, docs/certificate-format.md)
            **{f"step_{key}": encode_array(proof.steps.gather(leaves, key, start))
               for key in STEP_KEYS},
            **trapping_cells(facts),
        },
        "regions": regions_data(proof.trapping),
        "summary": summary,
    }
