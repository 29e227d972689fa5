"""Synthetic survey walks for the plan / survey / alignment tests: a true
path in the plan, walked at constant speed, with the steps a dead-reckoning
chain would report (scale error, heading bias, heading noise), in the earth
frame given the true earth-to-plan rotation."""

from __future__ import annotations

import numpy as np

from fingerprint.records import Checkpoints, Motion, ProcessedWalk, Track


def polyline_walk(vertices, *, speed=1.2, rate_hz=50.0, step_s=0.5, t_before_s=0.0, t_after_s=0.0):
    """Times and true positions along ``vertices`` ((V, 2), metres).

    The walker may stand ``t_before_s`` before the first vertex walking
    along the first leg backwards (i.e. the first leg is extended) and
    ``t_after_s`` after the last one. Returns a dict with sample times
    ``t`` (N,), truth ``xy`` (N, 2), step end times ``step_t`` (M,),
    the truth at step ends and the checkpoint times at the vertices.
    """
    v = np.asarray(vertices, float)
    leg = np.diff(v, axis=0)
    leg_len = np.hypot(leg[:, 0], leg[:, 1])
    cum = np.concatenate([[0.0], np.cumsum(leg_len)])
    total = cum[-1]
    t_cp = cum / speed + t_before_s
    t_end = t_cp[-1] + t_after_s

    def at(tq):
        s = (np.asarray(tq, float) - t_before_s) * speed  # arc length, may be < 0 or > total
        x = np.interp(s, cum, v[:, 0])
        y = np.interp(s, cum, v[:, 1])
        u0 = leg[0] / leg_len[0]
        u1 = leg[-1] / leg_len[-1]
        before = s < 0
        after = s > total
        x = np.where(before, v[0, 0] + s * u0[0], np.where(after, v[-1, 0] + (s - total) * u1[0], x))
        y = np.where(before, v[0, 1] + s * u0[1], np.where(after, v[-1, 1] + (s - total) * u1[1], y))
        return np.column_stack([x, y])

    t = np.arange(0.0, t_end + 1e-9, 1.0 / rate_hz)
    step_t = np.arange(step_s, t[-1] + 1e-9, step_s)
    return {"t": t, "xy": at(t), "step_t": step_t, "at": at, "t_cp": t_cp, "cp_xy": v}


def make_walk(truth, *, earth_to_plan_rad, scale=1.0, heading_bias_rad=0.0, heading_noise_rad=0.0,
              heading_walk_rad=0.0, rng=None, with_motion=True):
    """A ProcessedWalk whose steps follow ``truth`` (from
    :func:`polyline_walk`) with the given errors.

    Step ``i`` ends at ``step_t[i]``; its true displacement is the truth
    between the previous step end (or the first sample) and this one.
    Earth heading = plan heading - earth_to_plan + bias + noise.
    """
    rng = rng or np.random.default_rng(0)
    t = truth["t"]
    ends = np.concatenate([[t[0]], truth["step_t"]])
    p = truth["at"](ends)
    d = np.diff(p, axis=0)
    length = np.hypot(d[:, 0], d[:, 1]) * scale
    plan_h = np.arctan2(d[:, 1], d[:, 0])
    noise = heading_noise_rad * rng.standard_normal(len(d))
    walk_err = np.cumsum(heading_walk_rad * rng.standard_normal(len(d)))
    earth_h = plan_h - earth_to_plan_rad + heading_bias_rad + noise + walk_err
    if with_motion:
        motion = Motion(t=truth["step_t"].copy(), length_m=length, heading_rad=earth_h, kind="steps")
    else:
        e = np.empty(0)
        motion = Motion(t=e, length_m=e, heading_rad=e, kind="steps")
    n = t.size
    quat = np.tile([0.0, 0.0, 0.0, 1.0], (n, 1))
    return ProcessedWalk(t=t.copy(), quat=quat, mag_earth_ut=np.zeros((n, 3)), heading_rad=np.zeros(n),
                         mag_noise_ut=0.5, motion=motion, platform="handheld", meta={}, source="synthetic")


def checkpoints_of(truth, *, tap_sigma_m=0.0, rng=None):
    rng = rng or np.random.default_rng(1)
    xy = truth["cp_xy"] + tap_sigma_m * rng.standard_normal(truth["cp_xy"].shape)
    return Checkpoints(t=truth["t_cp"].copy(), xy=xy)


def track_of(truth, *, every=10, sigma=None):
    t = truth["t"][::every]
    extra = {} if sigma is None else {"sigma_m": np.full(t.size, float(sigma))}
    return Track(t=t, xy=truth["xy"][::every], extra=extra)
