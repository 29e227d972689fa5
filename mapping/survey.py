"""Positions for every sample of a survey walk.

* With a position track (a robot localised by lidar or motion capture, or
  the simulator's truth) positions are interpolated from it.
* Otherwise they are pinned to the checkpoints. Between two consecutive
  checkpoints the dead-reckoning path (``walk.motion`` rotated into the plan
  by ``earth_to_plan_rad``) is mapped by the similarity transform (scale and
  rotation, a complex ratio) that takes its displacement onto the
  checkpoints' displacement, so the segment starts and ends on them.
  A fitted scale or rotation outside the allowed range is clamped and the
  rest of the misfit is spread along the segment in proportion to the
  distance walked. Positions outside free space are pulled back into it.

Per-sample uncertainty (1-sigma, metres): the tap error of the checkpoints
(about a metre by hand on a plan; kept whole between checkpoints, since
the taps of one walker are not independent) plus a random-walk drift pinned
at both ends (a Brownian bridge, variance ``q * d_a * d_b / (d_a + d_b)``
with ``d_a``, ``d_b`` the distances walked from the previous and to the
next checkpoint), so it grows with the distance from the nearest checkpoint.

Alternatively (``method="adjust"``) the checkpoints are first moved by a
least-squares adjustment over the whole walk (taps and dead-reckoning
displacements weighted by their variances, one scale and rotation per
walk). Measured on the real survey walks by leaving one interior checkpoint
out and predicting it (F1: 419, B1: 491 checkpoints), both methods give the
same error (median 0.81 / 0.84 m on F1, 0.96 / 1.01 m on B1, against
2.5 / 2.3 m for straight lines in time), so the simpler "segments" is the
default.

Samples before the first or after the last checkpoint: policy ``outside``
("extrapolate": dead reckoning from the end checkpoint with the end
segment's transform and a fast-growing sigma; "drop": left out, see
``SurveyPositions.index``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fingerprint.errors import ConfigError, DataError

__all__ = ["SurveyPositions", "reconstruct_positions", "segment_fits", "dead_reckoning", "adjust_checkpoints"]

_OUTSIDE = ("extrapolate", "drop")
_METHODS = ("segments", "adjust")


@dataclass(frozen=True, eq=False)
class SurveyPositions:
    """Plan positions of the samples of one walk.

    Attributes
    ----------
    t : (N,) float, seconds, the sample times kept
    xy : (N, 2) float, metres, plan frame
    sigma_m : (N,) float, 1-sigma position uncertainty per axis (isotropic),
        metres
    source : "track", "checkpoints" or "checkpoints-interpolated" (no
        motion: straight lines between checkpoints)
    index : (N,) int, index of each kept sample in the walk's samples
    meta : dict, per-segment fit (scale, rotation_rad, clamped) and policy
    """

    t: np.ndarray
    xy: np.ndarray
    sigma_m: np.ndarray
    source: str
    index: np.ndarray = None
    meta: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.t.shape[0])


def _merge_checkpoints(t, xy):
    """Sort by time and average checkpoints that share a time."""
    t = np.asarray(t, dtype=float).reshape(-1)
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    if t.shape[0] != xy.shape[0]:
        raise DataError(f"checkpoints have {t.shape[0]} times but {xy.shape[0]} positions")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(xy))):
        raise DataError("checkpoint times and positions must be finite")
    order = np.argsort(t, kind="stable")
    t, xy = t[order], xy[order]
    ut, inv = np.unique(t, return_inverse=True)
    if len(ut) == len(t):
        return t, xy
    cnt = np.bincount(inv)
    mx = np.bincount(inv, weights=xy[:, 0]) / cnt
    my = np.bincount(inv, weights=xy[:, 1]) / cnt
    return ut, np.column_stack([mx, my])


def dead_reckoning(walk, t_query, *, rotation_rad=0.0):
    """Dead-reckoning position and distance walked at given times.

    The path of ``walk.motion`` starts at the origin at the walk's first
    sample (or the first increment's time if earlier) and each increment
    ends at ``motion.t[i]``; in between, positions are linear in time.

    Parameters
    ----------
    walk : ProcessedWalk
    t_query : (Q,) float, seconds
    rotation_rad : float, added to every earth heading (earth -> plan)

    Returns
    -------
    xy : (Q, 2) float, metres, relative to the start
    s_m : (Q,) float, distance walked since the start
    """
    m = walk.motion
    t_query = np.asarray(t_query, dtype=float)
    if m is None or m.n == 0:
        return np.zeros((t_query.size, 2)), np.zeros(t_query.size)
    path = m.path((0.0, 0.0), rotation_rad)
    t0 = min(float(walk.t[0]) if walk.n else float(m.t[0]), float(m.t[0]))
    tp = np.concatenate([[t0], np.asarray(m.t, dtype=float)])
    # guard against repeated times (zero-duration increments)
    tp = np.maximum.accumulate(tp)
    tp = tp + np.arange(tp.size) * 1e-9
    s = np.concatenate([[0.0], np.cumsum(m.length_m)])
    xy = np.column_stack([np.interp(t_query, tp, path[:, 0]), np.interp(t_query, tp, path[:, 1])])
    return xy, np.interp(t_query, tp, s)


def segment_fits(walk, checkpoints_t, checkpoints_xy, *, rotation_rad=0.0):
    """Similarity fit of the dead-reckoning displacement to each checkpoint
    segment.

    Returns
    -------
    dict of (K-1,) arrays: ``ratio`` (complex: scale * exp(i * rotation)
    taking the DR displacement onto the checkpoint displacement; NaN where
    the DR displacement is zero), ``dr_disp`` (complex), ``cp_disp``
    (complex), ``walked_m`` (distance walked), ``straightness``
    (|DR displacement| / distance walked, 1 = straight), ``t0``, ``t1``.
    """
    t, xy = _merge_checkpoints(checkpoints_t, checkpoints_xy)
    p, s = dead_reckoning(walk, t, rotation_rad=rotation_rad)
    zp = p[:, 0] + 1j * p[:, 1]
    zc = xy[:, 0] + 1j * xy[:, 1]
    dr = np.diff(zp)
    cp = np.diff(zc)
    walked = np.diff(s)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(np.abs(dr) > 1e-9, cp / dr, np.nan + 0j)
        straight = np.where(walked > 1e-9, np.abs(dr) / walked, np.nan)
    return {"ratio": ratio, "dr_disp": dr, "cp_disp": cp, "walked_m": walked, "straightness": straight,
            "t0": t[:-1], "t1": t[1:]}


def adjust_checkpoints(tap, dr_disp, walked_m, *, tap_sigma_m=1.0, drift_m2_per_m=0.05, segment_rel_sigma=0.05,
                       walk_fit_sigma=0.2):
    """Least-squares adjustment of one walk's checkpoints.

    Unknowns: the true positions ``z_k`` at the checkpoint times (complex,
    plan metres) and one complex factor ``c`` (scale and rotation of the
    walk's dead reckoning). Observations, weighted by their variances:

    * taps: ``z_k = tap_k`` (variance ``tap_sigma_m²`` per axis),
    * dead reckoning: ``z_{k+1} - z_k = c * dr_k`` (variance
      ``drift * L_k + (segment_rel_sigma * L_k)²``, ``L_k`` walked),
    * prior: ``c = 1`` (variance ``walk_fit_sigma²``).

    The problem is linear in the complex unknowns and is solved with
    :func:`numpy.linalg.lstsq`; the posterior variances are the diagonal
    of ``(Aᴴ W A)⁻¹``.

    Parameters
    ----------
    tap : (K,) complex, tapped positions
    dr_disp : (K-1,) complex, dead-reckoning displacement per segment
    walked_m : (K-1,) float, distance walked per segment

    Returns
    -------
    z : (K,) complex, adjusted positions
    var_m2 : (K,) float, posterior variance per axis
    c : complex, fitted scale and rotation
    """
    tap = np.asarray(tap, dtype=complex)
    k = tap.size
    dr_disp = np.asarray(dr_disp, dtype=complex)
    walked = np.asarray(walked_m, dtype=float)
    n_obs = k + (k - 1) + 1
    a = np.zeros((n_obs, k + 1), dtype=complex)
    b = np.zeros(n_obs, dtype=complex)
    w = np.empty(n_obs)
    a[np.arange(k), np.arange(k)] = 1.0
    b[:k] = tap
    w[:k] = 1.0 / tap_sigma_m**2
    rows = k + np.arange(k - 1)
    a[rows, np.arange(1, k)] = 1.0
    a[rows, np.arange(k - 1)] = -1.0
    a[rows, k] = -dr_disp
    var_dr = drift_m2_per_m * walked + (segment_rel_sigma * walked) ** 2 + 1e-4
    w[k : 2 * k - 1] = 1.0 / var_dr
    a[-1, k] = 1.0
    b[-1] = 1.0
    w[-1] = 1.0 / walk_fit_sigma**2
    sw = np.sqrt(w)
    sol, *_ = np.linalg.lstsq(a * sw[:, None], b * sw, rcond=None)
    cov = np.linalg.pinv((a.conj().T * w) @ a)
    return sol[:k], np.real(np.diag(cov))[:k], complex(sol[k])


def _from_track(walk, track, *, track_sigma_m, outside):
    t = np.asarray(walk.t, dtype=float)
    keep = np.ones(t.size, dtype=bool)
    if outside == "drop":
        keep = (t >= track.t[0]) & (t <= track.t[-1])
    idx = np.nonzero(keep)[0]
    tq = t[idx]
    xy = track.at(tq)
    sig = track.extra.get("sigma_m") if isinstance(track.extra, dict) else None
    if sig is not None and np.all(np.isfinite(sig)):
        sigma = np.interp(tq, track.t, np.asarray(sig, dtype=float))
    else:
        sigma = np.full(tq.size, float(track_sigma_m))
    return SurveyPositions(tq, xy, sigma, "track", idx, {"outside": outside})


def reconstruct_positions(
    walk,
    *,
    checkpoints=None,
    track=None,
    plan=None,
    earth_to_plan_rad=0.0,
    outside="extrapolate",
    tap_sigma_m=1.0,
    drift_m2_per_m=0.05,
    extrapolate_frac=0.15,
    track_sigma_m=0.05,
    scale_range=(0.6, 1.6),
    max_rotation_rad=np.radians(45.0),
    max_extrapolate_m=None,
    method="segments",
    segment_rel_sigma=0.05,
    walk_fit_sigma=0.2,
) -> SurveyPositions:
    """Positions for the samples of ``walk`` (see module docstring).

    Parameters
    ----------
    walk : ProcessedWalk (``t`` (N,), ``motion``)
    checkpoints : Checkpoints or None
    track : Track or None; used when given (checkpoints are then ignored)
    plan : FloorPlan or None; positions outside its free space are pulled in
    earth_to_plan_rad : float, rotation of earth headings into the plan
    outside : {"extrapolate", "drop"}, samples before the first / after the
        last checkpoint (or outside the track's time span)
    tap_sigma_m : float, 1-sigma error of a checkpoint, metres
    drift_m2_per_m : float, random-walk variance of dead reckoning per metre
    extrapolate_frac : float, extra sigma per metre walked beyond the end
        checkpoints (uncorrected scale and heading error)
    track_sigma_m : float, sigma of track positions without a sigma_m column
    scale_range : (lo, hi), allowed fitted scale per segment
    max_rotation_rad : float, allowed fitted rotation per segment
    method : {"segments", "adjust"}; "segments" pins the path to the
        checkpoints as tapped; "adjust" first moves the checkpoints by a
        least-squares adjustment over the whole walk (see
        :func:`adjust_checkpoints`), then pins to the adjusted positions
    segment_rel_sigma : float, "adjust": dead-reckoning error per segment
        as a fraction of its length (1-sigma, per axis)
    walk_fit_sigma : float, "adjust": prior sigma of the walk's scale and
        rotation correction (complex, around 1)
    max_extrapolate_m : float or None, with ``outside="extrapolate"``,
        samples farther than this (distance walked) beyond the end
        checkpoints are left out; None keeps them all (their sigma grows)

    Returns
    -------
    SurveyPositions

    Raises
    ------
    DataError
        Neither checkpoints nor track, or an empty walk.
    ConfigError
        Unknown ``outside`` policy.
    """
    if outside not in _OUTSIDE:
        raise ConfigError(f"outside must be one of {', '.join(_OUTSIDE)}, got {outside!r}")
    if method not in _METHODS:
        raise ConfigError(f"method must be one of {', '.join(_METHODS)}, got {method!r}")
    if walk.n == 0:
        raise DataError("walk has no samples", path=walk.source)
    if track is not None:
        if track.t.size == 0:
            raise DataError("track has no positions", path=track.path)
        out = _from_track(walk, track, track_sigma_m=track_sigma_m, outside=outside)
    else:
        if checkpoints is None or checkpoints.n == 0:
            raise DataError("survey positions need checkpoints or a track; got neither", path=walk.source)
        out = _from_checkpoints(
            walk, checkpoints, earth_to_plan_rad=earth_to_plan_rad, outside=outside, tap_sigma_m=tap_sigma_m,
            drift_m2_per_m=drift_m2_per_m, extrapolate_frac=extrapolate_frac, scale_range=scale_range,
            max_rotation_rad=max_rotation_rad, max_extrapolate_m=max_extrapolate_m, method=method,
            segment_rel_sigma=segment_rel_sigma, walk_fit_sigma=walk_fit_sigma,
        )
    if plan is not None and out.n:
        inside = plan.contains(out.xy)
        if not inside.all():
            moved = plan.nearest_free(out.xy)
            shift = np.hypot(*(moved - out.xy).T)
            meta = dict(out.meta, pulled_in=int((~inside).sum()), max_pull_m=float(shift.max()))
            out = SurveyPositions(out.t, moved, out.sigma_m, out.source, out.index, meta)
    return out


def _from_checkpoints(walk, cps, *, earth_to_plan_rad, outside, tap_sigma_m, drift_m2_per_m, extrapolate_frac,
                      scale_range, max_rotation_rad, max_extrapolate_m=None, method="segments",
                      segment_rel_sigma=0.05, walk_fit_sigma=0.2):
    t = np.asarray(walk.t, dtype=float)
    tc, xyc = _merge_checkpoints(cps.t, cps.xy)
    k = tc.size
    keep = np.ones(t.size, dtype=bool)
    if outside == "drop":
        keep = (t >= tc[0]) & (t <= tc[-1])
    elif max_extrapolate_m is not None:
        _, s_all = dead_reckoning(walk, t)
        _, s_end = dead_reckoning(walk, tc[[0, -1]])
        keep = (s_all >= s_end[0] - max_extrapolate_m) & (s_all <= s_end[1] + max_extrapolate_m)
    idx = np.nonzero(keep)[0]
    tq = t[idx]
    has_motion = walk.motion is not None and walk.motion.n > 0
    source = "checkpoints" if has_motion else "checkpoints-interpolated"

    p_q, s_q = dead_reckoning(walk, tq, rotation_rad=earth_to_plan_rad)
    p_c, s_c = dead_reckoning(walk, tc, rotation_rad=earth_to_plan_rad)
    zq = p_q[:, 0] + 1j * p_q[:, 1]
    zc_dr = p_c[:, 0] + 1j * p_c[:, 1]
    zc = xyc[:, 0] + 1j * xyc[:, 1]
    cp_var = np.full(k, tap_sigma_m**2)
    walk_ratio = None
    if method == "adjust" and has_motion and k >= 2:
        zc, cp_var, walk_ratio = adjust_checkpoints(
            zc, np.diff(zc_dr), np.diff(s_c), tap_sigma_m=tap_sigma_m, drift_m2_per_m=drift_m2_per_m,
            segment_rel_sigma=segment_rel_sigma, walk_fit_sigma=walk_fit_sigma,
        )

    # per-segment similarity (complex ratio), clamped
    n_seg = max(k - 1, 0)
    dr = np.diff(zc_dr)
    cpd = np.diff(zc)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(np.abs(dr) > 1e-6, cpd / dr, 1.0 + 0j)
    scale = np.abs(ratio)
    rot = np.angle(ratio)
    lo, hi = scale_range
    clamped = (scale < lo) | (scale > hi) | (np.abs(rot) > max_rotation_rad) | (np.abs(dr) <= 1e-6)
    scale_c = np.clip(scale, lo, hi)
    rot_c = np.clip(rot, -max_rotation_rad, max_rotation_rad)
    ratio_c = np.where(clamped, scale_c * np.exp(1j * rot_c), ratio)
    if not has_motion:
        ratio_c = np.zeros(n_seg, dtype=complex)
    resid = cpd - ratio_c * dr  # (K-1,) complex, 0 where the fit is exact

    # segment of each query: seg j covers [tc[j], tc[j+1]]
    seg = np.clip(np.searchsorted(tc, tq, side="right") - 1, 0, max(n_seg - 1, 0))
    z = np.empty(tq.size, dtype=complex)
    var = np.empty(tq.size)
    inner = (tq >= tc[0]) & (tq <= tc[-1]) if k > 1 else np.zeros(tq.size, dtype=bool)
    if n_seg:
        j = seg[inner]
        walked = s_c[j + 1] - s_c[j]
        d_a = s_q[inner] - s_c[j]
        d_b = s_c[j + 1] - s_q[inner]
        dur = tc[j + 1] - tc[j]
        frac_t = np.where(dur > 0, (tq[inner] - tc[j]) / np.where(dur > 0, dur, 1.0), 0.0)
        frac = np.where(walked > 1e-6, d_a / np.where(walked > 1e-6, walked, 1.0), frac_t)
        frac = np.clip(frac, 0.0, 1.0)
        z[inner] = zc[j] + ratio_c[j] * (zq[inner] - zc_dr[j]) + frac * resid[j]
        if not has_motion:
            d_a = frac_t * np.abs(cpd[j])
            d_b = (1 - frac_t) * np.abs(cpd[j])
            frac = frac_t
        tot = d_a + d_b
        bridge = np.where(tot > 0, d_a * d_b / np.where(tot > 0, tot, 1.0), 0.0)
        var[inner] = (1 - frac) * cp_var[j] + frac * cp_var[j + 1] + drift_m2_per_m * np.maximum(bridge, 0.0)
    # before the first / after the last checkpoint (or a single checkpoint)
    for side in ("before", "after"):
        sel = (tq < tc[0]) if side == "before" else (tq > tc[-1])
        if k == 1:
            sel = (tq <= tc[0]) if side == "before" else (tq > tc[0])
        if not sel.any():
            continue
        end = 0 if side == "before" else k - 1
        if n_seg and has_motion:
            r = ratio_c[0] if side == "before" else ratio_c[-1]
        else:
            r = 1.0 + 0j if has_motion else 0j
        z[sel] = zc[end] + r * (zq[sel] - zc_dr[end])
        d = np.abs(s_q[sel] - s_c[end])
        var[sel] = cp_var[end] + drift_m2_per_m * d + (extrapolate_frac * d) ** 2
    xy = np.column_stack([z.real, z.imag])
    meta = {
        "outside": outside,
        "method": method,
        "segments": int(n_seg),
        "scale": scale.round(4).tolist(),
        "rotation_rad": rot.round(5).tolist(),
        "clamped": clamped.tolist(),
    }
    if walk_ratio is not None:
        meta["walk_scale"] = round(float(abs(walk_ratio)), 4)
        meta["walk_rotation_rad"] = round(float(np.angle(walk_ratio)), 5)
        meta["checkpoint_shift_m"] = np.abs(zc - (xyc[:, 0] + 1j * xyc[:, 1])).round(3).tolist()
    return SurveyPositions(tq, xy, np.sqrt(var), source, idx, meta)
