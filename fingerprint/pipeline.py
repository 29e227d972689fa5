"""The sensor chain: a :class:`~fingerprint.records.WalkLog` in, a
:class:`~fingerprint.records.ProcessedWalk` out.

1. Missing samples (NaN cells) are filled by linear interpolation in time,
   per sensor; a sensor with no sample at all is treated as absent.
2. Magnetometer: an explicit :class:`~fingerprint.calibration.Calibration`
   is applied to the columns it was fitted on; otherwise a log marked
   ``magnetometer_calibrated: yes`` is used as given (its residual is only
   checked, see :func:`calibration_verdict`), and an uncalibrated log is
   calibrated from the walk itself (ellipsoid fit, or the circle fallback
   for planar motion; with ``expected_total_ut`` the vertical offset of a
   planar fit is set so that the median |B| matches it).
3. Steps are detected first (handheld; they need only |a|), so that the
   attitude can remove the centripetal acceleration of turns (speed from
   the steps or the odometry); a robot's still periods for the gyro bias
   are those where its wheels report no motion.
4. Attitude (:mod:`fingerprint.attitude`: gyro heading plus one robust
   magnetometer offset per walk by default), earth-frame field, heading.
5. Motion: steps with Weinberg lengths (handheld) or grouped odometry
   (robot with ``odom_*`` columns).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from .attitude import FORWARD_AXIS, AttitudeSettings, _lowpass, estimate_attitude, quat_rotate, row_norm
from .calibration import Calibration, fit_calibration
from .errors import ConvergenceError, DataError
from .odometry import OdometrySettings, odometry_motion
from .records import Motion, ProcessedWalk, WalkLog
from .steps import DEFAULT_STEP_CONSTANT, StepSettings, detect_steps, weinberg_length

__all__ = ["PipelineSettings", "process_walk", "wheels_still", "step_speed", "odometry_speed", "fit_walker_constant", "mag_noise_ut", "fill_gaps", "calibration_verdict", "up_directions"]


@dataclass(frozen=True)
class PipelineSettings:
    attitude: AttitudeSettings = field(default_factory=AttitudeSettings)
    steps: StepSettings = field(default_factory=StepSettings)
    odometry: OdometrySettings = field(default_factory=OdometrySettings)
    #: calibrate an uncalibrated log from the walk itself
    self_calibrate: bool = True
    #: expected vertical field (µT, up positive) at the site, for the offset
    #: along the vertical that planar self-calibration cannot see
    field_up_ut: float | None = None
    #: expected magnitude of the true field (µT) at the site, e.g.
    #: ``fingerprint.geomag.background_field(lat, lon, date).total_ut``: with
    #: planar self-calibration (a robot turning only about z) and no
    #: ``field_up_ut``, the vertical offset is set so that the median |B|
    #: matches it
    expected_total_ut: float | None = None
    #: sign of the true vertical field used with ``expected_total_ut`` (-1:
    #: pointing down, northern magnetic hemisphere; +1 south)
    expected_up_sign: float = -1.0
    #: remove the centripetal acceleration of turns (speed from steps or
    #: odometry) before the tilt estimate; see ``estimate_attitude``
    turn_compensation: bool = True


def fill_gaps(t, x):
    """Linear interpolation of NaN rows of ``x`` ((N, 3)) over time ``t``.

    Returns the filled (N, 3) array, or None when no row has a sample.
    """
    x = np.asarray(x, float)
    ok = np.isfinite(x).all(axis=1)
    if ok.all():
        return x
    if not ok.any():
        return None
    out = np.empty_like(x)
    for j in range(x.shape[1]):
        out[:, j] = np.interp(t, t[ok], x[ok, j])
    return out


def up_directions(t, acc, *, cutoff_hz=0.4):
    """Unit up direction in the device frame per sample ((N, 3)): the
    accelerometer (gaps filled) low-passed with a zero-phase Butterworth
    filter, normalised. None when there is no accelerometer sample."""
    acc = fill_gaps(t, acc)
    if acc is None:
        return None
    g = _lowpass(acc, 1.0 / float(np.median(np.diff(t))), cutoff_hz)
    return g / np.linalg.norm(g, axis=1, keepdims=True)


def mag_noise_ut(mag_ut):
    """1-sigma per-sample magnetometer noise (µT) from second differences.

    The field changes smoothly at walking speed, so the second difference
    of consecutive samples is mostly noise: for white noise of sd σ it has
    sd σ·√6. A robust sd (1.4826 × median absolute deviation) is used, and
    the three axes are pooled by their median. Quantised sensors report at
    least resolution / √12 (the standard uniform-quantisation noise).
    """
    m = np.asarray(mag_ut, float)
    if m.shape[0] < 5:
        return float("nan")
    if m.shape[0] > 100_000:
        # a robust sd needs no more: 100 000 evenly spread second differences
        idx = np.linspace(1, m.shape[0] - 2, 100_000).astype(np.int64)
        d2 = m[idx + 1] - 2 * m[idx] + m[idx - 1]
        mad = np.median(np.abs(d2 - np.median(d2, axis=0)), axis=0) * 1.4826
        return float(np.median(mad) / np.sqrt(6.0)) or mag_noise_ut(m[:100_000])
    d2 = m[2:] - 2 * m[1:-1] + m[:-2]
    mad = np.median(np.abs(d2 - np.median(d2, axis=0)), axis=0) * 1.4826
    sig = float(np.median(mad) / np.sqrt(6.0))
    if sig == 0.0:
        steps = np.abs(np.diff(m, axis=0))
        steps = steps[steps > 0]
        sig = float(np.min(steps) / np.sqrt(12.0)) if steps.size else 0.0
    return sig


def calibration_verdict(mag_ut, *, calibrated_flag):
    """Short verdict on how well the magnetometer readings are calibrated.

    Uses the spread of |B| (sd / mean) over the walk: a well-calibrated
    sensor rotated in a steady field keeps |B| nearly constant; indoor
    disturbances add some spread, a hard-iron offset much more.

    Returns dict with ``verdict`` (str), ``b_mean_ut``, ``b_sd_ut``, ``flag``.
    """
    b = row_norm(mag_ut)
    mean, sd = float(np.mean(b)), float(np.std(b))
    rel = sd / mean if mean > 0 else np.inf
    if not (20.0 <= mean <= 80.0):
        v = "poor (mean |B| {:.0f} µT, the Earth's field is 25-65 µT: offset not removed?)".format(mean)
    elif rel < 0.1:
        v = "good (|B| spread {:.0%} of its mean)".format(rel)
    elif rel < 0.25:
        v = "fair (|B| spread {:.0%}: indoor disturbances or residual offset)".format(rel)
    else:
        v = "poor (|B| spread {:.0%}: offset not removed?)".format(rel)
    return {"verdict": v, "b_mean_ut": mean, "b_sd_ut": sd, "flag": "yes" if calibrated_flag else "no"}


def _choose_mag(log, calibration, settings, meta, acc):
    t = log.t
    if calibration is not None:
        src = log.mag_raw if calibration.source == "mag_raw" else log.mag
        if src is None:
            raise DataError(
                f"calibration applies to the {calibration.source} columns, which this log does not have",
                path=log.path,
            )
        src = fill_gaps(t, src)
        if src is None:
            return None
        meta["calibration"] = {"method": "given", "source": calibration.source}
        return calibration.apply(src)
    mag = fill_gaps(t, log.mag)
    if mag is None:
        return None
    if log.magnetometer_calibrated or not settings.self_calibrate:
        meta["calibration"] = {"method": "device" if log.magnetometer_calibrated else "none", "source": "mag"}
        return mag
    try:
        cal, rep = fit_calibration(mag, source="mag", up_device=up_directions(t, acc),
                                   field_up_ut=settings.field_up_ut, field_total_ut=settings.expected_total_ut,
                                   field_up_sign=settings.expected_up_sign)
    except (DataError, ConvergenceError) as err:
        meta["calibration"] = {"method": "none", "source": "mag", "message": f"self-calibration failed: {err}"}
        return mag
    meta["calibration"] = {"method": "self:" + rep["method"], "source": "mag", "message": rep["message"],
                           "offset_ut": rep["offset_ut"]}
    if "vertical_offset_from" in rep:
        meta["calibration"]["vertical_offset_from"] = rep["vertical_offset_from"]
    return cal.apply(mag)


def step_speed(t, ev, *, step_constant=DEFAULT_STEP_CONSTANT):
    """Walking speed (N,) m/s at the samples ``t`` from detected steps: each
    step's Weinberg length (with the default constant, so that the attitude
    does not depend on the constant a walk is processed with) over its
    duration, constant within the step, 0 outside every step."""
    dur = np.maximum(ev.end_s - ev.start_s, 1e-3)
    v = weinberg_length(ev.a_max, ev.a_min, step_constant) / dur
    i = np.searchsorted(ev.start_s, t, side="right") - 1
    inside = (i >= 0) & (t <= ev.end_s[np.clip(i, 0, None)])
    return np.where(inside, v[np.clip(i, 0, None)], 0.0)


def odometry_speed(t, odom, *, window_s=0.5):
    """Forward speed (N,) m/s of a wheeled platform: ``odom_dx`` over the
    sample spacing, averaged over ``window_s``; NaN rows count as no motion."""
    from scipy.ndimage import uniform_filter1d

    dx = np.nan_to_num(np.asarray(odom, float)[:, 0], nan=0.0)
    dt = np.diff(t, prepend=t[0] - (t[1] - t[0]) if t.size > 1 else 1.0)
    v = dx / np.where(dt > 0, dt, np.inf)
    w = max(1, int(round(window_s / float(np.median(dt)))))
    return uniform_filter1d(v, w, mode="nearest")


def wheels_still(t, odom, *, window_s=1.0, tol=1e-9):
    """(N,) bool: rows whose odometry (``dx_m, dy_m, dyaw_rad`` (N, 3))
    shows no motion over a centred window of ``window_s``. Rows without an
    odometry sample (NaN) count as no motion, as in
    :func:`~fingerprint.odometry.odometry_motion`."""
    from scipy.ndimage import maximum_filter1d

    moving = (np.abs(np.nan_to_num(np.asarray(odom, float), nan=0.0)) > tol).any(axis=1)
    dt = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    w = max(1, int(round(window_s / dt)))
    return ~maximum_filter1d(moving, w, mode="nearest")


def process_walk(log: WalkLog, *, calibration: Calibration | None = None, step_constant=None, settings=None,
                 expected_total_ut=None, expected_up_ut=None):
    """Turn a walk log into a processed walk.

    Parameters
    ----------
    log : WalkLog
    calibration : Calibration, optional
    step_constant : float, optional
        Weinberg constant K (handheld); default
        :data:`~fingerprint.steps.DEFAULT_STEP_CONSTANT`.
    settings : PipelineSettings, optional
    expected_total_ut : float, optional
        Expected field magnitude at the site (µT); overrides
        ``settings.expected_total_ut`` (see :class:`PipelineSettings`).
    expected_up_ut : float, optional
        Expected mean vertical field along the walk (µT, up positive), e.g.
        a floor map's mean along its graph; overrides
        ``settings.field_up_ut``. Only a planar self-calibration (a robot
        turning about z alone, which cannot see the offset along z) uses it.

    Returns
    -------
    ProcessedWalk
        ``meta`` holds ``calibration``, ``calibration_verdict``, ``attitude``,
        ``step_constant``, ``n_steps`` (handheld), ``mag_noise_ut``.
    """
    s = settings or PipelineSettings()
    given = {k: float(v) for k, v in (("expected_total_ut", expected_total_ut), ("field_up_ut", expected_up_ut))
             if v is not None}
    if given:
        from dataclasses import replace as _replace

        s = _replace(s, **given)
    if log.n < 10:
        raise DataError(f"a walk needs at least 10 samples to process, got {log.n}", path=log.path)
    t = log.t
    platform = log.platform
    meta = {"platform": platform}
    acc = fill_gaps(t, log.acc)
    if acc is None:
        raise DataError("the log has no accelerometer sample; attitude needs gravity", path=log.path)
    gyro = fill_gaps(t, log.gyro)
    if gyro is None:
        gyro = np.zeros_like(acc)
        meta["warning"] = "no gyroscope samples: heading from the magnetometer only"
    mag = _choose_mag(log, calibration, s, meta, acc)
    fwd = FORWARD_AXIS.get(platform, FORWARD_AXIS["handheld"])
    att_set = s.attitude
    if "warning" in meta and np.isfinite(att_set.mag_time_constant_s):
        # without a gyro the magnetometer must carry the heading
        from dataclasses import replace

        att_set = replace(att_set, heading_mode="smooth", mag_time_constant_s=0.5)
    hint = speed = ev = None
    if platform == "robot" and log.odom is not None:
        hint = wheels_still(t, log.odom, window_s=att_set.still_window_s)
        if s.turn_compensation:
            speed = odometry_speed(t, log.odom)
    elif platform != "robot":
        ev = detect_steps(t, acc, settings=s.steps)
        if s.turn_compensation and ev.n:
            speed = step_speed(t, ev)
    att = estimate_attitude(t, acc, gyro, mag, forward_axis=fwd, settings=att_set, still_hint=hint,
                            forward_speed_m_s=speed)
    meta["attitude"] = att.meta
    if mag is None:
        mag_earth = np.full((log.n, 3), np.nan)
        noise = float("nan")
    else:
        mag_earth = att.mag_earth_ut if att.mag_earth_ut is not None else quat_rotate(att.quat, mag)
        # on the rows the magnetometer reported: the gaps were filled by
        # interpolation, whose second differences are no noise at all
        reported = np.isfinite(log.mag).all(axis=1)
        if log.mag_raw is not None:
            reported |= np.isfinite(log.mag_raw).all(axis=1)
        noise = mag_noise_ut(mag[reported])
        meta["calibration_verdict"] = calibration_verdict(mag, calibrated_flag=log.magnetometer_calibrated)
    meta["mag_noise_ut"] = noise
    if platform == "robot":
        if log.odom is not None:
            motion = odometry_motion(t, log.odom, att.heading_rad, settings=s.odometry)
        else:
            e = np.empty(0)
            motion = Motion(t=e, length_m=e, heading_rad=e, kind="odometry")
            meta["warning"] = (meta.get("warning", "") + "; " if "warning" in meta else "") + (
                "robot log without odom_dx,odom_dy,odom_dyaw columns: no motion increments")
    else:
        k = DEFAULT_STEP_CONSTANT if step_constant is None else float(step_constant)
        if not (np.isfinite(k) and k > 0):
            raise DataError(f"step constant must be a positive number, got {step_constant!r}")
        if ev.n:
            head = _circular_interp(ev.t, t, att.heading_rad)
            motion = Motion(t=ev.end_s, length_m=weinberg_length(ev.a_max, ev.a_min, k), heading_rad=head,
                            kind="steps")
        else:
            e = np.empty(0)
            motion = Motion(t=e, length_m=e, heading_rad=e, kind="steps")
        meta["step_constant"] = k
        meta["n_steps"] = ev.n
    return ProcessedWalk(
        t=t.copy(),
        quat=att.quat,
        mag_earth_ut=mag_earth,
        heading_rad=att.heading_rad,
        mag_noise_ut=noise,
        motion=motion,
        platform=platform,
        meta=meta,
        source=log.path,
    )


def _circular_interp(tq, t, ang):
    c = np.interp(tq, t, np.cos(ang))
    s = np.interp(tq, t, np.sin(ang))
    return np.arctan2(s, c)


def fit_walker_constant(walks, checkpoints, *, min_distance_m=2.0):
    """Fit the Weinberg constant of one walker (or phone) from processed
    handheld walks and their checkpoints (see
    :func:`fingerprint.steps.fit_step_constant`); walks are re-scaled from
    the constant they were processed with (``meta["step_constant"]``).

    Parameters
    ----------
    walks : list of ProcessedWalk (handheld)
    checkpoints : list of Checkpoints, one per walk

    Returns
    -------
    (k, info) : float, dict with ``n_segments`` and ``ratios``
    """
    from .steps import fit_step_constant

    if len(walks) != len(checkpoints):
        raise DataError(f"need one checkpoints set per walk, got {len(walks)} walks and {len(checkpoints)}")
    pairs = [(w.motion, c, float(w.meta.get("step_constant", DEFAULT_STEP_CONSTANT)))
             for w, c in zip(walks, checkpoints) if w.motion.kind == "steps"]
    return fit_step_constant(pairs, min_distance_m=min_distance_m)
