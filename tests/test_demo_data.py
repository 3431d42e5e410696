"""The invented demo scenario (plateaufit.demo) and its committed data."""

from __future__ import annotations

import math
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
from emcee.autocorr import integrated_time
from scipy import stats

from plateaufit.data.ensemble import align_observables
from plateaufit.data.loaders import load_correlator
from plateaufit.demo import (DEMO_DERIVED, OBSERVABLES, STREAMS, TIME_EXTENT, demo_derived_truth,
                             demo_spec_text, demo_truth,
                             format_truth_table, generate_demo_data, hdf5_library_version,
                             simulate)
from plateaufit.stats.resample import bin_samples

ROOT = Path(__file__).resolve().parents[1]
COMMITTED = ROOT / "examples" / "demo_data"
SPEC = ROOT / "fit_specs" / "demo.yaml"


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_data")
    return out, generate_demo_data(out)


@pytest.fixture(scope="module")
def sim():
    return simulate()


def _stream_codes(sim):
    labels = [label for label, _ in STREAMS]
    return np.array([labels.index(s) for s in sim["streams"]])


def test_generated_files_match_the_committed_ones_byte_for_byte(generated):
    out, info = generated
    assert sorted(info["files"]) == sorted(p.name for p in COMMITTED.iterdir())
    for name in info["files"]:
        new, old = (out / name).read_bytes(), (COMMITTED / name).read_bytes()
        if name.endswith(".h5"):
            with h5py.File(COMMITTED / name) as h5:
                same_library = h5.attrs["written_with"] == hdf5_library_version()
            if not same_library:
                # another HDF5 library lays the file out differently: compare the contents
                with h5py.File(COMMITTED / name) as a, h5py.File(out / name) as b:
                    assert sorted(a) == sorted(b)
                    for key in a:
                        assert a[key][()].tobytes() == b[key][()].tobytes()
                continue
        assert new == old, f"{name} differs from examples/demo_data/{name}"


def test_data_are_small():
    # 2.7 MB for the four correlators, 1.7 MB for the 3 x 3 matrix (nine float32 arrays)
    assert sum(p.stat().st_size for p in COMMITTED.iterdir()) < 5_000_000


def test_spec_file_is_the_generated_spec_and_carries_the_truth():
    text = SPEC.read_text(encoding="utf-8")
    assert text == demo_spec_text()
    spec = yaml.safe_load(text)
    assert spec["truth"] == {**demo_truth(), "derived": demo_derived_truth()}
    assert {f["name"] for f in spec["fits"]} == set(demo_truth())
    assert spec["derived"] == DEMO_DERIVED
    for name, obs in spec["observables"].items():
        assert (SPEC.parent / obs["file"]).is_file(), name


def test_spec_passes_validation():
    from plateaufit.pipeline.rules import load_spec

    spec = load_spec(SPEC)
    assert spec.ensemble.time_extent == TIME_EXTENT
    assert [f.name for f in spec.fits] == list(demo_truth())
    assert spec.derived == DEMO_DERIVED


def test_derived_truth_follows_from_the_fits_truth():
    # the derived quantities' truth is the expressions evaluated on the fits' truth
    from plateaufit.fit.derived import DerivedExpression

    truth = demo_truth()
    known = {fit: list(params) for fit, params in truth.items()}
    for name, expression in DEMO_DERIVED.items():
        expr = DerivedExpression(expression, known)
        values = {ref: truth[fit][param] for ref, (fit, param) in expr.parts.items()}
        assert demo_derived_truth()[name] == pytest.approx(float(expr(values)), rel=1e-12)


def test_loaders_read_back_what_was_generated_with_ids_and_streams(generated, sim):
    out, _ = generated
    raws = {obs.name: load_correlator(out / obs.file, format=obs.format,
                                      dataset="vector" if obs.format == "hdf5" else None,
                                      ids_dataset="config_ids" if obs.format == "hdf5" else None)
            for obs in OBSERVABLES}
    for name, raw in raws.items():
        np.testing.assert_array_equal(raw.values, sim["values"][name])
    # the CSV knows its streams (a, b) and configuration ids; HDF5 the same ids
    csv = raws["nucleon"]
    np.testing.assert_array_equal(np.bincount(csv.streams), [n for _, n in STREAMS])
    np.testing.assert_array_equal(csv.config_ids, sim["config_ids"])
    np.testing.assert_array_equal(raws["vector"].config_ids, sim["config_ids"])
    assert csv.config_ids[600] == 21000 and np.all(np.diff(csv.config_ids[:600]) == 8)
    ens = align_observables(raws, name="heron", time_extent=TIME_EXTENT,
                            stream_sizes=[n for _, n in STREAMS],
                            boundaries={"nucleon": "antiperiodic"}, fold={"nucleon": False})
    assert ens.n_configs == 1000 and ens.n_streams == 2
    assert ens.correlators["pion_ss"].shape == (1000, TIME_EXTENT // 2 + 1)
    assert ens.correlators["nucleon"].shape == (1000, TIME_EXTENT)


@pytest.mark.parametrize("obs", OBSERVABLES, ids=lambda o: o.name)
def test_the_mean_of_the_data_is_the_truth(sim, obs):
    # Bins of 25 within each stream (many times tau_int) are close to independent;
    # Hotelling's T^2 of the binned mean against the exact correlator follows
    # (n - p) / (p (n - 1)) T^2 ~ F(p, n - p) (source: Hotelling 1931; scipy.stats.f).
    binned = bin_samples(sim["values"][obs.name], 25, _stream_codes(sim))
    t = np.arange(0, 17, 2)
    n, p = binned.shape[0], t.size
    x = binned[:, t]
    d = x.mean(axis=0) - obs.truth(t, TIME_EXTENT)
    cov = np.cov(x, rowvar=False)
    t2 = n * d @ np.linalg.solve(cov, d)
    p_value = stats.f.sf((n - p) / (p * (n - 1)) * t2, p, n - p)
    assert p_value > 1e-3
    pulls = d / np.sqrt(np.diag(cov) / n)
    assert np.all(np.abs(pulls) < 4.5)


def _relative_noise(sim, obs):
    t = np.arange(TIME_EXTENT)
    return sim["values"][obs.name] / obs.truth(t, TIME_EXTENT) - 1.0


@pytest.mark.parametrize("obs", OBSERVABLES, ids=lambda o: o.name)
def test_noise_is_autocorrelated_as_documented(sim, obs):
    noise = _relative_noise(sim, obs)
    slices = [2, 6, 10, 14]
    streams = [noise[:600], noise[600:]]
    # exact AR(1): rho(1) = phi; over 1000 configurations x 4 timeslices its estimate
    # scatters by about 0.02
    rho1 = np.mean([np.corrcoef(s[1:, t], s[:-1, t])[0, 1] for s in streams for t in slices])
    assert rho1 == pytest.approx(obs.phi, abs=0.06)
    # exact AR(1): tau_int = 1/2 + phi / (1 - phi). emcee's integrated_time is
    # 1 + 2 sum rho = 2 tau_int (source: emcee.autocorr); with chains of 400 its
    # estimate scatters by tens of percent, hence the loose tolerance.
    walkers = np.concatenate([s[:400, slices] for s in streams], axis=1)[:, :, None]
    tau_emcee = float(integrated_time(walkers, quiet=True)[0])
    assert tau_emcee / 2 == pytest.approx(obs.tau_int, rel=0.5)


def test_relative_noise_grows_as_parisi_say(sim):
    # relative noise ~ exp((E0 - E_noise/2) t): constant for the pion, growing with
    # (E0 - 3/2 m_pi) for the nucleon (G. Parisi, Phys. Rept. 103 (1984) 203)
    for obs in OBSERVABLES:
        rel = _relative_noise(sim, obs).std(axis=0)
        t = np.array([3, 9])
        expected = obs.relative_noise(t, TIME_EXTENT)
        np.testing.assert_allclose(rel[t], expected, rtol=0.15)
    pion = next(o for o in OBSERVABLES if o.name == "pion_ss")
    nucleon = next(o for o in OBSERVABLES if o.name == "nucleon")
    assert pion.relative_noise(np.array([12.0]), TIME_EXTENT)[0] == pytest.approx(pion.noise0)
    growth = nucleon.relative_noise(np.array([12.0]), TIME_EXTENT)[0] / nucleon.noise0
    assert growth == pytest.approx(math.exp((0.56 - 0.30) * 12))


def test_neighbouring_timeslices_are_strongly_correlated(sim):
    noise = _relative_noise(sim, OBSERVABLES[0])
    corr = np.corrcoef(noise[:, 8], noise[:, 9])[0, 1]
    assert 0.8 < corr < 0.99


def test_truth_table_shows_value_error_truth_and_pull():
    results = {"fits": {"pion": {"chosen": {"params": {
        "E0": {"value": 0.2010, "error": 0.0005},
        "E1": {"value": 0.70, "error": 0.02}}}}},
        "truth": {"pion": {"E0": 0.2, "E1": 0.72, "A0.x": 1.0}}}
    table = format_truth_table(results)
    lines = table.splitlines()
    assert lines[0].split() == ["fit", "parameter", "fitted", "truth", "pull", "(sigma)"]
    e0 = next(line for line in lines if " E0 " in line).split()
    assert e0 == ["pion", "E0", "0.20100(50)", "0.2", "+2.00"]
    e1 = next(line for line in lines if " E1 " in line).split()
    assert e1[-1] == "-1.00"
    assert "(not fitted)" in next(line for line in lines if "A0.x" in line)


def test_truth_table_lists_the_derived_quantities():
    results = {"fits": {"pion": {"chosen": {"params": {
        "E0": {"value": 0.2010, "error": 0.0005}}}}},
        "derived": {"gap_pion": {"value": 0.53, "error": 0.005}},
        "truth": {"pion": {"E0": 0.2}, "derived": {"gap_pion": 0.52, "ratio_vector_pion": 2.2}}}
    lines = format_truth_table(results).splitlines()
    gap = next(line for line in lines if " gap_pion " in line).split()
    assert gap == ["derived", "gap_pion", "0.5300(50)", "0.52", "+2.00"]
    assert "(not computed)" in next(line for line in lines if "ratio_vector_pion" in line)
