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

    Raises
    ------
    OSError
        The write failed (disk full, permission, ...); ``filename`` names the
        destination (not the temporary file), and no temporary file is left.
    """
    target = Path(path)
    tmp = None
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
        # mkstemp creates the file 0600; give it the mode an ordinary open() would
        os.fchmod(fd, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException as exc:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(exc, OSError) and (exc.filename is None or exc.filename == tmp):
            exc.filename = str(target)   # name the destination, not the temporary file
        raise
    return target


def write_text(path: str | os.PathLike[str], text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically; see :func:`write_bytes`."""
    return write_bytes(path, text.encode("utf-8"))
