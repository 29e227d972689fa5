"""Baselines that show what the particle filter adds: dead reckoning alone
and sequence matching of the field by dynamic time warping (DTW).

Dead reckoning integrates the walk's motion increments (steps or odometry)
from the start checkpoint, rotated into the plan by the map's
``earth_to_plan_rad``; nothing corrects its drift.

Sequence matching (:func:`dtw_track`) resamples the measured field features
(vertical component ``b_up`` and horizontal magnitude ``b_h``, both
independent of heading) per metre walked, and compares them by DTW (Sakoe &
Chiba 1978, "Dynamic programming algorithm optimization for spoken word
recognition", IEEE Trans. ASSP 26(1)) with the mapped field along candidate
paths. Candidates start in the start region and follow the dead-reckoned
shape with a sampled start offset, rotation and scale, snapped onto the
floor graph (so they run along corridors and aisles and bend with the
dead-reckoned turns). The walk is matched window by window (default 30 m);
each window starts where the previous best match ended. The position at a
given distance walked is read off the best candidate through the DTW
alignment.
"""

from __future__ import annotations

import numpy as np

from fingerprint.errors import DataError
from fingerprint.records import Track

__all__ = [
    "dead_reckoning_track",
    "dtw_cost",
    "dtw_path",
    "dtw_track",
    "field_sequence",
    "densify_graph",
]


def _after(motion, start_time_s):
    keep = motion.t > (-np.inf if start_time_s is None else float(start_time_s))
    return motion.t[keep], motion.length_m[keep], motion.heading_rad[keep]


def dead_reckoning_track(walk, start_xy, *, start_time_s=None, earth_to_plan_rad=0.0):
    """Dead-reckoned positions from ``start_xy`` at ``start_time_s``.

    Parameters
    ----------
    walk : ProcessedWalk (its ``motion``)
    start_xy : (2,) float, metres, plan frame
    start_time_s : float, time of the start position; increments ending
        after it are integrated (default: all)
    earth_to_plan_rad : float, rotation of earth-frame headings into the plan

    Returns
    -------
    Track with (M+1,) times: the start time, then the end of every increment
    """
    t, length, heading = _after(walk.motion, start_time_s)
    h = heading + earth_to_plan_rad
    d = np.column_stack([length * np.cos(h), length * np.sin(h)])
    xy = np.vstack([np.zeros((1, 2)), np.cumsum(d, axis=0)]) + np.asarray(start_xy, dtype=float)
    t0 = float(start_time_s) if start_time_s is not None else (float(walk.t[0]) if walk.n else 0.0)
    if t.size and t[0] <= t0:
        t0 = float(t[0]) - 1e-6
    hd = np.concatenate([h[:1], h]) if h.size else np.zeros(1)
    return Track(t=np.concatenate([[t0], t]), xy=xy, heading_rad=hd)


# -- DTW ---------------------------------------------------------------------
def _cost_matrix(query, cands):
    """Squared Euclidean distances (K, n, m) between query (n, d) and
    candidate sequences (K, m, d)."""
    diff = query[None, :, None, :] - cands[:, None, :, :]
    return np.einsum("knmd,knmd->knm", diff, diff)


def _accumulate(cost, band):
    """DTW accumulated cost (K, n+1, m+1) with a Sakoe-Chiba band: cell (i, j)
    allowed when |i - j*(n/m)| <= band. Loops over the sequence positions,
    vectorised over the K candidates."""
    k, n, m = cost.shape
    acc = np.full((k, n + 1, m + 1), np.inf)
    acc[:, 0, 0] = 0.0
    ratio = n / m
    for i in range(1, n + 1):
        if band is None:
            js = range(1, m + 1)
        else:
            lo = max(1, int(np.floor((i - band) / ratio)))
            hi = min(m, int(np.ceil((i + band) / ratio)))
            js = range(lo, hi + 1)
        prev = acc[:, i - 1]
        row = acc[:, i]
        for j in js:
            best = np.minimum(np.minimum(prev[:, j], prev[:, j - 1]), row[:, j - 1])
            row[:, j] = cost[:, i - 1, j - 1] + best
    return acc


def dtw_cost(query, candidates, *, band=None):
    """DTW distance of one query sequence to each of K candidate sequences.

    Parameters
    ----------
    query : (n, d) float
    candidates : (K, m, d) float
    band : int or None, Sakoe-Chiba radius in query samples (None: no band)

    Returns
    -------
    (K,) float, sum of squared Euclidean distances along the best warping
    path (steps (1,0), (0,1), (1,1)); ``inf`` if the band allows no path
    """
    query = np.asarray(query, dtype=float)
    cands = np.asarray(candidates, dtype=float)
    if query.ndim == 1:
        query = query[:, None]
    if cands.ndim == 2:
        cands = cands[..., None]
    if query.shape[0] == 0 or cands.shape[1] == 0:
        raise DataError("DTW needs non-empty sequences")
    return _accumulate(_cost_matrix(query, cands), band)[:, -1, -1]


def dtw_path(query, candidate, *, band=None):
    """Best warping path between ``query`` (n, d) and ``candidate`` (m, d).

    Returns
    -------
    cost : float
    match : (n,) int, for each query index the last candidate index it is
        aligned with
    """
    query = np.asarray(query, dtype=float)
    cand = np.asarray(candidate, dtype=float)
    if query.ndim == 1:
        query = query[:, None]
    if cand.ndim == 1:
        cand = cand[:, None]
    acc = _accumulate(_cost_matrix(query, cand[None]), band)[0]
    n, m = query.shape[0], cand.shape[0]
    i, j = n, m
    match = np.zeros(n, dtype=np.int64)
    seen = np.zeros(n, dtype=bool)
    while i > 0 and j > 0:
        if not seen[i - 1]:
            match[i - 1] = j - 1
            seen[i - 1] = True
        steps = (acc[i - 1, j - 1], acc[i - 1, j], acc[i, j - 1])
        s = int(np.argmin(steps))
        if s == 0:
            i, j = i - 1, j - 1
        elif s == 1:
            i -= 1
        else:
            j -= 1
    return float(acc[n, m]), match


# -- sequence matching -----------------------------------------------------
def field_sequence(walk, *, start_time_s=None, step_m=1.0):
    """Heading-free field features resampled per ``step_m`` walked.

    Parameters
    ----------
    walk : ProcessedWalk
    start_time_s : float, distance counted from here

    Returns
    -------
    s_m : (L,) float, distance walked at each resampled point (0, step, ...)
    t_s : (L,) float, the time at which that distance was reached
    feats : (L, 2) float, µT: mean ``b_up`` and ``b_h`` of the samples in each
        ``step_m`` bin (empty bins interpolated)
    """
    t0 = walk.t[0] if start_time_s is None else float(start_time_s)
    mt, length, _ = _after(walk.motion, t0)
    cum_t = np.concatenate([[t0], mt])
    cum_s = np.concatenate([[0.0], np.cumsum(length)])
    keep = walk.t >= t0
    ts = walk.t[keep]
    b = walk.mag_earth_ut[keep]
    if ts.size == 0 or cum_s[-1] < step_m:
        return np.zeros(1), np.array([t0]), np.zeros((1, 2)) + np.nan
    s = np.interp(ts, cum_t, cum_s)
    feats_raw = np.column_stack([b[:, 2], np.hypot(b[:, 0], b[:, 1])])
    good = np.all(np.isfinite(feats_raw), axis=1)
    n_bins = int(np.floor(cum_s[-1] / step_m)) + 1
    idx = np.clip(np.round(s[good] / step_m).astype(np.int64), 0, n_bins - 1)
    cnt = np.bincount(idx, minlength=n_bins)
    feats = np.empty((n_bins, 2))
    grid = np.arange(n_bins) * step_m
    for c in range(2):
        tot = np.bincount(idx, weights=feats_raw[good, c], minlength=n_bins)
        have = cnt > 0
        feats[:, c] = np.interp(grid, grid[have], tot[have] / cnt[have]) if have.any() else np.nan
    # time at which each distance was reached (distance is non-decreasing)
    t_grid = np.interp(grid, cum_s, cum_t)
    return grid, t_grid, feats


def densify_graph(graph, *, spacing_m=0.25):
    """Points along every graph edge, at most ``spacing_m`` apart: (P, 2)."""
    n_seg = np.maximum(1, np.ceil(graph.length_m / spacing_m).astype(np.int64))
    edge = np.repeat(np.arange(graph.n_edges), n_seg + 1)
    first = np.concatenate([[0], np.cumsum(n_seg + 1)[:-1]])
    k = np.arange(edge.size) - np.repeat(first, n_seg + 1)
    frac = k / np.repeat(n_seg, n_seg + 1)
    return graph.point(edge, frac * graph.length_m[edge])


def dtw_track(
    walk,
    fmap,
    start_xy,
    *,
    start_time_s=None,
    rng,
    step_m=1.0,
    window_m=30.0,
    n_candidates=400,
    start_sigma_m=1.5,
    rotation_sigma_rad=np.radians(10.0),
    scale_sigma=0.06,
    snap_weight=4.0,
    band_frac=0.15,
    demean=False,
):
    """Positions from DTW matching of the field sequence against candidate
    graph paths (see the module docstring).

    Parameters
    ----------
    walk : ProcessedWalk
    fmap : FieldMap (plan-frame field and graph, ``earth_to_plan_rad``)
    start_xy : (2,) float, metres, the start region's centre
    rng : numpy.random.Generator
    window_m : float, length of each matched window
    n_candidates : int, candidate paths per window
    start_sigma_m, rotation_sigma_rad, scale_sigma : spread of the candidate
        start offsets (metres; the first window, later windows use half),
        rotations and length scales
    snap_weight : µT² per m² of mean squared distance between a candidate's
        dead-reckoned shape and the graph (penalises shapes the graph cannot
        hold)
    band_frac : Sakoe-Chiba radius as a fraction of the window length
    demean : compare the sequences after removing each one's mean over the
        window (a per-walk field offset, e.g. a residual calibration error,
        then cannot pull the match away; the shape of the sequence remains)

    Returns
    -------
    Track at every metre walked (times from the motion increments), with
    ``extra["dtw_cost"]`` (per point, the window's normalised cost)
    """
    from scipy.spatial import cKDTree

    start_xy = np.asarray(start_xy, dtype=float)
    t0 = walk.t[0] if start_time_s is None else float(start_time_s)
    s_grid, t_grid, obs = field_sequence(walk, start_time_s=t0, step_m=step_m)
    if s_grid.size < 2 or not np.all(np.isfinite(obs)):
        return Track(t=np.array([t0]), xy=start_xy[None].copy(), extra={"dtw_cost": np.zeros(1)})
    dr = dead_reckoning_track(walk, (0.0, 0.0), start_time_s=t0, earth_to_plan_rad=fmap.earth_to_plan_rad)
    dr_s = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(dr.xy, axis=0).T))])
    shape = np.column_stack([np.interp(s_grid, dr_s, dr.xy[:, 0]), np.interp(s_grid, dr_s, dr.xy[:, 1])])
    pts = densify_graph(fmap.graph)
    tree = cKDTree(pts)
    per = max(2, int(round(window_m / step_m)))
    out_xy = np.empty((s_grid.size, 2))
    out_cost = np.empty(s_grid.size)
    anchor = start_xy.copy()
    sigma = start_sigma_m
    lo = 0
    while lo < s_grid.size - 1:
        hi = min(s_grid.size - 1, lo + per)
        q = shape[lo : hi + 1] - shape[lo]  # (m, 2) shape relative to the window start
        m = q.shape[0]
        k = int(n_candidates)
        off = rng.normal(0.0, sigma, size=(k, 2))
        off[0] = 0.0  # the plain dead-reckoned shape is always a candidate
        rot = rng.normal(0.0, rotation_sigma_rad, size=k)
        rot[0] = 0.0
        sc = np.clip(1.0 + rng.normal(0.0, scale_sigma, size=k), 0.5, 1.5)
        sc[0] = 1.0
        c, s_ = np.cos(rot), np.sin(rot)
        qx = c[:, None] * q[None, :, 0] - s_[:, None] * q[None, :, 1]
        qy = s_[:, None] * q[None, :, 0] + c[:, None] * q[None, :, 1]
        cand = anchor + off[:, None, :] + sc[:, None, None] * np.stack([qx, qy], axis=-1)  # (k, m, 2)
        dist, nn = tree.query(cand.reshape(-1, 2))
        snapped = pts[nn].reshape(k, m, 2)
        snap2 = (dist.reshape(k, m) ** 2).mean(axis=1)
        mean, _, _ = fmap.lookup(snapped)
        cf = np.stack([mean[..., 2], np.hypot(mean[..., 0], mean[..., 1])], axis=-1)
        qo = obs[lo : hi + 1]
        if demean:
            qo = qo - qo.mean(axis=0)
            cf = cf - cf.mean(axis=1, keepdims=True)
        band = max(2, int(round(band_frac * m)))
        cost = dtw_cost(qo, cf, band=band) / (2 * m) + snap_weight * snap2
        cost = np.where(np.isfinite(cost), cost, np.inf)
        best = int(np.argmin(cost))
        _, match = dtw_path(qo, cf[best], band=band)
        out_xy[lo : hi + 1] = snapped[best, match]
        out_cost[lo : hi + 1] = cost[best]
        anchor = out_xy[hi].copy()
        sigma = 0.5 * start_sigma_m
        lo = hi
    # strictly increasing times for interpolation (several metres can end in
    # one long odometry increment)
    t_out = np.maximum.accumulate(t_grid + 1e-9 * np.arange(t_grid.size))
    return Track(t=t_out, xy=out_xy, extra={"dtw_cost": out_cost})
