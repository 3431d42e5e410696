"""Where an error of the numerical core belongs in the spec: the one mapping.

``stats/`` and ``fit/`` name their own arguments in errors (``size``,
``shrinkage``, ``tmin``, ``priors.E1``, ...). The pipeline calls them with
values from the spec and, when they refuse, re-raises the error at the spec
key the value came from: :func:`spec_key` is that translation, and
:func:`located` the context manager every pipeline step runs the core in.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from plateaufit.errors import PlateaufitError

__all__ = ["spec_key", "located", "GLOBAL_KEYS", "FIT_KEYS"]

#: argument of the numerical core -> spec key, wherever it is raised
GLOBAL_KEYS: dict[str, str] = {
    "size": "binning.size",
    "sizes": "binning.size",
    "taus": "binning.size",
    "n_configs": "ensemble.streams",
    "streams": "ensemble.streams",
    "stream_sizes": "ensemble.streams",
    "stream_counts": "ensemble.streams",
    "time_extent": "ensemble.time_extent",
    "shrinkage": "covariance.shrinkage",
    "target": "covariance.target",
    "eigenvalue_floor": "covariance.eigenvalue_floor",
    "per_sample": "covariance.per_sample",
    "covariance_matrix": "covariance.estimator",
}

#: first part of a fit-core argument path -> key of the fit entry (``fits[i].KEY``)
FIT_KEYS: dict[str, str] = {
    "tmin": "tmin", "tmax": "tmax", "states": "states", "form": "model", "model": "model",
    "priors": "priors", "bounds": "bounds", "start": "start", "formula": "formula",
    "oscillating": "oscillating", "constant": "constant", "factorised": "factorised",
    "operators": "factorised", "observables": "observables", "choose": "choose",
}


def spec_key(where: str, fit_index: int | None = None, default: str = "") -> str:
    """The spec key an error raised at ``where`` belongs to.

    Parameters
    ----------
    where : str
        ``err.where`` from the numerical core: an argument name, a path below
        one (``priors.E1``), a file path or spec key already (kept), or ''.
    fit_index : int, optional
        The fit entry the call was made for: fit arguments map to
        ``fits[i].KEY`` (``tmin`` -> ``fits[0].tmin``, ``form`` -> ``fits[0].model``).
    default : str
        The key for an error without a location (``where == ''``).

    Returns
    -------
    str
    """
    if not where:
        return default or (f"fits[{fit_index}]" if fit_index is not None else "")
    if where in GLOBAL_KEYS:
        return GLOBAL_KEYS[where]
    head, _, rest = where.partition(".")
    if fit_index is not None and head in FIT_KEYS:
        key = f"fits[{fit_index}].{FIT_KEYS[head]}"
        if head == "observables":
            return key   # the fit core names the observable; the spec lists them
        return f"{key}.{rest}" if rest else key
    return where      # a file path, or a spec key already (observables.NAME.file, ...)


@contextmanager
def located(fit_index: int | None = None, default: str = "") -> Iterator[None]:
    """Run numerical-core calls; re-raise their errors at the spec key (see :func:`spec_key`)."""
    try:
        yield
    except PlateaufitError as err:
        key = spec_key(err.where, fit_index, default)
        if key == err.where:
            raise
        raise type(err)(key, err.message) from None
