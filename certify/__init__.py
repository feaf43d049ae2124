"""certify: proven maps of which starting states of an ODE model stay within its limits.

This package namespace only re-exports the public entry points; see the modules
for the details.
"""

from certify.errors import CertificateError, CertifyError, ModelError, UsageError
from certify.model import Model, load_model, parse_model

__all__ = [
    "CertificateError",
    "CertifyError",
    "Model",
    "ModelError",
    "UsageError",
    "load_model",
    "parse_model",
]
