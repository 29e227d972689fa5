"""Attitude: the vectorised complementary filter against scipy's Rotation
on synthetic rotations (reference library; acceptance < 0.5°), and the
Madgwick (2010) MARG filter against the ``ahrs`` package's implementation
of the same published filter (ahrs.filters.Madgwick.updateMARG) on the
same inputs."""

import numpy as np
import pytest
from ahrs.filters import Madgwick
from scipy.spatial.transform import Rotation

from fingerprint.attitude import (
    FORWARD_AXIS,
    GRAVITY_M_S2,
    _NWU_TO_ENU,
    AttitudeSettings,
    estimate_attitude,
    gyro_bias,
    madgwick_marg,
)
from fingerprint.errors import ConfigError

B_ENU = np.array([0.0, 20.0, -40.0])  # µT, magnetic north has no east part by definition
FS = 50.0


def _trajectory(seconds=60.0, *, noise=False, seed=0, still_s=0.0, bias=(0, 0, 0)):
    """Smooth handheld-like rotations: turning, with pitch and roll sway.
    Gyro from scipy's relative rotations between samples (central average)."""
    rng = np.random.default_rng(seed)
    n = int(seconds * FS)
    t = np.arange(n) / FS
    tm = np.clip(t - still_s, 0, None)
    yaw = 0.3 * tm + 0.5 * np.sin(0.2 * tm)
    pitch = np.radians(10) + np.radians(5) * np.sin(0.17 * tm + 1)
    roll = np.radians(8) * np.sin(0.3 * tm)
    rot = Rotation.from_euler("ZXY", np.column_stack([yaw, pitch, roll]))
    dr = (rot[:-1].inv() * rot[1:]).as_rotvec() * FS
    gyro = np.vstack([dr[:1], 0.5 * (dr[1:] + dr[:-1]), dr[-1:]]) + np.asarray(bias, float)
    acc = rot.inv().apply([0, 0, GRAVITY_M_S2])
    mag = rot.inv().apply(B_ENU)
    if noise:
        gyro = gyro + rng.normal(0, 0.01, gyro.shape)
        acc = acc + rng.normal(0, 0.05, acc.shape)
        mag = mag + rng.normal(0, 0.3, mag.shape)
    return t, rot, acc, gyro, mag


def _angle_deg(r1, r2):
    return np.degrees((r1.inv() * r2).magnitude())


def test_static_random_orientations_match_scipy():
    for k, r in enumerate(Rotation.random(12, random_state=7)):
        if (r.apply([0, 0, 1]) @ [0, 0, 1]) < 0.2:
            continue  # the phone is carried screen roughly up
        n = int(5 * FS)
        t = np.arange(n) / FS
        acc = np.tile(r.inv().apply([0, 0, GRAVITY_M_S2]), (n, 1))
        mag = np.tile(r.inv().apply(B_ENU), (n, 1))
        att = estimate_attitude(t, acc, np.zeros((n, 3)), mag)
        err = _angle_deg(Rotation.from_quat(att.quat), Rotation.from_quat(np.tile(r.as_quat(), (n, 1))))
        assert err.max() < 0.5, k


def test_moving_attitude_matches_scipy_truth():
    t, rot, acc, gyro, mag = _trajectory()
    att = estimate_attitude(t, acc, gyro, mag)
    assert _angle_deg(Rotation.from_quat(att.quat), rot).max() < 0.5


def test_tilt_under_noise():
    t, rot, acc, gyro, mag = _trajectory(noise=True, seed=1)
    att = estimate_attitude(t, acc, gyro, mag)
    up_true = rot.inv().apply([0, 0, 1.0])
    err = np.degrees(np.arccos(np.clip(np.einsum("ij,ij->i", up_true, att.up_device), -1, 1)))
    assert np.percentile(err, 95) < 0.5 and np.median(err) < 0.2


def test_heading_is_forward_axis_azimuth():
    t, rot, acc, gyro, mag = _trajectory(seconds=20, noise=True, seed=2)
    for platform in ("handheld", "robot"):
        fwd = FORWARD_AXIS[platform]
        att = estimate_attitude(t, acc, gyro, mag, forward_axis=fwd)
        f = Rotation.from_quat(att.quat).apply(fwd)
        np.testing.assert_allclose(np.exp(1j * att.heading_rad), np.exp(1j * np.arctan2(f[:, 1], f[:, 0])), atol=1e-9)
        ht = rot.apply(fwd)
        dh = np.angle(np.exp(1j * (att.heading_rad - np.arctan2(ht[:, 1], ht[:, 0]))))
        assert np.degrees(np.abs(dh)).max() < 1.5


def test_heading_not_yanked_by_local_disturbance():
    """A 4 s disturbance turning the horizontal field by 90° (a steel
    column): a compass would be 90° off; the filter moves by a few degrees."""
    t, rot, acc, gyro, mag = _trajectory(noise=True, seed=3)
    dist = (t > 30) & (t < 34)
    bad = Rotation.from_rotvec([0, 0, np.pi / 2]).apply(B_ENU)
    mag = mag.copy()
    mag[dist] = rot[dist].inv().apply(bad)
    att = estimate_attitude(t, acc, gyro, mag)
    ht = rot.apply(FORWARD_AXIS["handheld"])
    dh = np.degrees(np.abs(np.angle(np.exp(1j * (att.heading_rad - np.arctan2(ht[:, 1], ht[:, 0]))))))
    assert dh.max() < 5.0


def test_gyro_bias_while_still():
    bias = np.array([0.004, -0.006, 0.02])
    t, rot, acc, gyro, mag = _trajectory(seconds=40, still_s=5.0, bias=bias, noise=True, seed=4)
    b, still = gyro_bias(t, acc, gyro)
    assert still[: int(3 * FS)].all() and not still[int(8 * FS):].any()
    np.testing.assert_allclose(b, bias, atol=2e-3)
    # without the magnetometer, heading drift stays small thanks to the bias
    att = estimate_attitude(t, acc, gyro, mag, settings=AttitudeSettings(mag_time_constant_s=float("inf")))
    ht = rot.apply(FORWARD_AXIS["handheld"])
    dh = np.degrees(np.abs(np.angle(np.exp(1j * (att.heading_rad - np.arctan2(ht[:, 1], ht[:, 0]))))))
    assert dh.max() < 3.0


def _ahrs_madgwick(gyro, acc, mag, q0_enu, gain):
    m = Madgwick(frequency=FS, gain=gain)
    x, y, z, w = (_NWU_TO_ENU.inv() * Rotation.from_quat(q0_enu)).as_quat()
    Q = np.zeros((len(gyro), 4))
    Q[0] = [w, x, y, z]
    for i in range(1, len(gyro)):
        Q[i] = m.updateMARG(Q[i - 1], gyro[i], acc[i], mag[i])
    return _NWU_TO_ENU * Rotation.from_quat(Q[:, [1, 2, 3, 0]])


@pytest.mark.parametrize("gain", [0.041, 0.1])
def test_madgwick_matches_ahrs(gain):
    t, rot, acc, gyro, mag = _trajectory(seconds=30, noise=True, seed=5)
    q = madgwick_marg(gyro, acc, mag, dt_s=1 / FS, beta=gain, q0=rot[0].as_quat())
    ref = _ahrs_madgwick(gyro, acc, mag, rot[0].as_quat(), gain)
    assert _angle_deg(Rotation.from_quat(q), ref).max() < 1e-6
    # and the published filter tracks the truth
    assert _angle_deg(Rotation.from_quat(q), rot).max() < 2.0


def test_quaternion_helpers_match_scipy():
    from fingerprint.attitude import quat_rotate, tilt_quat

    r = Rotation.random(500, random_state=11)
    v = np.random.default_rng(11).normal(size=(500, 3))
    np.testing.assert_allclose(quat_rotate(r.as_quat(), v), r.apply(v), atol=1e-12)
    up = r.apply([0, 0, 1.0])
    q = tilt_quat(up)
    np.testing.assert_allclose(Rotation.from_quat(q).apply(up), np.tile([0, 0, 1.0], (500, 1)), atol=1e-12)
    # smallest rotation: its angle is the angle between up and +z
    np.testing.assert_allclose(Rotation.from_quat(q).magnitude(), np.arccos(np.clip(up[:, 2], -1, 1)), atol=1e-9)


def test_madgwick_method_in_estimate_attitude():
    t, rot, acc, gyro, mag = _trajectory(seconds=30, noise=True, seed=6)
    att = estimate_attitude(t, acc, gyro, mag, settings=AttitudeSettings(method="madgwick"))
    assert att.meta["method"].startswith("madgwick")
    assert np.percentile(_angle_deg(Rotation.from_quat(att.quat), rot), 95) < 2.0
    up_true = rot.inv().apply([0, 0, 1.0])
    assert np.degrees(np.arccos(np.clip(np.einsum("ij,ij->i", up_true, att.up_device), -1, 1))).max() < 2.0


def test_gap_is_not_integrated():
    """A 5 s hole in the log with a large bogus gyro rate at its edge: the
    gyro is not integrated across it (max_gap_s)."""
    t, rot, acc, gyro, mag = _trajectory(seconds=40, noise=True, seed=7)
    keep = (t < 20) | (t > 25)
    t, acc, gyro, mag = t[keep], acc[keep], gyro[keep].copy(), mag[keep]
    rot = rot[np.flatnonzero(keep)]
    i = np.flatnonzero(t > 25)[0]
    gyro[i - 1 : i + 1, 2] += 3.0  # 3 rad/s over a 5 s gap would be 15 rad of yaw
    att = estimate_attitude(t, acc, gyro, mag)
    ht = rot.apply(FORWARD_AXIS["handheld"])
    dh = np.degrees(np.abs(np.angle(np.exp(1j * (att.heading_rad - np.arctan2(ht[:, 1], ht[:, 0]))))))
    assert np.median(dh) < 3.0


def _heading_err_deg(att, rot, fwd=FORWARD_AXIS["handheld"]):
    ht = rot.apply(fwd)
    return np.degrees(np.abs(np.angle(np.exp(1j * (att.heading_rad - np.arctan2(ht[:, 1], ht[:, 0]))))))


@pytest.mark.parametrize("turn_deg, max_err_deg", [(40.0, 5.0), (90.0, 1.5)])
def test_default_offset_is_not_bent_by_a_long_disturbance(turn_deg, max_err_deg):
    """A disturbance that turns the horizontal field (magnitude and dip
    unchanged, so only the residual weights can catch it) for a quarter of
    the walk (15 s alongside steel racking). The default ("offset") heading
    is never bent: its error against the scipy truth is one constant over
    the walk (spread under 1°); a 90° pull is rejected almost entirely, a
    40° one, close to the residual scale, moves the constant by a few
    degrees."""
    t, rot, acc, gyro, clean = _trajectory(noise=True, seed=8)
    dist = (t > 20) & (t < 35)
    mag = clean.copy()
    mag[dist] = rot[dist].inv().apply(Rotation.from_rotvec([0, 0, np.radians(turn_deg)]).apply(B_ENU))
    att = estimate_attitude(t, acc, gyro, mag)
    assert att.meta["heading_reference"].startswith("magnetometer, one constant offset")
    assert _heading_err_deg(att, rot).max() < max_err_deg
    # not bent: against the undisturbed run the heading moved by one constant
    ref = estimate_attitude(t, acc, gyro, clean)
    assert np.ptp(np.angle(np.exp(1j * (att.heading_rad - ref.heading_rad)))) < 1e-9


def test_offset_mode_is_gyro_heading_plus_one_constant():
    """Relative heading is the gyro's alone: offset and first-azimuth modes
    differ by one constant angle over the whole walk."""
    t, rot, acc, gyro, mag = _trajectory(seconds=30, noise=True, seed=9)
    a = estimate_attitude(t, acc, gyro, mag)
    b = estimate_attitude(t, acc, gyro, mag, settings=AttitudeSettings(heading_mode="first"))
    d = np.angle(np.exp(1j * (a.heading_rad - b.heading_rad)))
    assert np.ptp(d) < 1e-9
    assert _heading_err_deg(a, rot).max() < 1.5  # and the constant is right (scipy truth)
    assert 0.9 < a.meta["heading_offset_inlier_share"] <= 1.0  # undisturbed: nearly every sample agrees
    with pytest.raises(ConfigError, match="heading_mode"):
        estimate_attitude(t, acc, gyro, mag, settings=AttitudeSettings(heading_mode="compass"))


def test_robot_still_hint_keeps_cruising_turns_out_of_the_bias():
    """A robot cruising with gentle turns (0.05 rad/s, below the still
    threshold) and a stop at the start: the accelerometer alone calls the
    cruise still and mixes the turn rate into the bias; with the wheels'
    still hint the bias comes from the stop only."""
    rng = np.random.default_rng(3)
    n = int(60 * FS)
    t = np.arange(n) / FS
    rate = np.where(t < 5, 0.0, 0.05 * np.sin(2 * np.pi * (t - 5) / 55.0) + 0.03)
    bias = np.array([0.001, -0.002, 0.004])
    yaw = np.cumsum(rate) / FS
    rot = Rotation.from_rotvec(np.column_stack([np.zeros(n), np.zeros(n), yaw]))
    acc = rot.inv().apply([0, 0, GRAVITY_M_S2]) + rng.normal(0, 0.02, (n, 3))
    gyro = np.column_stack([np.zeros(n), np.zeros(n), rate]) + bias + rng.normal(0, 0.001, (n, 3))
    b_plain, _ = gyro_bias(t, acc, gyro)
    b_hint, still = gyro_bias(t, acc, gyro, still_hint=t < 5)
    assert abs(b_plain[2] - bias[2]) > 0.01  # the cruise's turn rate leaks in
    np.testing.assert_allclose(b_hint, bias, atol=5e-4)
    assert not still[t >= 5].any()


def test_turn_compensation_reduces_tilt_error():
    """Walking a circle of radius 3 m at 1.3 m/s, phone level: the
    accelerometer sees the centripetal v²/r = 0.56 m/s² besides gravity
    (a tilt of 3.3° if taken for gravity); with the forward speed given, the
    tilt matches the scipy truth."""
    n = int(40 * FS)
    t = np.arange(n) / FS
    v, r = 1.3, 3.0
    yaw = v / r * t
    rot = Rotation.from_rotvec(np.column_stack([np.zeros(n), np.zeros(n), yaw]))
    # phone +y (forward) points at yaw + 90° in ENU; the centre of a left
    # turn lies to its left, at yaw + 180°: centripetal acceleration v²/r
    cen = v * v / r * np.column_stack([np.cos(yaw + np.pi), np.sin(yaw + np.pi), np.zeros(n)])
    acc = rot.inv().apply(cen + [0, 0, GRAVITY_M_S2])
    gyro = np.tile([0.0, 0.0, v / r], (n, 1))
    mag = rot.inv().apply(B_ENU)
    up_true = rot.inv().apply([0, 0, 1.0])

    def tilt_err(att):
        return np.degrees(np.arccos(np.clip(np.einsum("ij,ij->i", up_true, att.up_device), -1, 1)))[200:-200]

    plain = estimate_attitude(t, acc, gyro, mag)
    comp = estimate_attitude(t, acc, gyro, mag, forward_speed_m_s=np.full(n, v))
    assert np.median(tilt_err(plain)) == pytest.approx(np.degrees(np.arctan2(v * v / r, GRAVITY_M_S2)), abs=0.3)
    assert tilt_err(comp).max() < 0.1


def test_quat_prefix_products_match_scipy_running_product():
    # reference: scipy Rotation composition, one factor at a time
    from fingerprint.attitude import quat_prefix_products

    q = Rotation.random(37, random_state=3)
    out = quat_prefix_products(q.as_quat())
    ref = [q[0]]
    for k in range(1, len(q)):
        ref.append(ref[-1] * q[k])
    ref = Rotation.concatenate(ref)
    assert _angle_deg(Rotation.from_quat(out), ref).max() < 1e-6


def test_gyro_aided_tilt_follows_step_sway():
    """A phone swaying ±2° in roll at 1 Hz and ±0.6° in pitch at 2 Hz (the
    sway of a walker's hand; common practice, no source) while it turns:
    a low-pass of the accelerometer alone averages the sway away (about
    1.5° RMS tilt error); with the gyro carrying the short-term tilt, the
    up direction matches the scipy truth."""
    n = int(60 * FS)
    t = np.arange(n) / FS
    yaw = 0.2 * t
    pitch = np.radians(12) + np.radians(0.6) * np.sin(2 * np.pi * 2.0 * t)
    roll = np.radians(2.0) * np.sin(2 * np.pi * 1.0 * t)
    rot = Rotation.from_euler("ZXY", np.column_stack([yaw, pitch, roll]))
    dr = (rot[:-1].inv() * rot[1:]).as_rotvec() * FS
    gyro = np.vstack([dr[:1], 0.5 * (dr[1:] + dr[:-1]), dr[-1:]])
    acc = rot.inv().apply([0, 0, GRAVITY_M_S2])
    mag = rot.inv().apply(B_ENU)
    up_true = rot.inv().apply([0, 0, 1.0])

    def tilt_err(att):
        return np.degrees(np.arccos(np.clip(np.einsum("ij,ij->i", up_true, att.up_device), -1, 1)))[100:-100]

    plain = estimate_attitude(t, acc, gyro, mag, settings=AttitudeSettings(tilt_gyro_aided=False))
    aided = estimate_attitude(t, acc, gyro, mag)
    assert np.sqrt(np.mean(tilt_err(plain) ** 2)) > 1.0
    assert tilt_err(aided).max() < 0.1
    # the earth-frame field then stays on the true one (B_ENU, µT)
    assert np.abs(aided.mag_earth_ut[100:-100] - B_ENU).max() < 0.2


def test_start_stop_acceleration_is_compensated():
    """Walking off and stopping (speed 0 -> 1.4 m/s in about 0.6 s and back,
    phone level, facing east): the forward acceleration, taken for gravity,
    tilts a low-pass of the accelerometer by a few degrees; with the forward
    speed given it is removed (truth from scipy Rotation)."""
    from scipy.ndimage import gaussian_filter1d

    n = int(30 * FS)
    t = np.arange(n) / FS
    v = gaussian_filter1d(np.where((t > 5) & (t < 10), 1.4, 0.0) + np.where((t > 18) & (t < 21), 1.4, 0.0), 0.15 * FS)
    a_fwd = np.gradient(v, t)
    rot = Rotation.from_euler("ZXY", np.column_stack([np.full(n, -np.pi / 2), np.zeros(n), np.zeros(n)]))
    acc = rot.inv().apply(np.column_stack([a_fwd, np.zeros(n), np.full(n, GRAVITY_M_S2)]))
    gyro = np.zeros((n, 3))
    mag = rot.inv().apply(B_ENU)
    up_true = rot.inv().apply([0, 0, 1.0])

    def tilt_err(att):
        return np.degrees(np.arccos(np.clip(np.einsum("ij,ij->i", up_true, att.up_device), -1, 1)))

    off = estimate_attitude(t, acc, gyro, mag, forward_speed_m_s=v,
                            settings=AttitudeSettings(linear_compensation=False))
    on = estimate_attitude(t, acc, gyro, mag, forward_speed_m_s=v)
    assert tilt_err(off).max() > 2.0
    assert tilt_err(on).max() < 0.2
