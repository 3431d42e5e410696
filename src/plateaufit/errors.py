"""User-facing errors.

Every error a user can cause (a bad spec, a missing or malformed file, data that
cannot support the requested fit) is raised as one of these. Each carries
``where`` -- the spec key path (``fits[1].tmin``) or the file -- and a message
that says what to do. The command line turns them into one line on stderr and
exit status 2; anything else escaping is a bug.
"""

from __future__ import annotations


class PlateaufitError(Exception):
    """Base class of the errors a user can fix.

    Parameters
    ----------
    where : str
        The spec key path (``fits[0].tmax``) or file path the problem is in.
        Empty when the problem has no single place.
    message : str
        What is wrong and what to do about it.
    """

    def __init__(self, where: str, message: str) -> None:
        self.where = str(where) if where is not None else ""
        self.message = message
        super().__init__(f"{self.where}: {message}" if self.where else message)

    def __reduce__(self):  # keep both arguments across a process boundary
        return (type(self), (self.where, self.message))


class SpecError(PlateaufitError):
    """The specification file is malformed or inconsistent."""


class DataError(PlateaufitError):
    """A data file is missing, unreadable, or unusable for the analysis."""


class FitError(PlateaufitError):
    """A requested fit cannot be set up (e.g. a singular covariance)."""
