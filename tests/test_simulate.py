"""The simulator: field model, routes, walkers, sensors, data sets, CLI,
and the sensor chain run on simulated logs."""

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from fingerprint.errors import ConfigError, FormatError, MapFileError
from fingerprint.floorgraph import FloorGraph
from fingerprint.geomag import background_field
from fingerprint.simulate import (
    DatasetSettings,
    Device,
    FieldModel,
    HandheldWalker,
    RobotWalker,
    field_model_for_floor,
    graph_segments,
    load_steel,
    plan_floor,
    plan_survey_routes,
    plan_test_route,
    route_polyline,
    simulate_job,
    synthesize_log,
    write_walk,
)
from fingerprint.simulate.walkers import G, turn_in_hand

DEMO = Path(__file__).resolve().parents[1] / "demo_building"


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def site():
    from mapping.site import load_site

    return load_site(DEMO / "site.json")


@pytest.fixture(scope="module")
def geo(site):
    return background_field(site.latitude_deg, site.longitude_deg, site.date)


@pytest.fixture(scope="module")
def steel():
    return load_steel(DEMO / "steel.json")


@pytest.fixture(scope="module")
def models(site, steel, geo):
    return {f: field_model_for_floor(steel, f, geo, plan_rotation_deg=site.plan_rotation_deg) for f in site.floors}


@pytest.fixture(scope="module")
def floors(site):
    import shapely

    from mapping.floorplan import load_floor_plan
    from mapping.graphbuild import load_graph_geojson

    out = {}
    for f, p in site.floors.items():
        plan = load_floor_plan(p)
        free = plan.free
        shapely.prepare(free)
        out[f] = (plan, free, load_graph_geojson(p.parent / "routes.geojson", max_edge_m=None))
    return out


@pytest.fixture(scope="module")
def small_walks(floors, models):
    """A few walks of every kind on both floors (seed 7)."""
    settings = DatasetSettings(n_test_handheld=2, n_test_robot=1)
    walks = []
    for f, (plan, free, graph) in floors.items():
        jobs = plan_floor(f, graph, seed=7, settings=settings)
        pick = [j for j in jobs if j.session == "survey"][:2] + [j for j in jobs if j.session != "survey"][:3]
        pick += [j for j in jobs if j.session == "test" and j.platform == "robot"][:1]
        pick += [j for j in jobs if j.session == "test" and j.platform == "handheld"][:2]  # calibrated phones
        for j in pick:
            walks.append((f, j, simulate_job(j, f, models[f], graph, free=free, seed=7, settings=settings)))
    return walks


def _corridor_graph():
    """A hand-built graph: a loop of four corridors with one spur.
        3 ---- 2
        |      |
        0 ---- 1 ---- 4
    """
    nodes = [(0, 0), (20, 0), (20, 10), (0, 10), (32, 0)]
    edges = [(0, 1), (1, 2), (2, 3), (3, 0), (1, 4)]
    return FloorGraph.from_arrays(nodes, edges)


# ---------------------------------------------------------------- field model
def test_background_direction_in_plan(models, site, geo):
    # Frame convention (site.json plan_rotation_deg): magnetic
    # north points in the plan at CCW angle 90° + rho - D from plan +x.
    b = models["G"].background_ut
    angle = math.degrees(math.atan2(b[1], b[0]))
    expected = 90.0 + site.plan_rotation_deg - geo.declination_deg
    assert abs((angle - expected + 180) % 360 - 180) < 1e-6
    assert math.isclose(np.linalg.norm(b), geo.total_ut, rel_tol=1e-12)
    assert models["G"].meta["earth_to_plan_rad"] == pytest.approx(math.radians(site.plan_rotation_deg - geo.declination_deg))


def test_field_model_matches_magpylib(models):
    # Reference: magpylib (SI units) summing the same dipoles; the
    # background is added on top. https://magpylib.readthedocs.io
    import magpylib as magpy
    fm = models["L1"]
    rng = np.random.default_rng(2)
    pts = np.column_stack([rng.uniform(5, 55, 60), rng.uniform(5, 35, 60), rng.uniform(0.3, 1.5, 60)])
    pts = pts[fm.min_distance_m(pts) > 0.3]
    sources = [magpy.misc.Dipole(moment=m, position=q) for q, m in zip(fm.positions_m, fm.moments_am2)]
    ref = magpy.getB(sources, pts, sumup=True) * 1e6 + fm.background_ut
    exact = fm.field(pts, exact=True)
    np.testing.assert_allclose(exact, ref, rtol=1e-6, atol=1e-9 * np.abs(ref).max())
    fast = fm.field(pts)
    assert np.abs(fast - ref).max() < 0.1  # float32 work arrays: < 0.1 µT, a quarter of the sensor noise


def test_induced_moments_follow_background(steel, geo):
    # Induced part m = chi V H, H = B / mu0 (definition of susceptibility).
    from fingerprint.simulate.building import MU0, steel_dipoles

    spec = {"chains": [{"kind": "column", "xy": [[0, 0]], "z_m": [0, 2], "spacing_m": 1.0, "chi_volume_m3": 2.0,
                        "remanent_rms_am2": 0.0}]}
    bg = np.array([10.0, 20.0, -40.0])
    pos, mom, kinds = steel_dipoles(spec, bg, rng=np.random.default_rng(0))
    np.testing.assert_allclose(pos, [[0, 0, 0.5], [0, 0, 1.5]])
    np.testing.assert_allclose(mom, np.tile(2.0 * bg * 1e-6 / MU0, (2, 1)))
    assert list(kinds) == ["column", "column"]


def test_anomaly_ranges_at_sensor_height(models, floors):
    # Ranges asked for (from memory: indoor anomalies near steel of ~5-30 µT
    # that fade over a few metres). Along the route centre lines at 1.1 m:
    for f, fm in models.items():
        graph = floors[f][2]
        s = np.concatenate([np.arange(0, graph.length_m[e], 0.25) for e in range(graph.n_edges)])
        e = np.concatenate([np.full(np.arange(0, graph.length_m[k], 0.25).size, k) for k in range(graph.n_edges)])
        xy = graph.point(e, s)
        a = np.linalg.norm(fm.anomaly(np.column_stack([xy, np.full(len(xy), 1.1)])), axis=1)
        p50, p95, top = np.percentile(a, [50, 95, 100])
        assert 1.0 < p50 < 15.0, f
        assert 5.0 < p95 < 40.0, f
        assert 15.0 < top < 80.0, f


def test_single_column_anomaly_decays_within_metres(steel, geo):
    # One demo column alone: tens of µT 1 m from its axis, a few µT at 3 m
    # (a chain of dipoles falls like 1/r^2, a single dipole like 1/r^3).
    spec = dict(steel["floors"]["L1"]["chains"][0])
    spec["xy"] = [[0.0, 0.0]]
    fm = field_model_for_floor({"floors": {"X": {"chains": [spec]}}, "remanence_seed": 3}, "X", geo)
    r = np.array([0.5, 1.0, 2.0, 3.0, 5.0])
    pts = np.column_stack([r, np.zeros(5), np.full(5, 1.1)])
    a = np.linalg.norm(fm.anomaly(pts), axis=1)
    assert np.all(np.diff(a) < 0)
    assert a[1] > 20.0
    assert a[3] < a[1] / 5.0  # 1/r^2 would give 1/9
    assert a[4] < 3.0


def test_field_model_file_roundtrip(models, tmp_path):
    fm = models["G"]
    fm.save(tmp_path / "fm.npz")
    back = FieldModel.load(tmp_path / "fm.npz")
    pts = np.array([[10.0, 8.0, 1.1], [43.5, 22.0, 0.4]])
    np.testing.assert_array_equal(back.field(pts), fm.field(pts))
    assert back.floor == "G" and back.meta["declination_deg"] == fm.meta["declination_deg"]
    assert back.n_dipoles == fm.n_dipoles and set(back.kinds) == set(fm.kinds)
    (tmp_path / "bad.npz").write_bytes(b"not a zip file")
    with pytest.raises(MapFileError):
        FieldModel.load(tmp_path / "bad.npz")
    np.savez(tmp_path / "other.npz", x=np.zeros(3))
    with pytest.raises(MapFileError):
        FieldModel.load(tmp_path / "other.npz")


def test_steel_description_errors(tmp_path):
    p = tmp_path / "steel.json"
    p.write_text('{"floors": {"G": {"chains": [{"xy": [[0, 0]], "z_m": [2, 1], "spacing_m": 1,'
                 ' "chi_volume_m3": 1, "remanent_rms_am2": 0}]}}}')
    with pytest.raises(FormatError, match="z1 > z0"):
        load_steel(p)
    p.write_text('{"floors": [1, 2]}')
    with pytest.raises(FormatError, match="floors"):
        load_steel(p)
    p.write_text('{"floors": {"G": {}}, "remanence_seed": 1,')
    with pytest.raises(FormatError) as info:
        load_steel(p)
    assert info.value.line == 1


# ---------------------------------------------------------------- routes
def test_segments_of_hand_built_graph():
    g = _corridor_graph()
    segs = graph_segments(g)
    # node 1 is the only junction: the loop is one segment, the spur another
    assert sorted(np.round(segs.length_m, 6)) == [12.0, 60.0]
    # a corridor drawn as many short edges is still one segment
    # (a T: corridor of 1 m edges along x, a side branch at x = 5)
    nodes = [(x, 0.0) for x in range(11)] + [(10.0, 5.0), (5.0, 5.0)]
    edges = [(i, i + 1) for i in range(10)] + [(10, 11), (5, 12)]
    segs = graph_segments(FloorGraph.from_arrays(nodes, edges))
    assert sorted(np.round(segs.length_m, 6)) == [5.0, 5.0, 10.0]


@pytest.mark.parametrize("cover", [1, 2, 3])
def test_survey_routes_cover_every_segment(cover):
    g = _corridor_graph()
    routes = plan_survey_routes(g, rng=np.random.default_rng(cover), target_length_m=40.0, min_cover=cover)
    segs = graph_segments(g)
    counts = np.zeros(len(segs.nodes), int)
    for r in routes:
        # consecutive nodes must be joined by an edge
        for a, b in zip(r[:-1], r[1:]):
            assert any({a, b} == set(e) for e in g.edges.tolist())
        for a, b in zip(r[:-1], r[1:]):
            e = [k for k, ed in enumerate(g.edges.tolist()) if set(ed) == {a, b}][0]
            counts[segs.edge_segment[e]] += 1
    assert counts.min() >= cover


def test_demo_survey_covers_every_aisle_twice(floors):
    # The demo survey design: walks cover every corridor and aisle at least twice.
    for f, (plan, free, graph) in floors.items():
        jobs = plan_floor(f, graph, seed=11, settings=DatasetSettings(platforms=("handheld",)))
        segs = graph_segments(graph)
        edge_index = {frozenset(e): k for k, e in enumerate(graph.edges.tolist())}
        counts = np.zeros(len(segs.nodes), int)
        for j in (j for j in jobs if j.session == "survey"):
            for a, b in zip(j.route[:-1], j.route[1:]):
                counts[segs.edge_segment[edge_index[frozenset((int(a), int(b)))]]] += 1
        # count passes per segment: a segment of n edges is passed once per n edge traversals
        n_edges = np.bincount(segs.edge_segment, minlength=len(segs.nodes))
        passes = counts / n_edges
        assert passes[segs.length_m >= 2.0].min() >= 2, f
        n_survey = sum(j.session == "survey" for j in jobs)
        assert 4 <= n_survey <= 14, (f, n_survey)


def test_test_route_is_connected_and_long_enough():
    g = _corridor_graph()
    r = plan_test_route(g, rng=np.random.default_rng(4), length_m=60.0)
    poly = route_polyline(g, r)
    length = np.hypot(*np.diff(poly, axis=0).T).sum()
    assert 0.85 * 60.0 <= length <= 60.0 + 2 * g.length_m.max()
    for a, b in zip(r[:-1], r[1:]):
        assert any({a, b} == set(e) for e in g.edges.tolist())


# ---------------------------------------------------------------- walkers
def test_handheld_walk_kinematics():
    g = _corridor_graph()
    rng = np.random.default_rng(1)
    poly = route_polyline(g, np.array([0, 1, 2, 3, 0]))
    w = HandheldWalker(weinberg_k=0.48, step_length_m=0.7, cadence_hz=1.9, pauses=0, lateral_sd_m=0.0)
    tr = w.walk(poly, rng=rng)
    # Weinberg relation (Weinberg 2002, AN-602): per step,
    # a_max - a_min of the vertical acceleration = (L / K)^4
    steps = np.diff(tr.step_xy, axis=0)
    lens = np.hypot(steps[:, 0], steps[:, 1])
    mid = slice(5, -5)  # away from starting and stopping
    b = np.searchsorted(tr.t, tr.step_t[:-1])
    swing = np.array([np.ptp(tr.acc_plan[i:j, 2]) for i, j in zip(b[:-1], b[1:])])
    k_est = lens[1:-1] / swing ** 0.25
    assert np.median(k_est[mid]) == pytest.approx(0.48, rel=0.05)
    assert 2.0 < np.median(swing) < 8.0  # "a few m/s²"
    # cadence and walking speed (common practice, no source)
    assert np.median(np.diff(tr.step_t)) == pytest.approx(1 / 1.9, rel=0.05)
    assert abs(tr.path_length_m - 60.0) < 2.0  # rounded corners cut a little
    horiz = np.hypot(tr.acc_plan[:, 0], tr.acc_plan[:, 1])
    assert np.percentile(horiz, 99) < 5.0
    # heading follows the walk: east, north, west, south = three left turns
    h = np.unwrap(tr.heading_rad)
    assert h[-1] - h[0] == pytest.approx(1.5 * np.pi, abs=np.radians(3))


def test_walks_stay_in_free_space_and_away_from_steel(small_walks, floors, models):
    for f, job, w in small_walks:
        plan = floors[f][0]
        assert plan.contains(w.track.xy).all(), (f, job.name)
        # design rule of the demo steel: no dipole closer than ~0.8 m to where the sensors pass
        d = models[f].min_distance_m(np.column_stack([w.truth.xy, w.truth.z]))
        assert d.min() >= 0.8, (f, job.name, d.min())


def test_checkpoints(small_walks):
    for f, job, w in small_walks:
        cps = w.checkpoints
        assert cps.n >= 3
        assert np.all(np.diff(cps.t) > 0)
        assert cps.t[0] == w.log.t[0] and cps.t[-1] == w.log.t[-1]
        # positions are the true positions at those times
        np.testing.assert_allclose(cps.xy, w.track.at(cps.t), atol=1e-9)
        # spacing of checkpoints along the path: never more than ~15 m
        # apart, except around the robot's calibration spin
        s = np.concatenate([[0], np.cumsum(np.hypot(*np.diff(w.track.xy, axis=0).T))])
        gaps = np.diff(np.interp(cps.t, w.track.t, s))
        assert gaps.max() < 16.0, (job.name, gaps.max())
        assert set(cps.floor) == {f}


def test_robot_walk_and_odometry(floors, models):
    plan, free, graph = floors["G"]
    rng = np.random.default_rng(5)
    route = plan_test_route(graph, rng=rng, length_m=40.0)
    bot = RobotWalker(cruise_mps=0.8, mount_height_m=0.4)
    traj = bot.walk(route_polyline(graph, route), rng=rng, free=free)
    v = np.hypot(*np.gradient(traj.xy, traj.dt, axis=0).T)
    assert v.max() < 0.8 * 1.05
    # acceleration limit 0.4 m/s² along, 0.25 m/s² in bends (plus smoothing)
    assert np.percentile(np.hypot(*traj.acc_plan[:, :2].T), 99) < 0.8
    assert np.abs(traj.acc_plan[:, :2]).max() < 1.5
    assert np.allclose(traj.z, 0.4)
    # the calibration spin: at least one full turn before moving
    h = np.unwrap(traj.heading_rad)
    moving = np.flatnonzero(v > 0.05)[0]
    assert abs(h[moving] - h[0]) >= 2 * np.pi - 0.05
    dev = Device.random_robot(np.random.default_rng(1))
    exact = dataclasses.replace(dev, odom_scale=1.0, odom_yaw_scale=1.0, odom_slip=0.0)
    log, truth = synthesize_log(traj, models["G"], exact, rng=np.random.default_rng(2))
    # integrating error-free odometry in the body frame gives back the path
    yaw = np.unwrap(truth.heading_rad[0] + np.cumsum(log.odom[:, 2]))
    yaw_prev = np.concatenate([[truth.heading_rad[0]], yaw[:-1]])
    dx = np.cos(yaw_prev) * log.odom[:, 0] - np.sin(yaw_prev) * log.odom[:, 1]
    dy = np.sin(yaw_prev) * log.odom[:, 0] + np.cos(yaw_prev) * log.odom[:, 1]
    xy = truth.xy[0] + np.column_stack([np.cumsum(dx), np.cumsum(dy)])
    assert np.abs(xy - truth.xy).max() < 0.05
    # a scale error shows up as the same ratio of travelled distance
    scaled = dataclasses.replace(exact, odom_scale=1.02)
    log2, _ = synthesize_log(traj, models["G"], scaled, rng=np.random.default_rng(2))
    assert np.abs(log2.odom[:, 0]).sum() / np.abs(log.odom[:, 0]).sum() == pytest.approx(1.02, rel=1e-4)
    assert log.meta["magnetometer_calibrated"] == "no" and log.meta["platform"] == "robot"


# ---------------------------------------------------------------- sensors
@pytest.fixture(scope="module")
def handheld_case(models):
    g = _corridor_graph()
    rng = np.random.default_rng(8)
    traj = HandheldWalker(pauses=1).walk(route_polyline(g, np.array([0, 1, 4, 1, 2, 3])), rng=rng)
    return traj, models["L1"]


def test_accelerometer_and_gyro_are_consistent_with_truth(handheld_case):
    traj, fm = handheld_case
    dev = Device.random_phone(np.random.default_rng(0))
    clean = dataclasses.replace(dev, acc_bias=(0, 0, 0), acc_noise=0.0, acc_quant=0.0, gyro_bias=(0, 0, 0),
                                gyro_noise=0.0, gyro_drift=0.0, gyro_quant=0.0, jitter_s=0.0)
    log, truth = synthesize_log(traj, fm, clean, rng=np.random.default_rng(1))
    # standing still at the start: |a| = standard gravity 9.80665 m/s²
    # (CGPM 1901 conventional value)
    assert np.linalg.norm(log.acc[:50], axis=1) == pytest.approx(np.full(50, 9.80665), abs=1e-3)
    # gravity seen in the device frame matches the true attitude
    g_dev = Rotation.from_quat(truth.quat).inv().apply([0, 0, 1.0])
    still = slice(0, 50)
    np.testing.assert_allclose(log.acc[still] / G, g_dev[still], atol=1e-3)
    # integrating the gyro (scipy Rotation, trapezoid) reproduces the attitude
    r = Rotation.from_quat(truth.quat[0])
    out = [r]
    for k in range(log.n - 1):
        r = r * Rotation.from_rotvec(0.5 * (log.gyro[k] + log.gyro[k + 1]) * (log.t[k + 1] - log.t[k]))
        out.append(r)
    err = (Rotation.concatenate(out) * Rotation.from_quat(truth.quat).inv()).magnitude()
    assert np.degrees(err.max()) < 0.5


def test_magnetometer_model(handheld_case):
    traj, fm = handheld_case
    dev = dataclasses.replace(Device.random_phone(np.random.default_rng(3)), mag_drift=0.0)  # drift: below
    log, truth = synthesize_log(traj, fm, dev, rng=np.random.default_rng(4))
    soft = np.asarray(dev.mag_soft)
    resid = log.mag - truth.mag_device_ut @ soft.T - np.asarray(dev.mag_residual)
    # noise as set (0.4 µT) plus quantisation (0.15 µT step: sd 0.15/sqrt(12))
    assert resid.std(axis=0) == pytest.approx(np.full(3, math.hypot(0.4, 0.15 / math.sqrt(12))), rel=0.1)
    np.testing.assert_allclose((log.mag_raw - log.mag).mean(axis=0), np.subtract(dev.mag_hard, dev.mag_residual),
                               atol=0.05)
    # true field in the device frame is the plan field rotated
    np.testing.assert_allclose(Rotation.from_quat(truth.quat).apply(truth.mag_device_ut), truth.mag_plan_ut,
                               atol=1e-9)
    assert log.meta["magnetometer_calibrated"] == "yes"
    # timestamps: strictly increasing, nominal rate, bounded jitter
    dt = np.diff(log.t)
    assert dt.min() > 0.3 / dev.rate_hz
    assert np.median(dt) == pytest.approx(1 / dev.rate_hz, rel=0.02)
    assert 0.0005 < np.std(dt) < 0.3 / dev.rate_hz


def test_walks_are_deterministic_by_seed(floors, models):
    plan, free, graph = floors["L1"]
    s = DatasetSettings(n_test_handheld=1, n_test_robot=1)
    a = plan_floor("L1", graph, seed=3, settings=s)
    b = plan_floor("L1", graph, seed=3, settings=s)
    c = plan_floor("L1", graph, seed=4, settings=s)
    assert [j.name for j in a] == [j.name for j in b]
    assert all(np.array_equal(x.route, y.route) for x, y in zip(a, b))
    j = a[-1]
    w1 = simulate_job(j, "L1", models["L1"], graph, free=free, seed=3, settings=s)
    w2 = simulate_job(b[-1], "L1", models["L1"], graph, free=free, seed=3, settings=s)
    np.testing.assert_array_equal(w1.log.mag, w2.log.mag)
    np.testing.assert_array_equal(w1.track.xy, w2.track.xy)
    w3 = simulate_job(c[-1], "L1", models["L1"], graph, free=free, seed=4, settings=s)
    assert w3.log.n != w1.log.n or not np.array_equal(w3.log.mag, w1.log.mag)


def test_written_files_read_back(small_walks, tmp_path):
    from fingerprint.logio import read_checkpoints, read_track, read_walk_log

    f, job, w = small_walks[0]
    path = write_walk(tmp_path, w)
    log = read_walk_log(path)
    assert log.n == w.log.n and log.meta["seed"] == "7" and log.meta["floor"] == f
    np.testing.assert_allclose(log.mag, w.log.mag, atol=1e-6)
    cps = read_checkpoints(tmp_path / f"{w.name}.checkpoints.csv")
    np.testing.assert_allclose(cps.xy, w.checkpoints.xy, atol=1e-9)
    tr = read_track(tmp_path / f"{w.name}.track.csv")
    assert tr.heading_rad is not None and tr.xy.shape == (log.n, 2)
    assert w.name.startswith("hh_") or w.name.startswith("rb_")


# ---------------------------------------------------------------- sensor chain
def test_chain_recovers_path_length_and_heading_change(floors, models):
    # Acceptance: the sensor chain (fingerprint.pipeline) on simulated
    # handheld logs: path length within 5 % (Weinberg K fitted with the
    # chain's own fit_step_constant on another walk of the same person) and
    # heading change over the walk within 5°.
    from fingerprint.pipeline import process_walk
    from fingerprint.steps import fit_step_constant

    plan, free, graph = floors["G"]
    fm = models["G"]
    rng = np.random.default_rng(21)
    person = HandheldWalker.random(rng, lateral_sd_m=0.15, pauses=1)
    phone = Device.random_phone(rng)
    walks = []
    for _ in range(3):
        route = plan_test_route(graph, rng=rng, length_m=70.0)
        traj = person.walk(route_polyline(graph, route), rng=rng, free=free)
        log, truth = synthesize_log(traj, fm, phone, rng=rng)
        from fingerprint.simulate.datasets import checkpoints_from_truth
        from fingerprint.simulate.routes import route_markers

        cps = checkpoints_from_truth(truth.t, truth.xy, route_markers(graph), floor="G")
        walks.append((log, truth, traj, cps))
    # the default chain: heading change comes from the gyro, the
    # magnetometer only sets one constant offset per walk (see
    # fingerprint.attitude), so indoor anomalies cannot bend it
    processed = [process_walk(log) for log, *_ in walks]
    assert all(pw.meta["attitude"]["heading_reference"].startswith("magnetometer, one constant offset")
               for pw in processed)
    k, _ = fit_step_constant([(processed[0].motion, walks[0][3], processed[0].meta["step_constant"])])
    for (log, truth, traj, cps), pw in list(zip(walks, processed))[1:]:
        length = pw.motion.length_m.sum() * k / pw.meta["step_constant"]
        assert length == pytest.approx(traj.path_length_m, rel=0.05)
        turn_true = np.unwrap(truth.heading_rad)
        turn_est = np.unwrap(pw.heading_rad)
        d_true = turn_true[-1] - turn_true[0]
        d_est = turn_est[-1] - turn_est[0]
        assert abs(np.degrees(d_est - d_true)) < 5.0
        assert abs(pw.motion.n - traj.step_t.size) <= 0.05 * traj.step_t.size


def test_chain_calibration_recovers_true_field(models):
    # Acceptance: after the chain's calibration (fingerprint.calibration,
    # Li & Griffiths ellipsoid fit) the raw magnetometer matches the true
    # field within the noise set (0.4 µT per axis, quantisation 0.15 µT).
    from fingerprint.calibration import fit_calibration

    rng = np.random.default_rng(13)
    fm = models["G"]
    phone = Device.random_phone(rng)
    traj = turn_in_hand((30.0, 5.5), rng=rng, duration_s=30.0)
    log, truth = synthesize_log(traj, fm, phone, rng=rng)
    cal, report = fit_calibration(log.mag_raw, source="mag_raw")
    fixed = cal.apply(log.mag_raw)
    rms = np.sqrt(np.mean((fixed - truth.mag_device_ut) ** 2, axis=0))
    noise = math.hypot(phone.mag_noise, phone.mag_quant / math.sqrt(12))
    assert np.all(rms < 1.5 * noise), rms
    raw_err = np.sqrt(np.mean((log.mag_raw - truth.mag_device_ut) ** 2))
    assert raw_err > 10 * noise  # the hard iron was big before


# ---------------------------------------------------------------- command line
def test_cli_simulate_layout(tmp_path):
    from fingerprint.logio import read_walk_log
    from mapping.cli import main

    out = tmp_path / "sim"
    rc = main(["simulate", str(DEMO), "--out", str(out), "--walks", "1", "--floors", "L1", "--seed", "5",
               "--no-progress", "--plot"])
    assert rc == 0
    floor = out / "L1"
    surveys = sorted((floor / "survey").glob("hh_*.log.csv"))
    assert len(surveys) >= 3
    tests = sorted((floor / "test").glob("*.log.csv"))
    assert {p.name[:3] for p in tests} == {"hh_", "rb_"}
    for p in surveys[:1] + tests:
        stem = p.name[: -len(".log.csv")]
        assert (p.parent / f"{stem}.checkpoints.csv").exists() and (p.parent / f"{stem}.track.csv").exists()
        assert read_walk_log(p).meta["seed"] == "5"
    assert (floor / "survey_robot").is_dir()
    fm = FieldModel.load(floor / "field_model.npz")
    assert fm.floor == "L1"
    summary = json.loads((out / "simulation.json").read_text())
    assert summary["seed"] == 5 and "L1" in summary["floors"]
    png = (floor / "simulation.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    truth = json.loads((floor / "truth.json").read_text())
    assert all(v["true_path_length_m"] > 10 for v in truth["walks"].values())


def test_cli_errors(tmp_path, capsys):
    from mapping.cli import main

    site = tmp_path / "site"
    site.mkdir()
    (site / "site.json").write_text((DEMO / "site.json").read_text())
    rc = main(["simulate", str(site), "--out", str(tmp_path / "o"), "--no-progress"])
    assert rc == 2
    assert "steel" in capsys.readouterr().err
    rc = main(["simulate", str(DEMO), "--out", str(tmp_path / "o"), "--floors", "L9", "--no-progress"])
    assert rc == 2
    assert "L9" in capsys.readouterr().err


def test_settings_validation():
    with pytest.raises(ConfigError):
        DatasetSettings(platforms=("bicycle",))
    with pytest.raises(ConfigError):
        DatasetSettings(survey_cover=0)


def test_cli_robot_only_and_plan_graph(tmp_path):
    from mapping.cli import main

    out = tmp_path / "r"
    assert main(["simulate", str(DEMO), "--out", str(out), "--platform", "robot", "--walks", "1", "--floors", "L1",
                 "--no-progress"]) == 0
    names = {p.name[:3] for p in (out / "L1" / "survey").glob("*.log.csv")}
    assert names == {"rb_"} and not (out / "L1" / "survey_robot").exists()
    # routes on the graph built from the plan (mapping.graphbuild) instead
    # of the shipped routes file
    out2 = tmp_path / "p"
    assert main(["simulate", str(DEMO), "--out", str(out2), "--platform", "handheld", "--walks", "1", "--floors", "L1",
                 "--routes", "plan", "--no-progress"]) == 0
    summary = json.loads((out2 / "simulation.json").read_text())
    assert summary["floors"]["L1"]["route_graph"] == "graph built from the plan"
    assert len(list((out2 / "L1" / "survey").glob("hh_*.track.csv"))) >= 2


def test_calibrated_phone_residual_is_new_every_session(small_walks):
    # even calibrated data keep residual errors that differ
    # between devices and sessions (common practice, no source); the same phone on two walks must not
    # carry the same offset (it would look like field to a map)
    by_phone = {}
    for f, j, w in small_walks:
        dev = w.params["device"]
        if not dev["calibrated"]:
            continue
        by_phone.setdefault(dev["name"], []).append(np.asarray(dev["mag_residual"]))
        # the log is the distorted true field plus that session's offset
        # (noise 0.4 µT and quantisation 0.15 µT as set)
        # over the first 5 s, before the offset's slow drift (0.03 µT/sqrt(s)) adds up
        resid = w.log.mag - w.truth.mag_device_ut @ np.asarray(dev["mag_soft"]).T
        first = w.log.t < w.log.t[0] + 5.0
        np.testing.assert_allclose(resid[first].mean(axis=0), dev["mag_residual"], atol=0.25)
    pairs = [v for v in by_phone.values() if len(v) >= 2]
    assert pairs, "no phone used twice"
    for v in pairs:
        assert np.abs(v[0] - v[1]).max() > 0.05


def test_session_residual_spread():
    # Device.for_session draws N(0, sd) per axis: the sample sd of many
    # sessions matches it (chi-square bound, common practice, no source)
    phone = Device.random_phone(np.random.default_rng(5))
    rng = np.random.default_rng(6)
    res = np.array([phone.for_session(rng, residual_sd_ut=1.5).mag_residual for _ in range(400)])
    assert res.std(axis=0) == pytest.approx(np.full(3, 1.5), rel=0.12)
    robot = Device.random_robot(np.random.default_rng(5))
    assert robot.for_session(rng) is robot  # a bare sensor has no device calibration


# ---------------------------------------------------------------- survey with calibration and full cover
def _lattice_graph(nx_=6, ny=4, spacing=1.0):
    """A square lattice (nx_ x ny nodes) with a corridor spur off one corner."""
    xy = [(i * spacing, j * spacing) for j in range(ny) for i in range(nx_)]
    edges = [(j * nx_ + i, j * nx_ + i + 1) for j in range(ny) for i in range(nx_ - 1)]
    edges += [(j * nx_ + i, (j + 1) * nx_ + i) for j in range(ny - 1) for i in range(nx_)]
    xy += [(-4.0, 0.0), (-8.0, 0.0)]
    edges += [(0, len(xy) - 2), (len(xy) - 2, len(xy) - 1)]
    return FloorGraph.from_arrays(xy, edges)


def test_edge_cover_routes_walk_every_edge_in_lanes():
    import networkx as nx

    from fingerprint.simulate.routes import plan_edge_cover_routes

    g = _lattice_graph()
    routes = plan_edge_cover_routes(g, rng=np.random.default_rng(2), target_length_m=1e6)
    assert len(routes) == 1
    walked = {frozenset((int(a), int(b))) for r in routes for a, b in zip(r[:-1], r[1:])}
    edges = {frozenset(e) for e in g.edges.tolist()}
    assert walked <= edges and walked == edges  # consecutive nodes share an edge; every edge walked
    # reference: the shortest closed walk over every edge (Chinese postman,
    # networkx eulerize); an open walk needs no more than that
    euler = nx.eulerize(g.to_networkx())
    postman = sum(math.dist(g.nodes_xy[u], g.nodes_xy[v]) for u, v in euler.edges())
    length = float(np.hypot(*np.diff(g.nodes_xy[routes[0]], axis=0).T).sum())
    assert g.total_length_m <= length <= 1.25 * postman
    # straight lanes: most steps go on in the direction of the previous one
    d = np.diff(g.nodes_xy[routes[0]], axis=0)
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    assert np.mean(np.einsum("ij,ij->i", d[1:], d[:-1]) > 0.99) > 0.5
    # only the needed edges must be walked
    need = g.nodes_xy[g.edges].mean(axis=1)[:, 0] >= 0  # the lattice, not the spur
    part = plan_edge_cover_routes(g, rng=np.random.default_rng(3), target_length_m=1e6, need=need)
    walked = {frozenset((int(a), int(b))) for r in part for a, b in zip(r[:-1], r[1:])}
    assert {frozenset(e) for e in g.edges[need].tolist()} <= walked
    assert frozenset((len(g.nodes_xy) - 2, len(g.nodes_xy) - 1)) not in walked


def test_start_from_best_nearby():
    from fingerprint.simulate.routes import start_from_best_nearby

    g = _corridor_graph()  # nodes (0,0) (20,0) (20,10) (0,10) (32,0)
    route = np.array([1, 2, 3])
    # best place: as far east as possible, within 15 m of node 1 -> node 4 (12 m away)
    r = start_from_best_nearby(g, route, lambda xy: xy[:, 0], radius_m=15.0)
    assert r.tolist() == [4, 1, 2, 3]
    assert start_from_best_nearby(g, route, lambda xy: xy[:, 0], radius_m=5.0).tolist() == [1, 2, 3]
    assert start_from_best_nearby(g, route, lambda xy: -xy[:, 1], radius_m=50.0).tolist() == [1, 2, 3]


def test_survey_walk_calibrates_from_its_figure_of_eight(floors, models):
    # A handheld survey walk logs the raw field (magnetometer_calibrated:
    # no) and begins with a calibration motion; the chain's self-calibration
    # (Li & Griffiths ellipsoid fit on the turning stretch) then leaves a
    # hard-iron residual well below the 1.5 µT sd of a phone's own session
    # residual (truth: the simulated device's hard iron), and the motion's
    # gyro rates match the attitude change (consistency of the truth).
    from fingerprint.pipeline import process_walk

    plan, free, graph = floors["G"]
    settings = DatasetSettings(n_test_handheld=0, n_test_robot=0, platforms=("handheld",))
    jobs = [j for j in plan_floor("G", graph, seed=3, settings=settings) if j.session == "survey"][:2]
    for j in jobs:
        w = simulate_job(j, "G", models["G"], graph, free=free, seed=3, settings=settings)
        assert w.log.meta["magnetometer_calibrated"] == "no"
        assert w.params["walker"]["calibration_motion_s"] == pytest.approx(settings.survey_calibration_s, abs=0.01)
        pw = process_walk(w.log)
        cal = pw.meta["calibration"]
        assert cal["method"] == "self:ellipsoid"
        err = np.asarray(cal["offset_ut"]) - np.asarray(w.params["device"]["mag_hard"])
        assert np.linalg.norm(err) < 0.5, err
        # the motion turned the phone through most of the sphere
        n_cal = int(settings.survey_calibration_s * settings.rate_hz)
        up = Rotation.from_quat(w.truth.quat[:n_cal]).inv().apply([0.0, 0.0, 1.0])
        from fingerprint.calibration import rotation_coverage

        assert rotation_coverage(up)["sphere_fraction"] > 0.4


def test_magnetometer_offset_drifts_as_a_random_walk(models):
    # the hard iron wanders as a random walk: increments over 10 s have
    # variance drift² x 10 s (Wiener process, common practice, no source),
    # checked on 1 s means (white noise 0.4 µT averages down to 0.06 µT)
    dev = dataclasses.replace(Device.random_phone(np.random.default_rng(9)), mag_drift=0.05)
    traj = turn_in_hand((30.0, 20.0), rng=np.random.default_rng(10), duration_s=600.0)
    log, truth = synthesize_log(traj, models["L1"], dev, rng=np.random.default_rng(11))
    resid = log.mag_raw - truth.mag_device_ut @ np.asarray(dev.mag_soft).T - np.asarray(dev.mag_hard)
    sec = np.floor(log.t - log.t[0]).astype(int)
    means = np.stack([np.bincount(sec, weights=resid[:, i]) / np.bincount(sec) for i in range(3)], axis=1)[:-1]
    inc = means[10:] - means[:-10]
    var = np.mean(inc[::10] ** 2)
    assert var == pytest.approx(0.05**2 * 10.0, rel=0.35)


def test_truth_scores_by_steel_clearance(models):
    # map-vs-truth scores in bands of distance from steel: a map off by a
    # constant c has RMSE c in every band (definition of the RMSE), and the
    # bands share out every scored edge mid-point
    from mapping.mapscore import truth_scores

    fm = models["L1"]
    g = _lattice_graph(nx_=20, ny=10, spacing=1.5)
    g = FloorGraph.from_arrays(g.nodes_xy + np.array([10.0, 12.0]), g.edges)
    c = np.array([0.3, -0.4, 0.5])

    class _Map:
        graph = g

        def lookup(self, xy):
            b = fm.field(np.column_stack([xy, np.full(len(xy), 1.1)]))
            return b - c, np.ones_like(b), np.zeros(len(xy))

    sc = truth_scores(_Map(), fm, height_m=1.1)
    bands = sc["by_steel_clearance"]
    assert sum(b["n"] for b in bands.values()) == sc["n"] == g.n_edges
    for b in bands.values():
        np.testing.assert_allclose(list(b["rmse_ut"].values()), np.abs(c), atol=1e-9)
