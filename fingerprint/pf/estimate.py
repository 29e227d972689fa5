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
    # per-coordinate 1-D arrays (views; contiguous when xy has contiguous columns)
    x, y = xy[:, 0], xy[:, 1]
    if np.isfinite(radius_m):
        cx = np.floor(x / radius_m).astype(np.int64)
        cy = np.floor(y / radius_m).astype(np.int64)
        cx -= cx.min()
        cy -= cy.min()
        sx, sy = int(cx.max()) + 1, int(cy.max()) + 1
        if sx * sy <= 4_000_000:
            key = cx * sy
            key += cy
            mass = np.bincount(key, weights=w, minlength=sx * sy)
            pad = np.pad(mass.reshape(sx, sy), 1)
            box = sum(pad[i : i + sx, j : j + sy] for i in range(3) for j in range(3))
            k = int(np.argmax(box))
            bx, by = k // sy, k % sy
        else:  # a huge, sparse spread: the heaviest occupied cell
            keys, inv = np.unique(np.column_stack([cx, cy]), axis=0, return_inverse=True)
            mass = np.bincount(inv.reshape(-1), weights=w, minlength=keys.shape[0])
            bx, by = keys[np.argmax(mass)]
        cx -= bx
        cy -= by
        near = (np.abs(cx) <= 1) & (np.abs(cy) <= 1)
        wn = w[near]
        sw = max(wn.sum(), 1e-300)
        dx = x - (wn @ x[near]) / sw
        dy = y - (wn @ y[near]) / sw
        dx *= dx
        dy *= dy
        dx += dy
        member = dx <= radius_m * radius_m
        wc, px, py = w[member], x[member], y[member]
    else:
        wc, px, py = w, x, y
    conf = float(wc.sum())
    c = max(conf, 1e-300)
    mean = np.array([wc @ px, wc @ py]) / c
    dx = px - mean[0]
    dy = py - mean[1]
    wdx = wc * dx
    cxy = (wdx @ dy) / c
    cov = np.array([[(wdx @ dx) / c, cxy], [cxy, (wc * dy) @ dy / c]])
    return mean, cov, min(conf, 1.0)
