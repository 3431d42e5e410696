"""User-facing errors keep their place and message, also across processes."""

import pickle

import pytest

from plateaufit.errors import DataError, FitError, PlateaufitError, SpecError


@pytest.mark.parametrize("cls", [SpecError, DataError, FitError])
def test_error_text_names_the_place(cls):
    err = cls("fits[1].tmin", "must be smaller than tmax")
    assert str(err) == "fits[1].tmin: must be smaller than tmax"
    assert isinstance(err, PlateaufitError)


def test_error_without_a_place_is_just_the_message():
    assert str(FitError("", "no fit converged")) == "no fit converged"


@pytest.mark.parametrize("cls", [SpecError, DataError, FitError])
def test_errors_survive_pickling(cls):
    # scan points run in worker processes; their errors come back pickled
    err = pickle.loads(pickle.dumps(cls("observables.pion.file", "not found")))
    assert type(err) is cls
    assert (err.where, err.message) == ("observables.pion.file", "not found")
