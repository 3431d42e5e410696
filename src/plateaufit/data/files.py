"""Safe access to data files: regular files only, bounded reads, strict text decoding.

Every loader goes through here before it parses anything, so that no input can
block the program or exhaust its memory:

* :func:`regular_file_size` ``os.stat``\\ s the path (following symbolic links)
  and refuses, without opening it, anything that is not a regular file: a
  directory (or a symbolic link to one), a named pipe (FIFO, whose opening
  blocks until a writer appears), a character or block device (``/dev/zero``
  never ends), a socket.
* :func:`open_regular` opens with ``O_NONBLOCK`` and checks the open
  descriptor again with ``fstat``, so a path swapped for a FIFO between the
  ``stat`` and the ``open`` cannot block either.
* :func:`read_text` reads at most ``limit`` bytes (plus one block) -- a file
  that grows while it is read still cannot exhaust memory -- and decodes them as UTF-8
  (an optional UTF-8 byte order mark is skipped), refusing UTF-16/UTF-32 and
  binary files with a message that says what they are and what to do.

Every error is a :class:`~plateaufit.errors.DataError` built by
:class:`FileContext`, which names the file (and the spec key when known).
"""

from __future__ import annotations

import errno
import os
import stat
from pathlib import Path
from typing import BinaryIO

from plateaufit.errors import DataError

__all__ = ["FileContext", "MAX_TEXT_BYTES", "regular_file_size", "open_regular", "read_text",
           "describe_size"]

#: Default largest text or CSV file read (bytes): 2 GiB. An ensemble of 10^5
#: configurations x 256 timeslices at ~25 bytes a value is ~640 MB of text, and
#: the long CSV form of the same (``stream,config,t,value`` per value) ~1 GB, so
#: the limit leaves room for the largest real ensembles while a runaway input
#: (a log file, a disk image) is refused before it is read.
MAX_TEXT_BYTES: int = 2 * 1024**3

_KINDS = (
    (stat.S_ISDIR, "a directory"),
    (stat.S_ISFIFO, "a named pipe (FIFO)"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
)


class FileContext:
    """Builds DataErrors that name the file, and the spec key when known.

    Parameters
    ----------
    path : pathlib.Path
        The file being read; every message starts with it.
    where : str
        The spec key the path came from (``observables.pion.file``); when
        empty, the file itself is the error's ``where``.
    """

    def __init__(self, path: Path, where: str = "") -> None:
        self.path = path
        self.where = where

    def error(self, message: str) -> DataError:
        """A DataError ``(where or path, "path: message")``."""
        return DataError(self.where or str(self.path), f"{self.path}: {message}")


def describe_size(n_bytes: int) -> str:
    """``1234567`` -> ``'1.2 MB (1234567 bytes)'`` (decimal units)."""
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n_bytes >= scale:
            return f"{n_bytes / scale:.1f} {unit} ({n_bytes} bytes)"
    return f"{n_bytes} bytes"


def _kind(mode: int) -> str | None:
    """What a non-regular file is, or None for a regular file."""
    if stat.S_ISREG(mode):
        return None
    for test, name in _KINDS:
        if test(mode):
            return name
    return "not a regular file"


def _refuse_kind(kind: str, path: Path, ctx: FileContext) -> DataError:
    link = ""
    if path.is_symlink():
        try:
            link = f" (a symbolic link to {os.readlink(path)})"
        except OSError:
            link = " (a symbolic link)"
    if kind == "a directory":
        what = "give the data file inside it, not the directory"
    else:
        what = ("data are read from regular files only (a pipe or device could block or "
                "never end): write the data to a file and give that file")
    return ctx.error(f"is {kind}{link}, not a regular file; {what}")


def _os_error(exc: OSError, ctx: FileContext, doing: str = "read") -> DataError:
    """One clear message for the OSErrors a file access can raise."""
    if isinstance(exc, FileNotFoundError) or exc.errno == errno.ENOENT:
        if doing == "access":
            return ctx.error("file not found; check the path")
        return ctx.error("the file vanished while it was being opened or read; check "
                         "whether another program moves or deletes it, and try again")
    if isinstance(exc, PermissionError) or exc.errno in (errno.EACCES, errno.EPERM):
        return ctx.error(f"permission denied: cannot {doing} the file; make it readable "
                         "for your user (e.g. chmod u+r) or copy it somewhere you can read")
    if exc.errno == errno.ENOTDIR:
        return ctx.error("a part of the path is not a directory; check the path")
    if exc.errno == errno.ELOOP:
        return ctx.error("too many levels of symbolic links; check where the path points")
    reason = exc.strerror or str(exc)
    return ctx.error(f"cannot {doing} the file ({reason}); check that it is a readable file")


def regular_file_size(path: Path, ctx: FileContext) -> int:
    """Size in bytes of a regular file; DataError for anything else.

    ``os.stat`` only -- the file is not opened, so a FIFO cannot block here.

    Raises
    ------
    DataError
        Not found, not accessible, a directory, pipe, device or socket (the
        message says which, and whether the path is a symbolic link).
    """
    try:
        st = os.stat(path)
    except OSError as exc:
        raise _os_error(exc, ctx, "access") from None
    kind = _kind(st.st_mode)
    if kind is not None:
        raise _refuse_kind(kind, path, ctx)
    return int(st.st_size)


def open_regular(path: Path, ctx: FileContext) -> BinaryIO:
    """Open a regular file for binary reading without ever blocking.

    The path is opened with ``O_NONBLOCK`` (opening a FIFO for reading then
    returns at once instead of waiting for a writer) and the descriptor is
    checked with ``fstat`` before anything is read; ``O_NONBLOCK`` is cleared
    again for the (regular) file.

    Returns
    -------
    BinaryIO
        An open binary file object; the caller closes it.

    Raises
    ------
    DataError
        As :func:`regular_file_size`.
    """
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0) \
        | getattr(os, "O_BINARY", 0)
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        raise _os_error(exc, ctx, "open") from None
    try:
        kind = _kind(os.fstat(fd).st_mode)
        if kind is not None:
            raise _refuse_kind(kind, path, ctx)
        if getattr(os, "O_NONBLOCK", 0):
            try:
                import fcntl

                fcntl.fcntl(fd, fcntl.F_SETFL, fcntl.fcntl(fd, fcntl.F_GETFL) & ~os.O_NONBLOCK)
            except (ImportError, OSError):  # pragma: no cover - regular files never block
                pass
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def _too_large(size: int, limit: int, ctx: FileContext) -> DataError:
    return ctx.error(
        f"the file is {describe_size(size)}, above the limit of {describe_size(limit)} for a "
        "text or CSV data file; check that it is the right file, store a large ensemble as "
        ".npy or HDF5, or raise the limit (max_text_bytes=... in load_correlator)"
    )


def read_text(path: Path, ctx: FileContext, *, limit: int | None, what: str = "text") -> str:
    """The decoded contents of a regular text file of at most ``limit`` bytes.

    Parameters
    ----------
    path : pathlib.Path
    ctx : FileContext
    limit : int or None
        Largest size accepted, in bytes; None for no limit.
    what : str
        The format's name for messages (``text``, ``CSV``).

    Returns
    -------
    str
        UTF-8 decoded text, without a leading UTF-8 byte order mark.

    Raises
    ------
    DataError
        Not a regular file; empty; larger than ``limit``; UTF-16 or UTF-32
        (byte order mark); binary (NUL bytes); not valid UTF-8 (the line and the
        byte are named). Each message says what to do.
    """
    size = regular_file_size(path, ctx)
    if limit is not None and size > limit:
        raise _too_large(size, limit, ctx)
    with open_regular(path, ctx) as handle:
        try:
            data = _read_bounded(handle, size, limit, ctx)
        except OSError as exc:
            raise _os_error(exc, ctx) from None
    if not data:
        raise ctx.error(f"the file is empty (0 bytes); expected {what} data")
    return decode_text(data, ctx, what)


def _read_bounded(handle: BinaryIO, size: int, limit: int | None, ctx: FileContext) -> bytes:
    """All bytes of ``handle``, never more than ``limit``: a buffer of the stat'ed size is
    read at once (a read of ``limit`` bytes would allocate them), then -- only when the
    file grew meanwhile -- the rest in blocks until the limit is passed."""
    data = handle.read(size + 1)
    if len(data) <= size:
        return data
    parts, total = [data], len(data)
    while True:
        if limit is not None and total > limit:
            raise _too_large(total, limit, ctx)  # it grew while being read
        block = handle.read(1 << 20)
        if not block:
            return b"".join(parts)
        parts.append(block)
        total += len(block)


def decode_text(data: bytes, ctx: FileContext, what: str = "text") -> str:
    """Decode the bytes of a text data file as UTF-8 (see :func:`read_text`)."""
    if data.startswith((b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff")):
        raise ctx.error(f"the file is encoded as UTF-32 (it starts with a UTF-32 byte order "
                        f"mark); save it as UTF-8 (or plain ASCII) {what}")
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise ctx.error(f"the file is encoded as UTF-16 (it starts with a UTF-16 byte order "
                        f"mark, as some spreadsheet programs write); save it as UTF-8 (or "
                        f"plain ASCII) {what}")
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    nul = data.find(b"\x00")
    if nul >= 0:
        line = data.count(b"\n", 0, nul) + 1
        raise ctx.error(
            f"this is a binary file, not {what} (a NUL byte on line {line}, byte {nul}); "
            "give the text file, or set the format of the binary data (npy, npz, hdf5)"
        )
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        byte = data[exc.start]
        raise ctx.error(
            f"line {line}: byte 0x{byte:02x} is not valid UTF-8 (the file is in another "
            "encoding, e.g. Latin-1, or is not text at all); save it as UTF-8 (or plain ASCII) "
            f"{what}"
        ) from None
