"""Round trip of the model library through SBML: each models/*.toml is written as SBML
with libsbml (tests/sbml_writer.py), imported with ``certify.import_sbml``, and the
imported right-hand sides must equal the original ones, exactly (sympy) and at random
points of the window (numpy). Reference: the library model files themselves, and
libsbml's own writer and formula parser (outside this project).
"""

from pathlib import Path

import numpy as np
import pytest
import sympy

from certify import import_sbml, load_model
from sbml_writer import model_to_sbml

MODELS = sorted((Path(__file__).resolve().parent.parent / "models").glob("*.toml"))


def _imported(model, tmp_path):
    path = tmp_path / "model.xml"
    path.write_text(model_to_sbml(model))
    intervals = {p.name: (p.lo, p.hi) for p in model.parameters if p.is_interval}
    return import_sbml(path, ranges={s.name: (s.lo, s.hi) for s in model.states},
                       limits=[c.text for c in model.constraints], params=intervals)


@pytest.mark.parametrize("path", MODELS, ids=[p.stem for p in MODELS])
def test_library_model_survives_sbml(path, tmp_path):
    model = load_model(path)
    imported = _imported(model, tmp_path)
    assert [s.name for s in imported.states] == [s.name for s in model.states]
    assert imported.window == model.window
    assert {(p.name, p.lo, p.hi) for p in imported.parameters} == \
        {(p.name, p.lo, p.hi) for p in model.parameters}
    for original, back in zip(model.equations, imported.equations):
        assert sympy.simplify(back - original) == 0, (original, back)
    assert [c.g for c in imported.constraints] == [c.g for c in model.constraints]

    symbols = model.state_symbols + model.parameter_symbols
    rng = np.random.default_rng(19)
    lo = np.array([float(s.lo) for s in model.states] + [float(p.lo) for p in model.parameters])
    hi = np.array([float(s.hi) for s in model.states] + [float(p.hi) for p in model.parameters])
    points = lo + (hi - lo) * rng.random((25, len(symbols)))
    original = sympy.lambdify(symbols, list(model.equations), "numpy")
    back = sympy.lambdify(symbols, list(imported.equations), "numpy")
    for point in points:
        np.testing.assert_allclose(back(*point), original(*point), rtol=1e-12, atol=1e-12)
