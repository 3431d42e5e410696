"""Readers of the binary formats: .npy, .npz (numpy) and HDF5 (h5py).

Each reader gets a path that :func:`plateaufit.data.files.regular_file_size`
has already accepted (a regular, non-empty file) and returns the raw array (and
for HDF5 the configuration ids); shape, part and value checks are the caller's
(:mod:`plateaufit.data.loaders`). Every exception the libraries raise on a
truncated or corrupt file is caught at the read and turned into one
:class:`~plateaufit.errors.DataError` naming the file and what to do.

Data files are never unpickled: the .npy header is read and checked first, so an
object array is refused before any of its data is touched, and a header that
promises more data than the file holds (a truncated file, or a corrupt header
claiming a huge shape) is reported without allocating anything.
"""

from __future__ import annotations

import math
import os
import zipfile
import zlib
from pathlib import Path
from typing import BinaryIO

import numpy as np

from plateaufit.data.files import FileContext, describe_size, open_regular, regular_file_size
from plateaufit.data.long_csv import LARGEST_ID
from plateaufit.errors import DataError

__all__ = ["read_npy", "read_npz", "read_hdf5", "integer_ids", "LIBRARY_ERRORS"]

#: What numpy, zipfile, zlib and h5py raise on a truncated or corrupt file.
LIBRARY_ERRORS = (ValueError, TypeError, OSError, EOFError, SyntaxError, KeyError,
                 OverflowError, zipfile.BadZipFile, zlib.error, NotImplementedError,
                 RuntimeError, MemoryError)


def _the_only_one(requested: str | None, candidates: list[str], listed: list[str],
                  container: str, noun: str, key: str, ctx: FileContext) -> str:
    """``requested``, or the only candidate when it is None; DataError asking for ``key``."""
    if requested is not None:
        return requested
    if len(candidates) != 1:
        shown = ", ".join(listed) or "(none)"
        raise ctx.error(f"{container} holds {len(candidates)} {noun} ({shown}); name the one "
                        f"to use with '{key}'")
    return candidates[0]


# --------------------------------------------------------------------------- npy / npz


def read_npy(p: Path, ctx: FileContext) -> np.ndarray:
    """The array of a .npy file (any shape and numeric dtype); DataError when it is not one."""
    with open_regular(p, ctx) as handle:
        return _read_npy_stream(handle, os.fstat(handle.fileno()).st_size, ctx, "the file",
                                "copy the file again, or write it with numpy.save (or set the "
                                "right format)")


def _read_npy_stream(fp: BinaryIO, available: int, ctx: FileContext, what: str,
                     remedy: str) -> np.ndarray:
    """One .npy array from a stream of ``available`` bytes; never unpickles.

    The header is read and checked first: object dtypes are refused, and the
    data size the header promises is compared with what the stream holds, so a
    truncated file (or a header claiming a huge shape) is reported without
    allocating anything.
    """
    fmt = np.lib.format
    try:
        version = fmt.read_magic(fp)
    except LIBRARY_ERRORS:
        raise ctx.error(f"{what} is not a .npy array (it does not start with the .npy "
                        f"signature); {remedy}") from None
    try:
        if version == (1, 0):
            shape, fortran, dtype = fmt.read_array_header_1_0(fp)
        elif version == (2, 0):
            shape, fortran, dtype = fmt.read_array_header_2_0(fp)
        else:
            read_header = getattr(fmt, "_read_array_header", None)
            if read_header is None:
                raise ctx.error(f"{what} has .npy format version {version}, which this numpy "
                                f"cannot read; {remedy}")
            shape, fortran, dtype = read_header(fp, version)
    except LIBRARY_ERRORS as exc:
        raise ctx.error(f"the .npy header of {what} is damaged or truncated ({exc}); "
                        f"{remedy}") from None
    if dtype.hasobject:
        raise ctx.error(
            f"{what} holds Python objects (data type {dtype}), which plateaufit never "
            "unpickles (unpickling can run arbitrary code); save the correlator as a numeric "
            "array, e.g. numpy.save(path, np.asarray(data, dtype=float))")
    expected = math.prod(int(n) for n in shape) * dtype.itemsize
    header_end = fp.tell()
    if available - header_end < expected:
        left = describe_size(max(available - header_end, 0))
        raise ctx.error(
            f"{what} is truncated: its header promises shape {tuple(shape)} of {dtype} "
            f"({describe_size(expected)}) but only {left} follow; {remedy}")
    try:
        fp.seek(0)
        return fmt.read_array(fp, allow_pickle=False)
    except LIBRARY_ERRORS as exc:
        raise ctx.error(f"cannot read {what} as a .npy array ({exc}); {remedy}") from None


def read_npz(p: Path, array: str | None, ctx: FileContext) -> np.ndarray:
    """The array ``array`` of an .npz archive (the only one when None); DataError when the
    archive is unreadable, the name is missing or ambiguous, or the member is not .npy."""
    with open_regular(p, ctx) as handle:
        try:
            archive = zipfile.ZipFile(handle)
        except LIBRARY_ERRORS as exc:
            raise ctx.error(
                f"not a readable .npz archive ({exc}); the file is truncated, corrupt or not "
                "an npz: write it again with numpy.savez (or set the right format)"
            ) from None
        with archive:
            try:
                members = {(n[:-4] if n.endswith(".npy") else n): n
                           for n in archive.namelist()}
                names = list(members)
                array = _the_only_one(array, names, names, "the archive", "arrays", "array",
                                      ctx)
                if array not in members:
                    listed = ", ".join(names) or "(none)"
                    raise ctx.error(f"no array {array!r} in the archive; it holds {listed}")
                info = archive.getinfo(members[array])
                with archive.open(info) as member:
                    return _read_npy_stream(member, int(info.file_size), ctx,
                                            f"array {array!r} of the archive",
                                            "the archive is corrupt: copy it again, or write "
                                            "it with numpy.savez")
            except LIBRARY_ERRORS as exc:
                raise ctx.error(
                    f"cannot read array {array!r} of the .npz archive ({exc}); the archive is "
                    "corrupt: write it again with numpy.savez"
                ) from None


# --------------------------------------------------------------------------- hdf5


def read_hdf5(
    p: Path, dataset: str | None, ids_dataset: str | None, ctx: FileContext
) -> tuple[np.ndarray, np.ndarray | None]:
    """The dataset ``dataset`` of an HDF5 file (the only one when None), and the ids of
    ``ids_dataset`` (:func:`integer_ids`), in file order; DataError when unreadable."""
    import h5py

    with open_regular(p, ctx):  # readable (permissions) and still a regular file
        pass
    try:
        handle = h5py.File(p, "r")
    except LIBRARY_ERRORS as exc:
        regular_file_size(p, ctx)  # vanished or replaced meanwhile: say that instead
        raise ctx.error(
            f"cannot open it as an HDF5 file ({exc}); the file is truncated, corrupt or not "
            "HDF5: copy or write it again (or set the right format)"
        ) from None
    try:
        with handle:
            found: list[str] = []
            handle.visititems(
                lambda name, obj: found.append(name) if isinstance(obj, h5py.Dataset) else None
            )
            candidates = [n for n in found if n != (ids_dataset or "").strip("/")]
            dataset = _the_only_one(dataset, candidates, found, "the file",
                                    "candidate datasets", "dataset", ctx)
            data = _h5_dataset(handle, dataset, found, "dataset", ctx)
            ids = None
            if ids_dataset is not None:
                raw_ids = _h5_dataset(handle, ids_dataset, found, "ids_dataset", ctx)
                ids = integer_ids(raw_ids, f"ids dataset {ids_dataset!r}", ctx)
    except DataError:
        raise
    except LIBRARY_ERRORS as exc:
        raise ctx.error(f"cannot read the HDF5 file ({exc}); it is corrupt: copy or write it "
                        "again") from None
    return data, ids


def _h5_dataset(handle, name: str, found: list[str], key: str, ctx: FileContext) -> np.ndarray:
    import h5py

    obj = handle.get(name)
    if obj is None or not isinstance(obj, h5py.Dataset):
        listed = ", ".join(found) or "(none)"
        raise ctx.error(f"no dataset {name!r} ('{key}') in the file; it holds {listed}")
    if obj.dtype.kind == "O" or h5py.check_string_dtype(obj.dtype) is not None:
        raise ctx.error(f"dataset {name!r} holds text or variable-length data ({obj.dtype}); "
                        "it must hold numbers")
    try:
        value = obj[()]
    except LIBRARY_ERRORS as exc:
        raise ctx.error(f"cannot read dataset {name!r} ({exc}); the file is corrupt: copy or "
                        "write it again") from None
    if isinstance(value, h5py.Empty):
        raise ctx.error(f"dataset {name!r} is empty (it has no data space); write the data")
    return np.asarray(value)


def integer_ids(raw: np.ndarray, what: str, ctx: FileContext) -> np.ndarray:
    """Configuration ids as int64: 1-D, whole (integers, or floats with no fraction),
    non-negative and below 2^53; DataError naming the first bad entry otherwise."""
    arr = np.asarray(raw)
    if arr.ndim != 1:
        raise ctx.error(f"{what} must be 1-D (one id per configuration), got shape {arr.shape}")
    if arr.dtype.kind == "u" and arr.size and int(arr.max()) > LARGEST_ID:
        raise ctx.error(f"{what}: id {int(arr.max())} is 2^53 or more; renumber the "
                        "configurations")
    if arr.dtype.kind in "iu":
        ids = arr.astype(np.int64)
    elif arr.dtype.kind == "f":
        with np.errstate(invalid="ignore"):
            whole = np.isfinite(arr) & (arr == np.round(arr))
        if not whole.all():
            i = int(np.argmax(~whole))
            raise ctx.error(f"{what}: entry {i} is {arr[i]!r}, not a whole number; ids "
                            "count configurations")
        if np.any(np.abs(arr) > LARGEST_ID):
            i = int(np.argmax(np.abs(arr) > LARGEST_ID))
            raise ctx.error(f"{what}: id {arr[i]:g} at entry {i} is 2^53 or more, too large "
                            "to be stored exactly as a float; renumber or store integers")
        ids = arr.astype(np.int64)
    else:
        raise ctx.error(f"{what} must hold whole numbers, got data type {arr.dtype}")
    if ids.size and np.any(ids < 0):
        i = int(np.argmax(ids < 0))
        raise ctx.error(f"{what}: negative id {int(ids[i])} at entry {i}; configuration ids "
                        "count Monte Carlo time from 0: fix or renumber them")
    if ids.size and int(ids.max()) > LARGEST_ID:
        raise ctx.error(f"{what}: id {int(ids.max())} is 2^53 or more; renumber the "
                        "configurations")
    return ids
