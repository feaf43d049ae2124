"""certify: proven maps of which starting states of an ODE model stay within its limits.

This package namespace only re-exports the public entry points, lazily: importing
``certify`` (or the independent checker, :mod:`certify.check`) loads none of the proof
modules until one of their names is used.
"""

import sys
from importlib import import_module
from types import ModuleType

from certify.errors import CertificateError, CertifyError, ModelError, UsageError

_LAZY = {
    "AtlasResult": "certify.atlas",
    "atlas": "certify.atlas",
    "Certificate": "certify.certificate",
    "read_certificate": "certify.certificate",
    "CheckResult": "certify.check",
    "check_certificate": "certify.check",
    "Model": "certify.model",
    "load_model": "certify.model",
    "parse_model": "certify.model",
    "import_sbml": "certify.sbml",
    "PolicyMap": "certify.policy_output",
    "PolicyProof": "certify.policy",
    "check_policy": "certify.check._policy",
    "prove_policy": "certify.policy",
    "read_policy": "certify.policy_output",
    "Proof": "certify.prove",
    "prove": "certify.prove",
    "SweepResult": "certify.sweep",
    "sweep": "certify.sweep",
}

__all__ = sorted(["CertificateError", "CertifyError", "ModelError", "UsageError", *_LAZY])


class _Package(ModuleType):
    """The package module, keeping ``certify.prove``, ``certify.sweep`` and ``certify.atlas``
    the functions.

    Importing a submodule sets the package attribute of the same name to the module;
    the functions of that name must win, as with an eager ``from .prove import prove``.
    """

    def __setattr__(self, name, value):
        if isinstance(value, ModuleType) and _LAZY.get(name) == f"{__name__}.{name}":
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package


def __getattr__(name):
    if name in _LAZY:
        value = getattr(import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'certify' has no attribute {name!r}")


def __dir__():
    return __all__
