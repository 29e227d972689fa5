"""Device attitude: the device-to-earth rotation of every sample.

Earth frame: east, north, up (ENU); "north" is magnetic north, held weakly.

Choice (default, :func:`estimate_attitude`): a complementary filter in
closed, vectorised form, run offline over a whole walk:

1. Gyro bias: the mean gyro rate over still periods (accelerometer magnitude
   steady and close to g, gyro rate small, for at least ``still_window_s``).
2. Tilt: gravity is the accelerometer low-passed with a zero-phase
   Butterworth filter (``tilt_cutoff_hz``; walking accelerations at the step
   frequency are averaged out), by default in a frame carried by the
   integrated gyro (``tilt_gyro_aided``, :func:`gyro_aided_gravity`), so
   that the tilt keeps the hand's sway at the step frequency instead of
   averaging it away; with a forward speed the centripetal acceleration of
   turns and the forward acceleration of starts and stops are removed
   first. The tilt rotation is the smallest rotation taking the measured up
   direction onto earth up.

   Why gyro-aided (``/tmp`` scripts, not part of the suite): on simulated
   demo walks (``lodemap simulate demo_building --walks 3``, 13 survey and
   6 test handheld logs, truth from the simulator's device rotation) the
   accelerometer-only tilt was off by 1.2-2.6° RMS (the roll sway at half
   the step rate), i.e. 1.0-2.1 µT RMS in the horizontal earth-frame field
   (the 50 µT vertical field leaking sideways); gyro-aided with the
   start/stop compensation 0.3-1.7° RMS, 0.2-1.4 µT. Real walks
   (``/shared/real_data/siteA``, survey split): robust spread of plan
   bearing minus heading over straight checkpoint segments (the
   ``mapping.alignment`` estimate) F1 11.24° -> 10.89° (334 segments),
   B1 12.41° -> 12.07° (408), accelerometer-only -> gyro-aided. Where the
   two tilts differ by more than ``tilt_gyro_max_deg`` (a phone turned in
   the hand at several rad/s at the start of a real walk) the plain one is
   kept.
3. Short-term heading: the gyro rate about the measured up direction,
   integrated (trapezoid), minus the yaw twist of the tilt rotation itself,
   so the integration is exact for any tilt history.
4. Absolute heading (``heading_mode``, default ``"offset"``): the gyro
   carries all relative heading; the tilt-compensated magnetometer azimuth
   gives only one constant offset per walk, the robust weighted circular
   mean of (azimuth - gyro heading). Each sample is weighted down where the
   field magnitude or dip departs from the walk's median (a local
   disturbance, scale ``disturbance_ut``); the mean starts at the mode of a
   weighted histogram and is then reweighted with von Mises weights of scale
   ``offset_scale_rad`` about the current mean. A disturbance can then
   rotate the whole walk by a fraction of its share, but never bend it.
   Options kept as settings: ``"smooth"`` (a slowly varying correction, the
   difference smoothed as a unit phasor with a Gaussian window of
   ``mag_time_constant_s``, reweighted in ``robust_passes``; the
   low-pass/high-pass split of a complementary filter) and ``"first"`` (the
   first usable azimuth, gyro only after).

   Gyro bias matters more once the magnetometer no longer removes drift: on
   a robot, samples count as still only when the wheels report no motion
   too (``still_hint``; a robot cruising smoothly looks still to the
   accelerometer). And with ``forward_speed_m_s`` the centripetal
   acceleration of turns is removed before the tilt low-pass.

   How the default was chosen (``/tmp`` scripts, not part of the suite):
   simulated demo walks (``lodemap simulate demo_building --seed 3``, 25
   handheld and 19 robot logs, truth in the tracks), absolute error of the
   heading change over each walk, median / max:

   ==========================  ==============  ==============
   heading                     handheld        robot
   ==========================  ==============  ==============
   smooth 20 s (old default)   5.7° / 23.4°    6.1° / 37.3°
   smooth 120 s                1.9° / 8.8°     3.3° / 10.2°
   first azimuth (gyro only)   1.7° / 5.0°     3.2° / 10.9°
   offset (default)            1.6° / 4.8°     0.7° / 3.4°
   ==========================  ==============  ==============

   (robot figures of the last row with the wheel still-hint; without it
   gyro-only robots drifted by up to 11°). Real walks
   (``/shared/real_data/siteA``, all 106 F1 and 157 B1 walks): plan bearing
   of straight checkpoint segments (>= 4 m) minus the mean heading along
   them, median and interquartile range:

   ==========================  ====================  ====================
   heading                     F1 (385 segments)     B1 (512 segments)
   ==========================  ====================  ====================
   smooth 20 s (old default)   2.5°, IQR 15.8°       1.1°, IQR 17.7°
   smooth 120 s                2.9°, IQR 18.3°       2.4°, IQR 18.0°
   first azimuth               4.1°, IQR 23.5°       4.2°, IQR 20.7°
   offset (default)            2.8°, IQR 14.2°       0.4°, IQR 17.3°
   ==========================  ====================  ====================

   and the dead-reckoned displacement between consecutive test-split
   checkpoints (K fitted on the survey split, rotated by the median bearing
   difference), median |error| / distance: F1 19.1 % -> 18.0 %, B1 22.3 %
   -> 21.8 % (old default -> offset; the distance-only error, 7.7 % and
   8.1 %, does not depend on heading). ``offset_scale_rad`` 0.4 was picked
   from 0.15 / 0.25 / 0.4 on F1 (IQR 17.0 / 15.6 / 14.2°; B1 17.4 / 17.2 /
   17.3°, so B1 is neutral and F1 is not an untouched hold-out).

The published recursive filter of Madgwick (2010), "An efficient orientation
filter for inertial and inertial/magnetic sensor arrays" (report, University
of Bristol), MARG form with magnetic distortion compensation (eqs. 45-46), is
available as :func:`madgwick_marg` (a per-sample loop, for comparison and for
streaming use); the tests check it against the ``ahrs`` package.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.ndimage import gaussian_filter1d, uniform_filter1d
from scipy.signal import butter, sosfiltfilt
from scipy.spatial.transform import Rotation

from .errors import DataError

__all__ = [
    "AttitudeSettings",
    "Attitude",
    "estimate_attitude",
    "gyro_bias",
    "tilt_rotation",
    "tilt_quat",
    "gyro_aided_gravity",
    "quat_prefix_products",
    "quat_rotate",
    "madgwick_marg",
    "GRAVITY_M_S2",
    "FORWARD_AXIS",
    "HEADING_MODES",
]

#: Standard gravity, m/s² (CGPM 1901 conventional value).
GRAVITY_M_S2 = 9.80665
#: Device forward axis by platform (the device frames of the README, "Input files").
FORWARD_AXIS = {"handheld": np.array([0.0, 1.0, 0.0]), "robot": np.array([1.0, 0.0, 0.0])}

#: Ways the complementary filter uses the magnetometer for heading.
HEADING_MODES = ("offset", "smooth", "first")

# Madgwick's earth frame (x magnetic north, y west, z up) -> ENU: +90° about z.
_NWU_TO_ENU = Rotation.from_euler("z", 90.0, degrees=True)


@dataclass(frozen=True)
class AttitudeSettings:
    """Parameters of :func:`estimate_attitude`.

    method : "complementary" (default, vectorised) or "madgwick" (the
        recursive filter, per-sample loop; about 100x slower)
    heading_mode : how the complementary filter uses the magnetometer:
        "offset" (default): one constant heading offset per walk, the
        robust weighted circular mean of (magnetometer azimuth - gyro
        heading); "smooth": a slowly varying correction, Gaussian window of
        ``mag_time_constant_s``; "first": the first usable magnetometer
        azimuth, gyro only after
    tilt_cutoff_hz : low-pass cutoff for gravity from the accelerometer
    mag_time_constant_s : Gaussian window (sd) of the "smooth" heading
        correction; ``float("inf")`` means "first" in any mode (heading
        then starts at the first magnetometer azimuth, or 0 without one)
    still_window_s : window for still detection
    still_acc_sd : max sd of |a| (m/s²) in a still window
    still_gyro_rad_s : max |ω| (rad/s) in a still window
    disturbance_ut : scale (µT) of the magnitude/dip down-weighting
    robust_passes : reweighting passes of the heading correction
    robust_scale_rad : scale of the azimuth residual down-weighting ("smooth")
    offset_scale_rad : the same for the constant "offset" (a wider scale:
        the one offset must absorb the residual gyro drift of the whole walk)
    max_gap_s : sample spacing above which the gyro is not integrated
    madgwick_beta : gain of the Madgwick filter (rad/s)
    tilt_gyro_aided : gravity low-passed in a frame carried by the gyro
        (:func:`gyro_aided_gravity`, default) rather than in the device
        frame: the tilt then follows the sway of a hand-held phone at the
        step frequency, which a low-pass of the raw accelerometer averages
        away (on simulated demo walks 1.2-2.6° RMS tilt error, 1-2 µT RMS
        in the horizontal field, before; see the module docstring)
    tilt_gyro_max_deg : where the gyro-aided and the plain tilt differ by
        more than this, the plain one is kept (handling of the phone)
    linear_compensation : with ``forward_speed_m_s``, also remove the
        forward acceleration of starts and stops (``dv/dt`` along the
        horizontal forward direction) before the low-pass
    """

    method: str = "complementary"
    heading_mode: str = "offset"
    tilt_cutoff_hz: float = 0.4
    mag_time_constant_s: float = 20.0
    still_window_s: float = 1.0
    still_acc_sd: float = 0.12
    still_gyro_rad_s: float = 0.08
    disturbance_ut: float = 8.0
    robust_passes: int = 2
    robust_scale_rad: float = 0.25
    offset_scale_rad: float = 0.4
    max_gap_s: float = 1.0
    madgwick_beta: float = 0.041
    tilt_gyro_aided: bool = True
    tilt_gyro_max_deg: float = 10.0
    linear_compensation: bool = True


@dataclass(frozen=True, eq=False)
class Attitude:
    """Result of :func:`estimate_attitude`.

    quat : (N, 4) device->earth (ENU), scalar-last
    heading_rad : (N,) earth heading of the forward axis, CCW from east
    up_device : (N, 3) unit up direction in the device frame
    gyro_bias : (3,) rad/s
    meta : dict
    mag_earth_ut : (N, 3) µT or None, the magnetometer readings rotated to
        the earth frame by ``quat`` (complementary method with a magnetometer)
    """

    quat: np.ndarray
    heading_rad: np.ndarray
    up_device: np.ndarray
    gyro_bias: np.ndarray
    meta: dict = field(default_factory=dict)
    mag_earth_ut: np.ndarray | None = None


def row_norm(x):
    """Euclidean norm of each row of an (N, k) array -> (N,) (the same as
    ``np.linalg.norm(x, axis=1)``, faster for short rows)."""
    x = np.asarray(x, float)
    return np.sqrt(np.einsum("ij,ij->i", x, x))


def _rolling_sd(x, w):
    m = uniform_filter1d(x, w, axis=0, mode="nearest")
    m2 = uniform_filter1d(x * x, w, axis=0, mode="nearest")
    return np.sqrt(np.clip(m2 - m * m, 0, None))


def gyro_bias(t, acc, gyro, *, settings=None, still_hint=None):
    """Gyro bias (3,) rad/s from still periods, and the still mask (N,) bool.

    A sample is still when, over a centred window of ``still_window_s``, the
    sd of |a| is below ``still_acc_sd``, the mean |a| within 0.5 m/s² of g
    and the gyro magnitude below ``still_gyro_rad_s``. Without still samples
    the bias is zero.

    still_hint : (N,) bool, optional
        Samples an outside source knows to be still (a robot whose wheels
        report no motion). A robot cruising smoothly keeps |a| as steady as
        a robot at rest, so the inertial test alone would count gentle
        turns as bias; with a hint, a sample must pass both.
    """
    s = settings or AttitudeSettings()
    t = np.asarray(t, float)
    if t.size < 3:
        return np.zeros(3), np.zeros(t.size, bool)
    dt = float(np.median(np.diff(t)))
    w = max(3, int(round(s.still_window_s / dt)))
    an = row_norm(acc)
    gn = row_norm(gyro)
    still = (
        (_rolling_sd(an, w) < s.still_acc_sd)
        & (np.abs(uniform_filter1d(an, w, mode="nearest") - GRAVITY_M_S2) < 0.5)
        & (uniform_filter1d(gn, w, mode="nearest") < s.still_gyro_rad_s)
        & (gn < 2 * s.still_gyro_rad_s)
    )
    if still_hint is not None:
        still &= np.asarray(still_hint, bool)
    if still.sum() < w:
        return np.zeros(3), still
    return gyro[still].mean(axis=0), still


def tilt_quat(up_device):
    """Smallest rotations taking unit up directions (N, 3) onto +z, as
    scalar-last quaternions (N, 4): ``normalise(u x z, 1 + u.z)`` (the
    half-way quaternion; common practice, no source). Upside-down samples
    (u = -z) get a half turn about x."""
    u = np.asarray(up_device, float)
    u = u / row_norm(u)[:, None]
    q = np.zeros((len(u), 4))
    q[:, 0] = u[:, 1]
    q[:, 1] = -u[:, 0]
    q[:, 3] = 1.0 + u[:, 2]
    nq = row_norm(q)
    bad = nq < 1e-9
    q[bad] = [1.0, 0.0, 0.0, 0.0]
    nq[bad] = 1.0
    return q / nq[:, None]


def tilt_rotation(up_device):
    """Smallest rotations taking unit up directions (N, 3) onto +z: Rotation (N)."""
    return Rotation.from_quat(tilt_quat(up_device))


def _cross(a, b):
    """Row-wise cross product of (N, 3) arrays (faster than np.cross)."""
    a0, a1, a2 = a[:, 0], a[:, 1], a[:, 2]
    b0, b1, b2 = b[:, 0], b[:, 1], b[:, 2]
    return np.column_stack([a1 * b2 - a2 * b1, a2 * b0 - a0 * b2, a0 * b1 - a1 * b0])


def quat_rotate(q, v):
    """Rotate vectors v ((N, 3) or (3,)) by scalar-last unit quaternions q
    ((N, 4)): ``v + 2w (qv x v) + 2 qv x (qv x v)`` (same as scipy's
    ``Rotation.from_quat(q).apply(v)``, checked in the tests)."""
    qv = q[:, :3]
    w = q[:, 3:4]
    v = np.broadcast_to(np.asarray(v, float), qv.shape)
    c = _cross(qv, v)
    return v + 2.0 * (w * c + _cross(qv, c))


def _lowpass(x, fs, fc, order=2):
    if x.shape[0] < 16 or fc >= 0.45 * fs:
        return x.copy()
    sos = butter(order, fc, btype="low", fs=fs, output="sos")
    pad = min(x.shape[0] - 1, int(3 * fs / fc))
    return sosfiltfilt(sos, x, axis=0, padlen=pad)


def _qmul(a, b):
    """Row-wise Hamilton product ``a * b`` of scalar-last quaternions (N, 4)."""
    ax, ay, az, aw = a[:, 0], a[:, 1], a[:, 2], a[:, 3]
    bx, by, bz, bw = b[:, 0], b[:, 1], b[:, 2], b[:, 3]
    return np.column_stack([aw * bx + ax * bw + ay * bz - az * by,
                            aw * by - ax * bz + ay * bw + az * bx,
                            aw * bz + ax * by - ay * bx + az * bw,
                            aw * bw - ax * bx - ay * by - az * bz])


def quat_prefix_products(q):
    """Running products ``q[0] * q[1] * ... * q[k]`` of scalar-last unit
    quaternions (N, 4) -> (N, 4), in ceil(log2 N) vectorised passes (an
    inclusive parallel prefix scan of Hillis and Steele, 1986, "Data
    parallel algorithms", CACM 29(12); the product is associative, not
    commutative, and the earlier factor stays on the left)."""
    out = np.array(q, float)
    k = 1
    while k < out.shape[0]:
        out[k:] = _qmul(out[:-k], out[k:])
        out[k:] /= row_norm(out[k:])[:, None]
        k *= 2
    return out


def gyro_aided_gravity(t, acc, gyro, *, cutoff_hz=0.4, max_gap_s=1.0):
    """Gravity (specific force low-passed) in the device frame, with the
    device's own rotation carried by the gyro: a complementary split of the
    tilt, short term from the gyro and long term from the accelerometer.

    The accelerometer is rotated into the frame of the first sample by the
    integrated gyro (``Q_k``, device k -> device 0), low-passed there with
    the zero-phase Butterworth filter of the plain method (in that frame
    gravity is fixed but for slow gyro drift, which the filter follows) and
    rotated back by ``Q_k^-1``. Across gaps longer than ``max_gap_s`` the
    gyro is not integrated.

    Parameters
    ----------
    t : (N,) s; acc : (N, 3) m/s², specific force; gyro : (N, 3) rad/s,
        bias removed

    Returns
    -------
    (N, 3) m/s², low-passed specific force in the device frame
    """
    t = np.asarray(t, float)
    dt = np.diff(t)
    fs = 1.0 / float(np.median(dt))
    rv = 0.5 * (gyro[1:] + gyro[:-1]) * dt[:, None]
    rv[dt > max_gap_s] = 0.0
    dq = np.vstack([[0.0, 0.0, 0.0, 1.0], Rotation.from_rotvec(rv).as_quat()])
    q = quat_prefix_products(dq)
    g_ref = _lowpass(quat_rotate(q, acc), fs, cutoff_hz)
    return quat_rotate(q * np.array([-1.0, -1.0, -1.0, 1.0]), g_ref)


def _forward_acceleration(t, speed, acc, fwd, fs, cutoff_hz):
    """(N, 3) device-frame acceleration ``dv/dt`` along the horizontal
    forward direction (the forward axis with its component along the
    plainly low-passed up direction removed)."""
    dv = np.gradient(speed, t) if t.size > 1 else np.zeros_like(speed)
    u = _lowpass(acc, fs, cutoff_hz)
    u = u / np.maximum(row_norm(u), 1e-9)[:, None]
    fh = fwd[None, :] - (u @ fwd)[:, None] * u
    fh = fh / np.maximum(row_norm(fh), 1e-9)[:, None]
    return dv[:, None] * fh


def estimate_attitude(t, acc, gyro, mag, *, forward_axis=None, settings=None, still_hint=None,
                      forward_speed_m_s=None):
    """Attitude of every sample (see the module docstring for the method).

    Parameters
    ----------
    t : (N,) s; acc : (N, 3) m/s²; gyro : (N, 3) rad/s; mag : (N, 3) µT
        calibrated, device frame (may be None: heading is then relative)
    forward_axis : (3,) device forward axis (default phone +y)
    still_hint : (N,) bool, optional; see :func:`gyro_bias`
    forward_speed_m_s : (N,) float, optional
        Speed along the forward axis (from steps or odometry). When given,
        the centripetal acceleration of turning, ``ω × v`` in the device
        frame, is removed from the accelerometer before the tilt low-pass:
        turning a corner at walking pace pulls the low-passed "up" several
        degrees towards the centre, and the yaw rate about that tilted up
        then under-counts every turn by about ``1 - cos(tilt)`` (0.5-1 %).

    Returns
    -------
    Attitude
    """
    s = settings or AttitudeSettings()
    t = np.asarray(t, float)
    acc = np.asarray(acc, float)
    gyro = np.asarray(gyro, float)
    n = t.size
    if n < 2:
        raise DataError(f"attitude needs at least 2 samples, got {n}")
    fwd = FORWARD_AXIS["handheld"] if forward_axis is None else np.asarray(forward_axis, float)
    dt = np.diff(t)
    fs = 1.0 / float(np.median(dt))

    if s.method not in ("complementary", "madgwick"):
        from .errors import ConfigError

        raise ConfigError(f"attitude method must be 'complementary' or 'madgwick', got {s.method!r}")
    if s.heading_mode not in HEADING_MODES:
        from .errors import ConfigError

        raise ConfigError(f"heading_mode must be one of {', '.join(HEADING_MODES)}, got {s.heading_mode!r}")
    bias, still = gyro_bias(t, acc, gyro, settings=s, still_hint=still_hint)
    if s.method == "madgwick":
        return _madgwick_attitude(t, acc, gyro - bias, mag, fwd, s, bias, still)
    w = gyro - bias

    a_spec = acc
    if forward_speed_m_s is not None:
        speed = np.asarray(forward_speed_m_s, float)
        a_spec = acc - _cross(w, speed[:, None] * fwd[None, :])
        if s.linear_compensation:
            a_spec = a_spec - _forward_acceleration(t, speed, a_spec, fwd, fs, s.tilt_cutoff_hz)
    g = _lowpass(a_spec, fs, s.tilt_cutoff_hz)
    if s.tilt_gyro_aided:
        ga = gyro_aided_gravity(t, a_spec, w, cutoff_hz=s.tilt_cutoff_hz, max_gap_s=s.max_gap_s)
        # the gyro-carried tilt differs from the plain one by the sway and
        # the starts and stops (a few degrees); where it differs by much more
        # the phone is being handled (turned in the hand at several rad/s,
        # where a real gyro's scale and timing errors add up): keep the plain
        # estimate there
        cos_d = np.einsum("ij,ij->i", ga, g) / np.maximum(row_norm(ga) * row_norm(g), 1e-12)
        agree = cos_d >= np.cos(np.radians(s.tilt_gyro_max_deg))
        g = np.where(agree[:, None], ga, g)
    gn = row_norm(g)
    if np.any(gn <= 1e-6):
        raise DataError("accelerometer gives no gravity direction (zero low-passed acceleration)")
    up = g / gn[:, None]
    qt = tilt_quat(up)

    # yaw rate about earth up; minus the twist of the tilt rotation itself:
    # the z part of the rotation vector of qt[k+1] * qt[k]^-1
    w_up = np.einsum("ij,ij->i", w, up)
    # tilt quaternions have no z part: with a = qt[k+1] = (ax, ay, 0, aw)
    # and b = qt[k]^-1 = (-bx, -by, 0, bw), the product a * b has vector
    # part (aw*(-bx) + bw*ax, aw*(-by) + bw*ay, ax*(-by) - ay*(-bx))
    qx, qy, qw_ = np.ascontiguousarray(qt[:, 0]), np.ascontiguousarray(qt[:, 1]), np.ascontiguousarray(qt[:, 3])
    ax_, ay_, aw_ = qx[1:], qy[1:], qw_[1:]
    bx_, by_, bw_ = qx[:-1], qy[:-1], qw_[:-1]
    rvx = bw_ * ax_ - aw_ * bx_
    rvy = bw_ * ay_ - aw_ * by_
    rvz = ay_ * bx_ - ax_ * by_
    rw = aw_ * bw_ + ax_ * bx_ + ay_ * by_
    vn = np.sqrt(rvx * rvx + rvy * rvy + rvz * rvz)
    ang = 2.0 * np.arctan2(vn, np.abs(rw))
    scale = np.where(vn > 1e-15, ang / np.where(vn > 1e-15, vn, 1.0), 2.0)
    twist = np.where(rw < 0, -rvz, rvz) * scale
    dpsi = 0.5 * (w_up[1:] + w_up[:-1]) * dt - twist
    # across a gap in the log the gyro saw nothing: the turn over the gap is
    # taken from the magnetometer azimuths just before and after it (zero
    # without a magnetometer)
    gaps = np.flatnonzero(dt > s.max_gap_s)
    dpsi[gaps] = 0.0
    psi_g = np.concatenate([[0.0], np.cumsum(dpsi)])

    meta = {"method": "complementary (vectorised)", "gyro_bias_rad_s": bias.tolist(), "still_samples": int(still.sum())}
    corr = np.zeros(n)
    if mag is not None:
        mag = np.asarray(mag, float)
        mLx, mLy, mLz = _tilt_apply(qx, qy, qw_, mag[:, 0], mag[:, 1], mag[:, 2])
        psi_m = np.pi / 2 - np.arctan2(mLy, mLx)
        if gaps.size:
            nw = max(1, int(round(fs)))
            d0 = np.exp(1j * (psi_m - psi_g))  # gyro-relative azimuth, gap turn = 0
            for k in gaps:
                before = np.angle(np.mean(d0[max(0, k + 1 - nw) : k + 1]))
                after = np.angle(np.mean(d0[k + 1 : k + 1 + nw]))
                dpsi[k] = np.angle(np.exp(1j * (after - before)))
            psi_g = np.concatenate([[0.0], np.cumsum(dpsi)])
        d = psi_m - psi_g
        # weights: magnitude and dip far from the walk median = disturbed
        bm = np.sqrt(mLx * mLx + mLy * mLy + mLz * mLz)
        bh = np.hypot(mLx, mLy)
        bu = mLz
        wgt = np.exp(
            -0.5 * (((bm - np.median(bm)) / s.disturbance_ut) ** 2 + ((bu - np.median(bu)) / s.disturbance_ut) ** 2)
        ) * (bh > 1.0)
        if s.heading_mode == "first" or not np.isfinite(s.mag_time_constant_s):
            k = int(np.argmax(wgt > 0)) if np.any(wgt > 0) else 0
            corr[:] = d[k]
            meta["heading_reference"] = "first magnetometer azimuth, gyro only after"
        elif s.heading_mode == "offset" and wgt.sum() > 0:
            c0, info = _robust_offset(d, wgt, passes=max(2, s.robust_passes + 2), scale_rad=s.offset_scale_rad)
            corr[:] = c0
            meta["heading_reference"] = "magnetometer, one constant offset per walk (robust circular mean)"
            meta["mag_weight_mean"] = float(wgt.mean())
            meta.update(info)
        elif wgt.sum() > 0:
            # the correction is slow: smooth on 0.25 s bins (sums of the
            # weighted phasors), then interpolate back to the samples
            bw = 0.25
            b = np.floor((t - t[0]) / bw).astype(np.int64)
            nb = int(b[-1]) + 1
            tb = t[0] + (np.arange(nb) + 0.5) * bw
            sig = s.mag_time_constant_s / bw
            cd, sd = np.cos(d), np.sin(d)
            w_it = wgt
            for it in range(1 + s.robust_passes):
                zr = gaussian_filter1d(np.bincount(b, w_it * cd, nb), sig, mode="nearest")
                zi = gaussian_filter1d(np.bincount(b, w_it * sd, nb), sig, mode="nearest")
                cb = np.unwrap(np.arctan2(zi, zr))
                corr = np.interp(t, tb, cb)
                if it == s.robust_passes:
                    break
                # iteratively reweighted: azimuths that disagree with the
                # gyro-propagated heading by much more than the residual
                # scale are disturbances, not drift. Von Mises weight
                # exp((cos r - 1) / scale²) ~ exp(-r² / (2 scale²)) for small r
                cos_res = cd * np.cos(corr) + sd * np.sin(corr)
                w_it = wgt * np.exp((cos_res - 1.0) / s.robust_scale_rad**2)
            meta["heading_reference"] = f"magnetometer, smoothed over {s.mag_time_constant_s:g} s"
            meta["mag_weight_mean"] = float(wgt.mean())
    else:
        meta["heading_reference"] = "none (relative heading)"
    psi = psi_g + corr
    # quaternion of Rz(psi) * tilt, in closed form (tilt has no z part)
    sh, ch = np.sin(psi / 2), np.cos(psi / 2)
    quat = np.empty((n, 4))
    quat[:, 0] = ch * qx - sh * qy
    quat[:, 1] = ch * qy + sh * qx
    quat[:, 2] = sh * qw_
    quat[:, 3] = ch * qw_
    fLx, fLy, _ = _tilt_apply(qx, qy, qw_, *fwd)
    heading = _wrap(psi + np.arctan2(fLy, fLx))
    mag_earth = None
    if mag is not None:
        # Rz(psi) applied to the levelled field: cos psi = ch² - sh², sin psi = 2 sh ch
        cp, sp = ch * ch - sh * sh, 2.0 * sh * ch
        mag_earth = np.empty((n, 3))
        mag_earth[:, 0] = cp * mLx - sp * mLy
        mag_earth[:, 1] = sp * mLx + cp * mLy
        mag_earth[:, 2] = mLz
    return Attitude(quat=quat, heading_rad=heading, up_device=up, gyro_bias=bias, meta=meta, mag_earth_ut=mag_earth)


def _wrap(a):
    """Angles to [-pi, pi)."""
    return np.mod(a + np.pi, 2.0 * np.pi) - np.pi


def _tilt_apply(qx, qy, qw, vx, vy, vz):
    """Rotate vectors (components, (N,) or scalars) by tilt quaternions
    ``(qx, qy, 0, qw)`` ((N,) each): ``v + w t + qv x t`` with
    ``t = 2 qv x v`` (the formula of :func:`quat_rotate` with qz = 0).
    Returns the three components."""
    tx = 2.0 * (qy * vz)
    ty = -2.0 * (qx * vz)
    tz = 2.0 * (qx * vy - qy * vx)
    return vx + qw * tx + qy * tz, vy + qw * ty - qx * tz, vz + qw * tz + (qx * ty - qy * tx)


def _robust_offset(d, wgt, *, passes, scale_rad, n_bins=72):
    """Robust weighted circular mean of angles ``d`` ((N,) rad) with prior
    weights ``wgt`` ((N,) >= 0): start at the mode of a weighted, circularly
    smoothed histogram (so a large disturbed share cannot drag the start),
    then ``passes`` von Mises reweighting passes ``exp((cos r - 1) /
    scale²)`` about the current mean. Returns (angle, info dict)."""
    cd, sd = np.cos(d), np.sin(d)
    b = (np.floor((np.mod(d, 2 * np.pi)) / (2 * np.pi) * n_bins).astype(np.int64)) % n_bins
    h = np.bincount(b, wgt, n_bins)
    h = gaussian_filter1d(h, 1.5, mode="wrap")
    c = (np.argmax(h) + 0.5) * 2 * np.pi / n_bins
    w_it = wgt
    for _ in range(passes):
        cos_res = cd * np.cos(c) + sd * np.sin(c)
        w_it = wgt * np.exp((cos_res - 1.0) / scale_rad**2)
        c = float(np.arctan2((w_it * sd).sum(), (w_it * cd).sum()))
    tot = float(wgt.sum())
    return c, {"heading_offset_rad": c, "heading_offset_inlier_share": float(w_it.sum() / tot) if tot > 0 else 0.0}


def _madgwick_attitude(t, acc, gyro, mag, fwd, s, bias, still):
    dt = np.concatenate([[0.0], np.diff(t)])
    dt = np.where(dt > s.max_gap_s, 0.0, dt)
    up0 = _lowpass(acc, 1.0 / float(np.median(np.diff(t))), s.tilt_cutoff_hz)[0]
    q0 = tilt_quat(up0[None, :])
    if mag is not None:
        # start with the tilt-compensated compass heading of sample 0
        mL = quat_rotate(q0, mag[:1])[0]
        psi = np.pi / 2 - np.arctan2(mL[1], mL[0])
        qz = np.array([0.0, 0.0, np.sin(psi / 2), np.cos(psi / 2)])
        x, y, z, w = q0[0]
        c, sn = qz[3], qz[2]
        q0 = np.array([[c * x - sn * y, c * y + sn * x, c * z + sn * w, c * w - sn * z]])
        quat = madgwick_marg(gyro, acc, mag, dt_s=dt, beta=s.madgwick_beta, q0=q0[0])
    else:
        raise DataError("the Madgwick attitude needs magnetometer samples")
    f = quat_rotate(quat, fwd)
    up = quat_rotate(quat * [-1.0, -1.0, -1.0, 1.0], np.array([0.0, 0.0, 1.0]))
    meta = {"method": f"madgwick (beta {s.madgwick_beta:g})", "gyro_bias_rad_s": bias.tolist(),
            "still_samples": int(still.sum()), "heading_reference": "magnetometer (Madgwick gradient step)"}
    return Attitude(quat=quat, heading_rad=np.arctan2(f[:, 1], f[:, 0]), up_device=up, gyro_bias=bias, meta=meta)


def madgwick_marg(gyro, acc, mag, *, dt_s, beta=0.041, q0=None):
    """Madgwick (2010) MARG filter, one sample at a time.

    Gradient-descent correction of the gyro quaternion rate towards the
    accelerometer (gravity) and magnetometer (earth field with its dip
    estimated from the data, eqs. 45-46) directions; integration step eq. 13.

    Parameters
    ----------
    gyro : (N, 3) rad/s; acc : (N, 3); mag : (N, 3) (any consistent units)
    dt_s : float or (N,) float, seconds between sample i-1 and i
    beta : float, filter gain (rad/s)
    q0 : (4,) scalar-last device->ENU quaternion of sample 0 (default identity)

    Returns
    -------
    (N, 4) scalar-last device->ENU quaternions.
    """
    gyro = np.asarray(gyro, float)
    acc = np.asarray(acc, float)
    mag = np.asarray(mag, float)
    n = gyro.shape[0]
    dts = np.broadcast_to(np.asarray(dt_s, float), (n,))
    # work in Madgwick's frame (x north, y west, z up), scalar-first
    r0 = Rotation.identity() if q0 is None else Rotation.from_quat(q0)
    qx_, qy_, qz_, qw_ = (_NWU_TO_ENU.inv() * r0).as_quat()
    q = [qw_, qx_, qy_, qz_]
    out = np.empty((n, 4))
    out[0] = q
    an = acc / np.linalg.norm(acc, axis=1, keepdims=True)
    mn = mag / np.linalg.norm(mag, axis=1, keepdims=True)
    for i in range(1, n):
        q0_, q1, q2, q3 = q
        gx, gy, gz = gyro[i]
        # quaternion rate from the gyro (eq. 12): 0.5 q ⊗ (0, ω)
        d0 = 0.5 * (-q1 * gx - q2 * gy - q3 * gz)
        d1 = 0.5 * (q0_ * gx + q2 * gz - q3 * gy)
        d2 = 0.5 * (q0_ * gy - q1 * gz + q3 * gx)
        d3 = 0.5 * (q0_ * gz + q1 * gy - q2 * gx)
        ax, ay, az = an[i]
        mx, my, mz = mn[i]
        # earth-frame direction of the measured field h = q ⊗ m ⊗ q* (eq. 45)
        hx = mx * (q0_**2 + q1**2 - q2**2 - q3**2) + 2 * my * (q1 * q2 - q0_ * q3) + 2 * mz * (q1 * q3 + q0_ * q2)
        hy = 2 * mx * (q1 * q2 + q0_ * q3) + my * (q0_**2 - q1**2 + q2**2 - q3**2) + 2 * mz * (q2 * q3 - q0_ * q1)
        hz = 2 * mx * (q1 * q3 - q0_ * q2) + 2 * my * (q2 * q3 + q0_ * q1) + mz * (q0_**2 - q1**2 - q2**2 + q3**2)
        bx = np.hypot(hx, hy)  # eq. 46
        bz = hz
        f = np.array(
            [
                2 * (q1 * q3 - q0_ * q2) - ax,
                2 * (q0_ * q1 + q2 * q3) - ay,
                2 * (0.5 - q1**2 - q2**2) - az,
                2 * bx * (0.5 - q2**2 - q3**2) + 2 * bz * (q1 * q3 - q0_ * q2) - mx,
                2 * bx * (q1 * q2 - q0_ * q3) + 2 * bz * (q0_ * q1 + q2 * q3) - my,
                2 * bx * (q0_ * q2 + q1 * q3) + 2 * bz * (0.5 - q1**2 - q2**2) - mz,
            ]
        )
        J = np.array(
            [
                [-2 * q2, 2 * q3, -2 * q0_, 2 * q1],
                [2 * q1, 2 * q0_, 2 * q3, 2 * q2],
                [0.0, -4 * q1, -4 * q2, 0.0],
                [-2 * bz * q2, 2 * bz * q3, -4 * bx * q2 - 2 * bz * q0_, -4 * bx * q3 + 2 * bz * q1],
                [-2 * bx * q3 + 2 * bz * q1, 2 * bx * q2 + 2 * bz * q0_, 2 * bx * q1 + 2 * bz * q3, -2 * bx * q0_ + 2 * bz * q2],
                [2 * bx * q2, 2 * bx * q3 - 4 * bz * q1, 2 * bx * q0_ - 4 * bz * q2, 2 * bx * q1],
            ]
        )
        grad = J.T @ f
        gnorm = np.sqrt(grad @ grad)
        if gnorm > 0:
            grad = grad / gnorm
        qn = np.array([q0_, q1, q2, q3]) + (np.array([d0, d1, d2, d3]) - beta * grad) * dts[i]
        q = qn / np.sqrt(qn @ qn)
        out[i] = q
    r = _NWU_TO_ENU * Rotation.from_quat(out[:, [1, 2, 3, 0]])
    return r.as_quat()
