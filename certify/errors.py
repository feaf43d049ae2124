"""Exception family of certify.

Every mistake a user can make (a bad model file, a bad certificate, a bad
command-line request) raises a subclass of :class:`CertifyError` whose message
is one line naming the file, the key and the position. The command line turns
these into ``certify: error: <message>`` on stderr and exit code 2.
"""

__all__ = ["CertifyError", "ModelError", "CertificateError", "UsageError"]


class CertifyError(Exception):
    """Base class of every error certify reports to its user."""


class ModelError(CertifyError, ValueError):
    """A model file or model expression is malformed or unreadable."""


class CertificateError(CertifyError, ValueError):
    """A certificate file is malformed, unreadable or inconsistent."""


class UsageError(CertifyError, ValueError):
    """A request (command-line option, override, argument) is invalid."""
