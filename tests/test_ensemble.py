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


def test_by_ids_reorders_to_first_observable():
    a = np.arange(12.0).reshape(4, 3)
    ids_a = [5, 1, 9, 3]
    perm = [2, 0, 3, 1]
    b = 100 + a[perm]
    ens = align({"a": raw(a, ids_a), "b": raw(b, np.asarray(ids_a)[perm])}, 3,
                fold={"a": False, "b": False})
    np.testing.assert_array_equal(ens.config_ids, ids_a)
    np.testing.assert_array_equal(ens.correlators["b"], 100 + a)


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
    ens = align({"a": raw(a)}, 4, stream_counts=[6, 4])
    np.testing.assert_array_equal(ens.streams, [0] * 6 + [1] * 4)
    assert ens.stream_counts() == {0: 6, 1: 4}
    with pytest.raises(DataError) as err:
        align({"a": raw(a)}, 4, stream_counts=[6, 3])
    assert err.value.where == "stream_counts"
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
    np.testing.assert_array_equal(ens.streams, [0, 0, 0, 1, 1, 1])
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
    assert align({"a": r}, 2, stream_counts=[2, 2]).n_streams == 2
    with pytest.raises(DataError, match=r"counts \[3, 1\] disagree.*\[2, 2\]"):
        align({"a": r}, 2, stream_counts=[3, 1])


def test_a_single_configuration_is_an_error():
    with pytest.raises(DataError, match="at least two"):
        align({"a": raw(np.zeros((1, 4)))}, 4)
