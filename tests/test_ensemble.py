"""align_observables: alignment by ids or by count, streams, folding, and its errors."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from plateaufit.data.ensemble import Ensemble, align_observables
from plateaufit.data.loaders import RawCorrelator
from plateaufit.data.transforms import fold
from plateaufit.errors import DataError


def raw(values, ids=None, streams=None, name="x.txt"):
    return RawCorrelator(values=np.asarray(values, dtype=float),
                         config_ids=None if ids is None else np.asarray(ids),
                         streams=None if streams is None else np.asarray(streams),
                         source=Path("/data") / name)


def align(raws, T, **kw):
    kw.setdefault("boundaries", {})
    kw.setdefault("fold", {})
    return align_observables(raws, name="ens", time_extent=T, **kw)


def test_by_count_folds_and_has_one_stream(make_correlator):
    a = make_correlator(n_cfg=10, T=8, seed=1)
    b = make_correlator(n_cfg=10, T=8, seed=2)
    ens = align({"pi": raw(a), "rho": raw(b)}, 8,
                boundaries={"pi": "periodic", "rho": "open"}, fold={"pi": True, "rho": False})
    assert isinstance(ens, Ensemble)
    np.testing.assert_array_equal(ens.correlators["pi"], fold(a, "periodic"))
    np.testing.assert_array_equal(ens.correlators["rho"], b)
    assert ens.folded == {"pi": True, "rho": False}
    assert ens.boundaries == {"pi": "periodic", "rho": "open"}
    assert ens.n_configs == 10 and ens.n_streams == 1 and ens.config_ids is None


def test_by_ids_orders_by_id_whichever_observable_comes_first():
    a = np.arange(12.0).reshape(4, 3)
    ids_a = [5, 1, 9, 3]
    perm = [2, 0, 3, 1]
    b = 100 + a[perm]
    by_id = np.argsort(ids_a)
    for raws in ({"a": raw(a, ids_a), "b": raw(b, np.asarray(ids_a)[perm])},
                 {"b": raw(b, np.asarray(ids_a)[perm]), "a": raw(a, ids_a)}):
        ens = align(raws, 3, fold={"a": False, "b": False})
        assert ens.aligned_by == "ids"
        np.testing.assert_array_equal(ens.config_ids, [1, 3, 5, 9])
        np.testing.assert_array_equal(ens.correlators["a"], a[by_id])
        np.testing.assert_array_equal(ens.correlators["b"], 100 + a[by_id])


def test_missing_ids_are_listed_per_observable():
    a = np.zeros((6, 3))
    with pytest.raises(DataError) as err:
        align({"pion": raw(a, [1, 2, 3, 4, 5, 6], name="p.h5"),
               "kaon": raw(a[:5], [1, 2, 3, 4, 7], name="k.csv")}, 3)
    msg = err.value.message
    assert "pion (p.h5) lacks 7" in msg and "kaon (k.csv) lacks 5, 6" in msg


def test_unequal_counts_without_ids_name_each_count():
    with pytest.raises(DataError, match=r"pion \(x.txt\): 6, kaon \(y.txt\): 5"):
        align({"pion": raw(np.zeros((6, 3))), "kaon": raw(np.zeros((5, 3)), name="y.txt")}, 3)


def test_wrong_column_count_names_file_and_both_numbers():
    with pytest.raises(DataError) as err:
        align({"pion": raw(np.zeros((6, 48)), name="pion.txt")}, 64)
    assert err.value.where == "/data/pion.txt"
    assert "48 timeslices" in err.value.message and "time_extent is 64" in err.value.message


def test_stream_counts_label_configurations_and_must_add_up():
    a = np.zeros((10, 4))
    ens = align({"a": raw(a)}, 4, stream_sizes=[6, 4])
    np.testing.assert_array_equal(ens.stream_labels, [0] * 6 + [1] * 4)
    assert ens.stream_sizes() == {0: 6, 1: 4}
    with pytest.raises(DataError) as err:
        align({"a": raw(a)}, 4, stream_sizes=[6, 3])
    assert err.value.where == "stream_sizes"
    assert "add up to 9" in err.value.message and "have 10" in err.value.message


def test_streams_from_file_are_made_contiguous():
    # first observable (no streams) orders configs interleaved; second gives the streams
    a = np.arange(6.0)[:, None] * np.ones((1, 2))
    ids = [1, 101, 2, 102, 3, 103]
    streams_b = [0, 0, 0, 1, 1, 1]
    ids_b = [1, 2, 3, 101, 102, 103]
    b = np.asarray([a[ids.index(i)] for i in ids_b]) + 50
    ens = align({"a": raw(a, ids), "b": raw(b, ids_b, streams_b)}, 2,
                fold={"a": False, "b": False})
    np.testing.assert_array_equal(ens.stream_labels, [0, 0, 0, 1, 1, 1])
    np.testing.assert_array_equal(ens.config_ids, [1, 2, 3, 101, 102, 103])
    np.testing.assert_array_equal(ens.correlators["a"][:, 0], [0, 2, 4, 1, 3, 5])
    np.testing.assert_array_equal(ens.correlators["b"], ens.correlators["a"] + 50)


def test_same_ids_in_two_streams_align_on_stream_and_id():
    a = np.arange(8.0).reshape(4, 2)
    ens = align({"a": raw(a, [1, 2, 1, 2], [0, 0, 1, 1]),
                 "b": raw(a[::-1] * 2, [2, 1, 2, 1], [1, 1, 0, 0])}, 2,
                fold={"a": False, "b": False})
    np.testing.assert_array_equal(ens.correlators["b"], 2 * a)
    assert ens.n_streams == 2


def test_file_streams_and_counts_must_agree():
    a = np.zeros((4, 2))
    r = raw(a, [1, 2, 3, 4], [0, 0, 1, 1])
    assert align({"a": r}, 2, stream_sizes=[2, 2]).n_streams == 2
    with pytest.raises(DataError, match=r"counts \[3, 1\] disagree.*\[2, 2\]"):
        align({"a": r}, 2, stream_sizes=[3, 1])


def test_a_single_configuration_is_an_error():
    with pytest.raises(DataError, match="at least two"):
        align({"a": raw(np.zeros((1, 4)))}, 4)


# --------------------------------------------------------------------------- order independence


def _assert_same_ensemble(e1, e2):
    assert set(e1.correlators) == set(e2.correlators)
    for n in e1.correlators:
        np.testing.assert_array_equal(e1.correlators[n], e2.correlators[n])
    np.testing.assert_array_equal(e1.stream_labels, e2.stream_labels)
    if e1.config_ids is None:
        assert e2.config_ids is None
    else:
        np.testing.assert_array_equal(e1.config_ids, e2.config_ids)
    assert e1.stream_names == e2.stream_names and e1.aligned_by == e2.aligned_by
    assert set(e1.reordered) == set(e2.reordered)


def _every_order(raws, T, **kw):
    import itertools

    names = list(raws)
    results = [align({n: raws[n] for n in perm}, T, **kw)
               for perm in itertools.permutations(names)]
    for other in results[1:]:
        _assert_same_ensemble(results[0], other)
    return results[0]


def test_permuting_the_observables_gives_identical_arrays():
    rng = np.random.default_rng(30)
    n, T = 12, 4
    base = rng.standard_normal((n, T))
    ids = np.arange(n) * 3 + 7
    streams = np.repeat([5, 2], [7, 5])        # stream 5 first in the files
    shuffle = rng.permutation(n)
    # a: ids and streams (CSV-like); b: the same configurations with ids only, rows
    # shuffled (HDF5-like, already sorted by the loader); c: streams and ids, rows
    # in another order
    a = raw(base, ids, streams, name="a.csv")
    order_b = np.argsort(ids[shuffle])
    b = raw(2 * base[shuffle][order_b], ids[shuffle][order_b], name="b.h5")
    c_rows = np.lexsort((ids, np.where(streams == 5, 0, 1)))
    c = raw(3 * base[c_rows], ids[c_rows], streams[c_rows], name="c.csv")
    ens = _every_order({"a": a, "b": b, "c": c}, T, fold={"a": False, "b": False, "c": False})
    assert ens.aligned_by == "ids"
    np.testing.assert_array_equal(ens.stream_labels, streams)   # stream 5, then stream 2
    np.testing.assert_array_equal(ens.config_ids, ids)
    np.testing.assert_array_equal(ens.correlators["b"], 2 * base)
    np.testing.assert_array_equal(ens.correlators["c"], 3 * base)
    # row by row (one file without ids), with stream counts
    d = raw(4 * base, name="d.txt")
    ens = _every_order({"b": b, "d": d}, T, stream_sizes=[7, 5],
                       fold={"b": False, "d": False})
    assert ens.aligned_by == "rows"
    np.testing.assert_array_equal(ens.correlators["d"], 2 * ens.correlators["b"])
    assert ens.stream_sizes() == {0: 7, 1: 5}


def test_streams_follow_first_appearance_and_ids_within_a_stream(tmp_path):
    # the file lists stream "b" (5 configurations) before "a" (7): `streams: [5, 7]`
    # counts in that order
    from plateaufit.data.loaders import load_correlator

    rng = np.random.default_rng(31)
    values = rng.standard_normal((12, 3))
    labels = ["b"] * 5 + ["a"] * 7
    ids = list(range(200, 205)) + list(range(100, 107))   # stream a has the lower ids
    lines = ["config,t,value,stream"]
    for i in range(12):
        lines += [f"{ids[i]},{t},{float(values[i, t])!r},{labels[i]}" for t in range(3)]
    (tmp_path / "c.csv").write_text("\n".join(lines) + "\n")
    r = load_correlator(tmp_path / "c.csv")
    ens = align({"x": r}, 3, stream_sizes=[5, 7], fold={"x": False})
    assert ens.stream_sizes() == {0: 5, 1: 7}
    assert ens.stream_names == {0: "b", 1: "a"}
    np.testing.assert_array_equal(ens.correlators["x"], values)
    with pytest.raises(DataError) as err:
        align({"x": r}, 3, stream_sizes=[7, 5])
    assert err.value.where == "stream_sizes"
    assert "[7, 5] disagree" in err.value.message and "b: 5, a: 7" in err.value.message


def test_files_listing_streams_in_different_orders():
    a = np.arange(8.0).reshape(4, 2)
    first = raw(a, [1, 2, 1, 2], [0, 0, 1, 1], name="p.csv")
    second = raw(a[::-1] * 2, [2, 1, 2, 1], [1, 1, 0, 0], name="k.csv")
    # without counts the order only sorts the blocks: labels in sorted order
    ens = _every_order({"p": first, "k": second}, 2, fold={"p": False, "k": False})
    np.testing.assert_array_equal(ens.stream_labels, [0, 0, 1, 1])
    # with counts it is ambiguous which count is whose
    with pytest.raises(DataError) as err:
        align({"p": first, "k": second}, 2, stream_sizes=[2, 2])
    assert err.value.where == "stream_sizes" and "different orders" in err.value.message
    assert "p (p.csv): 0, 1" in err.value.message and "k (k.csv): 1, 0" in err.value.message


def test_stream_counts_follow_each_files_own_order_of_configurations():
    # an HDF5 file stores stream A (ids 1000..1005) and then stream B (ids 0..2):
    # `streams: [6, 3]` counts in the file's order, so the loader's sort by id must not
    # move B's configurations into A's stream
    a_ids, b_ids = np.arange(1000, 1006), np.arange(0, 3)
    file_ids = np.concatenate([a_ids, b_ids])
    values = np.arange(18.0).reshape(9, 2)
    file_rows = np.argsort(file_ids, kind="stable")
    sorted_raw = RawCorrelator(values=values[file_rows], config_ids=file_ids[file_rows],
                               streams=None, source=Path("/data/c.h5"), file_rows=file_rows)
    ens = align({"c": sorted_raw}, 2, stream_sizes=[6, 3], fold={"c": False})
    assert ens.stream_sizes() == {0: 6, 1: 3}
    np.testing.assert_array_equal(ens.config_ids, file_ids)   # A, then B, by id within
    np.testing.assert_array_equal(ens.correlators["c"], values)
    assert ens.reordered == ("c",) and ens.stream_names is None
    # a text file (file order = Monte Carlo order) matched row by row cannot follow
    text = raw(values, name="t.txt")
    with pytest.raises(DataError) as err:
        align({"c": sorted_raw, "t": text}, 2, stream_sizes=[6, 3])
    assert err.value.where == "stream_sizes"
    assert "split the observables' configurations differently" in err.value.message
    assert "c (c.h5) stored its configurations out of id order" in err.value.message


def test_reordered_and_aligned_by_are_reported():
    a = np.zeros((3, 2))
    moved = RawCorrelator(values=a, config_ids=np.array([1, 2, 3]), streams=None,
                          source=Path("/data/m.h5"), file_rows=np.array([2, 0, 1]))
    ens = align({"m": moved, "n": raw(a, [1, 2, 3])}, 2, fold={"m": False, "n": False})
    assert ens.reordered == ("m",) and ens.aligned_by == "ids"
    assert moved.reordered and moved.n_moved == 3


def test_permuting_observables_read_from_files_gives_identical_arrays(tmp_path):
    import h5py

    from plateaufit.data.loaders import load_correlator

    rng = np.random.default_rng(32)
    n, T = 10, 4
    values = rng.standard_normal((n, T))
    ids = np.arange(n) * 2 + 50
    labels = ["r2"] * 6 + ["r1"] * 4
    rows = ["stream,config,t,value"] + [f"{labels[i]},{ids[i]},{t},{float(values[i, t])!r}"
                                        for i in range(n) for t in range(T)]
    order = rng.permutation(len(rows) - 1) + 1
    (tmp_path / "p.csv").write_text(rows[0] + "\n" + "\n".join(rows[k] for k in order) + "\n")
    perm = rng.permutation(n)
    with h5py.File(tmp_path / "k.h5", "w") as f:
        f["corr"] = 2 * values[perm]
        f["ids"] = ids[perm]
    raws = {"p": load_correlator(tmp_path / "p.csv"),
            "k": load_correlator(tmp_path / "k.h5", dataset="corr", ids_dataset="ids")}
    ens = _every_order(raws, T, fold={"p": False, "k": False})
    np.testing.assert_array_equal(ens.correlators["k"], 2 * ens.correlators["p"])
    assert set(ens.reordered) == {"k", "p"}
    # the stream the shuffled CSV shows first comes first; ids ascend within each
    shown_first = rows[order[0]].split(",")[0]
    assert ens.stream_names[int(ens.stream_labels[0])] == shown_first
    for s in np.unique(ens.stream_labels):
        assert np.all(np.diff(ens.config_ids[ens.stream_labels == s]) > 0)
