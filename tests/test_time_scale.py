"""Default lengths of time scaled to the model's rate (certify/time_scale.py)."""

from __future__ import annotations

import numpy as np
import pytest

from certify.model import parse_model
from certify.prove import Method, prove
from certify.time_scale import (TIME_CONSTANTS_PLANE, TIME_CONSTANTS_SPACE, TIME_KEYS,
                                time_scale)

# x'' + 2 zeta w x' + w^2 x = 0 written as a first-order system, time in units of
# 1/`speed` s: a unit k times longer multiplies every rate by k (common practice).
OSCILLATOR = """
[model]
name = "Damped oscillator"
time_unit = "s"
[states]
x = {{ range = [-1, 1] }}
v = {{ range = [-8, 8] }}
[parameters]
w = 8
zeta = 0.25
speed = {speed}
[equations]
x = "speed*v"
v = "speed*(-w^2*x - 2*zeta*w*v)"
[limits]
reach = "x <= 0.75"
{settings}
"""


def oscillator(speed=1, settings=""):
    return parse_model(OSCILLATOR.format(speed=speed, settings=settings))


def test_rate_is_the_modulus_of_the_eigenvalues():
    # eigenvalues -zeta w +- i w sqrt(1 - zeta^2), both of modulus w (common practice)
    found = time_scale(oscillator())
    assert found.rate == pytest.approx(8.0, rel=1e-6)
    assert found.scale == pytest.approx(TIME_CONSTANTS_PLANE / 8.0, rel=1e-6)


def decays(rates, unit="d"):
    """x_i' = -a_i x_i for the given rates, with a floor on the sum of the states."""
    names = [f"x{i}" for i in range(len(rates))]
    return parse_model("\n".join(
        ["[model]", 'name = "Decays"', f'time_unit = "{unit}"', "[states]"]
        + [f"{x} = {{ range = [0, 1] }}" for x in names]
        + ["[equations]"] + [f'{x} = "-{a}*{x}"' for x, a in zip(names, rates)]
        + ["[limits]", f'floor = "{" + ".join(names)} >= 0.1"']))


@pytest.mark.parametrize("rates, constants", [((0.02, 0.05), TIME_CONSTANTS_PLANE),
                                              ((4, 2, 1), TIME_CONSTANTS_SPACE)])
def test_rate_of_decays_is_the_fastest_one(rates, constants):
    # x_i' = -a_i x_i: the Jacobian is diag(-a_i) everywhere, its spectral radius the
    # largest a_i (common practice); the shortest horizon is so many time constants
    found = time_scale(decays(rates))
    assert found.rate == pytest.approx(max(rates), rel=1e-6)
    assert found.scale == pytest.approx(constants / max(rates), rel=1e-6)


def test_a_field_at_rest_keeps_the_defaults():
    model = parse_model("""
[model]
name = "Nothing moves"
time_unit = "s"
[states]
x = { range = [0, 1] }
[equations]
x = "0"
[limits]
cap = "x <= 0.5"
""")
    assert time_scale(model).scale == 1.0
    assert prove(model, max_depth=2).method == Method()


def test_the_defaults_are_scaled_and_recorded():
    proof = prove(oscillator(), max_depth=3)
    scale = TIME_CONSTANTS_PLANE / 8.0
    assert proof.method.time_scale == pytest.approx(scale, rel=1e-6)
    for key in TIME_KEYS:
        assert getattr(proof.method, key) == pytest.approx(getattr(Method, key) * scale,
                                                           rel=1e-6)


def test_lengths_from_the_model_are_kept_unscaled():
    proof = prove(oscillator(settings="[settings]\nmin_horizon = 0.5"), max_depth=3)
    assert proof.method.time_scale == 1.0
    assert proof.method.min_horizon == 0.5
    assert proof.method.max_horizon == Method.max_horizon


def test_a_change_of_time_unit_changes_no_map():
    # The same trajectories, ten times faster: the scale shrinks tenfold, so every step
    # and horizon covers the same stretch of each trajectory, and the maps agree up to
    # rounding.
    slow, fast = oscillator(speed=1), oscillator(speed=10)
    assert time_scale(slow).scale == pytest.approx(10 * time_scale(fast).scale, rel=1e-9)
    maps = [prove(model, max_depth=6, time_limit=None) for model in (slow, fast)]
    for label in ("safe", "doomed", "undecided"):
        assert maps[0].fractions[label] == pytest.approx(maps[1].fractions[label], abs=2e-3)
    assert maps[0].fractions["safe"] > 0.3


def test_safe_starts_keep_the_limit_in_closed_form():
    # With tau = speed t the system is x_tau = v, v_tau = -w^2 x - 2 zeta w v, so
    # x = e^(-zeta w tau) (x0 cos(wd tau) + (v0 + zeta w x0) / wd sin(wd tau)),
    # wd = w sqrt(1 - zeta^2) (common practice): sampled starts of safe cells never
    # exceed x = 0.75 (over 30 units of tau, after which e^(-zeta w tau) < 1e-26). A
    # label speaks about the starts that keep the limit at time 0 (docs/labels.md).
    proof = prove(oscillator(speed=10), max_depth=5, time_limit=None)
    w, zeta = 8.0, 0.25
    wd = w * np.sqrt(1 - zeta ** 2)
    safe = proof.leaves[proof.labelling.label == "safe"]
    lo, hi = proof.tree.lo[safe], proof.tree.hi[safe]
    starts = lo + np.random.default_rng(3).uniform(size=lo.shape) * (hi - lo)
    starts = starts[starts[:, 0] <= 0.75]
    x0, v0 = starts[:, 0], starts[:, 1]
    tau = np.linspace(0.0, 30.0, 6001)[:, None]
    x = np.exp(-zeta * w * tau) * (x0 * np.cos(wd * tau)
                                   + (v0 + zeta * w * x0) / wd * np.sin(wd * tau))
    assert len(safe) > 50
    assert np.all(x <= 0.75)
