"""certify: proven maps of which starting states of an ODE model stay within its limits.

This package namespace only re-exports the public entry points; see the modules
for the details.
"""

from certify.certificate import Certificate, read_certificate
from certify.checker import CheckResult, check_certificate
from certify.errors import CertificateError, CertifyError, ModelError, UsageError
from certify.model import Model, load_model, parse_model
from certify.prove import Proof, prove
from certify.sweep import SweepResult, sweep

__all__ = [
    "Certificate",
    "CertificateError",
    "CertifyError",
    "CheckResult",
    "Model",
    "ModelError",
    "Proof",
    "SweepResult",
    "UsageError",
    "check_certificate",
    "load_model",
    "parse_model",
    "prove",
    "read_certificate",
    "sweep",
]
