"""Point estimate of a particle cloud: the weighted mean of its dominant
cluster, with covariance, a confidence figure and a converged flag."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Estimate", "cluster_estimate"]


@dataclass(frozen=True)
class Estimate:
    """One estimate.

    Attributes
    ----------
    t : float, seconds
    xy : (2,) float, plan metres (on the graph when projected)
    cov : (2, 2) float, m², weighted covariance of the dominant cluster
    sigma_m : float, ``sqrt(trace(cov))``
    confidence : float in [0, 1], weight share of the dominant cluster
    converged : bool
    lost : bool, a likelihood collapse was detected at this update
    heading_rad : float, device heading in the plan (CCW from +x)
    """

    t: float
    xy: np.ndarray
    cov: np.ndarray
    sigma_m: float
    confidence: float
    converged: bool
    lost: bool
    heading_rad: float


def cluster_estimate(xy, w, *, radius_m):
    """Weighted mean and covariance of the dominant cluster.

    The particles are binned on a square grid of cell ``radius_m``; the 3 x 3
    block of cells with the most weight gives a centre (its weighted mean);
    the cluster is every particle within ``radius_m`` of that centre.

    Parameters
    ----------
    xy : (N, 2) float, metres
    w : (N,) float, weights, sum 1
    radius_m : float, ``inf`` = the whole cloud

    Returns
    -------
    mean : (2,) float ; cov : (2, 2) float ; confidence : float
    """
    xy = np.asarray(xy, dtype=float)
    w = np.asarray(w, dtype=float)
    if np.isfinite(radius_m):
        cell = np.floor(xy / radius_m).astype(np.int64)
        lo = cell.min(axis=0)
        cell -= lo
        span = cell.max(axis=0) + 1
        if span[0] * span[1] <= 4_000_000:
            mass = np.bincount(cell[:, 0] * span[1] + cell[:, 1], weights=w, minlength=span[0] * span[1])
            pad = np.pad(mass.reshape(span[0], span[1]), 1)
            box = sum(pad[i : i + span[0], j : j + span[1]] for i in range(3) for j in range(3))
            k = int(np.argmax(box))
            best = np.array([k // span[1], k % span[1]])
        else:  # a huge, sparse spread: the heaviest occupied cell
            keys, inv = np.unique(cell, axis=0, return_inverse=True)
            mass = np.bincount(inv.reshape(-1), weights=w, minlength=keys.shape[0])
            best = keys[np.argmax(mass)]
        near = (np.abs(cell[:, 0] - best[0]) <= 1) & (np.abs(cell[:, 1] - best[1]) <= 1)
        wn = w[near]
        centre = (wn @ xy[near]) / max(wn.sum(), 1e-300)
        d2 = np.sum((xy - centre) ** 2, axis=1)
        member = d2 <= radius_m * radius_m
    else:
        member = np.ones(xy.shape[0], dtype=bool)
    wc = w[member]
    conf = float(wc.sum())
    pc = xy[member]
    mean = (wc @ pc) / max(conf, 1e-300)
    dev = pc - mean
    cov = (dev * wc[:, None]).T @ dev / max(conf, 1e-300)
    return mean, cov, min(conf, 1.0)
