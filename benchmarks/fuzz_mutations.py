"""The edits of the forgery fuzzer (benchmarks/forgery_fuzz.py): one random edit of a
decoded certificate per call, by family.

Every edit works on the raw certificate dictionary (docs/certificate-format.md): arrays
are decoded with :func:`certify.container.decode_array`, changed, and encoded again with
:func:`certify.container.encode_array`, so the file stays well formed unless the edit
itself breaks it. An edit returns a short description, or None when it does not apply to
this certificate (the fuzzer then draws again).
"""

from __future__ import annotations

import hashlib
import itertools
import re
from fractions import Fraction

import numpy as np

from certify.container import decode_array, encode_array, fraction_text

SPECIAL_FLOATS = (np.nan, np.inf, -np.inf, -0.0, 5e-324, 1e308, -1e308, 0.0)
SPECIAL_TEXTS = ("nan", "inf", "1/0", "", "0x10", 1.5, True, None, "1e400", "-0")
LABELS = ("safe", "doomed", "outside", "undecided")

CELL_FLOATS = ("crossing_upper", "survival_lower", "horizon", "step_h", "step_E",
               "set0_m", "step_m", "step_A")  # the last three: version 2 only
CELL_INTS = ("depth", "index", "rank", "successor_start", "successors", "step_start",
             "trapped")


# -- access ------------------------------------------------------------------------------
def _get(data, path):
    for key in path:
        data = data[key]
    return data


def decoded(data, path):
    """The array stored at `path` (a tuple of keys) of a raw certificate, decoded."""
    return decode_array(_get(data, path))


def store(data, path, a):
    """Encode `a` at `path` of a raw certificate, with the stored array's dtype."""
    parent = _get(data, path[:-1])
    parent[path[-1]] = encode_array(a, parent[path[-1]]["dtype"])


def _float_sites(data):
    """Paths of float arrays with values, weighted: the cells' arrays three times."""
    sites = [("cells", k) for k in CELL_FLOATS for _ in range(3) if k in data["cells"]]
    sites.append(("parameter_floats",))
    for i, face in enumerate(data["faces"]):
        for key in ("cover_lo", "cover_hi"):
            sites.append(("faces", i, key))
    return [s for s in sites if decoded(data, s).size]


def _int_sites(data):
    sites = [("cells", k) for k in CELL_INTS for _ in range(3)]
    for i, face in enumerate(data["faces"]):
        sites.append(("faces", i, "cover_reason"))
    for k, region in enumerate(data.get("regions", [])):
        for key in ("cover_depths", "cover_index", "cover_class"):
            if key in region:
                sites.append(("regions", k, key))
    return [s for s in sites if decoded(data, s).size]


def _exact_sites(data):
    """Paths of exact numbers ``"p/q"`` (a matrix entry stands for its symmetric pair)."""
    sites = [("window", k, j) for k in range(len(data["window"])) for j in (0, 1)]
    sites += [("parameters", name, j) for name in data["parameters"] for j in (0, 1)]
    for k, region in enumerate(data.get("regions", [])):
        n = len(region["centre"])
        sites += [("regions", k, "centre", i) for i in range(n)]
        sites += [("regions", k, "matrix", i, j) for i in range(n) for j in range(i, n)]
        sites += [("regions", k, "box", i, j) for i in range(n) for j in (0, 1)]
        sites.append(("regions", k, "level"))
    return sites


def pick(rng, items):
    """One of `items`, drawn uniformly by `rng` (any items, unlike ``rng.choice``)."""
    return items[int(rng.integers(len(items)))]


def _element(rng, data, site, a):
    """A flat position in `a`: for crossing/survival bounds mostly a finite, non-zero one
    (those carry claims)."""
    flat = a.reshape(-1)
    if site[-1] in ("crossing_upper", "survival_lower") and rng.random() < 0.8:
        live = np.flatnonzero(np.isfinite(flat) & (flat != 0))
        if len(live):
            return int(pick(rng, live))
    return int(rng.integers(flat.size))


# -- numbers -----------------------------------------------------------------------------
def _float_edit(kind):
    def edit(rng, data):
        site = pick(rng, _float_sites(data))
        a = decoded(data, site)
        flat = a.reshape(-1)
        i = _element(rng, data, site, a)
        old = float(flat[i])
        if kind == "ulp":
            new = float(np.nextafter(old, np.inf if rng.random() < 0.5 else -np.inf))
        elif kind == "small":
            new = old * (1 + float(rng.choice([-1, 1])) * 10 ** rng.uniform(-9, -3))
        elif kind == "large":
            new = float(rng.choice([0.5, 0.9, 1.1, 2.0, 10.0, 0.1, -1.0])) * old \
                if rng.random() < 0.7 else old + float(rng.choice([-1, 1, -10, 10]))
        else:
            new = float(pick(rng, SPECIAL_FLOATS))
        if np.array_equal(np.float64(new), np.float64(old), equal_nan=True) and \
                np.signbit(new) == np.signbit(old):
            return None
        flat[i] = new
        store(data, site, a)
        return f"{'.'.join(map(str, site))}[{i}]: {old!r} -> {new!r}"
    return edit


def _int_edit(rng, data):
    site = pick(rng, _int_sites(data))
    a = decoded(data, site)
    flat = a.reshape(-1)
    i = int(rng.integers(flat.size))
    old = int(flat[i])
    new = pick(rng, [old + 1, old - 1, -1, 0, int(rng.integers(-2, max(abs(old), 4) + 3)),
                      1 << 40, -(1 << 62)])
    if new == old:
        return None
    flat[i] = new
    store(data, site, a)
    return f"{'.'.join(map(str, site))}[{i}]: {old} -> {new}"


def _exact_edit(rng, data):
    site = pick(rng, _exact_sites(data))
    old = _get(data, site)
    q = Fraction(old)
    choice = rng.integers(6)
    if choice == 0:
        new = pick(rng, SPECIAL_TEXTS)
    else:
        scale = {1: Fraction(1, 10 ** 12), 2: Fraction(1, 10 ** 6), 3: Fraction(1, 10),
                 4: Fraction(1), 5: Fraction(2)}[int(choice)]
        new = fraction_text(q + (scale * (abs(q) if q and choice < 5 else 1))
                            * (1 if rng.random() < 0.5 else -1))
    if new == old:
        return None
    _get(data, site[:-1])[site[-1]] = new
    if site[0] == "regions" and site[2] == "matrix":     # keep the matrix symmetric
        _get(data, site[:-2])[site[-1]][site[-2]] = new
    return f"{'.'.join(map(str, site))}: {old!r} -> {new!r}"


# -- the cells as a table ----------------------------------------------------------------
class Cells:
    """The per-cell data of a certificate as Python lists, for edits that move cells,
    steps and successors; :meth:`write` stores it back consistently (offsets rebuilt).
    ``steps`` holds per cell a list of step rows (one value per key of ``step_keys``)."""

    ARRAYS = ("depth", "index", "rank", "crossing_upper", "survival_lower", "horizon",
              "trapped", "set0_m", "set0_r")
    LISTS = ("label", "image_known", "trapped_whole")

    def __init__(self, data):
        c = data["cells"]
        self.arrays = [k for k in self.ARRAYS if k in c]
        self.step_keys = [k for k in ("step_h", "step_E", "step_m", "step_A") if k in c]
        self.cols = {k: list(decoded(data, ("cells", k))) for k in self.arrays}
        self.cols.update({k: list(c[k]) for k in self.LISTS})
        ss, succ = decoded(data, ("cells", "successor_start")), decoded(data, ("cells", "successors"))
        self.cols["succ"] = [list(succ[ss[j]:ss[j + 1]]) for j in range(len(ss) - 1)]
        st = decoded(data, ("cells", "step_start"))
        stepped = [decoded(data, ("cells", k)) for k in self.step_keys]
        self.row_shapes = [a.shape[1:] for a in stepped]
        self.cols["steps"] = [[tuple(a[r] for a in stepped) for r in range(st[j], st[j + 1])]
                              for j in range(len(st) - 1)]

    @property
    def L(self):
        return len(self.cols["label"])

    def cells_with(self, test):
        return [j for j in range(self.L) if test(j)]

    def swap(self, a, b, keys):
        for k in keys:
            col = self.cols[k]
            col[a], col[b] = col[b], col[a]

    def reorder(self, order, renumber=True):
        """Cells in the new `order` (a list of old numbers, cells may repeat or go);
        successor numbers follow their cells when `renumber` (a dropped one is removed)."""
        new_of = {old: new for new, old in enumerate(order)}
        for k, col in self.cols.items():
            self.cols[k] = [col[j] for j in order]
        if renumber:
            self.cols["succ"] = [[new_of[s] for s in succ if s in new_of]
                                 for succ in self.cols["succ"]]

    def split(self, a):
        """Replace cell `a` by its 2^n children, each with a copy of its data; every
        successor list naming `a` names all the children instead."""
        n = len(self.cols["index"][a])
        children = list(range(self.L, self.L + (1 << n)))
        self.reorder(list(range(self.L)) + [a] * (1 << n), renumber=False)
        for child, offset in zip(children, itertools.product((0, 1), repeat=n)):
            self.cols["depth"][child] = self.cols["depth"][a] + 1
            self.cols["index"][child] = 2 * np.asarray(self.cols["index"][a]) + offset
        self.cols["succ"] = [[t for s in succ for t in (children if s == a else [s])]
                             for succ in self.cols["succ"]]
        self.reorder([j for j in range(self.L) if j != a])

    def merge(self, a):
        """Replace cell `a` and its siblings (all leaves) by their parent, which takes the
        data of `a`; successor lists naming a sibling name the parent. None when the
        siblings are not all leaves."""
        depth, index = self.cols["depth"][a], np.asarray(self.cols["index"][a])
        if depth == 0:
            return None
        parent = index // 2
        siblings = [j for j in range(self.L) if self.cols["depth"][j] == depth and
                    np.array_equal(np.asarray(self.cols["index"][j]) // 2, parent)]
        if len(siblings) != 1 << len(index):
            return None
        self.cols["depth"][a], self.cols["index"][a] = depth - 1, parent
        self.cols["succ"] = [sorted({a if s in siblings else s for s in succ})
                             for succ in self.cols["succ"]]
        self.reorder([j for j in range(self.L) if j == a or j not in siblings])
        return f"merged cell {a} with its siblings into their parent, with the data of {a}"

    def write(self, data):
        c = data["cells"]
        c["count"] = self.L
        for k in self.arrays:
            c[k] = encode_array(np.array(self.cols[k]).reshape(
                (self.L,) + np.shape(self.cols[k][0])), c[k]["dtype"])
        for k in self.LISTS:
            c[k] = list(self.cols[k])
        lengths = [len(s) for s in self.cols["succ"]]
        c["successor_start"] = encode_array(np.concatenate([[0], np.cumsum(lengths)]), "<i8")
        c["successors"] = encode_array(np.array([s for succ in self.cols["succ"] for s in succ],
                                                np.int64), "<i8")
        rows = [r for steps in self.cols["steps"] for r in steps]
        c["step_start"] = encode_array(np.concatenate(
            [[0], np.cumsum([len(s) for s in self.cols["steps"]])]), "<i8")
        for i, (k, shape) in enumerate(zip(self.step_keys, self.row_shapes)):
            c[k] = encode_array(np.array([r[i] for r in rows], float).reshape((-1,) + shape),
                                c[k]["dtype"])


def _label_edit(rng, data):
    """Relabel a cell: a plain label change, or a forger's consistent one (rank and
    bounds made to look right)."""
    cells = Cells(data)
    j = int(rng.integers(cells.L))
    col = cells.cols
    old = col["label"][j]
    # promotions to safe and doomed (the forger's aim) twice as often as the others
    new = pick(rng, [x for x in LABELS + ("safe", "doomed") if x != old])
    col["label"][j] = new
    note = "plain"
    if rng.random() < 0.7:
        note = "with its rank and bounds"
        doomed_ranks = [r for r, lab in zip(col["rank"], col["label"]) if lab == "doomed"]
        if new == "safe":
            col["rank"][j], col["crossing_upper"][j], col["survival_lower"][j] = -1, np.inf, np.inf
            if data.get("regions") and rng.random() < 0.4:   # claimed trapped instead
                col["trapped"][j] = int(rng.integers(len(data["regions"])))
                col["trapped_whole"][j] = bool(rng.random() < 0.5)
                note += f", trapped in region {col['trapped'][j]}" + \
                    (" whole" if col["trapped_whole"][j] else "")
        elif new == "undecided":
            col["rank"][j], col["crossing_upper"][j] = -1, np.inf
            col["survival_lower"][j] = min(col["survival_lower"][j], 0.0)
        elif new == "outside":
            col["rank"][j], col["crossing_upper"][j], col["survival_lower"][j] = 0, 0.0, 0.0
        else:
            col["rank"][j] = pick(rng, [0, max(doomed_ranks, default=0) + 1])
            col["crossing_upper"][j] = float(pick(rng, [1e3, 1e308, col["horizon"][j][1]]))
            col["survival_lower"][j] = 0.0
    cells.write(data)
    return f"cell {j}: {old} -> {new} ({note})"


def _steps_edit(rng, data):
    cells = Cells(data)
    have = cells.cells_with(lambda j: len(cells.cols["steps"][j]) > 0)
    if not have:
        return None
    j = pick(rng, have)
    steps = cells.cols["steps"][j]
    k = int(rng.integers(len(steps)))
    what = rng.integers(4)
    if what == 0:
        del steps[k]
        note = f"dropped step {k}"
    elif what == 1:
        steps.insert(k, steps[k])
        note = f"duplicated step {k}"
    elif what == 2:
        if len(steps) < 2:
            return None
        k = min(k, len(steps) - 2)
        steps[k], steps[k + 1] = steps[k + 1], steps[k]
        note = f"swapped steps {k} and {k + 1}"
    else:
        other = pick(rng, have)
        if other == j:
            return None
        cells.cols["steps"][j], cells.cols["steps"][other] = cells.cols["steps"][other], steps
        note = f"swapped all steps with cell {other}"
    cells.write(data)
    return f"cell {j}: {note}"


def _successors_edit(rng, data):
    cells = Cells(data)
    j = int(rng.integers(cells.L))
    succ = cells.cols["succ"][j]
    what = rng.integers(5)
    if what == 0 and succ:
        note = f"dropped successor {succ.pop(int(rng.integers(len(succ))))}"
    elif what == 1 and succ:
        s = pick(rng, succ)
        succ.append(s)
        note = f"duplicated successor {s}"
    elif what == 2 and len(succ) > 1:
        succ.reverse()
        note = "reversed the successors"
    elif what == 3:
        s = int(rng.integers(cells.L))
        succ.append(s)
        note = f"added successor {s}"
    elif what == 4 and succ:
        i = int(rng.integers(len(succ)))
        old, succ[i] = succ[i], int(rng.integers(cells.L))
        note = f"successor {old} -> {succ[i]}"
    else:
        return None
    cells.write(data)
    return f"cell {j}: {note}"


def _cells_edit(rng, data):
    cells = Cells(data)
    L = cells.L
    what = rng.integers(7)
    a, b = (int(x) for x in rng.choice(L, 2, replace=False))
    if what == 5:
        note = f"split cell {a} into its children, each with its data"
        cells.split(a)
    elif what == 6:
        note = cells.merge(a)
        if note is None:
            return None
    elif what == 0:
        renumber = rng.random() < 0.5
        cells.reorder([j for j in range(L) if j != a], renumber)
        note = f"dropped cell {a} ({'renumbered' if renumber else 'numbers kept'})"
    elif what == 1:
        cells.reorder(list(range(L)) + [a])
        note = f"duplicated cell {a}"
    elif what == 2:
        order = [int(x) for x in rng.permutation(L)]
        renumber = rng.random() < 0.8
        cells.reorder(order, renumber)
        note = f"permuted the cells ({'renumbered' if renumber else 'numbers kept'})"
    elif what == 3:
        cells.swap(a, b, ("depth", "index"))
        note = f"swapped the addresses of cells {a} and {b}"
    else:
        keys = [k for k in cells.cols if k not in ("depth", "index")]
        cells.swap(a, b, keys)
        note = f"swapped the data of cells {a} and {b}"
    cells.write(data)
    return note


def _claims_edit(rng, data):
    """Give a cell a new bound or rank, as a forger claiming more would: a survival bound
    where there was none, an earlier crossing, a lower rank, a trapping region."""
    cells = Cells(data)
    col = cells.cols
    key = pick(rng, ["survival_lower", "crossing_upper", "rank", "trapped"])
    # mostly the cells whose claims use the key: survival bounds of doomed and undecided
    # cells, crossing bounds and ranks of doomed ones, regions of safe ones
    wanted = {"survival_lower": ("doomed", "undecided"), "crossing_upper": ("doomed",),
              "rank": ("doomed",), "trapped": ("safe",)}[key]
    users = cells.cells_with(lambda j: col["label"][j] in wanted)
    j = pick(rng, users) if users and rng.random() < 0.8 else int(rng.integers(cells.L))
    T = float(col["horizon"][j][1])
    old = col[key][j]
    if key == "survival_lower":
        new = float(pick(rng, [T, T / 2, 2 * T, 1e-3, np.inf, float(rng.uniform(0, 3 * T))]))
    elif key == "crossing_upper":
        new = float(pick(rng, [T, T / 2, 0.0, float(rng.uniform(0, 3 * T)), np.inf]))
    elif key == "rank":
        new = int(pick(rng, [0, 1, old - 1, old + 1, -1]))
    else:
        if not data.get("regions"):
            return None
        new = int(rng.integers(-1, len(data["regions"])))
        col["trapped_whole"][j] = bool(rng.random() < 0.5)
    if new == old:
        return None
    col[key][j] = new
    cells.write(data)
    return f"cell {j} ({col['label'][j]}): {key} {old!r} -> {new!r}"


def _forgery_edit(rng, data):
    """A forger's consistent set of edits around one undecided cell: relabel it and
    everything it reaches safe (a closed set), or drop its successors that are not safe
    and relabel it safe, or make it and everything it reaches doomed with ranks falling
    along the successors (largest crossing bound)."""
    cells = Cells(data)
    col = cells.cols
    undecided = cells.cells_with(lambda j: col["label"][j] == "undecided")
    if not undecided:
        return None
    j = pick(rng, undecided)
    what = pick(rng, ["closed safe set", "successors dropped", "doomed chain"])
    if what == "successors dropped":
        col["succ"][j] = [d for d in col["succ"][j] if col["label"][d] in ("safe", "outside")]
        reach = [j]
    else:
        reach, seen = [j], {j}
        for c in reach:
            for d in col["succ"][c]:
                if d not in seen and col["label"][d] not in ("safe", "outside"):
                    seen.add(d)
                    reach.append(d)
    for rank, c in enumerate(reversed(reach)):
        if what == "doomed chain":
            col["label"][c], col["rank"][c] = "doomed", rank + 1
            col["crossing_upper"][c], col["survival_lower"][c] = 1e300, 0.0
        else:
            col["label"][c], col["rank"][c] = "safe", -1
            col["crossing_upper"][c], col["survival_lower"][c] = np.inf, np.inf
    cells.write(data)
    return f"cell {j}: {what} ({len(reach)} cells relabelled)"


FACE_KINDS = ("limit", "inflow", "invariant", "no-outflow", "open")


def _faces_edit(rng, data):
    """Claim another kind for a window face, or move its cover."""
    faces = data["faces"]
    k = int(rng.integers(len(faces)))
    face = faces[k]
    what = rng.integers(4)
    if what <= 1:
        old = face["kind"]
        face["kind"] = pick(rng, [x for x in FACE_KINDS if x != old])
        return f"face {k} ({face['axis']} {face['side']}): {old} -> {face['kind']}"
    if what == 2:
        other = int(rng.integers(len(faces)))
        if other == k:
            return None
        face["kind"], faces[other]["kind"] = faces[other]["kind"], face["kind"]
        return f"faces {k} and {other} swapped their kinds"
    face["side"] = "hi" if face["side"] == "lo" else "lo"
    return f"face {k}: side turned round"


# -- method, model and structure ---------------------------------------------------------
def _method_edit(rng, data):
    method = data["method"]
    key = pick(rng, sorted(method) + ["frames", "order", "order", "(all)"])
    if key == "(all)":
        data["method"] = pick(rng, [{}, [], None, "qr"])
        return "method replaced"
    if key == "frames":
        new = pick(rng, ["qr", "qr+parallelepiped", "parallelepiped", "", None, "(gone)"])
    elif key == "order":
        new = pick(rng, [1, 2, 3, 4, 5, 6, 8, 0, 9, -1, "4", 4.0, True, None])
    else:
        old = method[key]
        new = pick(rng, [None, "x", 0, -1, 1e308, float("nan")] +
                    ([old * 2, old / 2] if isinstance(old, (int, float)) and
                     not isinstance(old, bool) else [not old]))
    old = method.get(key, "(gone)")
    if new == "(gone)":
        method.pop(key, None)
    else:
        method[key] = new
    return f"method.{key}: {old!r} -> {new!r}"


NUMBER = re.compile(r"(?<![A-Za-z_\d.])(\d+(?:\.\d+)?(?:[eE][-+]?\d+)?)")


def _model_edit(rng, data):
    """Edit the stored model text (a number, an inequality) and, as a forger would,
    its hash; or the hash, name, states, version or format alone."""
    model = data["model"]
    text = model["text"]
    what = rng.integers(8)
    if what <= 3:
        numbers = list(NUMBER.finditer(text))
        if not numbers:
            return None
        m = pick(rng, numbers)
        old = Fraction(m.group(1))
        new = old + pick(rng, [Fraction(1, 10 ** 9), Fraction(1, 10 ** 3), Fraction(1, 10),
                                Fraction(1)]) * (1 if rng.random() < 0.5 else -1)
        text = text[:m.start()] + _decimal(new) + text[m.end():]
        note = f"model number {m.group(1)} -> {_decimal(new)}"
    elif what == 4:
        swaps = [(m.start(), m.group()) for m in re.finditer(r"<=|>=", text)]
        if not swaps:
            return None
        at, sign = pick(rng, swaps)
        text = text[:at] + ("<=" if sign == ">=" else ">=") + text[at + 2:]
        note = f"inequality {sign} at {at} turned round"
    elif what == 5:
        model["sha256"] = "0" * 64
        return "model.sha256 zeroed"
    elif what == 6:
        key = pick(rng, ["version", "format", "states", "name", "summary"])
        value = {"version": pick(rng, [2, 4, "3", None]), "format": "certify",
                 "states": list(reversed(data["states"])), "name": "other",
                 "summary": {"forged": True}}[key]
        if key == "name":
            model["name"] = value
        else:
            data[key] = value
        return f"{key} replaced"
    else:
        return _exact_edit(rng, data)
    model["text"] = text
    if rng.random() < 0.9:
        model["sha256"] = hashlib.sha256(text.encode("utf-8")).hexdigest()
        note += " (hash updated)"
    return note


def _decimal(q):
    """A decimal text of a rational with a terminating expansion (the edits above)."""
    if q < 0:
        return "-" + _decimal(-q)
    whole, rest = divmod(q.numerator, q.denominator)
    digits = ""
    while rest:
        rest *= 10
        d, rest = divmod(rest, q.denominator)
        digits += str(d)
    return f"{whole}.{digits}" if digits else str(whole)


def _structure_edit(rng, data):
    """Remove a key, or give it a value of the wrong type."""
    places = [data, data["cells"], data["model"], data["parameters"],
              pick(rng, data["faces"])] + list(data.get("regions", []))
    claim = data.get("claim")
    if isinstance(claim, dict):
        places += [claim, claim["region"]] + ([claim["counterexample"]] if isinstance(
            claim.get("counterexample"), dict) else [])
    where = pick(rng, [p for p in places if isinstance(p, dict) and p])
    key = pick(rng, sorted(where))
    if rng.random() < 0.5:
        del where[key]
        return f"key {key!r} removed"
    where[key] = pick(rng, [None, [], {}, "x", -1, 1.5, [[0]]])
    return f"key {key!r} given a wrong type"


#: The families and their edits.
FAMILIES = {
    "label": _label_edit,
    "claims": _claims_edit,
    "forgery": _forgery_edit,
    "faces": _faces_edit,
    "float-ulp": _float_edit("ulp"),
    "float-small": _float_edit("small"),
    "float-large": _float_edit("large"),
    "float-special": _float_edit("special"),
    "integer": _int_edit,
    "exact-number": _exact_edit,
    "steps": _steps_edit,
    "successors": _successors_edit,
    "cells": _cells_edit,
    "method": _method_edit,
    "model": _model_edit,
    "structure": _structure_edit,
}
