"""The output folder of a run: written all or nothing, never over an input, stale files removed.

``plateaufit fit`` and ``plateaufit report`` write a run's files (results.json,
run.log, tables, plots, the page) into one folder, which may also hold the
user's own files (the demo keeps its data and spec there). This module is the
one place that touches that folder, with four guarantees:

1. **Outputs never touch inputs.** :meth:`RunFolder.preflight`, called before
   any fitting, refuses (``DataError`` at the output key) an output folder whose
   outputs would replace a file the run reads (a data file, the spec), comparing
   resolved paths and, for existing files, device and inode; and a folder that
   is not a directory, cannot be created, or cannot take a probe write (no
   permission, read-only, no room).
2. **All or nothing.** :meth:`RunFolder.writing` gives a fresh staging folder
   inside the output folder. Every output is written there; only when all are
   written are they moved into place by renames, with results.json -- whose
   presence means a complete run -- last. Before the first rename the folder is
   marked incomplete (:data:`INCOMPLETE`) and the old results.json removed, so an
   interruption never leaves a folder that looks complete but mixes two runs. A
   failure or an interruption while staging leaves the folder as it was.
3. **Stale files go, the user's stay.** The folder keeps a manifest
   (:data:`MANIFEST`: the files this tool wrote, with their SHA-256). A new run
   removes the files of the previous manifest it did not write again -- only
   those, only when unchanged since, and never an input of the run.
4. **Truthful interruption.** Whatever escapes :meth:`RunFolder.writing`
   carries the folder's state (:func:`folder_state`), and
   :func:`interruption_message` says in words what is on disk.

Imports nothing of plateaufit but :mod:`plateaufit.errors`, so the pipeline, the
report and the demo share it (like :mod:`plateaufit.atomic`).
"""

from __future__ import annotations

import enum
import errno
import hashlib
import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from plateaufit.errors import DataError

try:   # advisory locking of the folder (POSIX); without it, no lock is taken
    import fcntl
except ImportError:  # pragma: no cover - not POSIX
    fcntl = None  # type: ignore[assignment]

__all__ = ["RunFolder", "FolderState", "FolderStatus", "MANIFEST", "INCOMPLETE", "COMPLETION",
           "STAGING_PREFIX", "PROBE_BYTES", "folder_state", "interruption_message",
           "read_manifest", "file_sha256"]

#: the file whose presence means a complete run; moved into place last
COMPLETION = "results.json"
#: the manifest of the files this tool wrote in the folder (sha256 and path per line)
MANIFEST = ".plateaufit-outputs"
#: present while a run's files are being moved into place
INCOMPLETE = ".plateaufit-incomplete"
#: prefix of the staging folders (inside the output folder)
STAGING_PREFIX = ".plateaufit-staging-"
#: bytes of the probe write before any fitting (a few plots' worth)
PROBE_BYTES = 1 << 20

_INCOMPLETE_TEXT = ("A plateaufit run was interrupted while it moved its files into this "
                    "folder: the files here may mix two runs. Run `plateaufit fit` again.\n")
_MANIFEST_HEADER = ("# plateaufit: the files it wrote in this folder (sha256, path). The next "
                    "run removes those it does not write again, if unchanged.\n")


class FolderState(enum.Enum):
    """What is on disk in the output folder."""

    #: nothing in the folder was changed (an earlier run's files, if any, are intact)
    UNCHANGED = "unchanged"
    #: files were being moved into place: results.json is absent, the folder is marked
    INCOMPLETE = "incomplete"
    #: the new run is complete (results.json in place)
    COMPLETE = "complete"


@dataclass(frozen=True)
class FolderStatus:
    """The state of an output folder when an exception left :meth:`RunFolder.writing`."""

    path: Path
    state: FolderState
    had_results: bool = False   # results.json of an earlier run was there before


def folder_state(exc: BaseException) -> FolderStatus | None:
    """The output folder's status carried by ``exc``, or None (it never reached the folder)."""
    status = getattr(exc, "plateaufit_folder", None)
    return status if isinstance(status, FolderStatus) else None


def interruption_message(exc: BaseException) -> str:
    """What is on disk after ``exc`` (e.g. a KeyboardInterrupt) ended a run, in words.

    Returns
    -------
    str
        E.g. ``"no results were written"``, or that the folder is incomplete and
        what to do.
    """
    batch = getattr(exc, "plateaufit_batch", None)   # (specs finished, specs in all)
    if batch is not None:
        done, total = batch
        return (f"{done} of {total} spec(s) of the batch finished, their results complete; "
                f"no batch summary was written; the spec in progress: "
                f"{_folder_message(folder_state(exc))}")
    return _folder_message(folder_state(exc))


def _folder_message(status: FolderStatus | None) -> str:
    if status is None or status.state is FolderState.UNCHANGED:
        if status is not None and status.had_results:
            return f"no results were written; {status.path} still holds the earlier run's"
        return "no results were written"
    if status.state is FolderState.INCOMPLETE:
        return (f"{status.path} is incomplete: the earlier run's results.json was removed "
                "and some files were already replaced by the new run's (the folder is marked "
                f"{INCOMPLETE}); run the fit again")
    return f"the results were complete: written to {status.path}"


def file_sha256(path: Path) -> str:
    """SHA-256 (hex) of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _safe_relative(text: str) -> str | None:
    """A manifest path if it stays inside the folder (relative, no '..'), else None."""
    p = PurePosixPath(text)
    if not text or p.is_absolute() or any(part in ("..", "") for part in p.parts):
        return None
    if p.parts[0].startswith(STAGING_PREFIX) or p.parts[0] in (MANIFEST, INCOMPLETE):
        return None
    return p.as_posix()


def read_manifest(folder: Path) -> dict[str, str]:
    """The manifest of ``folder`` as relative path -> sha256; {} when absent or unreadable.

    Lines that are malformed or name a path outside the folder are ignored:
    the manifest only ever narrows what may be removed.
    """
    path = folder / MANIFEST
    try:
        if not path.is_file():
            return {}
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return {}
    out: dict[str, str] = {}
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        digest, sep, name = line.partition("  ")
        rel = _safe_relative(name) if sep else None
        if rel is not None and len(digest) == 64 and all(c in "0123456789abcdef" for c in digest):
            out[rel] = digest
    return out


def _manifest_text(entries: dict[str, str]) -> str:
    return _MANIFEST_HEADER + "".join(f"{d}  {p}\n" for p, d in sorted(entries.items()))


def _strerror(exc: OSError) -> str:
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return "no space left on the device (or the quota is used up)"
    if exc.errno == errno.EFBIG:
        return "the file is too large for this file system or the process's size limit"
    return exc.strerror or str(exc)


@dataclass
class CommitReport:
    """What the commit did besides placing the new files."""

    removed: list[str] = field(default_factory=list)     # stale files of an earlier run
    kept_changed: list[str] = field(default_factory=list)  # listed, but changed since: kept


class RunFolder:
    """The output folder of one run (see the module docs for the guarantees).

    Parameters
    ----------
    path : path-like
        The output folder (created when missing).
    key : str
        Where it came from, for errors: ``output.dir`` or ``--out``.
    inputs : iterable of path-like
        Every file the run reads (data files, the spec): never replaced, never removed.
    """

    def __init__(self, path: str | os.PathLike[str], *, key: str = "output.dir",
                 inputs: Iterable[str | os.PathLike[str]] = ()) -> None:
        self.path = Path(path)
        self.key = key
        self.inputs = [Path(p) for p in inputs]
        self.state = FolderState.UNCHANGED
        self.report = CommitReport()

    # ------------------------------------------------------------------ checks

    def _error(self, message: str) -> DataError:
        return DataError(self.key, message)

    def _input_at(self, dest: Path) -> Path | None:
        """The input of the run that ``dest`` (a path in the folder) is, or None."""
        target = dest.resolve()
        for p in self.inputs:
            if p.resolve() == target:
                return p
            try:
                if dest.exists() and p.exists() and os.path.samefile(dest, p):
                    return p
            except OSError:
                continue
        return None

    def check_outputs(self, names: Iterable[str], *, plots: bool = True) -> None:
        """Refuse outputs (relative paths) that would replace an input of the run.

        With ``plots``, every file in ``plots/`` counts as an output. Raises
        DataError at the folder's key naming both the output and the input.
        """
        names = list(names)
        for name in names:
            dest = self.path / name
            found = self._input_at(dest)
            if found is not None:
                raise self._error(
                    f"the run would write {dest}, which is an input of this run ({found}): "
                    f"writing the outputs would destroy it. Choose another output folder (or "
                    "move the input); outputs never replace inputs")
        if plots:
            plots_dir = (self.path / "plots").resolve()
            for p in self.inputs:
                if plots_dir in p.resolve().parents:
                    raise self._error(
                        f"the input {p} is inside {self.path / 'plots'}, where the run writes "
                        "its plots; move it or choose another output folder")
            names = [*names, "plots/"]
        for name in names:
            rel = PurePosixPath(name)
            for parent in reversed(rel.parents[:-1]):   # folders on the way, outermost first
                there = self.path / parent
                if there.exists() and not there.is_dir():
                    raise self._error(f"{there} is a file, but the run writes into a folder "
                                      "of that name; move the file or choose another output "
                                      "folder")
            dest = self.path / rel
            if name.endswith("/"):
                if dest.exists() and not dest.is_dir():
                    raise self._error(f"{dest} is a file, but the run writes into a folder "
                                      "of that name; move the file or choose another output "
                                      "folder")
            elif dest.is_dir() and not dest.is_symlink():
                raise self._error(f"{dest} is a folder, but the run writes a file of that "
                                  "name; move it or choose another output folder")

    def _existing_base(self) -> Path:
        """The output folder, or its deepest existing ancestor; DataError if that is a file."""
        for candidate in (self.path, *self.path.absolute().parents):
            if candidate.exists():
                if not candidate.is_dir():
                    raise self._error(f"{candidate} is a file, not a folder, so {self.path} "
                                      "cannot be created there; choose another output folder")
                return candidate
        raise self._error(f"{self.path}: no existing parent folder")  # pragma: no cover

    def preflight(self, names: Iterable[str], *, plots: bool = True,
                  probe_bytes: int = PROBE_BYTES) -> None:
        """Before any fitting: outputs clear of inputs, folder creatable, writable, with room,
        and no other run writing into it at the moment.

        A probe file of ``probe_bytes`` is written (and synced) in the folder or,
        when it does not exist yet, in its deepest existing parent, then removed.

        Raises
        ------
        DataError
            At the folder's key (``output.dir`` or ``--out``), naming the path
            and what to do.
        """
        names = list(names)
        if self.path.exists() and not self.path.is_dir():
            raise self._error(f"{self.path} is a file, not a folder; choose another output "
                              "folder")
        self.check_outputs(names, plots=plots)
        base = self._existing_base()
        if not os.access(base, os.W_OK | os.X_OK):
            raise self._error(f"{base}: this folder is not writable, so the results cannot be "
                              "written there; choose another output folder")
        self._probe(base, probe_bytes)
        if self.path.is_dir():   # another run writing here now: say so before fitting
            lock = self._lock()
            if lock is not None:
                os.close(lock)

    def _probe(self, base: Path, n_bytes: int) -> None:
        fd, probe = -1, None
        try:
            fd, probe = tempfile.mkstemp(prefix=".plateaufit-probe-", dir=base)
            block = b"\0" * min(n_bytes, 1 << 16)
            left = n_bytes
            while left > 0:
                left -= os.write(fd, block[:left])
            os.fsync(fd)
        except OSError as exc:
            raise self._error(f"{base}: a test write of {n_bytes} bytes failed "
                              f"({_strerror(exc)}), so the results could not be written; "
                              "free space or choose another output folder") from None
        finally:
            if fd >= 0:
                os.close(fd)
            if probe is not None and os.path.exists(probe):
                os.unlink(probe)

    # ------------------------------------------------------------------ writing

    @contextmanager
    def writing(self, *, completion: str | None = COMPLETION,
                keep: Iterable[str] = ()) -> Iterator[Path]:
        """A staging folder for the run's files; moved into place when the block ends.

        Parameters
        ----------
        completion : str or None
            The file whose presence means a complete run (moved last; the old one
            is removed before anything else is replaced). None for a rebuild that
            does not rewrite it (``plateaufit report``).
        keep : iterable of str
            Files of the previous manifest to keep listed although not rewritten
            (``plateaufit report`` keeps results.json and run.log).

        Yields
        ------
        Path
            The staging folder: write every output under it, by its relative path.

        Raises
        ------
        DataError
            A write failed (naming the file; the folder is unchanged), another
            run holds the folder, or an output would replace an input.
        BaseException
            Anything else (KeyboardInterrupt, ...) passes through carrying the
            folder's status (:func:`folder_state`).
        """
        created = self._make_folder()
        had_results = completion is not None and (self.path / completion).exists()
        lock = None
        staging: Path | None = None
        try:
            lock = self._lock()
            self._remove_stale_staging()
            staging = Path(tempfile.mkdtemp(prefix=STAGING_PREFIX, dir=self.path))
            try:
                yield staging
            except OSError as exc:
                raise self._write_error(exc, staging) from None
            self._commit(staging, completion, set(keep))
        except BaseException as exc:
            status = FolderStatus(self.path, self.state, had_results)
            exc.plateaufit_folder = status  # type: ignore[attr-defined]
            raise
        finally:
            if staging is not None:
                shutil.rmtree(staging, ignore_errors=True)
            if lock is not None:
                os.close(lock)
            if self.state is FolderState.UNCHANGED:
                self._remove_created(created)

    def _make_folder(self) -> list[Path]:
        missing = [p for p in (self.path, *self.path.parents) if not p.exists()]
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise self._error(f"cannot create the output folder {self.path} "
                              f"({_strerror(exc)}); choose another output folder") from None
        return missing   # deepest first

    @staticmethod
    def _remove_created(created: list[Path]) -> None:
        for p in created:
            try:
                p.rmdir()
            except OSError:
                return

    def _lock(self) -> int | None:
        if fcntl is None:  # pragma: no cover
            return None
        fd = os.open(self.path, os.O_RDONLY)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise self._error(f"another plateaufit run is writing into {self.path} right now; "
                              "wait for it to finish or choose another output folder") from None
        return fd

    def _remove_stale_staging(self) -> None:
        """Staging folders left by a killed run (the lock says none is live)."""
        for p in self.path.iterdir():
            if p.name.startswith(STAGING_PREFIX) and p.is_dir() and not p.is_symlink():
                shutil.rmtree(p, ignore_errors=True)

    def _write_error(self, exc: OSError, staging: Path) -> DataError:
        name = exc.filename if isinstance(exc.filename, str) else None
        shown = self.path
        if name is not None:
            try:
                rel = Path(name).resolve().relative_to(staging.resolve())
                shown = self.path / rel
            except ValueError:
                shown = Path(name)
        return DataError(str(shown), f"cannot write the output ({_strerror(exc)}); nothing "
                         f"in {self.path} was changed -- free space or choose another output "
                         "folder, then run again")

    def _staged_files(self, staging: Path) -> list[str]:
        out = []
        for root, _dirs, files in os.walk(staging):
            for f in files:
                out.append((Path(root) / f).relative_to(staging).as_posix())
        return sorted(out)

    def _commit(self, staging: Path, completion: str | None, keep: set[str]) -> None:
        staged = self._staged_files(staging)
        old = read_manifest(self.path)
        # every check first: nothing is replaced unless every file can be placed
        self.check_outputs(staged, plots=False)
        entries = {rel: file_sha256(staging / rel) for rel in staged}
        for rel in keep:
            if rel in old and rel not in entries and (self.path / rel).is_file():
                entries[rel] = old[rel]
        try:
            (staging / MANIFEST).write_text(_manifest_text(entries), encoding="utf-8")
            (staging / INCOMPLETE).write_text(_INCOMPLETE_TEXT, encoding="utf-8")
        except OSError as exc:
            raise self._write_error(exc, staging) from None
        # from here on the folder is being changed
        self.state = FolderState.INCOMPLETE
        os.replace(staging / INCOMPLETE, self.path / INCOMPLETE)
        if completion is not None:
            done = self.path / completion
            if done.is_file() or done.is_symlink():
                done.unlink()
        for rel in staged:
            if rel == completion:
                continue
            dest = self.path / rel
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(staging / rel, dest)
        self._remove_stale(old, entries)
        os.replace(staging / MANIFEST, self.path / MANIFEST)
        if completion is not None and completion in entries:
            os.replace(staging / completion, self.path / completion)
        self.state = FolderState.COMPLETE
        (self.path / INCOMPLETE).unlink(missing_ok=True)

    def _remove_stale(self, old: dict[str, str], new: dict[str, str]) -> None:
        """Files of the previous manifest not written again: removed if unchanged, not inputs."""
        root = self.path.resolve()
        for rel, digest in sorted(old.items()):
            if rel in new:
                continue
            p = self.path / rel
            try:
                if p.is_symlink() or not p.is_file() or root not in p.resolve().parents:
                    continue
                if self._input_at(p) is not None:
                    continue
                if file_sha256(p) != digest:
                    self.report.kept_changed.append(rel)
                    continue
                p.unlink()
            except OSError:
                continue
            self.report.removed.append(rel)
            parent = p.parent
            while parent != self.path and root in parent.resolve().parents:
                try:
                    parent.rmdir()   # only when empty
                except OSError:
                    break
                parent = parent.parent
