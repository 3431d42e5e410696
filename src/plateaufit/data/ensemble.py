"""Align several correlators measured on one ensemble, configuration by configuration.

Rules (what :func:`align_observables` does). None of them depends on the order
in which the observables are given: permuting them permutes nothing but the
keys of the result.

* Every correlator must have ``time_extent`` timeslices per configuration.
* **Alignment.** When every observable knows its configuration ids, they are
  matched by id (by ``(stream, id)`` when every file also knows the streams);
  the sets must be equal -- a configuration measured for one observable and
  not for another is an error naming the missing ids, since silently dropping
  configurations changes the statistics. Ids count Monte Carlo time: the
  configurations come out by stream, then by ascending id. When some
  observable has no ids, the files are taken row by row (each in the order
  its loader returns: text and npy in file order), all must have the same
  number of configurations, and the ids the others know must agree row by row.
* **Streams** (independent Monte Carlo chains) come from the files (a CSV
  ``stream`` column), else from ``stream_sizes`` (numbers of configurations
  per stream, counted in each file's own order of the configurations,
  :attr:`~plateaufit.data.loaders.RawCorrelator.file_rows`), else there is one
  stream. Stream labels are matched by the label as written in the file. The
  order of the streams is their order of first appearance in the files; when
  files list the same streams in different orders, it is the sorted order of
  the labels (integers numerically), unless ``stream_sizes`` are given, which
  is then an error. When both the files and ``stream_sizes`` give streams, the
  counts must equal the files' stream sizes in that order. Streams are
  contiguous blocks of configurations in the result.
* **Folding** is applied per observable after alignment
  (:func:`plateaufit.data.transforms.fold`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

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
    stream_labels : numpy.ndarray
        ``(n_cfg,)`` int stream label of each configuration; each stream is
        one contiguous block, streams in order of first appearance.
    config_ids : numpy.ndarray or None
        ``(n_cfg,)`` configuration ids, when the files know them.
    boundaries : dict[str, str]
        NAME -> periodic | antiperiodic | open.
    folded : dict[str, bool]
        NAME -> whether the correlator was folded.
    stream_names : dict[int, str] or None
        Stream label -> the label as written in the files (a CSV ``stream``
        column), in stream order; None when the streams come from
        ``stream_sizes`` or there is one stream without a label.
    reordered : tuple of str
        The observables whose loader put the file's rows in another order
        (HDF5 rows stored out of id order, CSV configurations out of order);
        a data summary should say so.
    aligned_by : {'ids', 'rows'}
        Whether the observables were matched by configuration id or row by row.
    """

    name: str
    time_extent: int
    correlators: dict[str, np.ndarray]
    stream_labels: np.ndarray
    config_ids: np.ndarray | None
    boundaries: dict[str, str]
    folded: dict[str, bool]
    stream_names: dict[int, str] | None = None
    reordered: tuple[str, ...] = ()
    aligned_by: str = "rows"

    @property
    def n_configs(self) -> int:
        """Number of configurations (rows of every correlator)."""
        return int(self.stream_labels.shape[0])

    @property
    def n_streams(self) -> int:
        """Number of distinct Monte Carlo streams."""
        return int(np.unique(self.stream_labels).size)

    @property
    def stream_order(self) -> np.ndarray:
        """The distinct stream labels, in the order the streams appear."""
        labels, first = np.unique(self.stream_labels, return_index=True)
        return labels[np.argsort(first)]

    def stream_sizes(self) -> dict[int, int]:
        """Stream label -> number of configurations, in order of appearance."""
        return {int(s): int(np.count_nonzero(self.stream_labels == s))
                for s in self.stream_order}


def align_observables(
    raws: Mapping[str, RawCorrelator],
    *,
    name: str,
    time_extent: int,
    stream_sizes: Sequence[int] | None = None,
    boundaries: Mapping[str, str],
    fold: Mapping[str, bool],
) -> Ensemble:
    """Align correlators by configuration, attach streams, and fold.

    Parameters
    ----------
    raws : mapping NAME -> RawCorrelator
        At least one observable. The result does not depend on their order.
    name : str
        Name of the ensemble.
    time_extent : int
        ``T``; every correlator must have this many timeslices.
    stream_sizes : sequence of int, optional
        Configurations per stream, in the order the files store the
        configurations (the spec's ``ensemble.streams``); their sum must equal
        the number of configurations.
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
        (naming each observable's count); streams are inconsistent between
        files, listed in different orders, or disagree with ``stream_sizes``.
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
    raws = dict(raws)
    counts = None if stream_sizes is None else _valid_counts(stream_sizes)
    from_counts = counts is not None and all(raws[n].streams is None for n in names)
    if from_counts and len({raws[n].n_configs for n in names}) > 1:
        # the observables disagree already: the alignment names each one's configurations
        if all(raws[n].config_ids is not None for n in names):
            _align_by_ids(raws, False)
        else:
            _align_by_count(raws, False)
    if from_counts:
        # label every file's configurations by the counts, in that file's own order
        raws = {n: _label_by_counts(n, raws[n], counts) for n in names}
    stream_order = _stream_order(raws, from_counts, counts)

    if all(raws[n].config_ids is not None for n in names):
        order, ids, labels = _align_by_ids(raws, from_counts)
        aligned_by = "ids"
    else:
        order, ids, labels = _align_by_count(raws, from_counts)
        aligned_by = "rows"

    values = {n: raws[n].values[order[n]] for n in names}
    n_cfg = next(iter(values.values())).shape[0]
    if n_cfg < 2:
        raise DataError(
            str(raws[names[0]].source),
            f"only {n_cfg} configuration; statistical errors need at least two",
        )

    codes, ordered, stream_names = _stream_codes(labels, stream_order, raws, from_counts, n_cfg)
    if counts is not None and not from_counts:
        _check_counts(codes, ordered, stream_names, counts)
    perm = _grouping_order(codes, ordered, ids if aligned_by == "ids" else None)
    if perm is not None:
        codes = codes[perm]
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
    return Ensemble(name=name, time_extent=T, correlators=correlators, stream_labels=codes,
                    config_ids=ids, boundaries=bnd, folded=folded,
                    stream_names=None if from_counts else stream_names,
                    reordered=tuple(n for n in names if raws[n].reordered),
                    aligned_by=aligned_by)


# --------------------------------------------------------------------------- streams


def _labels(raw: RawCorrelator) -> np.ndarray | None:
    """Per row, the stream label as written in the file (object array of str), or None."""
    if raw.streams is None:
        return None
    names = raw.stream_names or {}
    return np.asarray([names.get(int(c), str(int(c))) for c in raw.streams.tolist()],
                      dtype=object)


def _appearance(labels: np.ndarray) -> list[str]:
    """The distinct labels in order of first appearance."""
    _, first = np.unique(labels, return_index=True)
    return [str(labels[i]) for i in np.sort(first)]


def _valid_counts(stream_sizes: Sequence[int]) -> list[int]:
    try:
        counts = [int(c) for c in stream_sizes]
    except (TypeError, ValueError):
        raise DataError("stream_sizes", f"stream counts must be whole numbers >= 1, got "
                        f"{list(stream_sizes)!r}") from None
    if not counts or any(c < 1 for c in counts):
        raise DataError("stream_sizes", f"stream counts must be whole numbers >= 1, "
                        f"got {counts}")
    return counts


def _label_by_counts(name: str, raw: RawCorrelator, counts: list[int]) -> RawCorrelator:
    """The raw with streams 0, 1, ... assigned by ``counts`` in the file's order."""
    n = raw.n_configs
    if sum(counts) != n:
        raise DataError(
            "stream_sizes",
            f"the stream counts {counts} add up to {sum(counts)} configurations but the "
            f"data have {n} ({name}: {raw.source}); they must be equal",
        )
    in_file_order = np.repeat(np.arange(len(counts), dtype=np.int64), counts)
    codes = in_file_order if raw.file_rows is None else in_file_order[raw.file_rows]
    return replace(raw, streams=codes, stream_names={i: str(i) for i in range(len(counts))})


def _label_key(label: str):
    """Sort key of stream labels: integers numerically, before text labels."""
    try:
        return (0, int(label), "")
    except ValueError:
        return (1, 0, label)


def _stream_order(raws: dict[str, RawCorrelator], from_counts: bool,
                  counts: list[int] | None) -> list[str] | None:
    """The labels in stream order: of first appearance, which must agree between files
    when ``stream_sizes`` are given; sorted labels when files disagree without counts."""
    if from_counts:
        return [str(i) for i in range(len(counts))]
    orders = {n: _appearance(_labels(r)) for n, r in raws.items() if r.streams is not None}
    if not orders:
        return None
    if len({tuple(o) for o in orders.values()}) == 1:
        return next(iter(orders.values()))
    same_sets = len({frozenset(o) for o in orders.values()}) == 1
    if same_sets and counts is not None:
        listed = "; ".join(f"{n} ({raws[n].source.name}): {', '.join(o)}"
                           for n, o in sorted(orders.items()))
        raise DataError(
            "stream_sizes",
            f"the files list the same streams in different orders ({listed}), so it is not "
            "clear which count belongs to which stream (counts follow the order of first "
            "appearance); list the streams in the same order in every file",
        )
    # Differing label sets are reported by the alignment; without counts the order of the
    # streams changes nothing but their order in the output: take the labels sorted.
    return sorted({label for o in orders.values() for label in o}, key=_label_key)


def _stream_codes(labels: np.ndarray | None, stream_order: list[str] | None,
                  raws: dict[str, RawCorrelator], from_counts: bool, n_cfg: int):
    """Integer stream code per configuration, the codes in stream order, and
    code -> label (None when the labels are not the files')."""
    if labels is None:
        return np.zeros(n_cfg, dtype=np.int64), [0], None
    if from_counts:
        return (np.asarray([int(s) for s in labels], dtype=np.int64),
                list(range(len(stream_order))), None)
    # Every file gives the same label the same code (integer labels are their own codes;
    # text labels are numbered by appearance, which agrees between files). Should two
    # files still disagree, number the labels in stream order instead.
    code_of: dict[str, int] = {}
    consistent = True
    for n in sorted(raws):
        raw = raws[n]
        if raw.streams is None:
            continue
        names = raw.stream_names or {}
        for code in np.unique(raw.streams).tolist():
            label = names.get(int(code), str(int(code)))
            consistent &= code_of.setdefault(label, int(code)) == int(code)
    if not consistent or len(set(code_of.values())) != len(code_of):
        code_of = {label: i for i, label in enumerate(stream_order)}
    codes = np.asarray([code_of[str(s)] for s in labels], dtype=np.int64)
    ordered = [code_of[label] for label in stream_order]
    return codes, ordered, {code_of[label]: label for label in stream_order}


def _check_counts(codes: np.ndarray, ordered: list[int], stream_names: dict[int, str],
                  counts: list[int]) -> None:
    file_counts = [int(np.count_nonzero(codes == c)) for c in ordered]
    if file_counts != counts:
        shown = ", ".join(f"{stream_names[c]}: {k}" for c, k in zip(ordered, file_counts))
        raise DataError(
            "stream_sizes",
            f"the counts {counts} disagree with the files' stream column (counts "
            f"{file_counts}: {shown}, streams in order of first appearance); remove "
            "ensemble.streams or make them agree",
        )


def _grouping_order(codes: np.ndarray, ordered: list[int],
                    ids: np.ndarray | None) -> np.ndarray | None:
    """Permutation making each stream one block, streams in the order ``ordered``, by
    ascending id within a stream when ids are given (else keeping the row order);
    None when nothing moves."""
    rank_of = {c: r for r, c in enumerate(ordered)}
    rank = np.asarray([rank_of[c] for c in codes.tolist()], dtype=np.int64)
    if ids is None:
        perm = np.argsort(rank, kind="stable")
    else:
        perm = np.lexsort((ids, rank))
    return None if np.array_equal(perm, np.arange(perm.size)) else perm


# --------------------------------------------------------------------------- alignment


def _keys(raw: RawCorrelator, with_streams: bool) -> list:
    ids = raw.config_ids.tolist()
    if with_streams:
        return list(zip(_labels(raw).tolist(), ids))
    return ids


def _show(keys: list, with_streams: bool) -> str:
    shown = sorted(keys)[:_SHOW_IDS]
    text = ", ".join(f"{k[1]} (stream {k[0]})" if with_streams else str(k) for k in shown)
    return text + (f", ... ({len(keys)} in all)" if len(keys) > _SHOW_IDS else "")


def _split_differently(raws: dict[str, RawCorrelator], names: list[str]) -> DataError:
    moved = [n for n in names if raws[n].reordered]
    why = (f" ({', '.join(f'{n} ({raws[n].source.name})' for n in moved)} stored its "
           "configurations out of id order)") if moved else ""
    return DataError(
        "stream_sizes",
        "the stream counts split the observables' configurations differently, because the "
        f"files store them in different orders{why}; give the files stream labels (a CSV "
        "stream column) or store every file's configurations in Monte Carlo order",
    )


def _align_by_ids(raws: dict[str, RawCorrelator], from_counts: bool):
    names = list(raws)
    with_streams = all(raws[n].streams is not None for n in names)
    keys = {n: _keys(raws[n], with_streams) for n in names}
    if not with_streams:
        for n in sorted(names):
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
        if from_counts and len({frozenset(raws[n].config_ids.tolist()) for n in names}) == 1:
            raise _split_differently(raws, names)
        first = sorted(n for n in names if union.difference(keys[n]))[0]
        raise DataError(
            str(raws[first].source),
            "configurations differ between observables: " + "; ".join(problems)
            + ". Measure every observable on the same configurations, or remove the extra ones",
        )
    # a canonical order, the same whichever observable comes first: by id (streams are
    # grouped afterwards, keeping the id order within each)
    reference = sorted(union, key=lambda k: (k[1], str(k[0]))) if with_streams else sorted(union)
    order = {}
    for n in names:
        position = {k: i for i, k in enumerate(keys[n])}
        order[n] = np.fromiter((position[k] for k in reference), dtype=np.int64,
                               count=len(reference))
    ids = np.asarray([k[1] for k in reference] if with_streams else reference, dtype=np.int64)
    labels = _common_labels(raws, order, from_counts)
    return order, ids, labels


def _align_by_count(raws: dict[str, RawCorrelator], from_counts: bool):
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
    with_ids = sorted(n for n in names if raws[n].config_ids is not None)
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
    return order, ids, _common_labels(raws, order, from_counts)


def _common_labels(raws: dict[str, RawCorrelator], order, from_counts: bool):
    """Per aligned configuration, its stream label; DataError when files disagree."""
    labels = None
    source = ""
    for n in sorted(raws):
        raw = raws[n]
        if raw.streams is None:
            continue
        s = _labels(raw)[order[n]]
        if labels is None:
            labels, source = s, n
        elif not np.array_equal(s, labels):
            if from_counts:
                raise _split_differently(raws, sorted(raws))
            raise DataError(
                str(raw.source),
                f"observables {source!r} and {n!r} give different stream labels for the same "
                "configurations; fix the stream column",
            )
    return labels
