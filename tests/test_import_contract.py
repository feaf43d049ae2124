"""The checker's independence is a package boundary (docs/design.md, section 6: the checker
trusts only the model reader, sympy and python-flint, never the proof code).

Two checks: an AST walk over every module of ``certify/check/`` lists the ``certify``
modules it imports (at any depth, including imports inside functions), and a fresh
interpreter that imports the checker must not have loaded any proof module.
"""

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "certify"

#: What the checker may use of the rest of the package: the model reader and its
#: expression parser, the error classes, the certificate container, atomic file writes.
ALLOWED = {"certify.errors", "certify.model", "certify.expr", "certify.container",
           "certify.files"}

#: Proof modules: none may be loaded by ``import certify.check``.
PROOF_MODULES = ["certify.prove", "certify.flow", "certify.interval", "certify.taylor",
                 "certify.program", "certify.evaluate", "certify.cells", "certify.faces",
                 "certify.labels", "certify.volumes", "certify.krawczyk", "certify.points",
                 "certify.certificate", "certify.claim", "certify.sweep", "certify.simulate"]


def _package_of(path):
    module = "certify." + ".".join(path.relative_to(PACKAGE).with_suffix("").parts)
    return module.removesuffix(".__init__") if path.name == "__init__.py" \
        else module.rsplit(".", 1)[0]


def _imported_modules(path, package=None):
    """Absolute names of every ``certify`` module imported by the file at `path`."""
    package = package or _package_of(path)
    names = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - node.level + 1]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module
            names.add(stem)
            # "from certify import flow" imports a module too
            names.update(f"{stem}.{a.name}" for a in node.names)
    return {n for n in names if n == "certify" or n.startswith("certify.")}


def _is_module(name):
    rel = Path(*name.split(".")[1:])
    return (PACKAGE / rel).with_suffix(".py").exists() or (PACKAGE / rel / "__init__.py").exists()


@pytest.mark.parametrize("path", sorted((PACKAGE / "check").glob("*.py")), ids=lambda p: p.name)
def test_checker_imports_only_the_trusted_base(path):
    used = {n for n in _imported_modules(path) if _is_module(n)}
    foreign = {n for n in used if not n.startswith("certify.check")} - ALLOWED
    assert not foreign, f"{path.name} imports {sorted(foreign)}"


def test_the_ast_walk_sees_a_forbidden_import(tmp_path):
    # the walker itself must notice a violation (a contract test that cannot fail is no test)
    fake = tmp_path / "probe.py"
    fake.write_text("def f():\n    from ..flow import flow_boxes\n")
    assert "certify.flow" in _imported_modules(fake, package="certify.check")


def test_importing_the_checker_loads_no_proof_module():
    code = ("import sys, certify.check; "
            f"print([m for m in {PROOF_MODULES!r} if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=PACKAGE.parent)
    assert out.stdout.strip() == "[]", out.stdout


def test_certificate_and_graph_form_no_import_cycle():
    assert "certify.certificate" not in _imported_modules(PACKAGE / "graph.py")


def test_public_names_stay_functions_after_their_modules_load():
    code = ("import certify.prove, certify.sweep, certify; "
            "print(callable(certify.prove) and callable(certify.sweep), "
            "type(certify.prove).__name__)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=PACKAGE.parent)
    assert out.stdout.split() == ["True", "function"]
