"""load_correlator on bad and awkward inputs: every one is a DataError naming the file
and saying what to do, never a traceback, a hang or a runaway read."""

from __future__ import annotations

import os
import socket
import stat
import zipfile

import h5py
import numpy as np
import pytest

from plateaufit.data import files as files_module
from plateaufit.data.loaders import (
    LARGEST_VALUE,
    MAX_TEXT_BYTES,
    SMALLEST_SCALE,
    RawCorrelator,
    load_correlator,
)
from plateaufit.errors import DataError

KEY = "observables.pion.file"


@pytest.fixture
def data(make_correlator) -> np.ndarray:
    return make_correlator(n_cfg=10, T=6, seed=21)


def refused(path, *needles, **kwargs) -> DataError:
    """Load ``path`` expecting a DataError at the spec key that names the file and says
    ``needles``; returns the error."""
    with pytest.raises(DataError) as err:
        load_correlator(path, where=KEY, **kwargs)
    assert err.value.where == KEY
    message = err.value.message
    assert str(path) in message, message
    for needle in needles:
        assert needle in message, (needle, message)
    return err.value


def text_of(values) -> str:
    return "".join(" ".join(repr(float(x)) for x in row) + "\n" for row in values)


# --------------------------------------------------------------------------- special files


def test_fifo_is_refused_at_once_without_blocking(tmp_path):
    # Opening a FIFO for reading blocks until a writer appears; the loader must never
    # open it. (If it did, this test would hang: pytest's own timeout is the CI's.)
    path = tmp_path / "pion.txt"
    os.mkfifo(path)
    refused(path, "named pipe (FIFO)", "not a regular file", "write the data to a file")
    refused(path, "named pipe", format="npy")
    refused(path, "named pipe", format="hdf5")


def test_character_device_is_refused_not_read_until_memory_runs_out(tmp_path):
    refused("/dev/zero", "character device", "write the data to a file", format="text")
    link = tmp_path / "zeros.csv"
    link.symlink_to("/dev/zero")
    refused(link, "character device", "symbolic link to /dev/zero")
    refused("/dev/null", "character device", format="hdf5")


def test_socket_is_refused(tmp_path):
    path = tmp_path / "s.csv"
    sock = socket.socket(socket.AF_UNIX)
    try:
        sock.bind(str(path))
        refused(path, "a socket", "not a regular file")
    finally:
        sock.close()


def test_directory_and_symlink_to_directory(tmp_path):
    folder = tmp_path / "runs.txt"
    folder.mkdir()
    refused(folder, "is a directory", "give the data file inside it")
    link = tmp_path / "latest.npy"
    link.symlink_to(folder)
    refused(link, "is a directory", "symbolic link to", "give the data file inside it")


def test_the_read_itself_rechecks_the_open_file(tmp_path):
    # A path swapped for a FIFO between the stat and the open: the open file is
    # checked again (fstat), and the open itself never blocks (O_NONBLOCK).
    fifo = tmp_path / "swap.fifo"
    os.mkfifo(fifo)
    ctx = files_module.FileContext(fifo)
    with pytest.raises(DataError, match="named pipe"):
        files_module.open_regular(fifo, ctx)


def test_symlink_to_a_regular_file_is_read(tmp_path, data):
    target = tmp_path / "real.txt"
    target.write_text(text_of(data))
    link = tmp_path / "link.txt"
    link.symlink_to(target)
    np.testing.assert_array_equal(load_correlator(link).values, data)


# --------------------------------------------------------------------------- vanishing, permissions


def test_missing_file(tmp_path):
    refused(tmp_path / "nope.h5", "file not found", "check the path")


def test_file_vanishing_between_check_and_read(tmp_path, data, monkeypatch):
    path = tmp_path / "c.txt"
    path.write_text(text_of(data))

    def vanished(*args, **kwargs):
        raise FileNotFoundError(2, "No such file or directory")

    monkeypatch.setattr(files_module.os, "open", vanished)
    refused(path, "vanished", "try again")


def test_unreadable_file_says_how_to_fix_permissions(tmp_path, data, monkeypatch):
    path = tmp_path / "c.csv"
    path.write_text("config,t,value\n1,0,1.0\n")
    # The tests run as root in CI, where chmod 000 does not stop a read: simulate it.
    def denied(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(files_module.os, "open", denied)
    refused(path, "permission denied", "chmod u+r")
    np.save(tmp_path / "c.npy", data)
    refused(tmp_path / "c.npy", "permission denied")
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["corr"] = data
    refused(tmp_path / "c.h5", "permission denied")


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads files whatever their mode")
def test_unreadable_file_by_mode(tmp_path, data):  # pragma: no cover - not as root
    path = tmp_path / "c.txt"
    path.write_text(text_of(data))
    path.chmod(0)
    try:
        refused(path, "permission denied")
    finally:
        path.chmod(stat.S_IRUSR | stat.S_IWUSR)


# --------------------------------------------------------------------------- sizes


@pytest.mark.parametrize("suffix", [".txt", ".csv", ".npy", ".npz", ".h5"])
def test_empty_file_of_every_format(tmp_path, suffix):
    path = tmp_path / f"empty{suffix}"
    path.write_bytes(b"")
    refused(path, "empty (0 bytes)")


def test_text_and_csv_above_the_size_limit_are_refused_before_reading(tmp_path, data):
    path = tmp_path / "big.txt"
    path.write_text(text_of(data))
    size = path.stat().st_size
    err = refused(path, "above the limit", f"({size} bytes)", "max_text_bytes",
                  max_text_bytes=size - 1)
    assert ".npy or HDF5" in err.message
    np.testing.assert_array_equal(load_correlator(path, max_text_bytes=size).values, data)
    (tmp_path / "big.csv").write_text("config,t,value\n" + "1,0,1.0\n" * 20)
    refused(tmp_path / "big.csv", "above the limit", max_text_bytes=100)
    # the default is documented and generous: 2 GiB
    assert MAX_TEXT_BYTES == 2 * 1024**3
    assert load_correlator(path, max_text_bytes=None).n_configs == data.shape[0]
    with pytest.raises(DataError, match="max_text_bytes must be a positive"):
        load_correlator(path, max_text_bytes=0)


# --------------------------------------------------------------------------- encodings


def test_latin1_bytes_name_the_line(tmp_path):
    path = tmp_path / "c.txt"
    path.write_bytes("# temp\u00e9rature 300 K\n1 2\n3 4\n".encode("latin-1"))
    refused(path, "line 1", "0xe9", "not valid UTF-8", "save it as UTF-8")
    csv_path = tmp_path / "c.csv"
    csv_path.write_bytes("config,t,value,stream\n1,0,1.0,r\u00e9plica\n".encode("latin-1"))
    refused(csv_path, "line 2", "save it as UTF-8")


def test_utf16_with_byte_order_mark(tmp_path):
    path = tmp_path / "c.txt"
    path.write_bytes("1 2\n3 4\n".encode("utf-16"))
    refused(path, "UTF-16", "save it as UTF-8")
    csv_path = tmp_path / "c.csv"
    csv_path.write_bytes("config,t,value\n1,0,1.0\n".encode("utf-16"))
    refused(csv_path, "UTF-16", "save it as UTF-8")
    path.write_bytes("1 2\n".encode("utf-32"))
    refused(path, "UTF-32")


def test_binary_file_given_as_text_or_csv(tmp_path, data):
    np.save(tmp_path / "c.npy", data)
    blob = (tmp_path / "c.npy").read_bytes()
    (tmp_path / "c.txt").write_bytes(blob)
    refused(tmp_path / "c.txt", "binary file", "set the format")
    (tmp_path / "c.csv").write_bytes(blob)
    refused(tmp_path / "c.csv", "binary file")
    # an .npy named as text with a format override reads fine
    np.testing.assert_array_equal(load_correlator(tmp_path / "c.txt", format="npy").values, data)


def test_utf8_with_byte_order_mark_and_windows_line_ends_are_fine(tmp_path, data):
    path = tmp_path / "c.txt"
    path.write_bytes(b"\xef\xbb\xbf" + text_of(data).replace("\n", "\r\n").encode())
    np.testing.assert_array_equal(load_correlator(path).values, data)


# --------------------------------------------------------------------------- partial text / csv


def test_text_last_row_cut_mid_line(tmp_path, data):
    path = tmp_path / "c.txt"
    whole = text_of(data)
    path.write_text(whole[: whole.rstrip("\n").rfind(" ")])  # the last value is cut off
    refused(path, f"line {data.shape[0]}", "looks cut off", "is the file complete")
    path.write_text(whole.rstrip("\n") + "e")  # cut inside an exponent
    refused(path, "cannot read", "looks cut off")


def test_csv_last_row_cut_and_missing_rows(tmp_path):
    path = tmp_path / "c.csv"
    path.write_text("config,t,value\n1,0,1.0\n1,1,2.0\n2,0,3.0\n2,1")
    refused(path, "line 5 has 2 fields", "looks cut off")
    path.write_text("config,t,value\n1,0,1.0\n1,1,2.0\n2,0,3.0\n3,0,4.0\n3,1,5.0\n")
    refused(path, "no value for config 2, t = 1", "add the missing rows")


def test_csv_timeslice_typo_is_reported_not_allocated(tmp_path):
    path = tmp_path / "c.csv"
    path.write_text("config,t,value\n1,0,1.0\n1,1,2.0\n2,0,1.0\n2,1000000000000,2.0\n")
    refused(path, "no value for config 1, t = 2", "t = 0..1000000000000")


def test_csv_quoted_fields_and_text_where_a_number_belongs(tmp_path):
    path = tmp_path / "c.csv"
    path.write_text('config,t,value\n1,0,"1.5"\n1,1,2.5\n')
    np.testing.assert_array_equal(load_correlator(path).values, [[1.5, 2.5]])
    path.write_text('config,t,value\n1,0,"one and a half"\n')
    refused(path, "line 2: cannot read value = 'one and a half' as a number")


# --------------------------------------------------------------------------- values


def test_nan_and_inf(tmp_path, data):
    bad = data.copy()
    bad[3, 2] = np.nan
    (tmp_path / "c.txt").write_text(text_of(bad))
    refused(tmp_path / "c.txt", "NaN value at configuration index 3, t = 2", "remove or repair")
    bad[3, 2] = -np.inf
    np.save(tmp_path / "c.npy", bad)
    refused(tmp_path / "c.npy", "infinite value", "remove or repair")


def test_huge_values_whose_squares_overflow(tmp_path, data):
    bad = data.copy()
    bad[4, 1] = 1e308
    np.save(tmp_path / "c.npy", bad)
    refused(tmp_path / "c.npy", "configuration index 4, t = 1", f"{LARGEST_VALUE:g}",
            "divide every value")
    # each finite, but their sum overflows
    (tmp_path / "c.txt").write_text("1.7e308 1\n1.7e308 2\n")
    refused(tmp_path / "c.txt", "(2 such values)", "overflows")
    # large but safe values load
    ok = data * 1e140
    np.save(tmp_path / "ok.npy", ok)
    np.testing.assert_array_equal(load_correlator(tmp_path / "ok.npy").values, ok)


def test_subnormal_and_too_small_timeslices(tmp_path, data):
    bad = data.copy()
    bad[2, 5] = 5e-320
    np.save(tmp_path / "c.npy", bad)
    refused(tmp_path / "c.npy", "subnormal", "configuration index 2, t = 5", "wrong type")
    tiny = data.copy()
    tiny[:, 3] *= 1e-200
    np.save(tmp_path / "t.npy", tiny)
    refused(tmp_path / "t.npy", "at t = 3", f"{SMALLEST_SCALE:g}", "multiply every value")
    # exact zeros are fine (a timeslice may vanish by symmetry), so are small correlators
    fine = data * 1e-100
    fine[:, 0] = 0.0
    np.save(tmp_path / "f.npy", fine)
    np.testing.assert_array_equal(load_correlator(tmp_path / "f.npy").values, fine)


# --------------------------------------------------------------------------- ids


def test_csv_ids_negative_float_huge_and_duplicated(tmp_path):
    path = tmp_path / "c.csv"
    path.write_text("config,t,value\n-3,0,1.0\n-3,1,2.0\n")
    refused(path, "line 2: negative config = -3", "fix or renumber")
    path.write_text("config,t,value\n1e20,0,1.0\n1e20,1,2.0\n")
    refused(path, "2^53 or more", "renumber")
    path.write_text("config,t,value\n9007199254740993,0,1.0\n")  # 2^53 + 1
    refused(path, "2^53 or more")
    path.write_text("config,t,value\n2.5,0,1.0\n")
    refused(path, "config = 2.5 is not a whole number")
    path.write_text("config,t,value\n1,0,1.0\n1,0,1.5\n")
    refused(path, "config 1, t = 0 appears more than once (lines 2 and 3)", "remove")
    # ids written as floats with a zero fraction are whole numbers
    path.write_text("config,t,value\n2.0,0,1.0\n1.0,0,2.0\n")
    raw = load_correlator(path)
    np.testing.assert_array_equal(raw.config_ids, [1, 2])
    np.testing.assert_array_equal(raw.values[:, 0], [2.0, 1.0])


@pytest.mark.parametrize("ids, needle", [
    (np.array([0, 1, 2, 3, 4, 5, 6, 7, 8, -9]), "negative id -9 at entry 9"),
    (np.arange(10) + 0.5, "not a whole number"),
    (np.array([1, 2, 3, 4, 5, 6, 7, 8, 9, 2**63 + 5], dtype=np.uint64), "2^53 or more"),
    (np.arange(10.0) * 1e16, "2^53 or more"),
    (np.array([1, 2, 3, 3, 5, 6, 7, 8, 9, 10]), "configuration id 3 appears more than once"),
    (np.arange(20).reshape(10, 2), "must be 1-D"),
    (np.array([b"c%d" % i for i in range(10)]), "holds text"),
    (np.array([np.nan] + list(range(9))), "not a whole number"),
])
def test_hdf5_bad_ids(tmp_path, data, ids, needle):
    path = tmp_path / "c.h5"
    with h5py.File(path, "w") as f:
        f["corr"] = data
        f["ids"] = ids
    refused(path, needle, dataset="corr", ids_dataset="ids")


# --------------------------------------------------------------------------- hdf5 out of order


def test_hdf5_rows_out_of_id_order_are_sorted_and_the_permutation_recorded(tmp_path, data):
    ids = np.arange(100, 100 + 10 * data.shape[0], 10)
    perm = np.random.default_rng(4).permutation(data.shape[0])
    path = tmp_path / "c.h5"
    with h5py.File(path, "w") as f:
        f["corr"] = data[perm]
        f["ids"] = ids[perm]
    raw = load_correlator(path, dataset="corr", ids_dataset="ids")
    np.testing.assert_array_equal(raw.values, data)
    np.testing.assert_array_equal(raw.config_ids, ids)
    assert raw.reordered and raw.n_moved == int(np.count_nonzero(perm != np.arange(perm.size)))
    # row i is the file's row file_rows[i]
    np.testing.assert_array_equal(data[perm][raw.file_rows], raw.values)
    with h5py.File(tmp_path / "sorted.h5", "w") as f:
        f["corr"] = data
        f["ids"] = ids
    in_order = load_correlator(tmp_path / "sorted.h5", dataset="corr", ids_dataset="ids")
    assert not in_order.reordered and in_order.file_rows is None and in_order.n_moved == 0


def test_hdf5_permuted_rows_give_the_tau_int_of_monte_carlo_order(tmp_path):
    # An AR(1) chain (exact tau_int = (1 + phi) / (2 (1 - phi)) = 4.5 for phi = 0.8,
    # 1/2 + sum rho convention) stored with its rows shuffled and the ids shuffled with
    # them: read in file order the chain looks uncorrelated (tau ~ 0.5).
    from scipy.signal import lfilter

    from plateaufit.stats.autocorr import tau_int

    rng = np.random.default_rng(12)
    n, phi = 20000, 0.8
    chain, _ = lfilter([1.0], [1.0, -phi], rng.standard_normal(n), zi=[0.0])
    values = np.column_stack([1.0 + 0.1 * chain, 0.5 + 0.05 * chain])
    perm = rng.permutation(n)
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["corr"] = values[perm]
        f["ids"] = (np.arange(n) * 5 + 1000)[perm]
    raw = load_correlator(tmp_path / "c.h5", dataset="corr", ids_dataset="ids")
    r = tau_int(raw.values[:, 0])
    # exact AR(1) result (not an estimate from the project)
    assert r.tau == pytest.approx((1 + phi) / (2 * (1 - phi)), abs=4 * r.error)
    assert tau_int(values[perm][:, 0]).tau < 0.6


# --------------------------------------------------------------------------- hdf5 wrong datasets


@pytest.mark.parametrize("make, needle", [
    (lambda: np.arange(10.0), "expected a 2-D array"),
    (lambda: np.zeros((2, 3, 4)), "expected a 2-D array"),
    (lambda: np.float64(3.0), "expected a 2-D array"),
    (lambda: np.array([[b"ab", b"cd"]] * 3), "holds text"),
    (lambda: h5py.Empty("f8"), "is empty"),
    (lambda: np.zeros((3, 0)), "no data"),
    (lambda: np.array([[True, False]] * 3), "not numeric"),
    (lambda: np.zeros((3, 4), dtype=[("a", "f8"), ("b", "f8"), ("c", "f8")]), "compound"),
])
def test_hdf5_dataset_of_wrong_rank_or_type(tmp_path, make, needle):
    path = tmp_path / "c.h5"
    with h5py.File(path, "w") as f:
        f["corr"] = make()
    refused(path, needle, dataset="corr")


def test_hdf5_complex_dataset_is_read(tmp_path, data):
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["corr"] = data + 2j * data
    np.testing.assert_array_equal(load_correlator(tmp_path / "c.h5", part="imag").values,
                                  2 * data)


@pytest.mark.parametrize("keep", [0.05, 0.5, 0.95])
def test_truncated_hdf5(tmp_path, data, keep):
    with h5py.File(tmp_path / "full.h5", "w") as f:
        f["corr"] = np.tile(data, (50, 1))
    blob = (tmp_path / "full.h5").read_bytes()
    path = tmp_path / "cut.h5"
    path.write_bytes(blob[: int(len(blob) * keep)])
    refused(path, "truncated, corrupt or not HDF5", "copy or write it again")


def test_text_given_as_hdf5(tmp_path, data):
    path = tmp_path / "c.h5"
    path.write_text(text_of(data))
    refused(path, "cannot open it as an HDF5 file", "set the right format")


# --------------------------------------------------------------------------- npy / npz


@pytest.mark.parametrize("keep", [3, 8, 40, 127, 129, -1])
def test_truncated_npy(tmp_path, data, keep):
    np.save(tmp_path / "full.npy", data)
    blob = (tmp_path / "full.npy").read_bytes()
    path = tmp_path / "cut.npy"
    path.write_bytes(blob[:keep])
    err = refused(path, "npy")
    assert "truncated" in err.message or "signature" in err.message


def test_npy_header_claiming_a_huge_shape_is_reported_without_allocating(tmp_path):
    header = {"descr": "<f8", "fortran_order": False, "shape": (10**7, 10**6)}
    with open(tmp_path / "liar.npy", "wb") as handle:
        np.lib.format.write_array_header_1_0(handle, header)
        handle.write(b"\x00" * 64)
    refused(tmp_path / "liar.npy", "truncated", "promises shape (10000000, 1000000)",
            "80.0 TB")


def test_object_npy_is_never_unpickled(tmp_path, monkeypatch):
    path = tmp_path / "obj.npy"
    np.save(path, np.array([[{"a": 1}, None]], dtype=object), allow_pickle=True)
    import pickle

    def no_unpickling(*args, **kwargs):  # pragma: no cover - must not be called
        raise AssertionError("the loader unpickled a data file")

    monkeypatch.setattr(pickle, "load", no_unpickling)
    monkeypatch.setattr(pickle, "loads", no_unpickling)
    refused(path, "Python objects", "never unpickles", "numeric array")
    np.savez(tmp_path / "obj.npz", corr=np.array([[object()]], dtype=object))
    refused(tmp_path / "obj.npz", "Python objects")


def test_pickle_file_given_as_npy(tmp_path):
    import pickle

    path = tmp_path / "p.npy"
    path.write_bytes(pickle.dumps([[1.0, 2.0]]))
    refused(path, "not a .npy array", "numpy.save")


@pytest.mark.parametrize("keep", [10, 200, -22, -1])
def test_truncated_npz(tmp_path, data, keep):
    np.savez(tmp_path / "full.npz", corr=data)
    blob = (tmp_path / "full.npz").read_bytes()
    path = tmp_path / "cut.npz"
    path.write_bytes(blob[:keep])
    refused(path, "not a readable .npz archive", "numpy.savez")


def test_corrupt_npz_member(tmp_path, make_correlator):
    big = make_correlator(n_cfg=200, T=16, seed=3)
    np.savez_compressed(tmp_path / "full.npz", corr=big)
    blob = bytearray((tmp_path / "full.npz").read_bytes())
    blob[400:440] = bytes(40)  # inside the compressed member
    path = tmp_path / "bad.npz"
    path.write_bytes(bytes(blob))
    refused(path, "corrupt", "numpy.savez")


def test_npz_member_that_is_not_npy(tmp_path):
    path = tmp_path / "c.npz"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("notes.txt", "hello")
    refused(path, "'notes.txt'", "not a .npy array")


def test_npz_given_as_npy_and_npy_as_npz(tmp_path, data):
    np.savez(tmp_path / "c.npz", corr=data)
    refused(tmp_path / "c.npz", "not a .npy array", format="npy")
    np.save(tmp_path / "c.npy", data)
    refused(tmp_path / "c.npy", "not a readable .npz archive", format="npz")


# --------------------------------------------------------------------------- paths


@pytest.mark.parametrize("name", ["with space.txt", "m\u00e9son \u03c0\u207a.txt", "\u683c\u5b50.csv"])
def test_paths_with_spaces_and_unicode(tmp_path, data, name):
    path = tmp_path / "run 1 \u00e9" / name
    path.parent.mkdir()
    if name.endswith(".csv"):
        rows = [f"{i},{t},{float(data[i, t])!r}" for i in range(data.shape[0]) for t in range(6)]
        path.write_text("config,t,value\n" + "\n".join(rows) + "\n", encoding="utf-8")
    else:
        path.write_text(text_of(data), encoding="utf-8")
    raw = load_correlator(path)
    assert isinstance(raw, RawCorrelator) and raw.source == path
    np.testing.assert_array_equal(raw.values, data)
    # and an error names such a path in full
    missing = path.with_name("missing " + name)
    refused(missing, "not found")


def test_a_file_growing_while_read_is_still_bounded(tmp_path):
    import io

    ctx = files_module.FileContext(tmp_path / "growing.txt")
    # stat said 10 bytes, but 100 arrive: read on in blocks, refused past the limit
    with pytest.raises(DataError, match="above the limit"):
        files_module._read_bounded(io.BytesIO(b"1 " * 50), 10, 50, ctx)
    assert files_module._read_bounded(io.BytesIO(b"1 " * 50), 10, 1000, ctx) == b"1 " * 50
    assert files_module._read_bounded(io.BytesIO(b"1 2\n"), 4, None, ctx) == b"1 2\n"
