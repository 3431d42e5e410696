"""``plateaufit batch``: many specs (ensembles) on one executor, one cache, one summary.

A study is many ensembles (lattice spacings, volumes, quark masses) times a few
channels, each a spec. :func:`run_batch` runs every spec as ``plateaufit fit``
would, each into its own output folder, on one shared executor (the worker
pool is started once, not once per spec) and one fit cache (so a rerun refits
only what changed, and specs reading the same data share their points), then
writes the batch's summary (:mod:`plateaufit.report.batch_summary`):
``summary.csv`` and ``summary.html`` in the batch folder, written all or nothing
like a run's folder (:mod:`plateaufit.run_folder`).

A spec that fails (a bad key, a missing file, unusable data) does not stop the
others: it is listed in the summary with its error. Specs run one after the
other; each spreads its scan points over all the executor's workers, so the
workers stay busy across specs.
"""

from __future__ import annotations

import glob
import os
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from plateaufit.errors import PlateaufitError, SpecError
from plateaufit.parallel import make_executor
from plateaufit.pipeline.cache import CACHE_DIR_NAME, CacheSession
from plateaufit.pipeline.fits import n_scan_points
from plateaufit.pipeline.rules import load_spec
from plateaufit.run_folder import RunFolder

__all__ = ["BatchRun", "find_specs", "run_batch", "BATCH_DIR", "SPEC_SUFFIXES"]

#: the batch folder when ``--out`` is not given
BATCH_DIR = "batch_output"
#: what counts as a spec file (anything else named on the command line is a list file)
SPEC_SUFFIXES = (".yaml", ".yml")
#: the files of a batch folder besides the plots
SUMMARY_FILES = ("summary.csv", "summary.html")


@dataclass
class BatchRun:
    """What :func:`run_batch` did.

    Attributes
    ----------
    folder : Path
        The batch folder holding summary.csv and summary.html.
    items : list of BatchItem
        One per spec, in the order given (:class:`plateaufit.report.batch_summary.BatchItem`).
    seconds : float
        Wall time of the whole batch.
    """

    folder: Path
    items: list[Any] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def failed(self) -> list[Any]:
        """The items whose spec failed."""
        return [item for item in self.items if item.error is not None]


def _list_file(path: Path) -> list[Path]:
    """Spec paths of a list file: one per line, ``#`` comments, relative to the file."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(str(path), f"cannot read this list of specs ({exc}); give spec files "
                                   "(.yaml), a glob such as 'specs/*.yaml', or a text file "
                                   "naming one spec per line") from None
    out = []
    for line in text.splitlines():
        entry = line.split("#", 1)[0].strip()
        if entry:
            p = Path(entry)
            out.append(p if p.is_absolute() else path.parent / p)
    if not out:
        raise SpecError(str(path), "this list of specs names no spec; write one spec path per "
                                   "line")
    return out


def find_specs(arguments: Sequence[str]) -> list[Path]:
    """The spec files a batch's arguments name, in order, each once.

    Each argument is a spec file (``.yaml``/``.yml``), a glob pattern
    (``'specs/*.yaml'``, expanded here when the shell did not), or a list file
    (any other file: one spec path per line, ``#`` comments, paths relative
    to the list file).

    Raises
    ------
    SpecError
        At the argument: a pattern matching nothing, a missing file, an
        unreadable or empty list file, or no argument at all.
    """
    if not arguments:
        raise SpecError("batch", "no spec given; name spec files, a glob or a list file")
    found: list[Path] = []
    for arg in arguments:
        if glob.has_magic(arg):
            matches = sorted(Path(m) for m in glob.glob(arg, recursive=True))
            if not matches:
                raise SpecError(arg, "this pattern matches no file; check the folder and quote "
                                     "the pattern if the shell should not expand it")
            found += matches
            continue
        path = Path(arg)
        if not path.is_file():
            raise SpecError(arg, "no such file; give a spec file, a glob or a list file")
        found += [path] if path.suffix.lower() in SPEC_SUFFIXES else _list_file(path)
    unique: list[Path] = []
    seen: set[Path] = set()
    for path in found:
        key = path.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(path)
    return unique


def _output_dirs(specs: Sequence[Path], loaded: dict[Path, Any], out: Path | None
                 ) -> dict[Path, Path | None]:
    """Each spec's output folder: ``OUT/<spec stem>`` (made unique), else its own output.dir."""
    dirs: dict[Path, Path | None] = {}
    if out is not None:
        used: dict[str, int] = {"plots": 1}   # OUT/plots holds the summary's plots
        for path in specs:
            n = used.get(path.stem, 0)
            used[path.stem] = n + 1
            dirs[path] = out / (path.stem if n == 0 else f"{path.stem}-{n + 1}")
        return dirs
    for path in specs:
        spec = loaded.get(path)
        dirs[path] = None if spec is None else Path(spec.output_dir)
    return dirs


def _clashes(dirs: dict[Path, Path | None]) -> dict[Path, str]:
    """Specs whose output folder an earlier spec of the batch already writes."""
    owners: dict[Path, Path] = {}
    errors = {}
    for path, folder in dirs.items():
        if folder is None:
            continue
        key = folder.resolve()
        if key in owners:
            errors[path] = (f"output.dir: {folder} is also the output folder of "
                            f"{owners[key]}; give the specs different output.dir, or run "
                            "the batch with --out DIR (each spec then writes DIR/<spec name>)")
        else:
            owners[key] = path
    return errors


def _batch_bar(total: int, show: bool) -> Any:
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="batch", unit="point", leave=False, file=sys.stderr,
                disable=not (show and sys.stderr.isatty()))


def run_batch(arguments: Sequence[str], out: str | os.PathLike[str] | None = None, *,
              jobs: int | None = None, scheduler: str | None = None,
              cache: bool | str | os.PathLike[str] = True, plots: bool = True,
              progress: bool = True, echo: bool = False) -> BatchRun:
    """Run many specs on one executor and write the batch summary.

    Parameters
    ----------
    arguments : sequence of str
        Spec files, glob patterns or list files (:func:`find_specs`).
    out : path, optional
        The batch folder (default ``batch_output``): summary.csv and
        summary.html, and, when given, each spec's results in ``OUT/<spec
        stem>``. Without it each spec writes into its own ``output.dir``.
    jobs, scheduler
        The executor shared by every spec, as for ``plateaufit fit``.
    cache : bool or path
        The fit cache shared by every spec: ``True`` (default)
        ``OUT/.plateaufit-cache``, a path, or ``False`` for none.
    plots : bool
        Each spec's plots and page, and the summary's plots.
    progress : bool
        One progress bar for the whole batch (scan points done, on a terminal only).
    echo : bool
        One line per spec on stderr as it finishes.

    Returns
    -------
    BatchRun
        The batch folder and one item per spec (failures carry their error).

    Raises
    ------
    SpecError, DataError
        Only for what stops the whole batch: no spec found, a batch folder
        that cannot be written. A failing spec is recorded instead.
    """
    from plateaufit.pipeline.run import run_spec
    from plateaufit.report.batch_summary import BatchItem, write_batch_summary

    started = time.perf_counter()
    specs = find_specs(arguments)
    folder_path = Path(out) if out is not None else Path(BATCH_DIR)
    folder = RunFolder(folder_path, key="--out", inputs=specs)
    folder.preflight(SUMMARY_FILES, plots=plots)
    loaded: dict[Path, Any] = {}
    errors: dict[Path, str] = {}
    for path in specs:
        try:
            loaded[path] = load_spec(path)
        except PlateaufitError as err:
            errors[path] = str(err)
    dirs = _output_dirs(specs, loaded, Path(out) if out is not None else None)
    errors.update({p: e for p, e in _clashes(dirs).items() if p not in errors})
    if cache is True:
        cache = folder_path / CACHE_DIR_NAME
    total = 0
    for path, spec in loaded.items():
        if path not in errors:
            try:
                total += sum(n_scan_points(spec, fit) for fit in spec.fits)
            except PlateaufitError:
                pass   # the run reports it
    items: list[Any] = []
    finished = 0
    bar = _batch_bar(total, progress)
    try:
        with make_executor(jobs=jobs, scheduler=scheduler) as executor:
            for number, path in enumerate(specs, 1):
                spec = loaded.get(path)
                ensemble = spec.ensemble.name if spec is not None else None
                t0 = time.perf_counter()
                sessions: list[CacheSession] = []
                results, error = None, errors.get(path)
                if error is None:
                    try:
                        results = run_spec(spec, dirs[path], plots=plots, progress=bar,
                                           executor=executor, cache=cache, session=sessions)
                    except PlateaufitError as err:
                        error = str(err)
                tally = sessions[0] if sessions else None
                item = BatchItem(spec=str(path), ensemble=ensemble,
                                 output_dir=None if results is None else results["output"]["dir"],
                                 results=results, error=error,
                                 seconds=time.perf_counter() - t0,
                                 from_cache=tally.hits if tally else 0,
                                 n_points=(tally.hits + tally.misses) if tally else 0)
                items.append(item)
                cached = sum(i.from_cache for i in items)
                finished += item.error is None
                bar.set_postfix_str(f"{cached} from the cache, {number}/{len(specs)} specs")
                if echo:
                    _echo(bar, number, len(specs), item)
    except KeyboardInterrupt as exc:   # Ctrl-C, SIGTERM: say what of the batch is on disk
        exc.plateaufit_batch = (finished, len(specs))  # type: ignore[attr-defined]
        raise
    finally:
        bar.close()
    with folder.writing(completion="summary.html") as staging:
        write_batch_summary(staging, items, plots=plots)
    return BatchRun(folder=folder_path, items=items, seconds=time.perf_counter() - started)


def _echo(bar: Any, number: int, n_specs: int, item: Any) -> None:
    name = item.ensemble or Path(item.spec).stem
    if item.error is None:
        text = f"[{number}/{n_specs}] {name}: done in {item.seconds:.1f} s"
        if item.n_points:    # counted only with a cache
            text += f", {item.from_cache} of {item.n_points} scan point(s) from the cache"
    else:
        text = f"[{number}/{n_specs}] {name}: FAILED: {item.error}"
    bar.write(text, file=sys.stderr)
