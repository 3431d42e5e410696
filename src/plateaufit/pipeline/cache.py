"""The fit cache: each scan point's result stored under a key of everything that decides it.

A scan point's result (central fit, jackknife refits, flags, caught warnings: a
:class:`~plateaufit.fit.correlator_fit.CorrelatorFit`) depends on the binned
data of its observables, the keyword arguments of the fit core at that point
(model, range, states, priors, bounds, covariance settings, starting values,
...), the code that computes it and the numerical libraries under it. The key
of an entry is a SHA-256 over exactly these:

* the binned data (names, dtypes, shapes and bytes of the arrays the scan
  receives; everything upstream, the data files, the bin size, the binning
  correction, the GEVP, reaches the fit only through them);
* the point's keyword arguments, in a canonical form (sorted mappings, floats by
  their exact bits; a value of a type with no canonical form is refused, never
  hashed by identity);
* ``(tmin, tmax, states)``;
* the engine: the package version, the versions of numpy, scipy and lmfit,
  and a hash of the source of the numerical core (``plateaufit.fit``,
  ``plateaufit.stats``), so an edited tolerance or a changed minimiser never
  reads an old entry.

Nothing else enters the key: the fit's name, the other points of the scan, the
executor and the output folder do not change a point's numbers.

Entries are files ``ROOT/ab/abcdef....fit`` (content addressed, so specs may
share a cache): a header line with a checksum of the payload, then the pickled
fit. They are written atomically (a temporary file, then a rename), so an
interrupted run leaves whole entries or none; an entry that fails its checksum
or does not unpickle is recomputed and noted. Pickles execute code when read:
keep a cache where only you can write, as you would your code.
"""

from __future__ import annotations

import dataclasses
import enum
import hashlib
import os
import pickle
import tempfile
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit import __version__
from plateaufit.errors import DataError

__all__ = ["CACHE_DIR_NAME", "FitCache", "CacheSession", "cache_size", "clear_cache",
           "default_cache_root", "engine_fingerprint"]

#: Folder of the cache inside an output directory (never an output of a run).
CACHE_DIR_NAME = ".plateaufit-cache"
#: First bytes of every entry; a new layout gets a new tag.
_MAGIC = b"plateaufit-fit-cache 1 "
_SUFFIX = ".fit"


def default_cache_root(out_dir: str | os.PathLike[str]) -> Path:
    """The cache of a run writing into ``out_dir``: ``out_dir/.plateaufit-cache``."""
    return Path(out_dir) / CACHE_DIR_NAME


# --------------------------------------------------------------------------- keys


def _feed(h: Any, obj: Any) -> None:
    """Feed ``obj`` into the hash ``h`` in a canonical, type-tagged form."""
    if obj is None or isinstance(obj, bool):
        h.update(b"N" if obj is None else (b"T" if obj else b"F"))
    elif isinstance(obj, enum.Enum):
        h.update(b"e" + type(obj).__name__.encode() + b":")
        _feed(h, obj.value)
    elif isinstance(obj, (int, np.integer)):
        h.update(b"i" + str(int(obj)).encode() + b";")
    elif isinstance(obj, (float, np.floating)):
        h.update(b"f" + float(obj).hex().encode() + b";")
    elif isinstance(obj, str):
        data = obj.encode()
        h.update(b"s" + str(len(data)).encode() + b":" + data)
    elif isinstance(obj, np.ndarray):
        array = np.ascontiguousarray(obj)
        if array.dtype == object:
            h.update(b"O" + str(array.shape).encode())
            for item in array.ravel():
                _feed(h, item)
        else:
            h.update(b"a" + array.dtype.str.encode() + str(array.shape).encode())
            h.update(array.tobytes())
    elif isinstance(obj, Mapping):
        h.update(b"m" + str(len(obj)).encode() + b"{")
        for key in sorted(obj, key=repr):
            _feed(h, key)
            _feed(h, obj[key])
        h.update(b"}")
    elif isinstance(obj, (list, tuple)):
        h.update((b"l" if isinstance(obj, list) else b"t") + str(len(obj)).encode() + b"[")
        for item in obj:
            _feed(h, item)
        h.update(b"]")
    elif isinstance(obj, (set, frozenset)):
        _feed(h, sorted(obj, key=repr))
    elif dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        h.update(b"d" + type(obj).__qualname__.encode())
        _feed(h, {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)})
    else:
        raise TypeError(f"the fit cache has no canonical form for {type(obj).__name__} "
                        f"({obj!r}); give the fit core plain numbers, strings, arrays and "
                        "mappings, or run without the cache")


def _source_digest(packages: Sequence[str]) -> str:
    h = hashlib.sha256()
    root = Path(__file__).resolve().parent.parent
    for package in packages:
        for path in sorted((root / package).rglob("*.py")):
            h.update(str(path.relative_to(root)).encode() + b"\0")
            h.update(path.read_bytes())
    return h.hexdigest()


def engine_fingerprint() -> dict[str, str]:
    """What besides the inputs decides a fit: versions and the numerical core's source."""
    from importlib.metadata import PackageNotFoundError, version

    def installed(name: str) -> str:
        try:                       # the installed version, without importing the package
            return version(name)
        except PackageNotFoundError:
            return "absent"

    return {"plateaufit": __version__, "numpy": np.__version__, "scipy": installed("scipy"),
            "lmfit": installed("lmfit"), "core": _source_digest(("fit", "stats"))}


# --------------------------------------------------------------------------- the store


@dataclass
class CacheSession:
    """One run's use of a :class:`FitCache`: what it found, computed and noted.

    This is what :func:`plateaufit.fit.scan.scan` receives as ``cache``; its
    counters are the run's own, so runs sharing a store (a batch) each report
    their own numbers.
    """

    store: FitCache
    hits: int = 0
    misses: int = 0
    notes: list[str] = field(default_factory=list)

    def keys(self, data: Any, kwargs_by_states: Mapping[int, Mapping[str, Any]],
             points: Iterable[tuple[int, int, int]]) -> list[str]:
        """The key of each ``(tmin, tmax, states)`` of a scan of ``data``."""
        base = hashlib.sha256()
        _feed(base, self.store.fingerprint)
        _feed(base, data)
        by_states: dict[int, Any] = {}
        out = []
        for point in points:
            states = point[2]
            if states not in by_states:
                h = base.copy()
                _feed(h, kwargs_by_states[states])
                by_states[states] = h
            h = by_states[states].copy()
            _feed(h, tuple(int(v) for v in point))
            out.append(h.hexdigest())
        return out

    def get(self, key: str, point: tuple[int, int, int]) -> Any | None:
        """The stored fit of ``key`` (None when absent or damaged; damage is noted)."""
        fit, problem = self.store.read(key)
        if fit is not None and (fit.tmin, fit.tmax, fit.states) != tuple(point):
            fit, problem = None, "it holds another fit range"
        if problem is not None:
            self.notes.append(f"fit cache: entry {key[:12]} for tmin={point[0]}, "
                              f"tmax={point[1]}, states={point[2]} was unusable ({problem}); "
                              "recomputed")
        if fit is None:
            self.misses += 1
        else:
            self.hits += 1
        return fit

    def put(self, key: str, fit: Any) -> None:
        """Store ``fit`` under ``key``; a failed write is noted, never fatal."""
        problem = self.store.write(key, fit)
        if problem is not None and not any(n.startswith("fit cache: not written") for n in
                                           self.notes):
            self.notes.append(f"fit cache: not written ({problem}); results are unaffected")


class FitCache:
    """A content-addressed store of scan-point fits under ``root``.

    Parameters
    ----------
    root : path
        The cache folder (created on the first write).

    Examples
    --------
    >>> cache = FitCache(out / ".plateaufit-cache")          # doctest: +SKIP
    >>> fits = scan(binned, ..., cache=cache.session())      # doctest: +SKIP
    """

    def __init__(self, root: str | os.PathLike[str]) -> None:
        self.root = Path(root)
        self._fingerprint: dict[str, str] | None = None

    @property
    def fingerprint(self) -> dict[str, str]:
        if self._fingerprint is None:
            self._fingerprint = engine_fingerprint()
        return self._fingerprint

    def session(self) -> CacheSession:
        """A fresh :class:`CacheSession` (counters at zero) on this store."""
        return CacheSession(self)

    def path(self, key: str) -> Path:
        return self.root / key[:2] / f"{key}{_SUFFIX}"

    def read(self, key: str) -> tuple[Any | None, str | None]:
        """``(fit, None)``, ``(None, None)`` when absent, ``(None, why)`` when damaged."""
        path = self.path(key)
        try:
            blob = path.read_bytes()
        except FileNotFoundError:
            return None, None
        except OSError as exc:
            return None, f"unreadable: {exc.strerror or exc}"
        header, sep, payload = blob.partition(b"\n")
        if not sep or not header.startswith(_MAGIC):
            return None, "not a cache entry of this version"
        if hashlib.sha256(payload).hexdigest().encode() != header[len(_MAGIC):]:
            return None, "checksum mismatch: truncated or altered"
        try:
            return pickle.loads(payload), None
        except Exception as exc:   # an unpicklable entry of an older layout
            return None, f"does not load ({type(exc).__name__})"

    def write(self, key: str, fit: Any) -> str | None:
        """Write one entry atomically; the reason it failed, or None."""
        try:
            payload = pickle.dumps(fit, protocol=pickle.HIGHEST_PROTOCOL)
        except Exception as exc:   # an object of the fit that does not pickle
            return f"the fit cannot be stored ({type(exc).__name__}: {exc})"
        blob = _MAGIC + hashlib.sha256(payload).hexdigest().encode() + b"\n" + payload
        target = self.path(key)
        tmp = None
        try:
            target.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{key[:12]}.", suffix=".tmp", dir=target.parent)
            with os.fdopen(fd, "wb") as handle:
                handle.write(blob)
            os.replace(tmp, target)
        except OSError as exc:
            if tmp is not None and os.path.exists(tmp):
                os.unlink(tmp)
            return f"{target.parent}: {exc.strerror or exc}"
        return None


# --------------------------------------------------------------------------- management


def _cache_folder(path: str | os.PathLike[str]) -> Path:
    """The cache of ``path``: an output folder (its ``.plateaufit-cache``) or a cache itself."""
    folder = Path(path)
    if not folder.is_dir():
        raise DataError(str(folder), "no such folder; give an output directory or a cache "
                                     "folder (--cache DIR)")
    inner = folder / CACHE_DIR_NAME
    return inner if inner.is_dir() else folder


def _entries(folder: Path) -> list[Path]:
    return [p for p in folder.glob(f"??/*{_SUFFIX}") if p.is_file()]


def cache_size(path: str | os.PathLike[str]) -> tuple[Path, int, int]:
    """``(folder, entries, bytes)`` of the cache at ``path`` (see :func:`_cache_folder`)."""
    folder = _cache_folder(path)
    entries = _entries(folder)
    return folder, len(entries), sum(p.stat().st_size for p in entries)


def clear_cache(path: str | os.PathLike[str]) -> tuple[Path, int, int]:
    """Remove every entry of the cache at ``path``; ``(folder, entries, bytes)`` removed.

    Only cache entries (``ab/<key>.fit`` and leftover temporary files) and the
    emptied two-letter folders are removed: a folder that is not a cache keeps
    everything else.
    """
    folder, n, size = cache_size(path)
    for sub in folder.glob("??"):
        if not sub.is_dir():
            continue
        for p in list(sub.iterdir()):
            if p.is_file() and (p.suffix == _SUFFIX or p.name.endswith(".tmp")):
                p.unlink()
        try:
            sub.rmdir()
        except OSError:
            pass   # something that is not ours is in it
    if folder.name == CACHE_DIR_NAME:
        try:
            folder.rmdir()
        except OSError:
            pass
    return folder, n, size
