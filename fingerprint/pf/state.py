"""The particle-filter state: one frozen dataclass of arrays, leading axis =
particle. Steps of the filter take a state and return a new one."""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np

__all__ = ["ParticleState", "normalise_log_weights", "effective_sample_size", "take_rows"]


@dataclass(frozen=True, eq=False)
class ParticleState:
    """N particles on a floor graph with their nuisance states.

    Attributes
    ----------
    edge : (N,) int64, graph edge index
    offset_m : (N,) float, metres from ``edges[edge, 0]`` along the edge
    direction : (N,) int8, +1 = travelling towards ``edges[edge, 1]``, -1 back
    heading_offset_rad : (N,) float, added to every earth heading before it is
        rotated into the plan (residual misalignment of the device heading)
    scale : (N,) float, step-length (or odometry) scale factor
    bias_ut : (N, 3) float, µT, mean of the per-particle field-bias estimate
        (the filter keeps it and ``bias_var_ut2`` as float32, column-major):
        components (forward, left, up) in the device frame, so the horizontal
        part turns with the device as a residual calibration offset does
    bias_var_ut2 : (N, 3) float, µT², variance of that estimate (the bias is
        marginalised with a per-particle Kalman update, see
        ``fingerprint.pf.measurement``)
    log_w : (N,) float, log-weights, normalised (log-sum-exp = 0)
    """

    edge: np.ndarray
    offset_m: np.ndarray
    direction: np.ndarray
    heading_offset_rad: np.ndarray
    scale: np.ndarray
    bias_ut: np.ndarray
    bias_var_ut2: np.ndarray
    log_w: np.ndarray

    @property
    def n(self) -> int:
        return int(self.edge.shape[0])

    def replace(self, **changes) -> "ParticleState":
        """A copy with some arrays replaced."""
        return replace(self, **changes)

    def take(self, index) -> "ParticleState":
        """The particles at ``index`` ((M,) int), log-weights reset to uniform."""
        index = np.asarray(index, dtype=np.int64)
        arrays = {f.name: take_rows(getattr(self, f.name), index) for f in fields(self) if f.name != "log_w"}
        return ParticleState(**arrays, log_w=np.full(index.shape[0], -np.log(index.shape[0])))

    def weights(self):
        """(N,) float, normalised linear weights."""
        top = np.max(self.log_w) if self.log_w.size else -np.inf
        if not np.isfinite(top):
            return np.exp(self.log_w - np.logaddexp.reduce(self.log_w))
        w = self.log_w - top
        np.exp(w, out=w)
        w *= 1.0 / np.sum(w)
        return w


def take_rows(a, index):
    """``np.take(a, index, axis=0)`` that keeps the memory layout of a 2-D
    ``a``: a column-major (N, k) array gives a column-major result, gathered
    one contiguous column at a time."""
    if a.ndim == 2 and a.flags.f_contiguous and not a.flags.c_contiguous:
        return np.take(a.T, index, axis=1).T
    return np.take(a, index, axis=0)


def normalise_log_weights(log_w):
    """Log-weights shifted so that their log-sum-exp is 0.

    Parameters
    ----------
    log_w : (N,) float; ``-inf`` allowed, NaN is not

    Returns
    -------
    log_w : (N,) float, normalised
    log_total : float, log-sum-exp of the input (``-inf`` when every weight is 0)
    """
    log_w = np.asarray(log_w, dtype=float)
    top = np.max(log_w)
    if not np.isfinite(top):
        return log_w, -np.inf
    log_total = top + np.log(np.sum(np.exp(log_w - top)))
    return log_w - log_total, float(log_total)


def effective_sample_size(log_w):
    """Kish's effective sample size ``1 / sum(w**2)`` of (N,) log-weights
    (normalised inside)."""
    w, _ = normalise_log_weights(log_w)
    w = np.exp(w)
    return float(1.0 / np.sum(w * w))
