"""``plateaufit batch``: many invented ensembles on one executor, one cache, one summary.

The ensembles are variants of the invented ``osprey-t32`` of
:mod:`parallel_fixtures` (fictional names ``osprey-a``, ``osprey-b``, ...,
each its own seed of the same known truth).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
import yaml

from parallel_fixtures import invented_sigma, write_run
from plateaufit.cli import main


def _ensemble(root: Path, name: str, seed: int, n_cfg: int = 120) -> Path:
    folder = root / name
    spec_path = write_run(folder, n_cfg=n_cfg, tmin=[3, 4], tmax=[10, 11], states=[1, 2],
                          values=invented_sigma(n_cfg, seed=seed), name=f"{name}.yaml")
    spec = yaml.safe_load(spec_path.read_text())
    spec["ensemble"]["name"] = name
    spec_path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return spec_path


def _rows(out: Path) -> list[dict]:
    with open(out / "summary.csv", newline="") as handle:
        return list(csv.DictReader(handle))


def test_a_batch_runs_every_spec_as_fit_would_and_lists_the_one_that_failed(tmp_path, capsys):
    specs = [_ensemble(tmp_path / "specs", f"osprey-{c}", seed) for c, seed in
             (("a", 1), ("b", 2), ("c", 3))]
    broken = tmp_path / "specs" / "broken.yaml"
    spec = yaml.safe_load(specs[0].read_text())
    spec["observables"]["sigma"]["file"] = "missing.txt"
    broken.write_text(yaml.safe_dump(spec))
    out = tmp_path / "batch"
    status = main(["batch", str(tmp_path / "specs" / "*" / "*.yaml"), str(broken), "--out",
                   str(out), "--jobs", "1", "--no-plots", "--quiet"])
    captured = capsys.readouterr()
    assert status == 2
    assert "Traceback" not in captured.err
    assert f"plateaufit: error: {broken}: " in captured.err and "missing.txt" in captured.err
    assert "1 of 4 spec(s) failed" in captured.err
    rows = _rows(out)
    assert sorted({r["ensemble"] for r in rows}) == ["osprey-a", "osprey-b", "osprey-c"]
    # each spec's results are those of `plateaufit fit` on it, bit for bit
    assert main(["fit", str(specs[1]), "--out", str(tmp_path / "alone"), "--no-plots",
                 "--quiet", "--jobs", "1", "--no-cache"]) == 0
    alone = json.loads((tmp_path / "alone" / "results.json").read_text())
    inside = json.loads((out / "osprey-b" / "results.json").read_text())
    assert alone["fits"] == inside["fits"] and alone["ensemble"] == inside["ensemble"]
    e0 = [r for r in rows if r["ensemble"] == "osprey-b" and r["parameter"] == "E0"][0]
    assert float(e0["value"]) == inside["fits"]["sigma"]["chosen"]["params"]["E0"]["value"]
    page = (out / "summary.html").read_text()
    assert "broken.yaml" in page and "missing.txt" in page
    # a rerun: every point from the shared cache, the same summary
    capsys.readouterr()
    assert main(["batch", *map(str, specs), "--out", str(out), "--jobs", "1", "--no-plots",
                 "--quiet"]) == 0
    err = capsys.readouterr().err
    assert err.count("scan point(s) from the cache") == 3
    n = len(json.loads((out / "osprey-a" / "results.json").read_text())["fits"]["sigma"]["scan"])
    assert err.count(f"{n} of {n} scan point(s) from the cache") == 3
    assert "\r" not in err                    # no progress bar when stderr is not a terminal
    assert [r for r in _rows(out) if r["ensemble"] != ""] == rows


def test_a_list_file_names_specs_relative_to_itself(tmp_path, capsys):
    a = _ensemble(tmp_path / "specs", "osprey-d", 4)
    listing = tmp_path / "specs" / "study.txt"
    listing.write_text("# the study\nosprey-d/osprey-d.yaml   # the only one\n\n")
    out = tmp_path / "batch"
    assert main(["batch", str(listing), "--out", str(out), "--jobs", "1", "--no-plots",
                 "--quiet", "--no-cache"]) == 0
    assert (out / "osprey-d" / "results.json").is_file()
    assert not (out / ".plateaufit-cache").exists()
    assert a.is_file()


@pytest.mark.parametrize("argument, words", [
    ("nothing/*.yaml", "matches no file"),
    ("absent.yaml", "no such file"),
])
def test_specs_that_cannot_be_found_stop_the_batch_with_one_line(tmp_path, capsys, argument,
                                                                   words, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["batch", argument, "--out", "b", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"plateaufit: error: {argument}") and words in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "b").exists()


def test_two_specs_writing_one_folder_is_an_error_of_the_second_only(tmp_path):
    a = _ensemble(tmp_path / "x", "osprey-e", 5)
    b = _ensemble(tmp_path / "y", "osprey-f", 6)
    spec = yaml.safe_load(b.read_text())
    spec["output"]["dir"] = str(tmp_path / "x" / "results")      # a's output folder
    b.write_text(yaml.safe_dump(spec))
    status = main(["batch", str(a), str(b), "--out", str(tmp_path / "batch"), "--jobs", "1",
                   "--no-plots", "--quiet"])
    assert status == 0       # with --out each spec has its own folder: no clash
    # without --out, the second spec would overwrite the first one's results
    from plateaufit.pipeline.batch import _clashes

    clash = _clashes({a: tmp_path / "x" / "results", b: tmp_path / "x" / "results"})
    assert list(clash) == [b] and "output.dir" in clash[b] and "--out" in clash[b]


def test_an_interrupted_batch_says_which_specs_finished(tmp_path, monkeypatch):
    from plateaufit.pipeline import run as run_module
    from plateaufit.pipeline.batch import run_batch
    from plateaufit.run_folder import interruption_message

    specs = [_ensemble(tmp_path / "specs", f"osprey-{c}", seed) for c, seed in
             (("i", 11), ("j", 12), ("k", 13))]
    real = run_module.run_spec
    calls = []

    def stop_at_the_second(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real(*args, **kwargs)
    monkeypatch.setattr(run_module, "run_spec", stop_at_the_second)
    with pytest.raises(KeyboardInterrupt) as caught:
        run_batch([str(s) for s in specs], tmp_path / "b", jobs=1, plots=False,
                  progress=False, cache=False)
    message = interruption_message(caught.value)
    assert message.startswith("1 of 3 spec(s) of the batch finished")
    assert "no batch summary was written" in message
    assert (tmp_path / "b" / "osprey-i" / "results.json").is_file()
    assert not (tmp_path / "b" / "summary.html").exists()


def test_without_a_cache_the_spec_lines_do_not_count_cached_points(tmp_path, capsys):
    spec = _ensemble(tmp_path / "specs", "osprey-m", 14)
    assert main(["batch", str(spec), "--out", str(tmp_path / "b"), "--jobs", "1",
                 "--no-plots", "--quiet", "--no-cache"]) == 0
    err = capsys.readouterr().err
    assert "osprey-m: done in" in err and "from the cache" not in err
