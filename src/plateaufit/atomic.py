"""Atomic file writes: a temporary file in the target's directory, then a rename.

An interrupted run never leaves a half-written results file: either the old file
(or none) is there, or the complete new one.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_bytes(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically; create parent directories.

    Parameters
    ----------
    path : path-like
        Destination file.
    data : bytes
        The complete content.

    Returns
    -------
    pathlib.Path
        The destination path.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        # mkstemp creates the file 0600; give it the mode an ordinary open() would
        os.fchmod(fd, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return target


def write_text(path: str | os.PathLike[str], text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically; see :func:`write_bytes`."""
    return write_bytes(path, text.encode("utf-8"))
