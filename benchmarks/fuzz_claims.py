"""Claim records in the forgery fuzzer (benchmarks/forgery_fuzz.py): the edits of a
certificate written by ``certify claim`` (docs/certificate-format.md, "The claim record")
and the simulation oracle of its verdict.

A ``proven`` verdict states the claim about every start of the region; a ``refuted`` one
states the opposite about the counterexample point, with the reported crossing time
bounds. Both are judged at sample points with :class:`fuzz_oracle.Oracle`.
"""

from __future__ import annotations

import itertools
from fractions import Fraction

import numpy as np

from fuzz_mutations import decoded, pick, store
from fuzz_oracle import EPS, later


def _claim_float_sites(claim):
    example = claim.get("counterexample")
    if not isinstance(example, dict) or not isinstance(example.get("flow"), dict):
        return []
    return [("claim", "counterexample", "flow", k) for k in example["flow"]]


def claim_edit(rng, data):
    """One edit of the claim record (None when the certificate has none)."""
    claim = data.get("claim")
    if not isinstance(claim, dict):
        return None
    what = pick(rng, ["verdict", "expect", "until", "region", "point", "limit", "time",
                       "flow", "volume", "drop"])
    example = claim.get("counterexample")
    if what == "verdict":
        old = claim["verdict"]
        claim["verdict"] = pick(rng, [v for v in ("proven", "refuted", "inconclusive")
                                       if v != old])
        return f"claim.verdict: {old} -> {claim['verdict']}"
    if what == "expect":
        old = claim["expect"]
        claim["expect"] = pick(rng, [v for v in ("safe", "doomed", "stays") if v != old])
        if claim["expect"] == "stays" and claim.get("until") is None:
            claim["until"] = pick(rng, ["1", "10", "1/10"])
        return f"claim.expect: {old} -> {claim['expect']} (until {claim.get('until')})"
    if what == "until":
        old = claim.get("until")
        claim["until"] = pick(rng, [None, "0", "1/1000", "1", "10", "1000", "-1", "x"])
        if claim["until"] == old:
            return None
        return f"claim.until: {old!r} -> {claim['until']!r}"
    if what == "region":
        name = pick(rng, sorted(claim["region"]))
        j = int(rng.integers(2))
        old = claim["region"][name][j]
        step = pick(rng, [Fraction(1, 10 ** 9), Fraction(1, 100), Fraction(1, 10)])
        new = Fraction(old) + step * (1 if rng.random() < 0.5 else -1)
        claim["region"][name][j] = f"{new.numerator}/{new.denominator}"
        return f"claim.region.{name}[{j}]: {old} -> {claim['region'][name][j]}"
    if not isinstance(example, dict):
        return None
    if what == "point":
        i = int(rng.integers(len(example["point"])))
        old = example["point"][i]
        example["point"][i] = float(pick(rng, [np.nextafter(old, np.inf),
                                                np.nextafter(old, -np.inf), old + 0.01,
                                                old - 0.01, old + 0.1, old - 0.1]))
        return f"counterexample.point[{i}]: {old!r} -> {example['point'][i]!r}"
    if what == "limit":
        old = example.get("limit")
        example["limit"] = pick(rng, ["disc", "wall", "prey", "predator", None, "bogus"])
        if example["limit"] == old:
            return None
        return f"counterexample.limit: {old!r} -> {example['limit']!r}"
    if what == "time":
        old = list(example["crossing_time"]) if example.get("crossing_time") else None
        lo, hi = old if old else (0.0, None)
        j = int(rng.integers(2))
        value = [lo, hi][j]
        base = value if value is not None else 1.0
        new = pick(rng, [None, 0.0, float(np.nextafter(base, -np.inf)),
                          float(np.nextafter(base, np.inf)), base / 2, base * 2, base + 1])
        pair = [lo, hi]
        pair[j] = new
        example["crossing_time"] = pair
        return f"counterexample.crossing_time: {old} -> {pair}"
    if what == "flow":
        sites = _claim_float_sites(claim)
        if not sites:
            return None
        site = pick(rng, sites)
        a = decoded(data, site)
        flat = a.reshape(-1)
        if not flat.size:
            return None
        i = int(rng.integers(flat.size))
        old = float(flat[i])
        flat[i] = pick(rng, [np.nextafter(old, np.inf), np.nextafter(old, -np.inf),
                              old * 1.001, old * 0.5, -old, np.nan])
        store(data, site, a)
        return f"{'.'.join(site)}[{i}]: {old!r} -> {float(flat[i])!r}"
    if what == "volume":
        old = claim.get("undecided_volume")
        claim["undecided_volume"] = pick(rng, [0.0, -1.0, 1e-9, None, "x"])
        return f"claim.undecided_volume: {old!r} -> {claim['undecided_volume']!r}"
    example.pop("flow", None)
    return "counterexample.flow removed"


def region_points(region, names, seed):
    """Sample starts of a claim's region: a 5-point grid per axis and 10 random ones."""
    lo = np.array([float(Fraction(region[k][0])) for k in names])
    hi = np.array([float(Fraction(region[k][1])) for k in names])
    inset = (hi - lo) * 1e-6
    grid = [np.linspace(a + d, b - d, 5) for a, b, d in zip(lo, hi, inset)]
    points = [np.array(p) for p in itertools.product(*grid)]
    rng = np.random.default_rng([seed, 99])
    return points + list(lo + (hi - lo) * rng.random((10, len(lo))))


def false_verdict(oracle, claim, names, seed):
    """What simulation refutes of a claim record's verdict (empty: nothing found).

    Parameters
    ----------
    oracle : fuzz_oracle.Oracle
    claim : dict
        The record as stored (docs/certificate-format.md).
    names : list of str
        The state names, in order.
    seed : int
    """
    verdict, expect = claim["verdict"], claim["expect"]
    until = claim.get("until")
    T = float(Fraction(until)) if until is not None else None
    out = []
    if verdict == "proven":
        for p in region_points(claim["region"], names, seed):
            for fate in _fates(oracle, p):
                if expect in ("safe", "stays") and fate.g0 < -EPS:
                    out.append(f"proven {expect}, yet {list(p)} violates a limit at t = 0")
                elif expect == "safe" and fate.g0 > EPS and np.isfinite(fate.cross):
                    out.append(f"proven safe, yet {list(p)} crosses at {fate.cross:.6g}")
                elif expect == "stays" and fate.g0 > EPS and later(T, fate.cross):
                    out.append(f"proven to stay until {T}, yet {list(p)} crosses at "
                               f"{fate.cross:.6g}")
                elif expect == "doomed" and fate.g0 > EPS and \
                        later(fate.touch, T if T is not None else oracle.horizon):
                    out.append(f"proven doomed (until {T}), yet {list(p)} reaches no limit "
                               f"by {T if T is not None else oracle.horizon}")
    elif verdict == "refuted":
        example = claim["counterexample"]
        p = np.array(example["point"], float)
        region = claim["region"]
        if not all(Fraction(region[k][0]) <= Fraction(float(x)) <= Fraction(region[k][1])
                   for k, x in zip(names, p)):
            out.append(f"refuted by {list(p)}, which lies outside the region")
        lo, hi = example.get("crossing_time") or (0.0, None)
        hi = np.inf if hi is None else hi
        for fate in _fates(oracle, p):
            if later(fate.touch, hi) or later(lo, fate.cross):
                out.append(f"crossing time of {list(p)} in [{lo}, {hi}], simulated "
                           f"[{fate.touch:.6g}, {fate.cross:.6g}]")
            if expect == "safe" and fate.g0 > EPS and not np.isfinite(fate.cross):
                out.append(f"refuted safe by {list(p)}, which stays (simulated)")
            if expect == "stays" and fate.g0 > EPS and later(fate.cross, T):
                out.append(f"refuted stays-until-{T} by {list(p)}, which crosses only at "
                           f"{fate.cross:.6g}")
            if expect == "doomed" and (fate.g0 < -EPS or later(T if T is not None
                                                                else oracle.horizon,
                                                                fate.touch)):
                out.append(f"refuted doomed by {list(p)}, which crosses (or starts beyond a "
                           f"limit)")
    return out


def _fates(oracle, p):
    """The fates of a start, leaving out those on a limit (within EPS) and those the
    integration could not follow."""
    return [f for f in oracle.fates(p) if abs(f.g0) > EPS and not np.isnan(f.cross)]
