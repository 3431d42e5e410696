"""The fit cache: reruns refit only what changed, and give the same numbers bit for bit.

The ensemble is the invented ``osprey-t32`` of :mod:`parallel_fixtures` (three
states of known truth), with a second invented observable where a test needs
one. "Bit for bit" is checked on results.json, whose floats round-trip exactly
(Python's json writes the shortest repr), with the creation time and the
output folder left out.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import yaml

from parallel_fixtures import invented_sigma, write_run
from plateaufit.cli import main
from plateaufit.pipeline.cache import CACHE_DIR_NAME, FitCache, _feed
from plateaufit.pipeline.run import run_spec


def _numbers(results: dict) -> dict:
    """Everything of results.json that a fit computes (no time stamp, no folder)."""
    out = {k: v for k, v in results.items() if k not in ("output", "provenance")}
    out["data_sha256"] = results["provenance"]["data_sha256"]
    return out


def _run(spec: Path, out: Path, **kw):
    sessions: list = []
    results = run_spec(spec, out, plots=False, progress=False, jobs=1, session=sessions, **kw)
    return results, (sessions[0] if sessions else None)


def _two_fit_spec(tmp_path: Path, *, tmax_b=(10, 12)) -> Path:
    """Two observables, one fit each: ``a`` reads sigma.txt, ``b`` reads rho.txt."""
    spec_path = write_run(tmp_path, n_cfg=150, tmin=[3, 5], tmax=[10, 12], states=[1, 2])
    np.savetxt(tmp_path / "rho.txt", 0.7 * invented_sigma(150, seed=7), fmt="%.12e",
               header="invented correlator rho of the osprey-t32 ensemble")
    spec = yaml.safe_load(spec_path.read_text())
    spec["observables"]["rho"] = {"file": "rho.txt", "boundary": "periodic"}
    first = spec["fits"][0]
    spec["fits"] = [dict(first, name="a"),
                    dict(first, name="b", observables=["rho"], tmax=list(tmax_b))]
    spec_path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return spec_path


def _edit(spec_path: Path, change) -> None:
    spec = yaml.safe_load(spec_path.read_text())
    change(spec)
    spec_path.write_text(yaml.safe_dump(spec, sort_keys=False))


def test_an_unchanged_rerun_fits_nothing_and_gives_the_same_numbers_bit_for_bit(tmp_path):
    spec = _two_fit_spec(tmp_path)
    cold, first = _run(spec, tmp_path / "out")
    assert first.hits == 0 and first.misses > 0
    warm, second = _run(spec, tmp_path / "out")
    assert second.hits == first.misses and second.misses == 0
    plain, none = _run(spec, tmp_path / "plain", cache=False)
    assert none is None
    assert _numbers(warm) == _numbers(cold) == _numbers(plain)
    log = (tmp_path / "out" / "run.log").read_text()
    assert f"fit cache: {second.hits} of {second.hits} scan point(s) from the cache" in log


def test_changing_one_fits_range_refits_only_its_new_points(tmp_path):
    spec = _two_fit_spec(tmp_path, tmax_b=(10, 12))
    _, cold = _run(spec, tmp_path / "out")
    n_a = n_b = cold.misses // 2      # both fits scan the same 2 x 3 x 2 grid
    _edit(spec, lambda s: s["fits"][1].update(tmax=[10, 13]))    # one more tmax for b
    changed, again = _run(spec, tmp_path / "out")
    assert again.misses == 3 * 2          # tmin 3, 4, 5 at tmax 13, for 1 and 2 states
    assert again.hits == n_a + n_b
    # the old points of b and all of a are those of a run that never saw a cache
    plain, _ = _run(spec, tmp_path / "plain", cache=False)
    for name in ("a", "b"):
        for got, want in zip(changed["fits"][name]["scan"], plain["fits"][name]["scan"]):
            assert got == want, (name, got["tmin"], got["tmax"], got["states"])


def test_changing_a_data_file_refits_every_point_that_reads_it_and_no_other(tmp_path):
    spec = _two_fit_spec(tmp_path)
    _, cold = _run(spec, tmp_path / "out")
    np.savetxt(tmp_path / "rho.txt", 0.7 * invented_sigma(150, seed=8), fmt="%.12e")
    _, again = _run(spec, tmp_path / "out")
    assert again.misses == cold.misses // 2 and again.hits == cold.misses // 2


@pytest.mark.parametrize("change", [
    lambda s: s["fits"][0].update(priors={"E1": [0.8, 0.3]}),
    lambda s: s["covariance"].update(shrinkage="none"),
    lambda s: s["binning"].update(size=2),
], ids=["prior", "shrinkage", "bin size"])
def test_what_decides_a_fit_is_in_its_key(tmp_path, change):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 4], tmax=11, states=[1, 2])
    _, cold = _run(spec, tmp_path / "out")
    _edit(spec, change)
    _, again = _run(spec, tmp_path / "out")
    if "priors" in yaml.safe_load(spec.read_text())["fits"][0]:
        assert again.hits == 2 and again.misses == 2   # the one-state fits have no E1
    else:
        assert again.hits == 0 and again.misses == cold.misses


def test_a_fits_name_and_the_output_folder_are_not_in_its_key(tmp_path):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 4], tmax=11, states=1)
    _, cold = _run(spec, tmp_path / "out")
    _edit(spec, lambda s: s["fits"][0].update(name="renamed"))
    _, again = _run(spec, tmp_path / "elsewhere", cache=tmp_path / "out" / CACHE_DIR_NAME)
    assert again.hits == cold.misses and again.misses == 0


def test_a_new_engine_never_reads_old_entries(tmp_path, monkeypatch):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 4], tmax=11, states=1)
    _, cold = _run(spec, tmp_path / "out")
    original = FitCache.fingerprint.fget

    def edited(self):
        return {**original(self), "core": "an edited tolerance"}
    monkeypatch.setattr(FitCache, "fingerprint", property(edited))
    _, again = _run(spec, tmp_path / "out")
    assert again.hits == 0 and again.misses == cold.misses


def test_no_cache_neither_reads_nor_writes(tmp_path):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 4], tmax=11, states=1)
    assert main(["fit", str(spec), "--no-plots", "--quiet", "--no-cache", "--jobs", "1",
                 "--out", str(tmp_path / "out")]) == 0
    assert not (tmp_path / "out" / CACHE_DIR_NAME).exists()
    assert "fit cache" not in (tmp_path / "out" / "run.log").read_text()


def test_a_damaged_entry_is_recomputed_and_noted(tmp_path):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 5], tmax=11, states=1)
    cold, first = _run(spec, tmp_path / "out")
    entries = sorted((tmp_path / "out" / CACHE_DIR_NAME).glob("??/*.fit"))
    assert len(entries) == first.misses == 3
    blob = entries[0].read_bytes()
    entries[0].write_bytes(blob[: len(blob) // 2])       # as a full disk would leave it
    entries[1].write_bytes(b"not an entry at all")
    warm, again = _run(spec, tmp_path / "out")
    assert again.misses == 2 and again.hits == 1
    assert _numbers(warm) == _numbers(cold)
    log = (tmp_path / "out" / "run.log").read_text()
    assert "checksum mismatch" in log and "not a cache entry" in log
    assert log.count("recomputed") == 2
    _, third = _run(spec, tmp_path / "out")              # rewritten whole
    assert third.hits == 3


def test_the_entries_of_an_interrupted_run_are_kept(tmp_path, monkeypatch):
    spec = _two_fit_spec(tmp_path)
    import plateaufit.pipeline.run as run_module

    real = run_module.run_fit

    def stop_at_b(spec_, index, *args, **kwargs):
        if spec_.fits[index].name == "b":
            raise KeyboardInterrupt
        return real(spec_, index, *args, **kwargs)
    monkeypatch.setattr(run_module, "run_fit", stop_at_b)
    with pytest.raises(KeyboardInterrupt):
        _run(spec, tmp_path / "out")
    assert not (tmp_path / "out" / "results.json").exists()
    assert not list((tmp_path / "out" / CACHE_DIR_NAME).glob("??/.*.tmp"))
    monkeypatch.setattr(run_module, "run_fit", real)
    _, again = _run(spec, tmp_path / "out")
    assert again.hits == again.misses      # fit a from the cache, fit b fitted


def test_the_cache_is_no_output_of_the_run(tmp_path):
    """Not in the manifest, never removed as a stale output, and `report` is content."""
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 4], tmax=11, states=1)
    _run(spec, tmp_path / "out")
    manifest = (tmp_path / "out" / ".plateaufit-outputs").read_text()
    assert CACHE_DIR_NAME not in manifest
    _edit(spec, lambda s: s["fits"][0].update(name="renamed"))   # old scan table goes stale
    _, again = _run(spec, tmp_path / "out")
    assert again.misses == 0 and (tmp_path / "out" / CACHE_DIR_NAME).is_dir()
    assert main(["report", str(tmp_path / "out")]) == 0


def test_cache_size_and_clear_from_the_command_line(tmp_path, capsys):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 5], tmax=11, states=1)
    _run(spec, tmp_path / "out")
    assert main(["cache", str(tmp_path / "out"), "--size"]) == 0
    assert "3 entries" in capsys.readouterr().out
    assert main(["cache", str(tmp_path / "out" / CACHE_DIR_NAME)]) == 0   # the folder itself
    assert "3 entries" in capsys.readouterr().out
    assert main(["cache", str(tmp_path / "out"), "--clear"]) == 0
    assert "removed 3 entries" in capsys.readouterr().out
    assert not (tmp_path / "out" / CACHE_DIR_NAME).exists()
    assert (tmp_path / "out" / "results.json").is_file()                 # outputs untouched
    _, again = _run(spec, tmp_path / "out")
    assert again.hits == 0


def test_cache_of_a_missing_folder_is_a_one_line_error(tmp_path, capsys):
    assert main(["cache", str(tmp_path / "nowhere"), "--size"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("plateaufit: error: ") and "nowhere" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_a_value_with_no_canonical_form_is_refused_not_hashed_by_identity():
    import hashlib

    with pytest.raises(TypeError, match="no canonical form"):
        _feed(hashlib.sha256(), {"start": object()})
    a, b = hashlib.sha256(), hashlib.sha256()
    _feed(a, {"x": 1.0, "y": [1, 2]})
    _feed(b, {"y": [1, 2], "x": 1.0})          # mappings are sorted
    assert a.digest() == b.digest()
    c = hashlib.sha256()
    _feed(c, {"x": 1, "y": [1, 2]})            # an int is not the float 1.0
    assert c.digest() != a.digest()


def test_formula_fits_are_cached_too(tmp_path):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 5], tmax=11, states=1)
    _edit(spec, lambda s: s["fits"][0].update(
        model="formula", states=None,
        formula={"expression": "a * (exp(-m * t) + exp(-m * (T - t)))",
                 "params": {"a": 1.0, "m": 0.3}}))
    _edit(spec, lambda s: s["fits"][0].pop("states"))
    cold, first = _run(spec, tmp_path / "out")
    warm, second = _run(spec, tmp_path / "out")
    assert first.misses == 3 and second.hits == 3
    assert _numbers(warm) == _numbers(cold)
    assert "not written" not in (tmp_path / "out" / "run.log").read_text()


@pytest.mark.slow
def test_a_cached_rerun_of_a_pool_run_is_the_pools_numbers(tmp_path):
    spec = _two_fit_spec(tmp_path)
    pooled = run_spec(spec, tmp_path / "out", plots=False, progress=False, jobs=2)
    warm, again = _run(spec, tmp_path / "out")
    assert again.misses == 0
    assert _numbers(warm) == _numbers(pooled)
    assert json.loads((tmp_path / "out" / "results.json").read_text())["fits"] == warm["fits"]
