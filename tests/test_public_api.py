"""The top-level API named in the design's contract resolves to the real functions."""

import importlib

import numpy as np
import pytest

import plateaufit as pf
from plateaufit import errors


@pytest.mark.parametrize("name", sorted(pf._EXPORTS))
def test_every_export_is_the_object_of_its_home_module(name):
    home = importlib.import_module(pf._EXPORTS[name])
    assert getattr(pf, name) is getattr(home, name)
    assert callable(getattr(pf, name))          # functions and classes, nothing else


def test_the_error_classes_are_the_ones_the_library_raises():
    for name in ("PlateaufitError", "SpecError", "DataError", "FitError"):
        assert getattr(pf, name) is getattr(errors, name)
    assert issubclass(pf.SpecError, pf.PlateaufitError)


def test_unknown_attribute_is_an_attribute_error():
    with pytest.raises(AttributeError):
        pf.no_such_function  # noqa: B018


def test_contract_signatures_work_on_arrays():
    # exact: an uncorrelated series has tau_int = 1/2 in the 1/2 + sum rho convention
    rng = np.random.default_rng(7)
    x = rng.normal(size=(4000, 3))
    result = pf.tau_int(x[:, 0], S=1.5)
    assert abs(result.tau - 0.5) < 0.1
    assert result.window >= 0 and result.rho[0] == pytest.approx(1.0)
    binned = pf.bin_samples(x, 4, streams=np.repeat([0, 1], 2000))
    assert binned.shape == (1000, 3)
    samples = pf.jackknife_samples(binned)
    # exact: the jackknife error of a mean is the ordinary standard error
    np.testing.assert_allclose(pf.jackknife_error(samples),
                               binned.std(axis=0, ddof=1) / np.sqrt(len(binned)))
    cov = pf.covariance_of_mean(binned, shrinkage="ledoit-wolf", target="diagonal")
    assert cov.matrix.shape == (3, 3) and 0.0 <= cov.shrinkage <= 1.0
