"""One replica of ``plateaufit calibrate``: draw it, run the spec on it in memory, summarise.

:func:`run_replica` is the executor's task (module level, so it runs in worker
processes): ``(ReplicaJob, (index, seed)) -> ReplicaOutcome``. The job is
shipped once per chunk of replicas and holds everything that does not depend
on the data: the validated spec, the fitted noise model and the ensemble's
layout (names, streams, boundaries). A replica never touches the disk: its
data go to :func:`plateaufit.pipeline.run.run_analysis` as an ``Ensemble``.
Inside a replica the scans run serially; the parallelism is across replicas.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from plateaufit.data.ensemble import Ensemble
from plateaufit.errors import PlateaufitError
from plateaufit.pipeline.results import Results
from plateaufit.specfile import Spec
from plateaufit.stats.replicas import ReplicaModel

__all__ = ["ReplicaJob", "ReplicaOutcome", "run_replica", "outcome_of", "replica_ensemble"]

#: what a replica's analysis may raise besides the user-facing errors: recorded as a
#: failed replica (with the text), never ending the calibration
_NUMERICAL_ERRORS = (ArithmeticError, ValueError, np.linalg.LinAlgError)


@dataclass(frozen=True)
class ReplicaJob:
    """What every replica shares: the spec, the noise model, the ensemble's layout."""

    spec: Spec
    model: ReplicaModel
    template: Ensemble            # correlators emptied; names, streams, boundaries kept
    layout: dict[str, slice]      # observable -> its columns of a replica

    @classmethod
    def of(cls, spec: Spec, model: ReplicaModel, ensemble: Ensemble,
           layout: dict[str, slice]) -> ReplicaJob:
        empty = {name: np.zeros((0, v.shape[1])) for name, v in ensemble.correlators.items()}
        return cls(spec=spec, model=model, template=replace(ensemble, correlators=empty),
                   layout=dict(layout))


@dataclass(frozen=True)
class ReplicaOutcome:
    """What one replica's analysis reported (values and total errors), or why it failed."""

    index: int
    params: dict[str, dict[str, tuple[float, float]]] = field(default_factory=dict)
    p_values: dict[str, float] = field(default_factory=dict)
    chosen: dict[str, tuple[int, int, int]] = field(default_factory=dict)
    derived: dict[str, tuple[float, float]] = field(default_factory=dict)
    failure: str = ""
    seconds: float = 0.0

    @property
    def failed(self) -> bool:
        return bool(self.failure)


def replica_ensemble(job: ReplicaJob, data: np.ndarray) -> Ensemble:
    """The replica's data (n_cfg, p) as an Ensemble of the measured one's layout."""
    return replace(job.template, correlators={name: np.ascontiguousarray(data[:, sl])
                                              for name, sl in job.layout.items()})


def outcome_of(results: Results, index: int, seconds: float = 0.0) -> ReplicaOutcome:
    """The numbers a calibration needs from one run's results."""
    params, p_values, chosen = {}, {}, {}
    for name, fit in results.fits.items():
        params[name] = {p: (float(e.value), float(e.error)) for p, e in fit.chosen.params.items()}
        p_values[name] = float(fit.chosen.point.p_value)
        chosen[name] = tuple(int(k) for k in fit.chosen.point.key)
    derived = {name: (float(d.estimate.value), float(d.estimate.error))
               for name, d in results.derived.items()}
    return ReplicaOutcome(index=index, params=params, p_values=p_values, chosen=chosen,
                          derived=derived, seconds=seconds)


def run_replica(job: ReplicaJob, item: tuple[int, np.random.SeedSequence]) -> ReplicaOutcome:
    """Draw replica ``index`` from its own seed and run the spec on it."""
    from plateaufit.pipeline.run import RunLog, run_analysis

    index, seed = item
    start = time.perf_counter()
    ensemble = replica_ensemble(job, job.model.draw(seed))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # the base run showed the data's warnings
            results = run_analysis(job.spec, ensemble=ensemble, log=RunLog(),
                                   effective_masses=False)
    except PlateaufitError as err:
        return ReplicaOutcome(index=index, failure=str(err),
                              seconds=time.perf_counter() - start)
    except _NUMERICAL_ERRORS as err:
        return ReplicaOutcome(index=index, failure=f"{type(err).__name__}: {err}",
                              seconds=time.perf_counter() - start)
    return outcome_of(results, index, time.perf_counter() - start)
