"""Atomic file writes: a reader never sees a half-written output."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .errors import UsageError

__all__ = ["write_atomic", "output_folder"]


def write_atomic(path, data):
    """Write bytes to `path` through a temporary file in the same folder and a rename.

    Parameters
    ----------
    path : str or Path
    data : bytes
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}-", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def output_folder(path, option="--out"):
    """Make sure `path` is a folder this process can write into, before any work.

    Creates the folder (and its parents) when missing.

    Parameters
    ----------
    path : str or Path
    option : str
        The command-line option that named the folder, for the message.

    Returns
    -------
    Path

    Raises
    ------
    UsageError
        When `path` is an existing file, or the folder cannot be created or written.
    """
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise UsageError(f"{option} {path}: is a file, not a folder; name a folder for "
                         "the outputs")
    try:
        path.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=".certify-write-test-", dir=path)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise UsageError(f"{option} {path}: cannot write there ({reason.lower()})") from None
    return path
