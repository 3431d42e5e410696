"""Fuzzing load_correlator: whatever bytes or text a .txt or .csv file holds, the only
outcomes are a valid RawCorrelator or a DataError -- never another exception, never a hang.

Deterministic (``derandomize=True``) and small (short inputs, a few hundred
examples), so the whole file runs in a few seconds on CI.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from plateaufit.data.loaders import LARGEST_VALUE, RawCorrelator, load_correlator
from plateaufit.errors import DataError

FUZZ = settings(max_examples=150, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow])

# Characters a numeric file is made of, plus a few that break parsers.
NUMERIC = "0123456789.,-+eE \t\n#"
AWKWARD = NUMERIC + "naifNIF\r\"'x_\x0b\x0c\x1c\u00a0\u2028\u00e9;"


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


def check_outcome(path) -> RawCorrelator | None:
    """Load ``path``: a valid RawCorrelator or a DataError naming the file, nothing else."""
    try:
        raw = load_correlator(path)
    except DataError as err:
        assert str(path) in err.message and err.where == str(path)
        return None
    assert isinstance(raw, RawCorrelator)
    values = raw.values
    assert values.ndim == 2 and values.shape[0] >= 1 and values.shape[1] >= 1
    assert values.dtype == np.float64 and values.flags.c_contiguous
    assert np.all(np.isfinite(values)) and np.all(np.abs(values) <= LARGEST_VALUE)
    if raw.config_ids is not None:
        assert raw.config_ids.dtype == np.int64 and np.all(raw.config_ids >= 0)
        assert raw.config_ids.shape == (values.shape[0],)
        if raw.streams is None:
            assert np.all(np.diff(raw.config_ids) > 0)
        else:
            same = raw.streams[1:] == raw.streams[:-1]
            assert np.all(np.diff(raw.config_ids)[same] > 0)
            # every stream one contiguous block
            assert np.count_nonzero(~same) == np.unique(raw.streams).size - 1
    return raw


def write(folder, name: str, payload: bytes):
    path = folder / name
    path.write_bytes(payload)
    return path


@FUZZ
@given(payload=st.binary(max_size=300))
def test_arbitrary_bytes_as_text(folder, payload):
    check_outcome(write(folder, "bytes.txt", payload))


@FUZZ
@given(payload=st.binary(max_size=300))
def test_arbitrary_bytes_as_csv(folder, payload):
    check_outcome(write(folder, "bytes.csv", payload))


@FUZZ
@given(text=st.text(max_size=200))
def test_arbitrary_text_as_text_and_csv(folder, text):
    payload = text.encode("utf-8", errors="surrogatepass")
    check_outcome(write(folder, "text.txt", payload))
    check_outcome(write(folder, "text.csv", payload))


@FUZZ
@given(text=st.text(alphabet=AWKWARD, max_size=200))
def test_number_like_text(folder, text):
    payload = text.encode("utf-8")
    check_outcome(write(folder, "numbers.txt", payload))
    check_outcome(write(folder, "numbers.csv", b"config,t,value\n" + payload))


@FUZZ
@given(
    header=st.sampled_from(["config,t,value", "stream,config,t,value", "config,t,value,imag",
                            "t,value,config", "config,t,value,stream"]),
    rows=st.lists(
        st.tuples(st.sampled_from(["0", "1", "2", "7", "-1", "2.0", "1e3", "1e20", "nan", "a",
                                   "b", "9007199254740993", ""]),
                  st.sampled_from(["0", "1", "2", "3", "-1", "1.5", "1e12", "x"]),
                  st.sampled_from(["1.0", "-2.5e-3", "0", "1e308", "5e-320", "inf", "nan",
                                   "1e-200", "3", '"4"', "v"]),
                  st.sampled_from(["a", "b", "1", "2", "0.5", ""])),
        max_size=25),
)
def test_long_csv_of_plausible_rows(folder, header, rows):
    columns = header.split(",")
    lines = [header]
    for config, t, value, extra in rows:
        fields = {"config": config, "t": t, "value": value, "stream": extra, "imag": value}
        lines.append(",".join(fields[c] for c in columns))
    path = write(folder, "plausible.csv", ("\n".join(lines) + "\n").encode())
    raw = check_outcome(path)
    if raw is not None:
        # a complete table: every (stream, config) has every timeslice exactly once
        assert raw.values.shape[0] * raw.values.shape[1] == len(rows)


@FUZZ
@given(values=st.lists(st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64),
                                min_size=1, max_size=6), min_size=1, max_size=8))
def test_text_of_arbitrary_doubles_round_trips_or_is_refused(folder, values):
    text = "\n".join(" ".join(repr(x) for x in row) for row in values) + "\n"
    raw = check_outcome(write(folder, "doubles.txt", text.encode()))
    if raw is not None:
        np.testing.assert_array_equal(raw.values, np.asarray(values, dtype=float))
