"""Floor-map orchestration pieces on synthetic walks with a known field.

References: the stretch averages are checked against a plain Python loop
(slow twin); coverage against a brute-force nearest-distance search; the
free mask against shapely's ``contains_xy``; the plan-frame rotation
against scipy's ``Rotation.from_euler``; the fitted field against the
analytic field it was sampled from."""

import math

import numpy as np
import pytest
import shapely
from scipy.spatial.transform import Rotation

from fingerprint import Motion, ProcessedWalk
from fingerprint.errors import ConfigError, DataError
from mapping.floorplan import plan_from_geojson
from mapping.mapbuild import (
    SurveyWalk,
    collect_samples,
    fit_samples,
    plan_rotation_matrix,
    raster_map,
    walk_samples,
)

ANGLE = math.radians(25.0)  # earth -> plan


def _plan():
    doc = {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "properties": {"kind": "walkable"},
             "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [14, 0], [14, 10], [0, 10], [0, 0]]]}},
            {"type": "Feature", "properties": {"kind": "obstacle"},
             "geometry": {"type": "Polygon", "coordinates": [[[5, 4], [9, 4], [9, 6], [5, 6], [5, 4]]]}},
        ],
    }
    return plan_from_geojson(doc)


def _field(xy):
    """Curl-free plan-frame field: -grad of Gaussian bumps plus a constant."""
    cent = np.array([[3.0, 3.0], [10.0, 7.0], [7.0, 8.5], [11.0, 2.0]])
    amp = np.array([12.0, -9.0, 7.0, 10.0])
    d = xy[:, None, :] - cent[None]
    g = amp * np.exp(-np.sum(d**2, -1) / (2 * 1.8**2))
    return np.column_stack([
        np.sum(g * d[..., 0], 1) / 1.8**2 + 15.0,
        np.sum(g * d[..., 1], 1) / 1.8**2 - 4.0,
        np.sum(g, 1) / 1.8 - 44.0,
    ])


def _walk(xy, heading_plan, rng, *, offset_dev=np.zeros(3), noise=0.2):
    """A ProcessedWalk whose samples sit at ``xy`` with the device flat and
    pointing along ``heading_plan``; the earth-frame field is the plan field
    rotated back, plus a device-frame offset turned with the heading."""
    n = xy.shape[0]
    h_earth = heading_plan - ANGLE
    rot_de = Rotation.from_euler("z", (h_earth - np.pi / 2)[:, None])  # device (x right, y forward) -> earth
    b_plan = _field(xy) + Rotation.from_euler("z", heading_plan[:, None]).apply(offset_dev)
    b_earth = b_plan @ plan_rotation_matrix(ANGLE)  # inverse rotation (orthogonal)
    b_earth = b_earth + rng.normal(size=(n, 3)) * noise
    t = np.arange(n) * 0.02
    motion = Motion(t=t[1:], length_m=np.hypot(*np.diff(xy, axis=0).T), heading_rad=h_earth[1:])
    return ProcessedWalk(t=t, quat=rot_de.as_quat(), mag_earth_ut=b_earth, heading_rad=h_earth,
                         mag_noise_ut=noise, motion=motion)


def _lawnmower(rng, y_rows, x0=0.5, x1=13.5, step=0.03):
    pts, hd = [], []
    for k, y in enumerate(y_rows):
        x = np.arange(x0, x1, step)
        if k % 2:
            x = x[::-1]
        pts.append(np.column_stack([x, np.full(x.size, y) + rng.normal(size=x.size) * 0.02]))
        hd.append(np.full(x.size, 0.0 if k % 2 == 0 else np.pi))
    return np.vstack(pts), np.concatenate(hd)


def test_plan_rotation_matches_scipy():
    r = plan_rotation_matrix(0.7)
    np.testing.assert_allclose(r, Rotation.from_euler("z", 0.7).as_matrix(), atol=1e-15)


def test_walk_samples_match_slow_loop():
    rng = np.random.default_rng(0)
    xy, hd = _lawnmower(rng, [1.0, 2.0])
    walk = _walk(xy, hd, rng)
    out = walk_samples(walk, xy, earth_to_plan_rad=ANGLE, spacing_m=0.25)
    # slow twin: walk the samples, open a new stretch every 0.25 m travelled
    b_plan = walk.mag_earth_ut @ plan_rotation_matrix(ANGLE).T
    s, groups, cur, last = 0.0, [], [0], xy[0]
    for i in range(1, xy.shape[0]):
        s_new = s + np.hypot(*(xy[i] - last))
        if math.floor(s_new / 0.25) != math.floor(s / 0.25):
            groups.append(cur)
            cur = []
        cur.append(i)
        s, last = s_new, xy[i]
    groups.append(cur)
    assert out["xy"].shape[0] == len(groups)
    for k in (0, 7, len(groups) // 2, len(groups) - 1):
        g = groups[k]
        np.testing.assert_allclose(out["xy"][k], xy[g].mean(0), atol=1e-12)
        np.testing.assert_allclose(out["b_ut"][k], b_plan[g].mean(0), atol=1e-12)
        assert out["n_raw"][k] == len(g)
    # heading-only rotations: plan heading about the vertical
    k = 3
    np.testing.assert_allclose(out["rotations"][k], Rotation.from_euler("z", out["heading_rad"][k]).as_matrix(), atol=1e-12)
    with pytest.raises(ConfigError):
        walk_samples(walk, xy, earth_to_plan_rad=ANGLE, spacing_m=0)


def test_fit_and_raster_recover_field_and_walk_offsets():
    rng = np.random.default_rng(3)
    walks, offsets = [], []
    positions = {}
    rows = np.arange(0.6, 9.6, 0.8)
    for w in range(4):
        sel = rows[w::2] if w < 2 else rows[(w - 2)::2] + 0.4
        xy, hd = _lawnmower(rng, sel)
        keep = ~((xy[:, 0] > 4.8) & (xy[:, 0] < 9.2) & (xy[:, 1] > 3.8) & (xy[:, 1] < 6.2))
        xy, hd = xy[keep], hd[keep]
        off = rng.normal(size=3) * 2.0
        offsets.append(off)
        walks.append(SurveyWalk(f"w{w}", _walk(xy, hd, rng, offset_dev=off)))
        positions[f"w{w}"] = xy
    plan = _plan()
    smp = collect_samples(walks, plan=plan, earth_to_plan_rad=ANGLE, spacing_m=0.25, positions=positions)
    assert smp.names == ["w0", "w1", "w2", "w3"] and smp.n > 500
    model = fit_samples(smp, kernel="curl-free", domain=((0, 0), (14, 10)), kernel_params={"n_basis": 300})
    # walk offsets recovered up to their common part (which is the constant)
    est = model.walk_offsets_ut_
    true = np.array(offsets)
    np.testing.assert_allclose(est - est.mean(0), true - true.mean(0), atol=0.4)
    origin, mean, var, cov, free = raster_map(model, plan, resolution_m=0.5, survey_xy=smp.xy)
    ny, nx = free.shape
    xs = origin[0] + 0.5 * np.arange(nx)
    ys = origin[1] + 0.5 * np.arange(ny)
    gx, gy = np.meshgrid(xs, ys)
    centres = np.column_stack([gx.ravel(), gy.ravel()])
    assert np.array_equal(free.ravel(), shapely.contains_xy(plan.free, centres[:, 0], centres[:, 1]))
    brute = np.min(np.linalg.norm(centres[:, None] - smp.xy[None], axis=-1), axis=1)
    np.testing.assert_allclose(cov.ravel(), brute, atol=1e-9)
    # the map against the analytic field (minus the mean offset, which no
    # survey can separate from the field) in well-covered free space
    truth = _field(centres).reshape(ny, nx, 3)
    good = free & (cov < 0.5)
    err = mean[good] - truth[good]
    err -= err.mean(0)
    assert np.sqrt(np.mean(err**2)) < 0.5
    assert np.all(var[free] > 0)


def test_collect_samples_errors():
    with pytest.raises(DataError, match="none of the survey walks"):
        rng = np.random.default_rng(0)
        xy = np.full((50, 2), np.nan)
        w = SurveyWalk("bad", _walk(np.zeros((50, 2)), np.zeros(50), rng))
        collect_samples([w], earth_to_plan_rad=0.0, positions={"bad": xy})
    with pytest.raises(ConfigError, match="valid"):
        fit_samples(None, kernel="spline")


def test_heading_error_removed_from_track_heading():
    """A walk whose attitude holds north 6° off (a disturbed walk-wide
    offset): against a track that knows the device heading, the error is
    found (circular mean, common practice, no source) and the walk's field
    comes back onto the true field (analytic), which it misses without."""
    from fingerprint import Track
    from mapping.mapbuild import track_heading_offset

    rng = np.random.default_rng(4)
    xy, hd = _lawnmower(rng, [1.0, 2.5, 8.0])
    walk = _walk(xy, hd, rng, noise=0.05)
    err = math.radians(6.0)
    # the attitude turned by +err: heading and earth-frame field turn together
    rz = plan_rotation_matrix(err)
    bad = ProcessedWalk(t=walk.t, quat=(Rotation.from_matrix(rz) * Rotation.from_quat(walk.quat)).as_quat(),
                        mag_earth_ut=walk.mag_earth_ut @ rz.T, heading_rad=walk.heading_rad + err,
                        mag_noise_ut=walk.mag_noise_ut, motion=walk.motion)
    track = Track(t=walk.t.copy(), xy=xy.copy(), heading_rad=hd.copy())
    got = track_heading_offset(bad, track, earth_to_plan_rad=ANGLE)
    assert got == pytest.approx(-err, abs=math.radians(0.2))
    assert track_heading_offset(bad, Track(t=walk.t, xy=xy), earth_to_plan_rad=ANGLE) is None

    from mapping.survey import SurveyPositions

    pos = SurveyPositions(t=walk.t, xy=xy, sigma_m=np.zeros(walk.n), source="track", index=np.arange(walk.n))
    kw = dict(earth_to_plan_rad=ANGLE, positions={"w": pos})
    fixed = collect_samples([SurveyWalk("w", bad, None, track)], **kw)
    kept = collect_samples([SurveyWalk("w", bad, None, track)], heading_from_track=False, **kw)
    rms = lambda s: float(np.sqrt(np.mean((s.b_ut - _field(s.xy)) ** 2)))  # noqa: E731
    assert rms(fixed) < 0.15 < 0.6 < rms(kept)
    assert fixed.info["heading_corrections_deg"]["w"] == pytest.approx(-6.0, abs=0.2)


def test_walk_offsets_match_least_squares():
    """Per-walk device-frame offsets of residuals ``r_i = R_i o_w + e_i``
    (random rotations from scipy's Rotation.random): the closed form
    ``mean(R_i^T r_i)`` equals numpy's least-squares solution of the
    stacked system, and removing it leaves the noise."""
    from mapping.mapscore import residual_scores, walk_offsets

    rng = np.random.default_rng(8)
    n = 600
    groups = np.repeat([3, 7, 11], n // 3)
    rot = Rotation.random(n, random_state=2).as_matrix()
    off_true = rng.normal(0, 2.0, (3, 3))
    code = np.unique(groups, return_inverse=True)[1]
    r = np.einsum("nij,nj->ni", rot, off_true[code]) + rng.normal(0, 0.1, (n, 3))
    off, fitted = walk_offsets(r, rot, groups)
    for w in range(3):
        m = code == w
        ref = np.linalg.lstsq(rot[m].reshape(-1, 3), r[m].reshape(-1), rcond=None)[0]
        np.testing.assert_allclose(off[w], ref, atol=1e-9)
    np.testing.assert_allclose(off, off_true, atol=0.05)
    b = rng.normal(0, 5, (n, 3))
    sc = residual_scores(b + r, b, np.full((n, 3), 4.0), np.full(3, 0.01), groups=groups, rotations=rot,
                         offset_var=np.full(3, 4.0 - 0.0))
    assert max(sc["rmse_ut"].values()) > 1.0
    assert max(sc["rmse_offset_removed_ut"].values()) < 0.12
    # without the offset variance the sd is sqrt(0.01): about 68 % of N(0, 0.1) residuals inside
    assert 0.55 < min(sc["within_1sd_offset_removed"].values()) <= max(sc["within_1sd_offset_removed"].values()) < 0.8


def test_checkpoint_checks_find_another_clock_and_taps_off_the_plan(tmp_path):
    """The data contract (README, "Input files"): checkpoint times are on the log's clock and x, y
    in the plan frame. Times in milliseconds are an error naming the file
    and line; a tap 2.5 m outside the walkable area is reported with its
    distance (shapely's distance is the reference), one in the middle of the
    4 m x 2 m obstacle (1 m from free space, a hand tap's error) is not."""
    from fingerprint.logio import read_checkpoints
    from mapping.mapbuild import checkpoint_checks

    t = np.linspace(0.0, 60.0, 601)
    walk = ProcessedWalk(t, np.tile([0.0, 0.0, 0.0, 1.0], (t.size, 1)), np.zeros((t.size, 3)), np.zeros(t.size),
                         0.5, Motion(t[::10], np.full(61, 0.6), np.zeros(61), "steps"))
    p = tmp_path / "w.checkpoints.csv"
    p.write_text("# floor: G\nt,x,y\n1.0,1.0,1.0\n20.0,7.0,5.0\n40.0,16.5,5.0\n99.0,2.0,2.0\n", encoding="utf-8")
    cps = read_checkpoints(p)
    found = checkpoint_checks([SurveyWalk("w", walk, cps)], _plan())
    assert found == [{"walk": "w", "file": str(p), "outside_log_time": [6],
                      "outside_free_space": [[5, 2.5]]}]
    plan = _plan()
    assert plan.free.distance(shapely.Point(16.5, 5.0)) == pytest.approx(2.5)
    # a walk marked as recorded on another floor: its taps are not held against this plan
    assert checkpoint_checks([SurveyWalk("w", walk, cps, floor="L1")], plan, floor="G")[0]["outside_free_space"] == []
    # the same taps in milliseconds: another clock, stopped before any work
    ms = tmp_path / "ms.checkpoints.csv"
    ms.write_text("t,x,y\n1000,1,1\n20000,2,2\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"ms\.checkpoints\.csv, line 2, column 1: checkpoint times 1000\.\.20000 s "
                       r"lie outside the walk log's 0\.\.60 s"):
        checkpoint_checks([SurveyWalk("w", walk, read_checkpoints(ms))], plan)
    # two checkpoints, the second tapped 5 s after the log stopped: reported, not refused
    late = tmp_path / "late.checkpoints.csv"
    late.write_text("x,y,t\n1,1,1.0\n2,2,65.0\n", encoding="utf-8")
    found = checkpoint_checks([SurveyWalk("w", walk, read_checkpoints(late))], plan)
    assert found[0]["outside_log_time"] == [3]


def test_displaced_misfit_hand_worked():
    """Positions moved along the walk, on fields whose answer is worked by hand.

    Walk 1 runs along x from 0 to 38 m (samples every 0.25 m) over
    ``b_up = A sin(2 pi x / 4)``, read from the exact field: at the true
    place the misfit is 0; moved half a period (2 m) either way the
    residual is ``2 A sin(2 pi x / 4)`` over 36 m, nine whole periods plus
    the end point: 145 samples whose sin² sum to 9 * 8 = 72 (sixteen per
    period, summing to 8) and whose mean is 0, so the RMSE is
    ``2 A sqrt(72 / 145)``; moved a whole period (4 m) the field repeats
    and the misfit is 0. Walk 2, the same path over a uniform gradient
    (``b_up = g y``, so constant along it, and ``b_x = g x`` along it), gives
    nothing at any distance: a change that is constant along the path goes
    with the walk's mean (per direction)."""
    from mapping.mapscore import displaced_misfit

    a, g = 3.0, 0.7
    x = np.arange(0.0, 38.0 + 1e-9, 0.25)
    xy1 = np.column_stack([x, np.zeros_like(x)])
    xy2 = np.column_stack([x, np.full_like(x, 5.0)])

    def field(q):
        q = np.asarray(q, float)
        on_2 = q[:, 1] > 2.5
        up = np.where(on_2, g * q[:, 1], a * np.sin(2 * np.pi * q[:, 0] / 4.0) + 40.0)
        bx = np.where(on_2, 20.0 + g * q[:, 0], 20.0)
        return np.column_stack([bx, np.zeros(q.shape[0]), up])

    xy = np.vstack([xy1, xy2])
    groups = np.repeat([0, 1], x.size)
    # walk 1 alone
    one = groups == 0
    rows = displaced_misfit(field(xy[one]), xy[one], groups[one], field, shifts_m=(2.0, 4.0))
    half, whole = rows
    assert half["n"] == 2 * 145 and whole["n"] == 2 * (x.size - 16)
    assert half["rmse_true_ut"]["b_up"] == pytest.approx(0.0, abs=1e-12)
    assert half["rmse_displaced_ut"]["b_up"] == pytest.approx(2 * a * math.sqrt(72 / 145), rel=1e-9)
    assert whole["rmse_displaced_ut"]["b_up"] == pytest.approx(0.0, abs=1e-9)
    # walk 2 alone: the gradient's change along the path is a constant per direction
    two = groups == 1
    for r in displaced_misfit(field(xy[two]), xy[two], groups[two], field, shifts_m=(1.0, 5.0)):
        assert r["rmse_displaced_ut"]["b_up"] == pytest.approx(0.0, abs=1e-9)
        assert r["rmse_displaced_ut"]["b_h"] == pytest.approx(0.0, abs=1e-9)
    # both walks: each walk keeps its own mean and path (walk 2's path does
    # not continue walk 1's); the pooled sum of squares is walk 1's
    both = displaced_misfit(field(xy), xy, groups, field, shifts_m=(2.0,))[0]
    assert both["n"] == 2 * 2 * 145
    assert both["rmse_displaced_ut"]["b_up"] == pytest.approx(2 * a * math.sqrt(72 / 145) / math.sqrt(2), rel=1e-9)
    # nothing left when the shift exceeds every walk
    far = displaced_misfit(field(xy), xy, groups, field, shifts_m=(50.0,))[0]
    assert far["n"] == 0 and far["rmse_displaced_ut"]["b_up"] is None
    assert displaced_misfit(np.zeros((0, 3)), np.zeros((0, 2)), np.zeros(0, int), field)[0]["n"] == 0


def test_hand_drawn_graph_is_checked_against_the_plan():
    """A graph drawn over another origin (500 m off) is refused; one with a
    node 3 m outside the free space gives a warning naming that node; one
    inside passes silently. Distances: shapely's, from the plan's free space."""
    import warnings

    from fingerprint import FloorGraph
    from fingerprint.errors import LodemapWarning
    from mapping.mapbuild import check_graph_on_plan

    plan = _plan()
    x0, y0, x1, y1 = plan.free.bounds  # a 14 m x 10 m room, a pillar at x 5..9, y 4..6
    inside = np.array([[x0 + 0.5, 2.0], [0.5 * (x0 + x1), 2.0], [x1 - 0.5, 2.0]])
    edges = np.array([[0, 1], [1, 2]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_graph_on_plan(FloorGraph.from_arrays(inside, edges), plan, path="g.geojson")
    with pytest.raises(DataError, match=r"g\.geojson: 3 of the graph's 3 nodes lie more than 1 m outside"):
        check_graph_on_plan(FloorGraph.from_arrays(inside + [500.0, 0.0], edges), plan, path="g.geojson")
    one_out = inside.copy()
    one_out[2] = [x1 + 3.0, 2.0]
    with pytest.warns(LodemapWarning, match=r"1 of the graph's 3 nodes .*farthest 3\.0 m"):
        check_graph_on_plan(FloorGraph.from_arrays(one_out, edges), plan, path="g.geojson")
