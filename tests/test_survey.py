"""Survey-walk positions.

References: the synthetic truth the walks are generated from (a path
walked at constant speed, tests/_plans_synth.py) - a similarity-corrected
dead-reckoning path along a straight leg must reproduce it exactly;
numpy.interp for track interpolation; the Brownian-bridge variance
q * a * b / (a + b) of a random walk pinned at both ends (common practice,
no source); shapely for free-space checks; the real walks' speeds in
shared/real_data/README.md (median about 1.1 m/s, never above 2 m/s)."""

from pathlib import Path

import numpy as np
import pytest

from _plans_synth import checkpoints_of, make_walk, polyline_walk, track_of
from fingerprint.errors import ConfigError, DataError
from fingerprint.records import Checkpoints
from mapping.floorplan import plan_from_geojson
from mapping.survey import adjust_checkpoints, dead_reckoning, reconstruct_positions, segment_fits
from _realdata import real_dir

ROOT = Path(__file__).resolve().parent
E2P = np.radians(20.0)
ROUTE = [[2.0, 1.0], [18.0, 1.0], [18.0, 9.0], [6.0, 9.0]]


def _walk(**kw):
    # at 1 m/s the corners (16, 24 and 36 m along) fall on step ends (every 0.5 s)
    truth = polyline_walk(ROUTE, speed=1.0, **{k: kw.pop(k) for k in ("t_before_s", "t_after_s") if k in kw})
    return truth, make_walk(truth, earth_to_plan_rad=E2P, **kw)


def test_checkpoint_pinning_recovers_truth_despite_scale_and_heading_bias():
    truth, walk = _walk(scale=1.12, heading_bias_rad=np.radians(6.0))
    sp = reconstruct_positions(walk, checkpoints=checkpoints_of(truth), earth_to_plan_rad=E2P)
    assert sp.source == "checkpoints" and sp.n == walk.n
    np.testing.assert_array_equal(sp.index, np.arange(walk.n))
    err = np.hypot(*(sp.xy - truth["xy"]).T)
    assert err.max() < 1e-6
    # the per-segment fit undoes the injected errors: scale 1/1.12, rotation -6°
    np.testing.assert_allclose(sp.meta["scale"], 1 / 1.12, atol=1e-3)
    np.testing.assert_allclose(sp.meta["rotation_rad"], -np.radians(6.0), atol=1e-4)
    assert not any(sp.meta["clamped"])


def test_noisy_heading_error_is_pinned_at_checkpoints_and_sigma_follows_bridge():
    rng = np.random.default_rng(5)
    truth, walk = _walk(heading_walk_rad=np.radians(1.5), rng=rng)
    cps = checkpoints_of(truth)
    sp = reconstruct_positions(walk, checkpoints=cps, earth_to_plan_rad=E2P, tap_sigma_m=0.8, drift_m2_per_m=0.04)
    err = np.hypot(*(sp.xy - truth["xy"]).T)
    # at the checkpoint times the position is the checkpoint
    at_cp = np.array([np.argmin(np.abs(walk.t - tc)) for tc in cps.t])
    assert err[at_cp].max() < 0.05
    assert err.max() < 2.0  # a heading random walk of 1.5°/step stays within a couple of metres
    # sigma: tap error plus the bridge variance from the true distances
    s = walk.t * 1.0  # arc length walked (constant speed 1 m/s, scale 1)
    cum = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(np.asarray(ROUTE), axis=0).T))])
    j = np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(cum) - 2)
    a = s - cum[j]
    b = cum[j + 1] - s
    inner = (s >= 0) & (s <= cum[-1])
    ref = np.sqrt(0.8**2 + 0.04 * a * b / (a + b))
    np.testing.assert_allclose(sp.sigma_m[inner], ref[inner], atol=0.02)
    assert sp.sigma_m.min() == pytest.approx(0.8, abs=1e-6)


@pytest.mark.parametrize("policy", ["extrapolate", "drop"])
def test_samples_outside_the_checkpoints(policy):
    truth, walk = _walk(t_before_s=3.0, t_after_s=2.0)
    cps = checkpoints_of(truth)
    sp = reconstruct_positions(walk, checkpoints=cps, earth_to_plan_rad=E2P, outside=policy)
    before = walk.t < cps.t[0]
    after = walk.t > cps.t[-1]
    assert before.sum() > 100 and after.sum() > 50
    if policy == "drop":
        np.testing.assert_array_equal(sp.index, np.nonzero(~before & ~after)[0])
        assert sp.t.min() >= cps.t[0] and sp.t.max() <= cps.t[-1]
        np.testing.assert_allclose(sp.xy, truth["xy"][sp.index], atol=1e-6)
    else:
        assert sp.n == walk.n
        # the end legs are straight, so extrapolating along them is exact
        np.testing.assert_allclose(sp.xy, truth["xy"], atol=1e-6)
        # sigma grows with the distance walked away from the end checkpoint
        sb = sp.sigma_m[before]
        assert np.all(np.diff(sb) <= 1e-12) and sb[0] > sp.sigma_m[~before & ~after].max()
        sa = sp.sigma_m[after]
        assert np.all(np.diff(sa) >= -1e-12) and sa[-1] > 1.0


def test_extrapolation_can_be_limited_to_a_short_way():
    truth, walk = _walk(t_before_s=3.0, t_after_s=2.0)  # 3 m before, 2 m after at 1 m/s
    cps = checkpoints_of(truth)
    sp = reconstruct_positions(walk, checkpoints=cps, earth_to_plan_rad=E2P, max_extrapolate_m=1.0)
    assert sp.t.min() == pytest.approx(cps.t[0] - 1.0, abs=0.03)
    assert sp.t.max() == pytest.approx(cps.t[-1] + 1.0, abs=0.03)
    np.testing.assert_allclose(sp.xy, truth["xy"][sp.index], atol=1e-6)


def test_positions_are_pulled_into_free_space():
    # a 2 m wide corridor along y = 1 .. 3 but the walker's true path (and
    # the checkpoints) run at y = 1.2; a heading bias without correction
    # (one checkpoint only) would take the path into the wall
    plan = plan_from_geojson({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"kind": "walkable"},
         "geometry": {"type": "Polygon", "coordinates": [[[0, 0.2], [30, 0.2], [30, 3], [0, 3], [0, 0.2]]]}}]})
    truth = polyline_walk([[1.0, 1.2], [25.0, 1.2]])
    walk = make_walk(truth, earth_to_plan_rad=0.0, heading_bias_rad=np.radians(-8.0))
    one = Checkpoints(t=truth["t_cp"][:1], xy=truth["cp_xy"][:1])
    free = reconstruct_positions(walk, checkpoints=one)
    assert (~plan.contains(free.xy)).sum() > 100  # without the plan some samples are in the wall
    kept = reconstruct_positions(walk, checkpoints=one, plan=plan)
    assert plan.contains(kept.xy).all()
    assert kept.meta["pulled_in"] == int((~plan.contains(free.xy)).sum())
    moved = np.hypot(*(kept.xy - free.xy).T)
    np.testing.assert_allclose(moved, np.where(plan.contains(free.xy), 0.0, plan.distance_to_free(free.xy) + 0.05),
                               atol=1e-6)


def test_track_is_interpolated():
    truth, walk = _walk(t_after_s=1.0)
    tr = track_of(truth, every=7, sigma=0.2)
    tr = type(tr)(t=tr.t[:-20], xy=tr.xy[:-20], extra={"sigma_m": tr.extra["sigma_m"][:-20]})
    sp = reconstruct_positions(walk, track=tr, checkpoints=checkpoints_of(truth))
    assert sp.source == "track" and sp.n == walk.n
    ref = np.column_stack([np.interp(walk.t, tr.t, tr.xy[:, 0]), np.interp(walk.t, tr.t, tr.xy[:, 1])])
    np.testing.assert_allclose(sp.xy, ref)  # reference: numpy.interp
    np.testing.assert_allclose(sp.sigma_m, 0.2)
    dropped = reconstruct_positions(walk, track=tr, outside="drop")
    assert dropped.t.max() <= tr.t[-1] and dropped.n < walk.n
    no_sigma = reconstruct_positions(walk, track=track_of(truth), track_sigma_m=0.07)
    np.testing.assert_allclose(no_sigma.sigma_m, 0.07)


def test_without_motion_positions_are_straight_lines_between_checkpoints():
    truth, walk = _walk(with_motion=False)
    cps = checkpoints_of(truth)
    sp = reconstruct_positions(walk, checkpoints=cps)
    assert sp.source == "checkpoints-interpolated"
    # constant speed on straight legs: interpolation in time is the truth
    np.testing.assert_allclose(sp.xy, truth["xy"], atol=1e-6)


def test_duplicate_checkpoint_times_are_averaged():
    truth, walk = _walk()
    cps = checkpoints_of(truth)
    t = np.insert(cps.t, 1, cps.t[1])
    xy = np.insert(cps.xy, 1, cps.xy[1] + [0.0, 0.4], axis=0)
    xy[2] -= [0.0, 0.4]  # the two taps average to the true corner
    sp = reconstruct_positions(walk, checkpoints=Checkpoints(t=t, xy=xy), earth_to_plan_rad=E2P)
    np.testing.assert_allclose(sp.xy, truth["xy"], atol=1e-6)


def test_dead_reckoning_and_segment_fits_against_truth():
    truth, walk = _walk(scale=0.9)
    xy, s = dead_reckoning(walk, truth["t_cp"], rotation_rad=E2P)
    # distances walked: 0.9 x the true leg lengths (16, 8, 12 m)
    np.testing.assert_allclose(np.diff(s), 0.9 * np.array([16.0, 8.0, 12.0]), atol=1e-9)
    fit = segment_fits(walk, truth["t_cp"], truth["cp_xy"], rotation_rad=0.0)
    # with no rotation applied the fit's angle is the earth-to-plan rotation
    np.testing.assert_allclose(np.angle(fit["ratio"]), E2P, atol=1e-9)
    np.testing.assert_allclose(fit["straightness"], 1.0, atol=1e-9)


def test_adjustment_matches_scipy_least_squares():
    # reference: scipy.optimize.least_squares on the same weighted residuals
    # written out in real numbers
    from scipy.optimize import least_squares

    rng = np.random.default_rng(8)
    k = 6
    true = np.cumsum(rng.normal(0, 5, k) + 1j * rng.normal(0, 5, k))
    c_true = 1.07 * np.exp(1j * 0.05)
    dr = np.diff(true) / c_true + 0.1 * (rng.normal(size=k - 1) + 1j * rng.normal(size=k - 1))
    walked = np.abs(dr) * 1.05
    tap = true + 0.7 * (rng.normal(size=k) + 1j * rng.normal(size=k))
    tap_s, q, rel, cs = 0.7, 0.05, 0.05, 0.2
    z, var, c = adjust_checkpoints(tap, dr, walked, tap_sigma_m=tap_s, drift_m2_per_m=q, segment_rel_sigma=rel,
                                   walk_fit_sigma=cs)
    sd_dr = np.sqrt(q * walked + (rel * walked) ** 2 + 1e-4)

    def resid(p):
        zz = p[:k] + 1j * p[k : 2 * k]
        cc = p[2 * k] + 1j * p[2 * k + 1]
        r = np.concatenate([(zz - tap) / tap_s, (np.diff(zz) - cc * dr) / sd_dr, [(cc - 1) / cs]])
        return np.concatenate([r.real, r.imag])

    ref = least_squares(resid, np.concatenate([tap.real, tap.imag, [1.0, 0.0]]), xtol=1e-12, ftol=1e-12)
    np.testing.assert_allclose(z.real, ref.x[:k], atol=1e-6)
    np.testing.assert_allclose(z.imag, ref.x[k : 2 * k], atol=1e-6)
    assert c == pytest.approx(ref.x[2 * k] + 1j * ref.x[2 * k + 1], abs=1e-6)
    # posterior variance per axis from the Jacobian (Gauss-Newton, (JᵀJ)⁻¹)
    jac = ref.jac
    cov = np.linalg.inv(jac.T @ jac)
    np.testing.assert_allclose(var, np.diag(cov)[:k], rtol=1e-6)
    assert np.all(var < tap_s**2)


def test_adjustment_beats_raw_taps_when_dead_reckoning_is_good():
    rng = np.random.default_rng(2)
    truth, walk = _walk(scale=1.05)
    cps = checkpoints_of(truth, tap_sigma_m=0.8, rng=rng)
    seg = reconstruct_positions(walk, checkpoints=cps, earth_to_plan_rad=E2P, tap_sigma_m=0.8)
    adj = reconstruct_positions(walk, checkpoints=cps, earth_to_plan_rad=E2P, tap_sigma_m=0.8, method="adjust",
                                segment_rel_sigma=0.01, drift_m2_per_m=0.001, walk_fit_sigma=1.0)
    e_seg = np.sqrt(np.mean(np.sum((seg.xy - truth["xy"]) ** 2, axis=1)))
    e_adj = np.sqrt(np.mean(np.sum((adj.xy - truth["xy"]) ** 2, axis=1)))
    assert e_adj < 0.8 * e_seg
    assert adj.meta["method"] == "adjust" and adj.meta["walk_scale"] == pytest.approx(1 / 1.05, abs=0.2)  # sd about 0.05 from 0.8 m taps over 36 m
    assert adj.sigma_m.min() < 0.8


def test_bad_input():
    truth, walk = _walk()
    with pytest.raises(DataError, match="checkpoints or a track"):
        reconstruct_positions(walk)
    with pytest.raises(ConfigError, match="outside"):
        reconstruct_positions(walk, checkpoints=checkpoints_of(truth), outside="clip")
    with pytest.raises(ConfigError, match="method"):
        reconstruct_positions(walk, checkpoints=checkpoints_of(truth), method="kalman")
    with pytest.raises(DataError, match="finite"):
        reconstruct_positions(walk, checkpoints=Checkpoints(t=np.array([0.0, np.nan]), xy=np.zeros((2, 2))))


def _real_dir():
    return real_dir("F1/split.json")


REAL = _real_dir()


@pytest.mark.skipif(REAL is None, reason="real-data sample not available")
@pytest.mark.realdata
def test_real_walk_positions_move_at_walking_speed():
    from fingerprint.logio import read_checkpoints, read_walk_log
    from fingerprint.pipeline import process_walk
    from mapping.floorplan import load_floor_plan
    from mapping.walkset import find_walks

    plan = load_floor_plan(REAL / "F1" / "floor.plan.geojson")
    walks = find_walks(REAL / "F1", split=REAL / "F1" / "split.json", part="survey")[:6]
    speeds = []
    for w in walks:
        pw = process_walk(read_walk_log(w.log))
        cps = read_checkpoints(w.checkpoints)
        sp = reconstruct_positions(pw, checkpoints=cps, plan=plan, outside="drop")
        assert plan.contains(sp.xy).all()
        assert np.all(np.isfinite(sp.sigma_m)) and sp.sigma_m.min() >= 1.0 - 1e-9
        # speed over 1 s windows (README: median about 1.1 m/s, never above 2 m/s
        # between checkpoints; dead reckoning adds wiggle, so allow 3 m/s)
        k = 50
        v = np.hypot(*(sp.xy[k:] - sp.xy[:-k]).T) / (sp.t[k:] - sp.t[:-k])
        speeds.append(v)
    v = np.concatenate(speeds)
    assert 0.7 < np.median(v) < 1.5
    assert np.quantile(v, 0.99) < 3.0
