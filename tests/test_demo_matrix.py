"""The demo's invented correlator matrix (plateaufit.demo.matrix) and its committed data."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from plateaufit.data.loaders import load_correlator
from plateaufit.demo import demo_truth
from plateaufit.demo.matrix import AXIAL, matrix_npz_bytes, simulate_matrix
from plateaufit.demo.scenario import STREAMS, TIME_EXTENT
from plateaufit.stats.resample import bin_samples

ROOT = Path(__file__).resolve().parents[1]
COMMITTED = ROOT / "examples" / "demo_data" / AXIAL.file


@pytest.fixture(scope="module")
def values():
    return simulate_matrix()


def test_four_states_for_three_operators_and_the_truth_of_every_level():
    assert AXIAL.size == 3 and len(AXIAL.energies) == 4     # the truncation is real
    assert all(len(row) == 4 for row in AXIAL.overlaps)
    assert list(AXIAL.energies) == sorted(AXIAL.energies)
    truth = demo_truth()
    assert [truth[f"axial_{n}"]["E0"] for n in range(3)] == list(AXIAL.energies[:3])


def test_the_archive_is_reproduced_byte_for_byte_and_read_back(values):
    assert matrix_npz_bytes(values) == COMMITTED.read_bytes()
    for entry in AXIAL.entries:
        raw = load_correlator(COMMITTED, array=entry)
        np.testing.assert_array_equal(raw.values, values[entry])
        assert raw.values.shape == (sum(n for _, n in STREAMS), TIME_EXTENT)


def _labels():
    return np.repeat(np.arange(len(STREAMS)), [n for _, n in STREAMS])


@pytest.mark.parametrize("entry", ["LL", "SW", "WS", "WW"])
def test_the_mean_of_every_entry_is_the_truth(values, entry):
    # Bins of 25 within each stream (many times tau_int) are close to independent;
    # Hotelling's T^2 of the binned mean against the exact matrix entry follows
    # (n - p) / (p (n - 1)) T^2 ~ F(p, n - p) (source: Hotelling 1931; scipy.stats.f)
    i, j = AXIAL.operators.index(entry[0]), AXIAL.operators.index(entry[1])
    t = np.arange(0, 17, 2)
    binned = bin_samples(values[entry], 25, _labels())[:, t]
    n, p = binned.shape
    d = binned.mean(axis=0) - AXIAL.truth(t, TIME_EXTENT)[i, j]
    t2 = n * d @ np.linalg.solve(np.cov(binned, rowvar=False), d)
    assert stats.f.sf((n - p) / (p * (n - 1)) * t2, p, n - p) > 1e-3


def test_c_ij_and_c_ji_share_part_of_their_noise_but_not_all(values):
    # the noise of C_LS and C_SL: the shared and pair parts (0.5 + 0.35 of the variance)
    # in common, the rest their own -> correlation 0.85 (exact, by construction)
    t = np.arange(TIME_EXTENT)
    rel = {e: values[e] / AXIAL.truth(t, TIME_EXTENT)[AXIAL.operators.index(e[0]),
                                                      AXIAL.operators.index(e[1])] - 1
           for e in ("LS", "SL", "LW")}
    r_pair = np.corrcoef(rel["LS"][:, 6], rel["SL"][:, 6])[0, 1]
    r_other = np.corrcoef(rel["LS"][:, 6], rel["LW"][:, 6])[0, 1]
    assert r_pair == pytest.approx(AXIAL.shared + AXIAL.pair, abs=0.04)
    assert r_other == pytest.approx(AXIAL.shared, abs=0.06)
    assert np.any(values["LS"] != values["SL"])


def test_noise_is_autocorrelated_as_documented(values):
    # exact AR(1): rho(1) = phi within each stream
    t = np.arange(TIME_EXTENT)
    rel = values["SS"] / AXIAL.truth(t, TIME_EXTENT)[1, 1] - 1
    first = STREAMS[0][1]
    rho = np.mean([np.corrcoef(s[1:, k], s[:-1, k])[0, 1]
                   for s in (rel[:first], rel[first:]) for k in (3, 8, 13)])
    assert rho == pytest.approx(AXIAL.phi, abs=0.06)
    assert AXIAL.tau_int == pytest.approx(1.5)


def test_relative_noise_grows_as_parisi_say(values):
    # relative noise ~ exp((E0 - m_pi) t), E_noise = 2 m_pi (G. Parisi, Phys. Rept. 103
    # (1984) 203)
    t = np.arange(TIME_EXTENT)
    rel = values["LL"] / AXIAL.truth(t, TIME_EXTENT)[0, 0] - 1
    np.testing.assert_allclose(rel.std(axis=0)[[3, 12]],
                               AXIAL.relative_noise(np.array([3, 12]), TIME_EXTENT), rtol=0.15)
