"""Soundness spot check of a certificate of a fresh model against scipy simulation.

Run from the worktree root::

    .venv/bin/python benchmarks/fresh_models/spotcheck.py MODEL CERT [--n 2000]

Draws N uniform starts in the window (and, for interval parameters, a uniform constant
value per start), asks the certificate for each start's label and crossing-time bounds,
and simulates the start with scipy ``solve_ivp`` (LSODA, rtol 1e-10, atol 1e-12, terminal
events on every limit margin) up to a long horizon. The right-hand sides and margins
below are transcribed by hand from the model files, independently of certify's parser.
A ``safe`` start that crosses, a ``doomed`` start that does not cross by its proven
upper bound, or any labelled start crossing before its proven lower bound, is a
contradiction (printed, and appended to SOUNDNESS.txt at the worktree root).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy.integrate import solve_ivp

from certify import read_certificate


def seihr(p):
    beta, sigma, gamma, delta, kappa = 0.3, 0.2, 0.1, 0.01, 0.1

    def f(t, x):
        S, E, I, H = x
        return [-beta * S * I, beta * S * I - sigma * E, sigma * E - (gamma + delta) * I,
                delta * I - kappa * H]
    return f, lambda x: [0.004 - x[3]]


def cstr(p):
    q, V, Caf, Tf, k0, EoR, dH, rc, UA, Vj, qj, Tjin = (
        100, 100, 1, 350, 7.2e10, 8750, 5e4, 239, 5e4, 20, 500, 285)

    def f(t, x):
        Ca, T, Tj = x
        r = k0 * np.exp(-EoR / T) * Ca
        return [q / V * (Caf - Ca) - r,
                q / V * (Tf - T) + dH / rc * r - UA / (V * rc) * (T - Tj),
                qj / Vj * (Tjin - Tj) + UA / (Vj * rc) * (T - Tj)]
    return f, lambda x: [400 - x[1]]


def glucose(p, kink=True):
    p1, p2, p3, n, gam, h, Gb, Ib = 0.03, 0.02, 1.3e-5, 0.2, 0.005, 85, 90, 10

    def f(t, x):
        G, X, I = x
        return [-(p1 + X) * G + p1 * Gb, -p2 * X + p3 * (I - Ib),
                -n * (I - Ib) + gam * (max(G - h, 0) if kink else G - h)]
    return f, lambda x: [x[0] - 70]


def food_chain(p):
    a1, b1, a2, b2, d1, d2 = 5, 2.5, 0.1, 2, 0.4, 0.01

    def f(t, x):
        X, Y, Z = x
        f1, f2 = a1 * X / (1 + b1 * X), a2 * Y / (1 + b2 * Y)
        return [X * (1 - X) - f1 * Y, f1 * Y - f2 * Z - d1 * Y, f2 * Z - d2 * Z]
    return f, lambda x: [x[2] - 9.5]


def npzd(p):
    mu, kN, g, kP, eps, mP, mZ, r, N0 = 1.0, 0.5, 1.0, 1.0, 0.3, 0.05, 0.1, 0.1, 6.0
    m = p["m"]

    def f(t, x):
        N, P, Z, D = x
        up, gr = mu * N / (kN + N) * P, g * P / (kP + P) * Z
        return [m * (N0 - N) - up + r * D, up - gr - mP * P - m * P,
                eps * gr - mZ * Z - m * Z, (1 - eps) * gr + mP * P + mZ * Z - r * D - m * D]
    return f, lambda x: [3 - x[1], x[2] - 0.2]


# model stem -> (system builder, interval parameters, long horizon in model time)
MODELS = {"seihr_beds": (seihr, {}, 3000.0),
          "seihr_wide": (seihr, {}, 3000.0),
          "cstr_jacket": (cstr, {}, 300.0),
          "glucose_minimal": (glucose, {}, 5000.0),
          "glucose_wideX": (glucose, {}, 5000.0),
          "glucose_smooth": (lambda p: glucose(p, kink=False), {}, 5000.0),
          "food_chain_hp": (food_chain, {}, 5000.0),
          "npzd_mixing": (npzd, {"m": (0.02, 0.04)}, 5000.0)}


def first_crossing(f, margins, x0, horizon):
    """First time a margin turns negative (inf if none up to horizon), and the least
    margin seen at the solver's steps."""
    k = len(margins(x0))
    events = []
    for j in range(k):
        ev = (lambda j: lambda t, x: margins(x)[j])(j)
        ev.terminal, ev.direction = True, -1
        events.append(ev)
    sol = solve_ivp(f, (0.0, horizon), x0, method="LSODA", rtol=1e-10, atol=1e-12,
                    events=events)
    least = float(np.min([np.min(margins(y)) for y in sol.y.T]))
    hits = [e[0] for e in sol.t_events if len(e)]
    return (min(hits) if hits else np.inf), least, sol.status


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("model")
    ap.add_argument("cert")
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args(argv)
    stem = Path(a.model).stem
    build, iparams, horizon = MODELS[stem]
    cert = read_certificate(a.cert)
    lo, hi = np.array(cert.lo.min(0)), np.array(cert.hi.max(0))
    rng = np.random.default_rng(a.seed)
    starts = lo + (hi - lo) * rng.random((a.n, len(lo)))
    labels = cert.label_at(starts)
    lower, upper = cert.crossing_time_bounds(starts)
    counts, bad = {}, []
    for x0, lab, lb, ub in zip(starts, labels, lower, upper):
        counts[lab] = counts.get(lab, 0) + 1
        if lab == "outside":
            continue
        p = {k: v[0] + (v[1] - v[0]) * rng.random() for k, v in iparams.items()}
        f, margins = build(p)
        tend = horizon if not np.isfinite(ub) else max(horizon, 1.5 * ub)
        tc, least, status = first_crossing(f, margins, x0, tend)
        if status < 0:
            print("solver failed at", x0.tolist(), p)
            continue
        why = None
        if lab == "safe" and np.isfinite(tc):
            why = f"safe start crosses at t = {tc!r}"
        elif lab == "doomed" and not tc <= ub:
            why = f"doomed start does not cross by its bound {ub!r} (crosses at {tc!r})"
        elif tc < lb:
            why = f"{lab} start crosses at {tc!r} before its proven lower bound {lb!r}"
        if why:
            line = f"{stem}: start {x0.tolist()!r} params {p!r}: {why}; least margin {least!r}"
            bad.append(line)
            print("CONTRADICTION", line, flush=True)
    print(stem, "labels of the sampled starts:", counts, "contradictions:", len(bad))
    if bad:
        with open(Path(__file__).resolve().parent.parent / "SOUNDNESS.txt", "a") as out:
            out.write("\n".join(bad) + "\n")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
