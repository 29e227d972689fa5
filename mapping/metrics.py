"""Accuracy metrics: errors at checkpoints, convergence, summary figures.

Everything here is plain numpy on arrays that the evaluation runner
(``mapping.evaluate``) collects; nothing reads files or runs a filter, so the
figures can be checked by hand.

Definitions (also written into every report):

- *error at a checkpoint*: Euclidean distance in the plan between the
  checkpoint and the estimated position at the checkpoint's time, the
  estimated track interpolated linearly in time (``Track.at``).
- *scored checkpoints*: in tracking mode the first checkpoint is the start
  and is not scored; in global mode every checkpoint is scored.
- *converged*: a walk is converged when its error stays under
  ``threshold_m`` (3 m) from some scored checkpoint on, up to its last one;
  the *convergence distance* is the distance walked from the start of the
  walk to that checkpoint.
- percentiles are numpy's default ("linear", type 7 of Hyndman & Fan 1996).
"""

from __future__ import annotations

import math

import numpy as np

from fingerprint.errors import DataError

__all__ = [
    "CONVERGED_THRESHOLD_M",
    "SUMMARY_KEYS",
    "checkpoint_errors",
    "scored_mask",
    "convergence",
    "error_stats",
    "summarise",
    "distance_walked_m",
    "json_number",
    "walk_bootstrap_ci",
    "percentile_difference",
]

#: A walk is converged once its error stays under this many metres.
CONVERGED_THRESHOLD_M = 3.0

#: Exactly the keys of ``summary.json``, in this order.
SUMMARY_KEYS = (
    "walks",
    "checkpoints",
    "median_error_m",
    "mean_error_m",
    "p75_error_m",
    "p95_error_m",
    "max_error_m",
    "converged_fraction",
    "median_convergence_distance_m",
    "dead_reckoning_median_error_m",
    "no_field_median_error_m",
    "no_field_p95_error_m",
    "runtime_s",
    "realtime_factor",
)


def checkpoint_errors(track, checkpoints):
    """Error of an estimated track at every checkpoint.

    Parameters
    ----------
    track : fingerprint.Track, estimated positions (K, 2) at times (K,)
    checkpoints : fingerprint.Checkpoints, true positions (C, 2) at times (C,)

    Returns
    -------
    errors_m : (C,) float, metres; the track is interpolated linearly in time
        (held constant before its first and after its last time)
    """
    if track.t.shape[0] == 0:
        raise DataError("the estimated track is empty: nothing to score", path=track.path)
    est = track.at(checkpoints.t)
    return np.hypot(est[:, 0] - checkpoints.xy[:, 0], est[:, 1] - checkpoints.xy[:, 1])


def scored_mask(n_checkpoints, mode):
    """(C,) bool: which checkpoints are scored in ``mode``.

    Tracking (and every mode that starts at the first checkpoint: no-field,
    dead-reckoning, dtw) skips the first; global scores all.
    """
    mask = np.ones(int(n_checkpoints), dtype=bool)
    if mode != "global" and n_checkpoints:
        mask[0] = False
    return mask


def distance_walked_m(motion, t_query, *, t0=None):
    """Distance walked (dead-reckoned step or odometry lengths) from ``t0``
    (default: before the first increment) to each time of ``t_query``.

    Parameters
    ----------
    motion : fingerprint.Motion, increments ending at ``motion.t`` (M,)
    t_query : (Q,) float, seconds

    Returns
    -------
    (Q,) float, metres; increments are counted when they end at or before
    the query time
    """
    t_query = np.asarray(t_query, dtype=float)
    cum = np.concatenate([[0.0], np.cumsum(motion.length_m)])
    idx = np.searchsorted(motion.t, t_query, side="right")
    out = cum[idx]
    if t0 is not None:
        out = out - cum[np.searchsorted(motion.t, float(t0), side="right")]
    return np.maximum(out, 0.0)


def convergence(errors_m, distance_m, *, threshold_m=CONVERGED_THRESHOLD_M):
    """Convergence of one walk from its scored errors.

    Parameters
    ----------
    errors_m : (C,) float, errors at the scored checkpoints, in time order
    distance_m : (C,) float, distance walked at those checkpoints
    threshold_m : float

    Returns
    -------
    converged : bool, error under ``threshold_m`` from some checkpoint on
    distance_m : float, distance walked at the first checkpoint of the final
        run under the threshold (NaN when not converged)
    index : int, that checkpoint's index (-1 when not converged)
    """
    errors_m = np.asarray(errors_m, dtype=float)
    if errors_m.size == 0:
        return False, math.nan, -1
    bad = np.flatnonzero(~(errors_m < threshold_m))
    first_good = 0 if bad.size == 0 else int(bad[-1]) + 1
    if first_good >= errors_m.size:
        return False, math.nan, -1
    return True, float(np.asarray(distance_m, dtype=float)[first_good]), first_good


def error_stats(errors_m):
    """Median, mean, p75, p95, max of pooled errors (NaN when empty).

    Returns
    -------
    dict with keys ``median``, ``mean``, ``p75``, ``p95``, ``max``, ``n``
    """
    e = np.asarray(errors_m, dtype=float).ravel()
    e = e[np.isfinite(e)]
    if e.size == 0:
        return {"median": math.nan, "mean": math.nan, "p75": math.nan, "p95": math.nan, "max": math.nan, "n": 0}
    p50, p75, p95 = np.percentile(e, [50, 75, 95])
    return {
        "median": float(p50),
        "mean": float(e.mean()),
        "p75": float(p75),
        "p95": float(p95),
        "max": float(e.max()),
        "n": int(e.size),
    }


def walk_bootstrap_ci(groups, statistic, *, n_boot=2000, level=0.95, rng=None):
    """Percentile-bootstrap interval of a statistic of pooled errors, whole
    walks resampled with replacement (the errors of one walk are correlated,
    so the walk is the unit; Efron & Tibshirani 1993, ch. 13, the percentile
    interval; resampling clusters: Davison & Hinkley 1997, ch. 3, hierarchical
    data, chapter from memory).

    Parameters
    ----------
    groups : list of tuples of arrays, one tuple per walk, one array per
        method in the tuple (a paired comparison keeps a walk's arrays
        together)
    statistic : callable, one pooled array per method -> float
        (e.g. ``lambda a, b: np.median(b) - np.median(a)``)
    rng : numpy.random.Generator (default ``default_rng(0)``)

    Returns
    -------
    (low, high) floats, or None with fewer than two walks
    """
    rng = np.random.default_rng(0) if rng is None else rng
    groups = [tuple(np.asarray(a, dtype=float).ravel() for a in g) for g in groups]
    if len(groups) < 2:
        return None
    k = len(groups[0])
    vals = np.empty(int(n_boot))
    for b in range(vals.size):  # a loop over resamples of a few dozen walks
        pick = rng.integers(0, len(groups), size=len(groups))
        vals[b] = statistic(*(np.concatenate([groups[i][j] for i in pick]) for j in range(k)))
    a = (1.0 - level) / 2.0
    lo, hi = np.quantile(vals, [a, 1.0 - a])
    return float(lo), float(hi)


def percentile_difference(pairs, q, *, n_boot=2000, rng=None):
    """Difference ``B - A`` of the ``q``-th percentile of pooled errors, with
    its 95 % interval from resampling walks (:func:`walk_bootstrap_ci`).

    Parameters
    ----------
    pairs : list of (errors A, errors B), one pair per walk (any shapes)
    q : float, percentile (50 = median)

    Returns
    -------
    (difference, low, high); low and high NaN with fewer than two walks
    """
    pairs = [(np.ravel(a), np.ravel(b)) for a, b in pairs]

    def stat(a, b):
        return float(np.percentile(b, q) - np.percentile(a, q))

    if not pairs:
        return math.nan, math.nan, math.nan
    d = stat(np.concatenate([a for a, _ in pairs]), np.concatenate([b for _, b in pairs]))
    ci = walk_bootstrap_ci(pairs, stat, n_boot=n_boot, rng=np.random.default_rng(0) if rng is None else rng)
    return (d, *(ci if ci is not None else (math.nan, math.nan)))


def json_number(x, digits=4):
    """A float for JSON: rounded, and None for NaN/inf (JSON has no NaN)."""
    if x is None:
        return None
    x = float(x)
    if not math.isfinite(x):
        return None
    return round(x, digits)


def summarise(
    errors_m,
    *,
    walks,
    converged,
    convergence_distance_m,
    dead_reckoning_errors_m,
    no_field_errors_m,
    runtime_s,
    walk_duration_s,
    localise_time_s,
):
    """The ``summary.json`` object (exactly :data:`SUMMARY_KEYS`).

    Parameters
    ----------
    errors_m : (C,) float, pooled errors of the scored checkpoints of all walks
    walks : int, walks scored
    converged : (W,) bool, per walk
    convergence_distance_m : (W,) float, per walk (NaN where not converged)
    dead_reckoning_errors_m, no_field_errors_m : (C',) float, pooled errors
        of the baselines over the same walks (None or empty when not run)
    runtime_s : float, wall time of the whole evaluation run
    walk_duration_s : float, total duration of the scored walks
    localise_time_s : float, time spent localising them with the method under
        test (the real-time factor is ``walk_duration_s / localise_time_s``)

    Returns
    -------
    dict, JSON-ready (NaN -> None)
    """
    s = error_stats(errors_m)
    converged = np.asarray(converged, dtype=bool)
    dist = np.asarray(convergence_distance_m, dtype=float)
    dist = dist[converged & np.isfinite(dist)]
    dr = error_stats([] if dead_reckoning_errors_m is None else dead_reckoning_errors_m)
    nf = error_stats([] if no_field_errors_m is None else no_field_errors_m)
    rtf = walk_duration_s / localise_time_s if localise_time_s and localise_time_s > 0 else math.nan
    out = {
        "walks": int(walks),
        "checkpoints": int(s["n"]),
        "median_error_m": json_number(s["median"]),
        "mean_error_m": json_number(s["mean"]),
        "p75_error_m": json_number(s["p75"]),
        "p95_error_m": json_number(s["p95"]),
        "max_error_m": json_number(s["max"]),
        "converged_fraction": json_number(converged.mean() if converged.size else math.nan),
        "median_convergence_distance_m": json_number(np.median(dist) if dist.size else math.nan),
        "dead_reckoning_median_error_m": json_number(dr["median"]),
        "no_field_median_error_m": json_number(nf["median"]),
        "no_field_p95_error_m": json_number(nf["p95"]),
        "runtime_s": json_number(runtime_s, 3),
        "realtime_factor": json_number(rtf, 2),
    }
    assert tuple(out) == SUMMARY_KEYS
    return out
