"""Magnetometer calibration: the Li & Griffiths (2004) ellipsoid fit on a
known synthetic hard/soft-iron distortion, checked against the truth and
against a geometric least-squares fit with scipy.optimize (reference
library); the planar fallback; the calibration file."""

import json
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from fingerprint.calibration import Calibration, circle_fit, fit_calibration, rotation_coverage
from fingerprint.errors import FormatError
from mapping.cli import main

B_EARTH = np.array([18.0, 6.0, -44.0])  # µT, a mid-latitude field (from memory)
F = float(np.linalg.norm(B_EARTH))
# symmetric soft-iron distortion and hard-iron offset (the usual m = S b + o
# model; common practice, no source)
S = np.array([[1.06, 0.04, -0.03], [0.04, 0.93, 0.05], [-0.03, 0.05, 1.01]])
O = np.array([42.0, -135.0, 260.0])


def _distorted(n=4000, noise=0.5, seed=0):
    rng = np.random.default_rng(seed)
    rot = Rotation.random(n, random_state=seed)
    b = rot.inv().apply(B_EARTH)  # field in the device frame
    return b @ S.T + O + rng.normal(0, noise, (n, 3))


def test_ellipsoid_recovers_offset_and_matrix():
    m = _distorted()
    cal, rep = fit_calibration(m, field_ut=F)
    assert rep["method"] == "ellipsoid"
    # acceptance: offset within 0.5 µT, matrix within 2 % (of S^-1)
    assert np.abs(cal.offset_ut - O).max() < 0.5
    Winv = np.linalg.inv(S)
    assert np.abs(cal.matrix - Winv).max() / np.abs(Winv).max() < 0.02
    assert rep["b_spread_after_ut"] < 0.1 * rep["b_spread_before_ut"]
    assert rep["b_mean_after_ut"] == pytest.approx(F, rel=0.01)
    assert rep["coverage"]["sphere_fraction"] > 0.9
    assert np.isfinite(rep["condition_number"]) and rep["condition_number"] > 1


def test_ellipsoid_matches_scipy_geometric_fit():
    """Reference: geometric fit | W (m - o) | = F with scipy.optimize.least_squares
    over a symmetric W (6 parameters) and o (3)."""
    m = _distorted(n=1500, noise=0.3, seed=5)
    cal, _ = fit_calibration(m, field_ut=F)

    def resid(p):
        W = np.array([[p[0], p[3], p[4]], [p[3], p[1], p[5]], [p[4], p[5], p[2]]])
        return np.linalg.norm((m - p[6:]) @ W.T, axis=1) - F

    p0 = np.r_[1, 1, 1, 0, 0, 0, m.mean(axis=0)]
    ref = least_squares(resid, p0).x
    Wref = np.array([[ref[0], ref[3], ref[4]], [ref[3], ref[1], ref[5]], [ref[4], ref[5], ref[2]]])
    np.testing.assert_allclose(cal.offset_ut, ref[6:], atol=0.3)
    np.testing.assert_allclose(cal.matrix, Wref, atol=0.01)


def test_without_field_keeps_volume():
    cal, rep = fit_calibration(_distorted(seed=2))
    assert np.linalg.det(cal.matrix) == pytest.approx(1.0, abs=1e-9)
    assert rep["b_spread_after_ut"] < 0.1 * rep["b_spread_before_ut"]


def test_planar_data_takes_circle_fallback_and_says_so():
    rng = np.random.default_rng(1)
    yaw = rng.uniform(0, 2 * np.pi, 3000)
    rot = Rotation.from_rotvec(np.column_stack([np.zeros_like(yaw), np.zeros_like(yaw), yaw]))
    m = rot.inv().apply(B_EARTH) + O + rng.normal(0, 0.5, (3000, 3))
    cal, rep = fit_calibration(m)
    assert rep["method"] == "circle-fallback"
    assert "one axis only" in rep["message"] and "not identifiable" in rep["message"]
    # the in-plane (x, y) offset is identified; z along the normal is not (left 0)
    assert np.abs(cal.offset_ut[:2] - O[:2]).max() < 0.5
    assert abs(cal.offset_ut[2]) < 1.0
    np.testing.assert_array_equal(cal.matrix, np.eye(3))
    assert rep["coverage"]["spread"][2] < 0.05
    assert rep["arc_fraction"] == 1.0


def test_too_little_turning_is_refused(tmp_path, capsys):
    """Readings from a 30° turn about the vertical: a circle through so short
    an arc does not fix its centre (common practice, no source), so the fit
    refuses instead of returning the field itself as the offset; the command
    exits 2 naming the log and writes no calibration file."""
    from fingerprint.errors import DataError

    rng = np.random.default_rng(4)
    yaw = rng.uniform(0, np.radians(30), 2000)
    rot = Rotation.from_rotvec(np.column_stack([np.zeros_like(yaw), np.zeros_like(yaw), yaw]))
    m = rot.inv().apply(B_EARTH) + O + rng.normal(0, 0.5, (2000, 3))
    with pytest.raises(DataError, match="did not turn enough"):
        fit_calibration(m)
    out = tmp_path / "cal.json"
    log = Path(__file__).parent / "data" / "malformed" / "valid.log.csv"  # a short log without turns
    assert main(["calibrate", str(log), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(log) in err[0] and "did not turn enough" in err[0], err
    assert not out.exists()


def test_circle_fit_against_three_point_circle():
    # the circle through (0,0), (4,0), (0,2) has centre (2,1), radius sqrt(5)
    # (elementary geometry: perpendicular bisectors)
    c, r = circle_fit(np.array([[0, 0], [4, 0], [0, 2.0]]))
    np.testing.assert_allclose(c, [2, 1], atol=1e-12)
    assert r == pytest.approx(np.sqrt(5), abs=1e-12)


def test_rotation_coverage_extremes():
    full = Rotation.random(5000, random_state=1).apply([1, 0, 0])
    assert rotation_coverage(full)["sphere_fraction"] > 0.95
    ev = rotation_coverage(full)["spread"]
    assert max(ev) - min(ev) < 0.05 and sum(ev) == pytest.approx(1.0)
    ring = np.column_stack([np.cos(np.linspace(0, 6, 500)), np.sin(np.linspace(0, 6, 500)), np.zeros(500)])
    assert rotation_coverage(ring)["sphere_fraction"] < 0.3  # a great circle crosses ~1/5 of 100 cells


def test_json_round_trip_and_errors(tmp_path):
    cal, _ = fit_calibration(_distorted(seed=3), field_ut=F, source="mag_raw")
    p = tmp_path / "calibration.json"
    cal.save(p)
    back = Calibration.from_json(p)
    np.testing.assert_array_equal(back.offset_ut, cal.offset_ut)
    np.testing.assert_array_equal(back.matrix, cal.matrix)
    assert back.source == "mag_raw"
    m = _distorted(n=10, seed=4)
    np.testing.assert_allclose(back.apply(m), (m - cal.offset_ut) @ cal.matrix.T)
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"format": "lodemap-calibration", "version": 1, "offset_ut": [1, 2], "matrix": []}))
    with pytest.raises(FormatError):
        Calibration.from_json(bad)
    bad.write_text("{not json")
    with pytest.raises(FormatError) as exc:
        Calibration.from_json(bad)
    assert exc.value.line == 1
    good = cal.to_json()
    for change, words in (
        ({"offset_ut": ["1", "2", "3"]}, "expected JSON numbers"),
        ({"offset_ut": [1.0, float("nan"), 3.0]}, "must be finite"),
        ({"matrix": [[0.0] * 3] * 3}, "singular"),
        ({"matrix": [[1.0, 0, 0], [0, 1.0, 0], [0, 0, -1.0]]}, "mirrors the axes"),
    ):
        bad.write_text(json.dumps({**good, **change}))  # json writes NaN as the NaN literal, which it reads back
        with pytest.raises(FormatError, match=rf"bad\.json: .*{words}"):
            Calibration.from_json(bad)


def test_cli_calibrate_on_real_walk(tmp_path, capsys):
    from pathlib import Path

    log = Path(__file__).parent / "data" / "real" / "siteA" / "F1" / "walk_001.log.csv.gz"
    out = tmp_path / "calibration.json"
    assert main(["calibrate", str(log), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    obj = json.loads(out.read_text())
    assert obj["source"] == "mag_raw"  # the raw columns are present
    # a phone carried flat: rotations about one axis only -> fallback, said so
    assert obj["report"]["method"] == "circle-fallback" and "circle-fallback" in text
    assert obj["report"]["b_spread_after_ut"] < obj["report"]["b_spread_before_ut"]


def test_planarity_from_gravity_despite_spatial_field_changes():
    """A robot (z up) turning on a floor over a field that changes from
    place to place by ±5 µT: the readings do not lie on a circle, but the
    gravity directions show rotations about the vertical only."""
    rng = np.random.default_rng(8)
    n = 4000
    yaw = np.linspace(0, 12 * np.pi, n) + rng.normal(0, 0.05, n)  # six turns
    rot = Rotation.from_rotvec(np.column_stack([np.zeros(n), np.zeros(n), yaw]))
    s = np.linspace(0, 40, n)
    field = B_EARTH + 5 * np.column_stack([np.sin(s / 3), np.cos(s / 5), np.sin(s / 2)])
    m = rot.inv().apply(field) + O + rng.normal(0, 0.3, (n, 3))
    up = rot.inv().apply([0, 0, 1.0]) + rng.normal(0, 0.01, (n, 3))
    cal, rep = fit_calibration(m, up_device=up)
    assert rep["method"] == "circle-fallback" and "vertical only" in rep["message"]
    assert np.abs(cal.offset_ut[:2] - O[:2]).max() < 3.0  # spatial changes leak in a little
    assert cal.offset_ut[2] == pytest.approx(0.0, abs=0.5)  # left at 0 along the (noisy) mean up
    # the expected vertical field (e.g. from IGRF) fixes the offset along up
    cal2, rep2 = fit_calibration(m, up_device=up, field_up_ut=B_EARTH[2])
    assert cal2.offset_ut[2] == pytest.approx(O[2], abs=1.0)
    assert "expected vertical field" in rep2["message"]


def _robot_turning(field_enu, *, n=4000, seed=9, tilt_deg=0.0):
    """A bare robot magnetometer (offset O) turning about z only, with a
    small random tilt of the up axis; field in ENU µT."""
    rng = np.random.default_rng(seed)
    yaw = np.linspace(0, 10 * np.pi, n)
    tilt = np.radians(tilt_deg) * rng.normal(size=(n, 2))
    rot = Rotation.from_rotvec(np.column_stack([tilt, yaw]))
    m = rot.inv().apply(field_enu) + O + rng.normal(0, 0.4, (n, 3))
    up = rot.inv().apply([0, 0, 1.0])
    return m, up


@pytest.mark.parametrize("field_enu, sign", [(B_EARTH, -1.0), (B_EARTH * [1, 1, -1], 1.0)])
def test_expected_total_field_fixes_vertical_offset(field_enu, sign):
    """Known synthetic offset O (truth of the construction): the expected
    total field |B| (e.g. IGRF total at the site) sets the offset along up
    so that the median corrected |B| matches it; the vertical sign picks the
    branch (field dipping down in the north, up in the south)."""
    m, up = _robot_turning(field_enu, tilt_deg=1.0)
    total = float(np.linalg.norm(field_enu))
    cal, rep = fit_calibration(m, up_device=up, field_total_ut=total, field_up_sign=sign)
    assert rep["method"] == "circle-fallback" and rep["vertical_offset_from"] == "total"
    assert "median |B| matches the expected total field" in rep["message"]
    np.testing.assert_allclose(cal.offset_ut, O, atol=0.6)
    assert np.median(np.linalg.norm(cal.apply(m), axis=1)) == pytest.approx(total, abs=1e-3)
    # the corrected vertical has the sign asked for and about the true size
    assert np.median(cal.apply(m) @ [0, 0, 1.0]) == pytest.approx(field_enu[2], abs=0.6)
    # the other sign gives the mirror branch, 2|B_up| away
    cal_w, _ = fit_calibration(m, up_device=up, field_total_ut=total, field_up_sign=-sign)
    assert abs(cal_w.offset_ut[2] - O[2]) == pytest.approx(2 * abs(field_enu[2]), abs=1.5)
    # field_up_ut wins when both are given
    cal_u, rep_u = fit_calibration(m, up_device=up, field_total_ut=total + 20, field_up_ut=field_enu[2])
    assert rep_u["vertical_offset_from"] == "field_up"
    assert cal_u.offset_ut[2] == pytest.approx(O[2], abs=1.0)


def test_expected_total_below_horizontal_is_reported():
    m, up = _robot_turning(B_EARTH)
    h = float(np.hypot(*B_EARTH[:2]))
    cal, rep = fit_calibration(m, up_device=up, field_total_ut=0.5 * h)
    assert rep["vertical_offset_from"] == "total-unreachable" and "cannot fix the vertical offset" in rep["message"]
    assert cal.offset_ut[2] == pytest.approx(0.0, abs=0.5)
    from fingerprint.errors import DataError

    with pytest.raises(DataError):
        fit_calibration(m, up_device=up, field_total_ut=-3.0)


def test_turning_stretch_is_fitted_alone():
    # A survey walk: a calibration motion at one spot (full rotations, the
    # field there fixed), then the device carried level while the field
    # changes from place to place (indoor anomalies of ~10 µT, from memory).
    # The fit on the turning stretch alone recovers the offset (truth: the
    # synthetic O); over the whole walk the field's spatial changes pull the
    # ellipsoid away from it.
    from fingerprint.calibration import turning_stretch

    rng = np.random.default_rng(21)
    n_cal, n_walk = 1000, 6000
    rot_cal = Rotation.random(n_cal, random_state=21)
    yaw = np.cumsum(rng.normal(0, 0.02, n_walk))
    rot_walk = Rotation.from_euler("z", yaw[:, None])
    b_walk = B_EARTH + 10.0 * np.column_stack([np.sin(np.arange(n_walk) / 97.0 + k) for k in range(3)])
    b_dev = np.vstack([rot_cal.inv().apply(B_EARTH), rot_walk.inv().apply(b_walk)])
    m = b_dev @ S.T + O + rng.normal(0, 0.4, (n_cal + n_walk, 3))
    up = np.vstack([rot_cal.inv().apply([0, 0, 1.0]), rot_walk.inv().apply([0, 0, 1.0])])
    assert turning_stretch(up) is not None
    start, stop = turning_stretch(up)
    assert start == 0 and n_cal - 60 <= stop <= n_cal + 60
    cal, rep = fit_calibration(m, up_device=up)
    assert rep["method"] == "ellipsoid" and rep["stretch"]["stop"] == stop
    assert np.abs(cal.offset_ut - O).max() < 0.5  # acceptance as for a clean sphere above
    whole, _ = fit_calibration(m, up_device=up, use_turning_stretch=False)
    assert np.abs(whole.offset_ut - O).max() > np.abs(cal.offset_ut - O).max()


def test_turning_everywhere_or_nowhere_keeps_the_whole_log():
    # a tumbling data set (the synthetic sphere above) and a level walk have
    # no separate calibration stretch (common practice, no source)
    from fingerprint.calibration import turning_stretch

    up_tumble = Rotation.random(3000, random_state=3).inv().apply([0, 0, 1.0])
    assert turning_stretch(up_tumble) is None
    up_level = np.tile([0.05, 0.2, 0.98], (3000, 1))
    assert turning_stretch(up_level) is None
