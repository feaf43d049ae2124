"""Atomic file writes: a reader never sees a half-written output."""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

from .errors import UsageError

__all__ = ["atomic_writer", "write_atomic", "output_folder"]


@contextmanager
def atomic_writer(path):
    """A binary file handle whose content appears at `path` only once it is complete.

    The content goes to a temporary file in the same folder, renamed to `path` when
    the block ends without an exception (and removed otherwise).

    Parameters
    ----------
    path : str or Path
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}-", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            yield handle
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_atomic(path, data):
    """Write bytes to `path` through a temporary file in the same folder and a rename.

    Parameters
    ----------
    path : str or Path
    data : bytes
    """
    with atomic_writer(path) as handle:
        handle.write(data)


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
