"""Statistical core: autocorrelation, resampling, covariance of the mean, effective masses,
the variational method (GEVP), synthetic replicas.

numpy arrays in, numpy arrays and small frozen dataclasses out; nothing here
knows about specification files.
"""

from plateaufit.stats.autocorr import (
    BinningStudy,
    BinningWarning,
    ShortChainWarning,
    TauIntResult,
    binning_study,
    choose_bin_size,
    tau_int,
    tau_int_derived,
)
from plateaufit.stats.covariance import (
    CovarianceResult,
    MeanCovariance,
    covariance_of_mean,
    ledoit_wolf_intensity,
    oas_intensity,
    per_sample_covariances,
)
from plateaufit.stats.autocov_matrix import CommonWindow, common_window
from plateaufit.stats.gamma_covariance import GammaCovariance, GammaCovarianceResult, gamma_covariance
from plateaufit.stats.replicas import REPLICA_METHODS, ReplicaModel, fit_replica_model, stream_labels
from plateaufit.stats.effmass import EffectiveMass, effective_mass, effective_mass_jackknife
from plateaufit.stats.gevp import GevpResult, asymmetry_significance, solve_gevp, symmetrise
from plateaufit.stats.principal import (
    Overlaps,
    PrincipalEffectiveEnergy,
    half_t0_effective_energy,
    overlaps,
    principal_effective_energy,
)
from plateaufit.stats.resample import (
    bin_samples,
    bin_streams,
    bootstrap_samples,
    jackknife_bias_corrected,
    jackknife_covariance,
    jackknife_error,
    jackknife_samples,
    stream_blocks,
)

__all__ = [
    "TauIntResult",
    "ShortChainWarning",
    "BinningWarning",
    "tau_int",
    "tau_int_derived",
    "BinningStudy",
    "binning_study",
    "choose_bin_size",
    "bin_samples",
    "bin_streams",
    "stream_blocks",
    "jackknife_samples",
    "jackknife_error",
    "jackknife_covariance",
    "jackknife_bias_corrected",
    "bootstrap_samples",
    "CovarianceResult",
    "covariance_of_mean",
    "MeanCovariance",
    "ledoit_wolf_intensity",
    "oas_intensity",
    "per_sample_covariances",
    "GammaCovarianceResult",
    "GammaCovariance",
    "gamma_covariance",
    "CommonWindow",
    "common_window",
    "REPLICA_METHODS",
    "ReplicaModel",
    "fit_replica_model",
    "stream_labels",
    "EffectiveMass",
    "effective_mass",
    "effective_mass_jackknife",
    "symmetrise",
    "asymmetry_significance",
    "GevpResult",
    "solve_gevp",
    "PrincipalEffectiveEnergy",
    "principal_effective_energy",
    "half_t0_effective_energy",
    "Overlaps",
    "overlaps",
]
