"""The independent checker: ``check_certificate(path) -> CheckResult``.

This subpackage re-verifies a certificate with python-flint arithmetic and its own
code. It imports nothing of the proof code (the prover, the flow, the interval
kernels); ``tests/test_import_contract.py`` enforces that boundary. It trusts the
model reader (:mod:`certify.model`), the certificate container
(:mod:`certify.container`) and sympy.
"""

from .checker import CheckResult, check_certificate

__all__ = ["CheckResult", "check_certificate"]
