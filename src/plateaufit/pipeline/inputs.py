"""From a validated spec to data: load every observable's file, fold, align.

The only place where spec keys meet data files: every
:class:`~plateaufit.errors.DataError` raised here has ``where`` set to the spec
key the file came from (``observables.pion.file``) or to ``ensemble.streams``.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from plateaufit.data.ensemble import Ensemble, align_observables
from plateaufit.data.files import FileContext, open_regular
from plateaufit.data.loaders import RawCorrelator, load_correlator
from plateaufit.errors import DataError
from plateaufit.pipeline.keys import located
from plateaufit.specfile import Spec

__all__ = ["load_ensemble", "load_inputs", "data_checksums", "observable_file", "file_sha256"]


def observable_file(spec: Spec, name: str) -> Path:
    """The resolved file of observable ``name``; DataError when it does not exist.

    Raises
    ------
    DataError
        ``where`` is ``observables.NAME.file``; the message gives the resolved
        path and says it was resolved relative to the spec file.
    """
    obs = spec.observables[name]
    path = spec.observable_path(name)
    key = f"observables.{name}.file"
    if not path.exists():
        relative = "" if Path(obs.file).expanduser().is_absolute() else (
            f" ({obs.file!r} is resolved relative to the spec file's directory "
            f"{spec.base_dir})")
        raise DataError(key, f"data file {path} not found{relative}; check the path")
    if path.is_dir():
        raise DataError(key, f"{path} is a directory; give the data file itself")
    return path


def load_ensemble(spec: Spec) -> Ensemble:
    """Load, fold and align every observable of ``spec``.

    Returns
    -------
    Ensemble
        Correlators aligned by configuration, folded per observable
        (``boundary``, ``fold``), with the streams of the files or of
        ``ensemble.streams`` (the stream sizes).

    Raises
    ------
    DataError
        ``where`` is ``observables.NAME.file`` (or ``ensemble.streams``) and the
        message names the file.
    """
    return load_inputs(spec)[0]


def load_inputs(spec: Spec) -> tuple[Ensemble, dict[str, RawCorrelator]]:
    """:func:`load_ensemble`, and every observable's file as read (``RawCorrelator``:
    what a data summary reports of the files, e.g. rows the loader reordered)."""
    T = spec.ensemble.time_extent
    raws: dict[str, RawCorrelator] = {}
    key_of_source: dict[str, str] = {}
    for name, obs in spec.observables.items():
        key = f"observables.{name}.file"
        path = observable_file(spec, name)
        raw = load_correlator(path, format=obs.format, dataset=obs.dataset,
                              ids_dataset=obs.ids_dataset, array=obs.array, part=obs.part,
                              where=key)
        if raw.n_timeslices != T:
            raise DataError(
                key,
                f"{path}: {raw.n_timeslices} timeslices per configuration, but "
                f"ensemble.time_extent is {T}; fix time_extent or the file (one column per "
                "timeslice, t = 0..T-1)",
            )
        raws[name] = raw
        key_of_source.setdefault(str(raw.source), key)
    try:
        with located():
            ensemble = align_observables(
                raws,
                name=spec.ensemble.name,
                time_extent=T,
                stream_sizes=spec.ensemble.stream_sizes,
                boundaries={n: o.boundary for n, o in spec.observables.items()},
                fold={n: o.folds for n, o in spec.observables.items()},
            )
    except DataError as err:
        where = key_of_source.get(err.where, err.where)
        if where == err.where:
            raise
        raise DataError(where, err.message) from None
    return ensemble, raws


def data_checksums(spec: Spec) -> dict[str, str]:
    """SHA-256 (hex) of every observable's data file, for provenance (NAME -> digest)."""
    return {name: file_sha256(observable_file(spec, name), f"observables.{name}.file")
            for name in spec.observables}


def file_sha256(path: Path, where: str = "") -> str:
    """SHA-256 (hex) of a file's bytes, read in blocks; DataError at ``where`` if unreadable.

    Opened through :func:`plateaufit.data.files.open_regular`: a path swapped for a pipe
    or device since it was loaded is refused, never read forever.
    """
    digest = hashlib.sha256()
    with open_regular(Path(path), FileContext(Path(path), where)) as handle:
        try:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
        except OSError as exc:
            raise DataError(where or str(path), f"cannot read {path} "
                            f"({exc.strerror or exc})") from None
    return digest.hexdigest()
