"""The demo analysis recovers every known energy of its invented data.

The demo data (examples/demo_data/, made by plateaufit.demo with a fixed seed)
are generated from known energies and amplitudes; fit_specs/demo.yaml carries
that truth. The whole demo analysis -- scans, model averages, a factorised fit,
derived quantities -- must land within 3 sigma (total error) of it.
"""

from pathlib import Path

import pytest

from plateaufit.pipeline.run import run_spec

pytestmark = pytest.mark.slow   # runs a process pool or a subprocess

DEMO_SPEC = Path(__file__).resolve().parents[1] / "fit_specs" / "demo.yaml"


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    return run_spec(DEMO_SPEC, out, plots=False, jobs=2, progress=False)


def test_every_known_energy_within_three_sigma(demo_results):
    truth = demo_results["truth"]
    checked = 0
    for fit_name, params in truth.items():
        if fit_name == "derived":
            continue
        chosen = demo_results["fits"][fit_name]["chosen"]["params"]
        for name, value in params.items():
            if not name.startswith("E"):
                continue
            entry = chosen[name]
            pull = (entry["value"] - value) / entry["error"]
            assert abs(pull) < 3.0, f"{fit_name}.{name}: pull {pull:+.2f}"
            checked += 1
    assert checked >= 8   # E0 and E1 of all four fits


def test_derived_quantities_within_three_sigma(demo_results):
    for name, value in demo_results["truth"]["derived"].items():
        entry = demo_results["derived"][name]
        assert abs(entry["value"] - value) < 3.0 * entry["error"], name


def test_the_demo_reports_no_warnings(demo_results):
    # a clean invented scenario: good p-values, converged fits, reliable tau_int
    assert demo_results["warnings"] == []
