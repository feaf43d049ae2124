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
    """Make sure `path` names a folder this process can write into, before any work.

    Nothing is created: a missing folder is checked through its nearest existing parent.

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
        When `path` or a parent of it is an existing file, or the folder (or the parent
        that would hold it) cannot be written.
    """
    path = Path(path)
    existing = path
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent
    if existing.exists() and not existing.is_dir():
        where = "is a file" if existing == path else f"{existing} is a file"
        raise UsageError(f"{option} {path}: {where}, not a folder; name a folder for the outputs")
    if not os.access(existing, os.W_OK | os.X_OK):
        raise UsageError(f"{option} {path}: cannot write there (no permission in {existing})")
    return path
