"""Align several correlators measured on one ensemble, configuration by configuration.

Rules (what :func:`align_observables` does):

* Every correlator must have ``time_extent`` timeslices per configuration.
* **Alignment.** When every observable knows its configuration ids, they are
  matched by id (by ``(stream, id)`` when every file also knows the streams);
  the sets must be equal -- a configuration measured for one observable and
  not for another is an error naming the missing ids, since silently dropping
  configurations changes the statistics. The order is that of the first
  observable. When some observable has no ids, the files are taken row by row
  in file order, and all must have the same number of configurations.
* **Streams** (independent Monte Carlo chains) come from the files (a CSV
  ``stream`` column), else from ``stream_counts`` (numbers of configurations
  per stream, in file order), else there is one stream. When both the files
  and ``stream_counts`` give streams, they must agree. Streams are contiguous
  blocks of configurations: when the aligned order interleaves them, the
  configurations are grouped by stream, streams in order of first appearance,
  keeping the Monte Carlo order within each stream.
* **Folding** is applied per observable after alignment
  (:func:`plateaufit.data.transforms.fold`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from plateaufit.data.loaders import RawCorrelator
from plateaufit.data.transforms import BOUNDARIES, fold as fold_correlator
from plateaufit.errors import DataError

__all__ = ["Ensemble", "align_observables"]

_SHOW_IDS = 5  # how many missing ids an error lists per observable


@dataclass(frozen=True)
class Ensemble:
    """Correlators of one ensemble, aligned by configuration and folded.

    Attributes
    ----------
    name : str
    time_extent : int
        ``T``, the number of timeslices before folding.
    correlators : dict[str, numpy.ndarray]
        NAME -> ``(n_cfg, n_t)`` after folding; the rows of all observables
        are the same configurations in the same (Monte Carlo) order.
    streams : numpy.ndarray
        ``(n_cfg,)`` int stream label of each configuration; each stream is
        one contiguous block.
    config_ids : numpy.ndarray or None
        ``(n_cfg,)`` configuration ids, when the files know them.
    boundaries : dict[str, str]
        NAME -> periodic | antiperiodic | open.
    folded : dict[str, bool]
        NAME -> whether the correlator was folded.
    """

    name: str
    time_extent: int
    correlators: dict[str, np.ndarray]
    streams: np.ndarray
    config_ids: np.ndarray | None
    boundaries: dict[str, str]
    folded: dict[str, bool]

    @property
    def n_configs(self) -> int:
        """Number of configurations (rows of every correlator)."""
        return int(self.streams.shape[0])

    @property
    def n_streams(self) -> int:
        """Number of distinct Monte Carlo streams."""
        return int(np.unique(self.streams).size)

    @property
    def stream_labels(self) -> np.ndarray:
        """The stream labels, in the order the streams appear."""
        labels, first = np.unique(self.streams, return_index=True)
        return labels[np.argsort(first)]

    def stream_counts(self) -> dict[int, int]:
        """Stream label -> number of configurations, in order of appearance."""
        return {int(s): int(np.count_nonzero(self.streams == s)) for s in self.stream_labels}


def align_observables(
    raws: Mapping[str, RawCorrelator],
    *,
    name: str,
    time_extent: int,
    stream_counts: Sequence[int] | None = None,
    boundaries: Mapping[str, str],
    fold: Mapping[str, bool],
) -> Ensemble:
    """Align correlators by configuration, attach streams, and fold.

    Parameters
    ----------
    raws : mapping NAME -> RawCorrelator
        At least one observable.
    name : str
        Name of the ensemble.
    time_extent : int
        ``T``; every correlator must have this many timeslices.
    stream_counts : sequence of int, optional
        Configurations per stream in file order (the spec's
        ``ensemble.streams``); their sum must equal the number of
        configurations.
    boundaries : mapping NAME -> {'periodic', 'antiperiodic', 'open'}
        Missing names default to periodic.
    fold : mapping NAME -> bool
        Whether to fold; missing names default to True unless the boundary is
        open.

    Returns
    -------
    Ensemble

    Raises
    ------
    DataError
        A correlator has the wrong number of timeslices (naming the file and
        both numbers); configuration ids differ between observables (listing
        missing ids per observable); counts differ where ids are unknown
        (naming each observable's count); streams are inconsistent.
    """
    if not raws:
        raise DataError("observables", "no observables to align; define at least one")
    T = int(time_extent)
    for obs, raw in raws.items():
        if raw.values.ndim != 2:
            raise DataError(str(raw.source), f"observable {obs!r}: expected a 2-D array, "
                            f"got shape {raw.values.shape}")
        if raw.values.shape[1] != T:
            raise DataError(
                str(raw.source),
                f"{raw.source}: observable {obs!r} has {raw.values.shape[1]} timeslices per "
                f"configuration but ensemble.time_extent is {T}; fix time_extent or the file",
            )

    names = list(raws)
    if all(raws[n].config_ids is not None for n in names):
        order, ids, streams = _align_by_ids(raws)
    else:
        order, ids, streams = _align_by_count(raws)

    values = {n: raws[n].values[order[n]] for n in names}
    n_cfg = next(iter(values.values())).shape[0]
    if n_cfg < 2:
        raise DataError(
            str(raws[names[0]].source),
            f"only {n_cfg} configuration; statistical errors need at least two",
        )

    streams = _resolve_streams(streams, stream_counts, n_cfg)
    perm = _contiguous_order(streams)
    if perm is not None:
        streams = streams[perm]
        values = {n: v[perm] for n, v in values.items()}
        ids = None if ids is None else ids[perm]

    bnd: dict[str, str] = {}
    folded: dict[str, bool] = {}
    correlators: dict[str, np.ndarray] = {}
    for n in names:
        b = boundaries.get(n, "periodic")
        if b not in BOUNDARIES:
            raise DataError("", f"observable {n!r}: unknown boundary {b!r}; use one of "
                            f"{', '.join(BOUNDARIES)}")
        f = bool(fold.get(n, b != "open")) and b != "open"
        bnd[n] = b
        folded[n] = f
        correlators[n] = fold_correlator(values[n], b) if f else np.ascontiguousarray(values[n])
    return Ensemble(name=name, time_extent=T, correlators=correlators, streams=streams,
                    config_ids=ids, boundaries=bnd, folded=folded)


# --------------------------------------------------------------------------- alignment


def _keys(raw: RawCorrelator, with_streams: bool) -> list:
    ids = raw.config_ids.tolist()
    if with_streams:
        return list(zip(raw.streams.tolist(), ids))
    return ids


def _show(keys: list, with_streams: bool) -> str:
    shown = sorted(keys)[:_SHOW_IDS]
    text = ", ".join(f"{k[1]} (stream {k[0]})" if with_streams else str(k) for k in shown)
    return text + (f", ... ({len(keys)} in all)" if len(keys) > _SHOW_IDS else "")


def _align_by_ids(raws: Mapping[str, RawCorrelator]):
    names = list(raws)
    with_streams = all(raws[n].streams is not None for n in names)
    keys = {n: _keys(raws[n], with_streams) for n in names}
    if not with_streams:
        for n in names:
            if len(set(keys[n])) != len(keys[n]):
                raise DataError(
                    str(raws[n].source),
                    f"{raws[n].source}: observable {n!r} repeats configuration ids (in different "
                    "streams); give the other observables' files stream labels too, or make the "
                    "ids unique",
                )
    union: set = set().union(*(set(k) for k in keys.values()))
    problems = []
    for n in names:
        missing = union.difference(keys[n])
        if missing:
            problems.append(f"{n} ({raws[n].source.name}) lacks {_show(list(missing), with_streams)}")
    if problems:
        first = next(n for n in names if union.difference(keys[n]))
        raise DataError(
            str(raws[first].source),
            "configurations differ between observables: " + "; ".join(problems)
            + ". Measure every observable on the same configurations, or remove the extra ones",
        )
    reference = keys[names[0]]
    order = {}
    for n in names:
        position = {k: i for i, k in enumerate(keys[n])}
        order[n] = np.fromiter((position[k] for k in reference), dtype=np.int64,
                               count=len(reference))
    first = raws[names[0]]
    ids = first.config_ids.copy()
    streams = _common_streams(raws, order)
    return order, ids, streams


def _align_by_count(raws: Mapping[str, RawCorrelator]):
    names = list(raws)
    counts = {n: raws[n].values.shape[0] for n in names}
    if len(set(counts.values())) > 1:
        listed = ", ".join(f"{n} ({raws[n].source.name}): {c}" for n, c in counts.items())
        raise DataError(
            str(raws[names[0]].source),
            f"observables have different numbers of configurations ({listed}); without "
            "configuration ids in every file they are matched row by row, so the counts "
            "must be equal",
        )
    n_cfg = counts[names[0]]
    order = {n: np.arange(n_cfg) for n in names}
    ids = None
    with_ids = [n for n in names if raws[n].config_ids is not None]
    if with_ids:
        ref = raws[with_ids[0]].config_ids
        for n in with_ids[1:]:
            if not np.array_equal(raws[n].config_ids, ref):
                raise DataError(
                    str(raws[n].source),
                    f"observables {with_ids[0]!r} and {n!r} list different configuration ids "
                    "row by row, and some other file has no ids to match on; give every file "
                    "its ids or bring them into the same order",
                )
        ids = ref.copy()
    return order, ids, _common_streams(raws, order)


def _common_streams(raws: Mapping[str, RawCorrelator], order) -> np.ndarray | None:
    streams = None
    source = ""
    for n, raw in raws.items():
        if raw.streams is None:
            continue
        s = raw.streams[order[n]]
        if streams is None:
            streams, source = s, n
        elif not np.array_equal(s, streams):
            raise DataError(
                str(raw.source),
                f"observables {source!r} and {n!r} give different stream labels for the same "
                "configurations; fix the stream column",
            )
    return None if streams is None else streams.astype(np.int64)


# --------------------------------------------------------------------------- streams


def _resolve_streams(
    from_files: np.ndarray | None, stream_counts: Sequence[int] | None, n_cfg: int
) -> np.ndarray:
    from_counts = None
    if stream_counts is not None:
        counts = [int(c) for c in stream_counts]
        if not counts or any(c < 1 for c in counts):
            raise DataError("stream_counts", f"stream counts must be whole numbers >= 1, "
                            f"got {counts}")
        if sum(counts) != n_cfg:
            raise DataError(
                "stream_counts",
                f"the stream counts {counts} add up to {sum(counts)} configurations but the "
                f"data have {n_cfg}; they must be equal",
            )
        from_counts = np.repeat(np.arange(len(counts), dtype=np.int64), counts)
    if from_files is not None and from_counts is not None:
        labels, first = np.unique(from_files, return_index=True)
        in_order = labels[np.argsort(first)]
        file_counts = [int(np.count_nonzero(from_files == s)) for s in in_order]
        if file_counts != [int(c) for c in stream_counts] or not _is_contiguous(from_files):
            raise DataError(
                "stream_counts",
                f"the counts {list(stream_counts)} disagree with the files' stream column "
                f"(counts {file_counts}); remove the counts or make them agree",
            )
        return from_files
    if from_files is not None:
        return from_files
    if from_counts is not None:
        return from_counts
    return np.zeros(n_cfg, dtype=np.int64)


def _is_contiguous(streams: np.ndarray) -> bool:
    changes = int(np.count_nonzero(streams[1:] != streams[:-1]))
    return changes == np.unique(streams).size - 1


def _contiguous_order(streams: np.ndarray) -> np.ndarray | None:
    """A stable permutation making each stream one block, or None when already so."""
    if _is_contiguous(streams):
        return None
    labels, first = np.unique(streams, return_index=True)
    rank = np.empty(labels.size, dtype=np.int64)
    rank[np.argsort(first)] = np.arange(labels.size)
    code = rank[np.searchsorted(labels, streams)]
    return np.argsort(code, kind="stable")
