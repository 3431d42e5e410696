"""load_correlator: every format round-trips invented data; every bad file is a DataError."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from plateaufit.data.loaders import RawCorrelator, load_correlator
from plateaufit.errors import DataError


@pytest.fixture
def data(make_correlator) -> np.ndarray:
    return make_correlator(n_cfg=12, T=8, seed=11)


def write_long_csv(path, values, *, ids=None, streams=None, imag=None, shuffle_seed=None):
    n_cfg, n_t = values.shape
    ids = np.arange(n_cfg) if ids is None else ids
    header = ["config", "t", "value"]
    if streams is not None:
        header.insert(0, "stream")
    if imag is not None:
        header.append("imag")
    rows = []
    for i in range(n_cfg):
        for t in range(n_t):
            row = [str(ids[i]), str(t), repr(float(values[i, t]))]
            if streams is not None:
                row.insert(0, str(streams[i]))
            if imag is not None:
                row.append(repr(float(imag[i, t])))
            rows.append(",".join(row))
    if shuffle_seed is not None:
        order = np.random.default_rng(shuffle_seed).permutation(len(rows))
        rows = [rows[k] for k in order]
    path.write_text("# invented test data\n" + ",".join(header) + "\n" + "\n".join(rows) + "\n")


# --------------------------------------------------------------------------- round trips


def test_text_round_trip_with_comments(tmp_path, data):
    path = tmp_path / "c.txt"
    body = "\n".join(" ".join(repr(float(x)) for x in row) for row in data)
    path.write_text("# header comment\n\n" + body + "  # trailing comment\n")
    raw = load_correlator(path)
    assert isinstance(raw, RawCorrelator)
    np.testing.assert_array_equal(raw.values, data)
    assert raw.config_ids is None and raw.streams is None
    assert raw.source == path


def test_dat_suffix_is_text(tmp_path, data):
    np.savetxt(tmp_path / "c.dat", data)
    np.testing.assert_allclose(load_correlator(tmp_path / "c.dat").values, data, rtol=1e-15)


def test_single_row_text_is_two_dimensional(tmp_path):
    (tmp_path / "one.txt").write_text("1 2 3\n")
    assert load_correlator(tmp_path / "one.txt").values.shape == (1, 3)


def test_npy_real_and_complex_parts(tmp_path, data):
    np.save(tmp_path / "r.npy", data)
    np.testing.assert_array_equal(load_correlator(tmp_path / "r.npy").values, data)
    z = data + 1j * (data * 0.5)
    np.save(tmp_path / "z.npy", z)
    np.testing.assert_array_equal(load_correlator(tmp_path / "z.npy").values, data)
    np.testing.assert_array_equal(load_correlator(tmp_path / "z.npy", part="imag").values,
                                  data * 0.5)


def test_npz_named_and_single_array(tmp_path, data):
    np.savez(tmp_path / "one.npz", corr=data)
    np.testing.assert_array_equal(load_correlator(tmp_path / "one.npz").values, data)
    np.savez(tmp_path / "two.npz", pion=data, kaon=2 * data)
    np.testing.assert_array_equal(load_correlator(tmp_path / "two.npz", array="kaon").values,
                                  2 * data)


def test_npz_several_arrays_without_name_lists_them(tmp_path, data):
    np.savez(tmp_path / "two.npz", pion=data, kaon=2 * data)
    with pytest.raises(DataError, match=r"kaon") as err:
        load_correlator(tmp_path / "two.npz", where="observables.pi.file")
    assert "pion" in err.value.message and "'array'" in err.value.message
    assert err.value.where == "observables.pi.file"
    with pytest.raises(DataError, match=r"no array 'sigma'.*pion"):
        load_correlator(tmp_path / "two.npz", array="sigma")


def test_hdf5_with_ids_complex_and_compound(tmp_path, data):
    path = tmp_path / "c.h5"
    ids = np.arange(100, 100 + 4 * data.shape[0], 4)
    compound = np.zeros(data.shape, dtype=[("r", "f8"), ("i", "f8")])
    compound["r"], compound["i"] = data, -data
    with h5py.File(path, "w") as f:
        f["meas/pion"] = data + 1j * 3 * data
        f["meas/rho"] = compound
        f["meas/cfg"] = ids
    raw = load_correlator(path, dataset="meas/pion", ids_dataset="meas/cfg")
    np.testing.assert_array_equal(raw.values, data)
    np.testing.assert_array_equal(raw.config_ids, ids)
    assert raw.config_ids.dtype == np.int64
    np.testing.assert_array_equal(
        load_correlator(path, dataset="meas/pion", part="imag").values, 3 * data)
    np.testing.assert_array_equal(load_correlator(path, dataset="meas/rho", part="imag").values,
                                  -data)


def test_hdf5_single_dataset_needs_no_name(tmp_path, data):
    with h5py.File(tmp_path / "c.hdf5", "w") as f:
        f["x"] = data
        f["ids"] = np.arange(data.shape[0])
    # the ids dataset is not a candidate for the correlator
    raw = load_correlator(tmp_path / "c.hdf5", ids_dataset="ids")
    np.testing.assert_array_equal(raw.values, data)


def test_hdf5_several_datasets_without_name_lists_them(tmp_path, data):
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["a/pion"] = data
        f["a/kaon"] = data
    with pytest.raises(DataError, match=r"a/kaon.*a/pion.*'dataset'"):
        load_correlator(tmp_path / "c.h5")
    with pytest.raises(DataError, match=r"no dataset 'a/eta'.*a/kaon"):
        load_correlator(tmp_path / "c.h5", dataset="a/eta")


def test_hdf5_ids_length_must_match(tmp_path, data):
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["x"] = data
        f["ids"] = np.arange(data.shape[0] - 1)
    with pytest.raises(DataError, match=r"11 entries.*12 configurations"):
        load_correlator(tmp_path / "c.h5", dataset="x", ids_dataset="ids")


def test_csv_with_streams_and_imag_in_any_row_order(tmp_path, data):
    # two streams with overlapping config numbers, rows shuffled
    ids = np.array([10, 20, 30, 40, 50, 60, 10, 20, 30, 40, 50, 60])
    streams = np.array([2] * 6 + [1] * 6)
    imag = data * 0.25
    path = tmp_path / "c.csv"
    write_long_csv(path, data, ids=ids, streams=streams, imag=imag, shuffle_seed=3)
    raw = load_correlator(path)
    # streams in order of first appearance in the (shuffled) file, then config id
    first_stream = int(path.read_text().splitlines()[2].split(",")[0])
    rank = np.where(streams == first_stream, 0, 1)
    order = np.lexsort((ids, rank))
    np.testing.assert_array_equal(raw.values, data[order])
    np.testing.assert_array_equal(raw.config_ids, ids[order])
    np.testing.assert_array_equal(raw.streams, streams[order])
    assert list(raw.stream_names) == [first_stream, 3 - first_stream]
    assert raw.reordered  # the shuffled rows were sorted
    np.testing.assert_array_equal(load_correlator(path, part="imag").values, imag[order])


def test_csv_text_stream_labels_in_order_of_appearance(tmp_path, data):
    streams = np.array(["b"] * 5 + ["a"] * 7)
    write_long_csv(tmp_path / "c.csv", data, streams=streams)
    raw = load_correlator(tmp_path / "c.csv")
    # labels numbered in order of first appearance in the file: b -> 0, a -> 1
    np.testing.assert_array_equal(raw.streams, [0] * 5 + [1] * 7)
    assert raw.stream_names == {0: "b", 1: "a"}
    np.testing.assert_array_equal(raw.values, data)
    assert not raw.reordered


def test_csv_integer_stream_labels_keep_their_values_in_file_order(tmp_path, data):
    streams = np.array([7] * 4 + [3] * 8)
    write_long_csv(tmp_path / "c.csv", data, streams=streams)
    raw = load_correlator(tmp_path / "c.csv")
    np.testing.assert_array_equal(raw.streams, streams)
    assert raw.stream_names == {7: "7", 3: "3"}
    np.testing.assert_array_equal(raw.values, data)


# --------------------------------------------------------------------------- errors


def test_missing_file_names_file_and_key(tmp_path):
    with pytest.raises(DataError) as err:
        load_correlator(tmp_path / "nope.txt", where="observables.pion.file")
    assert err.value.where == "observables.pion.file"
    assert "nope.txt" in err.value.message and "not found" in err.value.message


def test_without_where_the_file_is_the_where(tmp_path):
    with pytest.raises(DataError) as err:
        load_correlator(tmp_path / "nope.txt")
    assert err.value.where == str(tmp_path / "nope.txt")


def test_text_parse_error_gives_line_and_column(tmp_path):
    (tmp_path / "c.txt").write_text("# c\n1 2 3\n\n4 5 x6\n")
    with pytest.raises(DataError, match=r"line 4, column 3.*'x6'"):
        load_correlator(tmp_path / "c.txt")


def test_text_ragged_rows_give_line(tmp_path):
    (tmp_path / "c.txt").write_text("1 2 3\n4 5 6\n# skip\n7 8\n")
    with pytest.raises(DataError, match=r"line 4 has 2 columns but line 1 has 3"):
        load_correlator(tmp_path / "c.txt")


def test_binary_file_as_text_is_an_error(tmp_path):
    (tmp_path / "c.txt").write_bytes(b"\xff\xfe\x00\x81garbage")
    with pytest.raises(DataError, match="c.txt"):
        load_correlator(tmp_path / "c.txt")


def test_unknown_suffix_lists_accepted(tmp_path):
    (tmp_path / "c.xyz").write_text("1 2\n")
    with pytest.raises(DataError, match=r"'\.xyz'.*\.txt.*\.npy.*\.npz.*\.h5.*\.csv"):
        load_correlator(tmp_path / "c.xyz")
    np.testing.assert_array_equal(load_correlator(tmp_path / "c.xyz", format="text").values,
                                  [[1, 2]])


def test_unknown_format_lists_accepted(tmp_path):
    (tmp_path / "c.txt").write_text("1 2\n")
    with pytest.raises(DataError, match=r"unknown format 'excel'.*text, npy, npz, hdf5, csv"):
        load_correlator(tmp_path / "c.txt", format="excel")


def test_not_two_dimensional(tmp_path):
    np.save(tmp_path / "c.npy", np.arange(5.0))
    with pytest.raises(DataError, match=r"2-D.*\(5,\)"):
        load_correlator(tmp_path / "c.npy")


def test_empty_files(tmp_path):
    (tmp_path / "c.txt").write_text("# only a comment\n\n")
    with pytest.raises(DataError, match="no data"):
        load_correlator(tmp_path / "c.txt")
    np.save(tmp_path / "e.npy", np.zeros((0, 4)))
    with pytest.raises(DataError, match=r"no data.*\(0, 4\)"):
        load_correlator(tmp_path / "e.npy")
    (tmp_path / "e.csv").write_text("config,t,value\n")
    with pytest.raises(DataError, match="no data rows"):
        load_correlator(tmp_path / "e.csv")


def test_nan_names_configuration_index_and_t(tmp_path, data):
    bad = data.copy()
    bad[5, 3] = np.nan
    np.save(tmp_path / "c.npy", bad)
    with pytest.raises(DataError, match=r"NaN value at configuration index 5, t = 3"):
        load_correlator(tmp_path / "c.npy")


def test_inf_names_configuration_id_when_known(tmp_path, data):
    bad = data.copy()
    bad[2, 7] = np.inf
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["x"] = bad
        f["ids"] = np.arange(1000, 1000 + bad.shape[0])
    with pytest.raises(DataError, match=r"infinite value at configuration index 2 \(id 1002\), "
                                        r"t = 7"):
        load_correlator(tmp_path / "c.h5", dataset="x", ids_dataset="ids")


def test_nan_in_text(tmp_path):
    (tmp_path / "c.txt").write_text("1 2 3\n4 nan 6\n")
    with pytest.raises(DataError, match=r"configuration index 1, t = 1"):
        load_correlator(tmp_path / "c.txt")


def test_imag_part_of_real_data_is_an_error(tmp_path, data):
    np.save(tmp_path / "c.npy", data)
    with pytest.raises(DataError, match="complex"):
        load_correlator(tmp_path / "c.npy", part="imag")
    np.savetxt(tmp_path / "c.txt", data)
    with pytest.raises(DataError, match="text files hold real numbers"):
        load_correlator(tmp_path / "c.txt", part="imag")
    write_long_csv(tmp_path / "c.csv", data)
    with pytest.raises(DataError, match="'imag' column"):
        load_correlator(tmp_path / "c.csv", part="imag")


def test_options_for_other_formats_are_errors(tmp_path, data):
    np.save(tmp_path / "c.npy", data)
    with pytest.raises(DataError, match="'dataset' applies to hdf5"):
        load_correlator(tmp_path / "c.npy", dataset="x")
    with pytest.raises(DataError, match="'array' applies to npz"):
        load_correlator(tmp_path / "c.npy", array="x")


def test_csv_missing_pair_names_config_and_t(tmp_path, data):
    path = tmp_path / "c.csv"
    write_long_csv(path, data, ids=np.arange(100, 112))
    lines = path.read_text().splitlines()
    # drop config 103, t = 5: header is line 2, config i, t at line 3 + 8 i + t
    del lines[2 + 3 * 8 + 5]
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(DataError, match=r"no value for config 103, t = 5"):
        load_correlator(path)


def test_csv_duplicate_names_config_t_and_lines(tmp_path, data):
    path = tmp_path / "c.csv"
    write_long_csv(path, data)
    path.write_text(path.read_text() + "4,2,1.0\n")
    with pytest.raises(DataError, match=r"config 4, t = 2 appears more than once \(lines 37 and "
                                        r"99\)"):
        load_correlator(path)


def test_csv_bad_header_and_bad_values(tmp_path):
    (tmp_path / "h.csv").write_text("cfg,t,value\n1,0,1.0\n")
    with pytest.raises(DataError, match=r"missing column\(s\) config.*unknown column\(s\) cfg"):
        load_correlator(tmp_path / "h.csv")
    (tmp_path / "v.csv").write_text("config,t,value\n1,0,1.0\n1,1,oops\n")
    with pytest.raises(DataError, match=r"line 3: cannot read value = 'oops'"):
        load_correlator(tmp_path / "v.csv")
    (tmp_path / "t.csv").write_text("config,t,value\n1,0,1.0\n1,1.5,2.0\n")
    with pytest.raises(DataError, match=r"line 3: t = 1.5 is not a whole number"):
        load_correlator(tmp_path / "t.csv")
    (tmp_path / "f.csv").write_text("config,t,value\n1,0,1.0\n1,1\n")
    with pytest.raises(DataError, match=r"line 3 has 2 fields but the header has 3"):
        load_correlator(tmp_path / "f.csv")


def test_csv_and_text_with_byte_order_mark_and_spaces(tmp_path):
    # files saved by spreadsheet programs often start with a UTF-8 byte order mark
    (tmp_path / "c.csv").write_bytes(b"\xef\xbb\xbfconfig, t, value\n1, 0, 1.5\n1, 1, 2.5\n"
                                     b"2, 0, 3.5\n2, 1, 4.5\n")
    raw = load_correlator(tmp_path / "c.csv")
    np.testing.assert_array_equal(raw.values, [[1.5, 2.5], [3.5, 4.5]])
    np.testing.assert_array_equal(raw.config_ids, [1, 2])
    (tmp_path / "c.txt").write_bytes(b"\xef\xbb\xbf1.5 2.5\n3.5 4.5\n")
    np.testing.assert_array_equal(load_correlator(tmp_path / "c.txt").values,
                                  [[1.5, 2.5], [3.5, 4.5]])
