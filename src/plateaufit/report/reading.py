"""Reading a run's results.json for ``plateaufit report``: damaged files are user errors.

A results.json may be truncated, edited by hand, garbage, of the wrong type, or
written by an older layout. :func:`read_results` reads it without ever
blocking (regular files only, bounded size), parses it, checks the keys the
report cannot do without (:func:`~plateaufit.report.validate.check_results`),
and builds the typed results; anything unusable is a
:class:`~plateaufit.errors.DataError` naming the file and the key path
(``fits.pion.scan[3].tmin``), never a traceback.

The key of a value that cannot be used is found by reading through
:class:`Trail`-tracking containers: every access records its key path, so the
last path recorded when a conversion fails is the value that failed
(:func:`damaged`).
"""

from __future__ import annotations

import json
import os
import stat
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from plateaufit.errors import DataError
from plateaufit.pipeline.results import Results
from plateaufit.report.validate import check_results

__all__ = ["read_results", "damaged", "trail_of", "Trail", "MAX_RESULTS_BYTES", "MAX_DEPTH",
           "CONVERSION_ERRORS"]

#: largest results.json read (bytes); a run's file is a few MB at most
MAX_RESULTS_BYTES = 1 << 30
#: deepest nesting accepted (results.json is about 6 levels deep)
MAX_DEPTH = 64
#: what a damaged file needs
_RERUN = "the file is damaged or from another layout: rerun `plateaufit fit SPEC` to write it again"
#: what converting a damaged value raises (numpy, int(), float(), dict access)
CONVERSION_ERRORS = (KeyError, TypeError, ValueError, IndexError, AttributeError,
                     OverflowError, ZeroDivisionError)


class Trail:
    """The key path of the last value read through the tracking containers."""

    def __init__(self) -> None:
        self.last = ""


def _join(path: str, key: Any) -> str:
    if isinstance(key, int):
        return f"{path}[{key}]"
    return f"{path}.{key}" if path else str(key)


class _TDict(dict):
    """A dict recording the key path of every value read from it."""

    __slots__ = ("_path", "_trail")

    def _note(self, key: Any) -> None:
        self._trail.last = _join(self._path, key)

    def __getitem__(self, key: Any) -> Any:
        self._note(key)
        return dict.__getitem__(self, key)

    def get(self, key: Any, default: Any = None) -> Any:
        self._note(key)
        return dict.get(self, key, default)

    def items(self) -> Iterator[tuple[Any, Any]]:  # type: ignore[override]
        for key, value in dict.items(self):
            self._note(key)
            yield key, value

    def values(self) -> Iterator[Any]:  # type: ignore[override]
        for _, value in self.items():
            yield value


class _TList(list):
    """A list recording the index of every element read from it."""

    __slots__ = ("_path", "_trail")

    def __getitem__(self, index: Any) -> Any:
        if isinstance(index, int):
            self._trail.last = _join(self._path, index)
        else:
            self._trail.last = self._path
        return list.__getitem__(self, index)

    def __iter__(self) -> Iterator[Any]:
        for i, value in enumerate(list.__iter__(self)):
            self._trail.last = _join(self._path, i)
            yield value


def _tracked(value: Any, path: str, trail: Trail, depth: int, where: str) -> Any:
    if depth > MAX_DEPTH:
        raise DataError(where, f"key {path or '(top level)'} is nested more than {MAX_DEPTH} "
                        f"levels deep, which no results file is; {_RERUN}")
    if isinstance(value, dict):
        out = _TDict((k, _tracked(v, _join(path, k), trail, depth + 1, where))
                     for k, v in value.items())
    elif isinstance(value, list):
        out = _TList(_tracked(v, _join(path, i), trail, depth + 1, where)
                     for i, v in enumerate(value))
    else:
        return value
    out._path, out._trail = path, trail
    return out


def _read_bytes(path: Path) -> bytes:
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise DataError(str(path), "no results.json here; give the output directory of a "
                        "finished `plateaufit fit` run, or run the fit first") from None
    except OSError as exc:
        raise DataError(str(path), f"cannot read it ({exc.strerror or exc})") from None
    if not stat.S_ISREG(st.st_mode):
        raise DataError(str(path), "is not a regular file (a folder, pipe or device), so not a "
                        f"results file; {_RERUN}")
    if st.st_size > MAX_RESULTS_BYTES:
        raise DataError(str(path), f"is {st.st_size} bytes, far more than any results file; "
                        f"{_RERUN}")
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        with os.fdopen(fd, "rb") as handle:
            if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
                raise DataError(str(path), f"is not a regular file; {_RERUN}")
            return handle.read(MAX_RESULTS_BYTES + 1)
    except OSError as exc:
        raise DataError(str(path), f"cannot read it ({exc.strerror or exc})") from None


def _version_note(data: Any) -> str:
    from plateaufit import __version__

    version = data.get("version") if isinstance(data, dict) else None
    if isinstance(version, str) and version != __version__:
        return f" (written by plateaufit {version}; this is {__version__})"
    return ""


def read_results(out_dir: str | os.PathLike[str]) -> tuple[dict[str, Any], Results]:
    """The results dict and typed results of a run's folder; DataError when unusable.

    Parameters
    ----------
    out_dir : path-like
        A run's output folder (holding results.json).

    Returns
    -------
    (dict, Results)
        The dict is tracking (see the module docs): read it inside
        :func:`damaged` so that a bad value is reported at its key.

    Raises
    ------
    DataError
        ``where`` is the results.json path (or the folder); the message names
        the key and says what to do.
    """
    from plateaufit.run_folder import INCOMPLETE

    out = Path(out_dir)
    if not out.is_dir():
        what = "does not exist" if not out.exists() else "is a file, not a folder"
        raise DataError(str(out), f"{what}; give the output folder of a `plateaufit fit` run")
    path = out / "results.json"
    if not path.exists() and (out / INCOMPLETE).exists():
        raise DataError(str(path), "missing: this folder holds a run that was interrupted "
                        f"while its files were moved into place ({INCOMPLETE}); run "
                        "`plateaufit fit SPEC` again")
    raw = _read_bytes(path)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise DataError(str(path), f"is not UTF-8 text, so not a results file; {_RERUN}") from None
    if not text.strip():
        raise DataError(str(path), f"is empty; {_RERUN}")
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise DataError(str(path), f"is not valid JSON ({err.msg} at line {err.lineno}, "
                        f"column {err.colno}); {_RERUN}") from None
    except RecursionError:
        raise DataError(str(path), f"is nested too deeply to be a results file; {_RERUN}") \
            from None
    note = _version_note(data)
    try:
        check_results(data, str(path))
    except DataError as err:
        raise DataError(err.where, err.message.replace("; it is not", f"{note}; it is not", 1)) \
            from None
    trail = Trail()
    tracked = _tracked(data, "", trail, 0, str(path))
    with damaged(path, trail, note):
        typed = Results.from_dict(tracked)
    return tracked, typed


@contextmanager
def damaged(path: Path, trail: Trail | None = None, note: str = "") -> Iterator[Trail]:
    """Turn what converting a damaged value raises into a DataError at its key path."""
    trail = trail if trail is not None else Trail()
    try:
        yield trail
    except CONVERSION_ERRORS as exc:
        at = f"key {trail.last}" if trail.last else "a value"
        detail = str(exc).splitlines()[0][:120] if str(exc) else type(exc).__name__
        raise DataError(str(path), f"{at} cannot be used ({detail}){note}; {_RERUN}") from None


def trail_of(data: Any) -> Trail | None:
    """The Trail of a tracking dict from :func:`read_results`, else None."""
    return getattr(data, "_trail", None)
