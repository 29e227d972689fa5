"""The particle filter behind ``fingerprint.localise``, split by
mathematical role: ``state`` (the particles), ``motion`` (moving on the
graph), ``measurement`` (feature sets and likelihoods), ``resampling``
(schemes), ``estimate`` (point estimate), ``loop`` (one update) and
``settings``."""

from .estimate import Estimate, cluster_estimate
from .measurement import FEATURE_SETS, LIKELIHOODS, WindowObservation, window_observation
from .resampling import RESAMPLERS, get_resampler, systematic_resample
from .settings import FilterSettings
from .state import ParticleState, effective_sample_size, normalise_log_weights

__all__ = [
    "Estimate",
    "cluster_estimate",
    "FEATURE_SETS",
    "LIKELIHOODS",
    "WindowObservation",
    "window_observation",
    "RESAMPLERS",
    "get_resampler",
    "systematic_resample",
    "FilterSettings",
    "ParticleState",
    "effective_sample_size",
    "normalise_log_weights",
]
