"""process_walk on synthetic logs: a robot with odometry and an
uncalibrated magnetometer (self-calibration), a handheld log with missing
samples, and the calibration handed in explicitly."""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from fingerprint.attitude import GRAVITY_M_S2
from fingerprint.calibration import Calibration
from fingerprint.errors import DataError
from fingerprint.features import field_features
from fingerprint.pipeline import mag_noise_ut, process_walk
from fingerprint.records import WalkLog

B_ENU = np.array([0.0, 22.0, -41.0])


def _robot_log(seed=0, offset=(30.0, -80.0, 0.0)):
    """A robot driving circles on a flat floor (z up), heading known."""
    rng = np.random.default_rng(seed)
    fs = 50.0
    n = int(60 * fs)
    t = np.arange(n) / fs
    yaw_rate = 0.25
    yaw = 0.4 + yaw_rate * t
    rot = Rotation.from_rotvec(np.column_stack([np.zeros(n), np.zeros(n), yaw]))
    acc = rot.inv().apply([0, 0, GRAVITY_M_S2]) + rng.normal(0, 0.03, (n, 3))
    gyro = np.tile([0, 0, yaw_rate], (n, 1)) + rng.normal(0, 0.003, (n, 3))
    mag = rot.inv().apply(B_ENU) + np.asarray(offset) + rng.normal(0, 0.3, (n, 3))
    v = 0.5  # m/s forward
    odom = np.column_stack([np.full(n, v / fs), np.zeros(n), np.full(n, yaw_rate / fs)])
    log = WalkLog(t=t, acc=acc, gyro=gyro, mag=mag, odom=odom,
                  meta={"platform": "robot", "magnetometer_calibrated": "no"})
    return log, rot, yaw


def test_robot_self_calibration_and_odometry():
    log, rot, yaw = _robot_log()
    w = process_walk(log)
    cal = w.meta["calibration"]
    assert cal["method"] == "self:circle-fallback"  # planar motion, said so
    np.testing.assert_allclose(cal["offset_ut"][:2], [30.0, -80.0], atol=0.5)
    # heading of the robot x axis: the truth (scipy rotation built above)
    dh = np.degrees(np.abs(np.angle(np.exp(1j * (w.heading_rad - np.angle(np.exp(1j * yaw)))))))
    assert np.percentile(dh, 95) < 3.0
    assert w.motion.kind == "odometry"
    assert w.motion.length_m.sum() == pytest.approx(0.5 * 60, rel=0.01)
    # earth-frame horizontal field points to magnetic north
    mean = w.mag_earth_ut.mean(axis=0)
    assert abs(np.degrees(np.arctan2(mean[0], mean[1]))) < 3.0
    assert mean[1] == pytest.approx(22.0, abs=1.0)


def test_explicit_calibration_is_applied():
    log, rot, _ = _robot_log(offset=(30.0, -80.0, 55.0))
    cal = Calibration([30.0, -80.0, 55.0], np.eye(3), source="mag")
    w = process_walk(log, calibration=cal)
    assert w.meta["calibration"]["method"] == "given"
    np.testing.assert_allclose(np.median(w.mag_earth_ut, axis=0), B_ENU, atol=1.0)
    with pytest.raises(DataError):
        process_walk(log, calibration=Calibration(np.zeros(3), source="mag_raw"))


def test_missing_samples_are_interpolated():
    log, _, _ = _robot_log()
    mag = log.mag.copy()
    mag[100:110] = np.nan
    log2 = WalkLog(t=log.t, acc=log.acc, gyro=log.gyro, mag=mag, odom=log.odom, meta=log.meta)
    w = process_walk(log2)
    assert np.isfinite(w.mag_earth_ut).all()
    # against the same walk without the gap: in the gap the bridged field
    # misses only the 0.3 µT white noise of the samples left out (30 values,
    # so within 4 sd: 1.2 µT); elsewhere the walks agree but for the
    # self-calibration fitted on 10 rows fewer (0.1 µT is generous)
    clean = process_walk(log).mag_earth_ut
    assert np.abs(w.mag_earth_ut[100:110] - clean[100:110]).max() < 4 * 0.3
    rest = np.r_[0:100, 110:log.n]
    assert np.abs(w.mag_earth_ut[rest] - clean[rest]).max() < 0.1


def test_mag_noise_is_measured_on_reported_samples_only():
    """A magnetometer reporting on every other row (sensors at different
    rates): the noise is that of its own samples (0.3 µT white noise added
    in ``_robot_log``), not of the rows filled between them."""
    log, _, _ = _robot_log()
    mag = log.mag.copy()
    mag[1::2] = np.nan
    gyro = log.gyro.copy()
    gyro[::2] = np.nan
    half = process_walk(WalkLog(t=log.t, acc=log.acc, gyro=gyro, mag=mag, odom=log.odom, meta=log.meta))
    assert half.mag_noise_ut == pytest.approx(0.3, rel=0.1)
    assert process_walk(log).mag_noise_ut == pytest.approx(0.3, rel=0.1)


def test_mag_noise_estimate_on_white_noise():
    # sd of the second difference of white noise is sigma * sqrt(6)
    # (variance of x[i+1] - 2x[i] + x[i-1]: 1 + 4 + 1; common practice, no source)
    rng = np.random.default_rng(2)
    m = np.cumsum(rng.normal(0, 0.001, (20000, 3)), axis=0) + rng.normal(0, 0.7, (20000, 3))
    assert mag_noise_ut(m) == pytest.approx(0.7, rel=0.05)


def test_features_noise_grows_with_heading_uncertainty():
    log, _, _ = _robot_log()
    w = process_walk(log)
    f1 = field_features(w, heading_sd_rad=0.0)
    f2 = field_features(w, heading_sd_rad=0.1)
    np.testing.assert_allclose(f1["b_fwd_sd"], w.mag_noise_ut)
    assert np.all(f2["b_fwd_sd"] > f1["b_fwd_sd"])


def test_cli_inspect_and_calibrate_robot_log(tmp_path, capsys):
    """Through mapping.cli.main: a robot log written by our writer."""
    import json

    from fingerprint.logio import write_walk_log
    from mapping.cli import main

    log, _, _ = _robot_log(offset=(30.0, -80.0, 55.0))
    p = tmp_path / "rb.log.csv.gz"
    write_walk_log(p, log)
    assert main(["inspect", str(p)]) == 0
    out = capsys.readouterr().out
    assert "odometry" in out and "distance 30.0 m" in out
    assert "self:circle-fallback" in out
    cal_path = tmp_path / "calibration.json"
    assert main(["calibrate", str(p), "--out", str(cal_path), "--field-up-ut", str(B_ENU[2])]) == 0
    capsys.readouterr()
    rep = json.loads(cal_path.read_text())
    assert rep["report"]["method"] == "circle-fallback"
    np.testing.assert_allclose(rep["offset_ut"], [30.0, -80.0, 55.0], atol=1.0)
    assert main(["inspect", "--json", "--calibration", str(cal_path), str(p)]) == 0
    s = json.loads(capsys.readouterr().out)
    assert s["calibration"]["method"] == "given" and s["calibration_verdict"]["verdict"].startswith("good")
    assert main(["calibrate", str(p), "--out", str(cal_path), "--field-ut", "-3"]) == 2


def test_robot_without_odometry_has_no_motion():
    log, _, _ = _robot_log()
    bare = WalkLog(t=log.t, acc=log.acc, gyro=log.gyro, mag=log.mag, meta=log.meta)
    w = process_walk(bare)
    assert w.motion.kind == "odometry" and w.motion.n == 0
    assert "without odom" in w.meta["warning"]


def test_robot_vertical_offset_from_expected_total_field():
    """A bare robot magnetometer with a known vertical hard-iron offset
    (55 µT, the construction's truth), turning about z only: without help
    the vertical offset is not identifiable; with the expected total field
    (e.g. fingerprint.geomag's IGRF total at the site) process_walk fits it
    so that the median |B| matches, and says so."""
    log, rot, _ = _robot_log(offset=(30.0, -80.0, 55.0))
    total = float(np.linalg.norm(B_ENU))
    plain = process_walk(log)
    assert plain.meta["calibration"]["vertical_offset_from"] == "none"
    assert abs(np.median(plain.mag_earth_ut[:, 2]) - B_ENU[2]) > 40  # 55 µT of offset left in
    w = process_walk(log, expected_total_ut=total)
    cal = w.meta["calibration"]
    assert cal["vertical_offset_from"] == "total" and "expected total field" in cal["message"]
    np.testing.assert_allclose(cal["offset_ut"], [30.0, -80.0, 55.0], atol=0.7)
    assert np.median(np.linalg.norm(w.mag_earth_ut, axis=1)) == pytest.approx(total, abs=0.01)
    np.testing.assert_allclose(np.median(w.mag_earth_ut, axis=0), B_ENU, atol=1.0)
    # the same through the settings
    from fingerprint.pipeline import PipelineSettings

    w2 = process_walk(log, settings=PipelineSettings(expected_total_ut=total))
    np.testing.assert_allclose(w2.mag_earth_ut, w.mag_earth_ut)


def test_robot_vertical_offset_from_expected_vertical_field():
    """The same bare robot with the expected mean vertical field given (a
    floor map's mean along its graph, mapping.evaluate.map_vertical_ut):
    the offset along z, which turning about z alone cannot show (common
    practice, no source), comes back to the construction's 55 µT; a log
    whose magnetometer the device calibrated is left alone."""
    log, rot, _ = _robot_log(offset=(30.0, -80.0, 55.0))
    w = process_walk(log, expected_up_ut=B_ENU[2])
    cal = w.meta["calibration"]
    assert cal["vertical_offset_from"] == "field_up"
    np.testing.assert_allclose(cal["offset_ut"], [30.0, -80.0, 55.0], atol=0.7)
    assert np.mean(w.mag_earth_ut[:, 2]) == pytest.approx(B_ENU[2], abs=0.5)
    done = WalkLog(t=log.t, acc=log.acc, gyro=log.gyro, mag=log.mag - [30.0, -80.0, 55.0], odom=log.odom,
                   meta={"platform": "robot", "magnetometer_calibrated": "yes"})
    np.testing.assert_array_equal(process_walk(done, expected_up_ut=-10.0).mag_earth_ut,
                                  process_walk(done).mag_earth_ut)


def test_expected_total_from_geomag_background(tmp_path):
    """The site's IGRF total (fingerprint.geomag, ppigrf) as the expected
    field: a robot log synthesised in that background field gets its
    vertical offset back."""
    from fingerprint.geomag import background_field

    geo = background_field(48.0, 11.0, "2024-06-01")  # an invented mid-latitude site
    b = np.array([0.0, geo.horizontal_ut, geo.up_ut])  # magnetic ENU
    rng = np.random.default_rng(5)
    n = 3000
    t = np.arange(n) / 50.0
    yaw = 0.3 * t
    rot = Rotation.from_rotvec(np.column_stack([np.zeros(n), np.zeros(n), yaw]))
    log = WalkLog(t=t, acc=rot.inv().apply([0, 0, GRAVITY_M_S2]) + rng.normal(0, 0.03, (n, 3)),
                  gyro=np.tile([0, 0, 0.3], (n, 1)) + rng.normal(0, 0.003, (n, 3)),
                  mag=rot.inv().apply(b) + [12.0, 40.0, -70.0] + rng.normal(0, 0.3, (n, 3)),
                  meta={"platform": "robot", "magnetometer_calibrated": "no"})
    w = process_walk(log, expected_total_ut=geo.total_ut)
    np.testing.assert_allclose(w.meta["calibration"]["offset_ut"], [12.0, 40.0, -70.0], atol=0.7)


def test_package_reexports_the_sensor_chain():
    import fingerprint
    from fingerprint import logio, pipeline

    assert fingerprint.read_walk_log is logio.read_walk_log
    assert fingerprint.read_checkpoints is logio.read_checkpoints
    assert fingerprint.read_track is logio.read_track
    assert fingerprint.process_walk is pipeline.process_walk
    assert {"read_walk_log", "read_checkpoints", "read_track", "process_walk"} <= set(fingerprint.__all__)


def test_cli_calibrate_with_expected_total(tmp_path, capsys):
    import json

    from fingerprint.logio import write_walk_log
    from mapping.cli import main

    log, _, _ = _robot_log(offset=(30.0, -80.0, 55.0))
    p = tmp_path / "rb.log.csv"
    write_walk_log(p, log)
    out = tmp_path / "calibration.json"
    assert main(["calibrate", str(p), "--out", str(out), "--field-total-ut", f"{np.linalg.norm(B_ENU):.4f}"]) == 0
    assert "expected total field" in capsys.readouterr().out
    rep = json.loads(out.read_text())
    np.testing.assert_allclose(rep["offset_ut"], [30.0, -80.0, 55.0], atol=0.7)
    assert rep["report"]["vertical_offset_from"] == "total"


def test_wheels_still_and_step_speed():
    from fingerprint.pipeline import step_speed, wheels_still
    from fingerprint.steps import StepEvents

    t = np.arange(500) / 50.0
    odom = np.zeros((500, 3))
    odom[200:300, 0] = 0.01  # driving for 2 s
    odom[350, 2] = np.nan  # no sample: counts as no motion
    still = wheels_still(t, odom, window_s=1.0)
    # still only a half window (0.5 s) away from any motion
    assert still[:170].all() and not still[176:325].any() and still[330:].all()
    # a step of 0.7 m lasting 0.5 s is 1.4 m/s inside it and 0 outside
    k = 0.5
    amax, amin = np.array([k ** -4 * 0.7 ** 4 + 1.0]), np.array([1.0])  # Weinberg: L = k (amax - amin)^(1/4)
    ev = StepEvents(np.array([2.25]), np.array([112]), amax, amin, np.array([2.0]), np.array([2.5]))
    v = step_speed(t, ev, step_constant=k)
    assert v[(t >= 2.0) & (t <= 2.5)] == pytest.approx(1.4)
    assert not v[(t < 2.0) | (t > 2.5)].any()
