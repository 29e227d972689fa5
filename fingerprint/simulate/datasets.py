"""Data sets of simulated walks, deterministic by seed.

Per floor: survey walks (handheld) that pass every corridor and aisle at
least twice, near the centre lines (or every edge of a survey graph), each
begun with a calibration motion and logged with the raw magnetometer; test walks on other, random routes with
other walkers and devices, wandering more; robot walks likewise. Each walk
is a :class:`SimulatedWalk` with its log, checkpoints (when the walker
passes a marked point) and the true track at every log sample.

The work is planned first (:func:`plan_floor`: a list of :class:`WalkJob`,
each with its own child seed) and then simulated job by job
(:func:`simulate_job`), so a progress bar can follow and any single walk
can be reproduced alone.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import ConfigError
from ..records import Checkpoints, Track, WalkLog
from .routes import (plan_edge_cover_routes, plan_survey_routes, plan_test_route, route_markers, route_polyline,
                     start_from_best_nearby)
from .sensors import Device, SensorTruth, synthesize_log
from .walkers import HandheldWalker, RobotWalker, with_calibration_motion

__all__ = [
    "WalkJob",
    "SimulatedWalk",
    "DatasetSettings",
    "plan_floor",
    "simulate_job",
    "checkpoints_from_truth",
    "write_walk",
    "steel_clearance_of_edges",
]


@dataclass(frozen=True)
class DatasetSettings:
    """Sizes of a floor's data set.

    Attributes
    ----------
    platforms : tuple of "handheld" / "robot"
    n_test_handheld, n_test_robot : int, test walks per floor
    survey_cover : int, passes of every corridor/aisle by the survey walks
    survey_length_m : float, length of one survey walk (handheld)
    robot_survey : bool, also survey with the robot (at its own height;
        written to ``survey_robot/`` when handheld walks are made too)
    robot_survey_cover : int, passes of every segment by the robot survey
    test_length_m, robot_test_length_m : float
    rate_hz : float, sample rate of the logs
    survey_lateral_sd_m, test_lateral_sd_m : float, sideways wander
    session_residual_sd_ut : float, µT, 1-sigma per axis of a calibrated
        phone's residual offset, drawn anew for every walk
        (:meth:`~fingerprint.simulate.sensors.Device.for_session`)
    survey_calibration_s : float, s, handheld survey walks begin with a
        calibration motion this long (the phone turned slowly through all
        orientations in the hand,
        :func:`~fingerprint.simulate.walkers.with_calibration_motion`);
        0 = none
    survey_raw_magnetometer : bool, handheld survey walks log the
        uncalibrated field (``magnetometer_calibrated: no``: a survey app
        records the raw magnetometer and lodemap calibrates it from the
        calibration motion) instead of the phone's own calibrated field
    calibration_search_m : float, m, the calibration motion is made at the
        graph node within this distance of the walk's start that is
        farthest from visible steel (0 = at the start)
    survey_cover_edges : bool, with a survey graph (``plan_floor``'s
        ``survey_graph``) the handheld survey walks cover every one of its
        edges, the lattice over open areas included
        (:func:`~fingerprint.simulate.routes.plan_edge_cover_routes`),
        in walks of about ``survey_edge_length_m``
    """

    platforms: tuple = ("handheld", "robot")
    n_test_handheld: int = 3
    n_test_robot: int = 2
    survey_cover: int = 2
    survey_length_m: float = 130.0
    robot_survey: bool = True
    robot_survey_length_m: float = 90.0
    robot_survey_cover: int = 1
    test_length_m: float = 200.0
    robot_test_length_m: float = 120.0
    rate_hz: float = 50.0
    survey_lateral_sd_m: float = 0.08
    test_lateral_sd_m: float = 0.2
    checkpoint_radius_m: float = 0.9
    checkpoint_spacing_m: float = 12.0
    session_residual_sd_ut: float = 1.5
    survey_calibration_s: float = 30.0
    survey_raw_magnetometer: bool = True
    survey_cover_edges: bool = True
    survey_edge_length_m: float = 130.0
    calibration_search_m: float = 15.0

    def __post_init__(self):
        bad = set(self.platforms) - {"handheld", "robot"}
        if bad or not self.platforms:
            raise ConfigError(f"platforms must be among 'handheld', 'robot', got {self.platforms!r}")
        if self.n_test_handheld < 0 or self.n_test_robot < 0 or self.survey_cover < 1:
            raise ConfigError("walk counts must be >= 0 and survey_cover >= 1")


@dataclass(frozen=True, eq=False)
class WalkJob:
    """One planned walk.

    Attributes
    ----------
    name : str, ``hh_NNN`` or ``rb_NNN``
    session : str, ``survey``, ``survey_robot`` or ``test`` (the output folder)
    platform : str
    route : (L,) int, node indices in the route graph
    walker_id, device_id : int, index into the floor's people/devices
    seed : numpy.random.SeedSequence, the walk's own generator
    lateral_sd_m : float, sideways wander of this walk
    cast_seed : numpy.random.SeedSequence, the floor's people and devices
    graph : FloorGraph or None, the graph ``route`` indexes when it is not
        the floor's route graph (a survey planned on the plan's graph)
    """

    name: str
    session: str
    platform: str
    route: np.ndarray
    walker_id: int
    device_id: int
    seed: np.random.SeedSequence
    lateral_sd_m: float = 0.1
    cast_seed: np.random.SeedSequence | None = None
    graph: object = None


@dataclass(frozen=True, eq=False)
class SimulatedWalk:
    name: str
    session: str
    floor: str
    log: WalkLog
    checkpoints: Checkpoints
    track: Track
    truth: SensorTruth
    params: dict = field(default_factory=dict)


def _people_and_devices(ss):
    """The floor's cast, fixed by its seed: survey people 0-2, test people
    3-6; phones 0-1 (survey) and 2-4 (test); robots 0 (survey) and 1-2."""
    rng = np.random.default_rng(ss)
    people = [HandheldWalker.random(rng) for _ in range(7)]
    phones = [Device.random_phone(rng, name=f"phone-{i}") for i in range(5)]
    robots = [Device.random_robot(rng, name=f"robot-{i}") for i in range(3)]
    bots = [RobotWalker.random(rng) for _ in range(3)]
    return people, phones, robots, bots


def plan_floor(floor, route_graph, *, seed, settings=DatasetSettings(), survey_graph=None, survey_need=None):
    """Plan a floor's walks.

    Parameters
    ----------
    floor : str
    route_graph : FloorGraph the walkers follow
    seed : int, the data set's seed (``--seed``)
    settings : DatasetSettings
    survey_graph : FloorGraph or None, the graph the handheld survey must
        cover edge by edge (e.g. the one a map of the floor is built on);
        None = the survey passes the route graph's corridors and aisles
    survey_need : (E,) bool or None, the edges of ``survey_graph`` the survey
        must walk (default all; e.g. those clear of steel,
        :func:`steel_clearance_of_edges`)

    Returns
    -------
    list of WalkJob
    """
    root = np.random.SeedSequence([int(seed), zlib.crc32(floor.encode())])
    plan_ss, cast_ss, walk_ss = root.spawn(3)
    rng = np.random.default_rng(plan_ss)
    jobs = []
    counters = {"handheld": 0, "robot": 0}

    def name(platform):
        k = counters[platform]
        counters[platform] += 1
        return ("hh_" if platform == "handheld" else "rb_") + f"{k:03d}"

    survey_platforms = []
    if "handheld" in settings.platforms:
        survey_platforms.append(("handheld", "survey", settings.survey_length_m, settings.survey_cover))
    if "robot" in settings.platforms and (settings.robot_survey or settings.platforms == ("robot",)):
        if "handheld" in settings.platforms:
            survey_platforms.append(("robot", "survey_robot", settings.robot_survey_length_m,
                                     settings.robot_survey_cover))
        else:  # the robot is the surveyor
            survey_platforms.append(("robot", "survey", settings.robot_survey_length_m, settings.survey_cover))
    for platform, session, length, cover in survey_platforms:
        g = None
        if platform == "handheld" and survey_graph is not None and settings.survey_cover_edges:
            g = survey_graph
            routes = plan_edge_cover_routes(g, rng=rng, target_length_m=settings.survey_edge_length_m,
                                            need=survey_need)
        else:
            routes = plan_survey_routes(route_graph, rng=rng, target_length_m=length, min_cover=cover)
        for i, r in enumerate(routes):
            jobs.append(WalkJob(name(platform), session, platform, r, i % 3, i % 2 if platform == "handheld" else 0,
                                None, settings.survey_lateral_sd_m if platform == "handheld" else 0.04, graph=g))
    starts = []
    for platform, n, length in (("handheld", settings.n_test_handheld, settings.test_length_m),
                                ("robot", settings.n_test_robot, settings.robot_test_length_m)):
        if platform not in settings.platforms:
            continue
        for i in range(n):
            r = plan_test_route(route_graph, rng=rng, length_m=length, avoid=np.array(starts, dtype=np.int64))
            starts.append(int(r[0]))
            wid = 3 + i % 4 if platform == "handheld" else 1 + i % 2
            did = 2 + i % 3 if platform == "handheld" else 1 + i % 2
            jobs.append(WalkJob(name(platform), "test", platform, r, wid, did, None,
                                settings.test_lateral_sd_m if platform == "handheld" else 0.1))
    seeds = walk_ss.spawn(len(jobs))
    out = []
    for j, s in zip(jobs, seeds):
        out.append(WalkJob(j.name, j.session, j.platform, j.route, j.walker_id, j.device_id, s, j.lateral_sd_m,
                           cast_ss, j.graph))
    return out


def checkpoints_from_truth(t, xy, markers_xy, *, radius_m=0.6, floor=None, min_gap_s=3.0):
    """Checkpoints where a walk passes marked points: for every stretch of
    samples within ``radius_m`` of a mark, the sample closest to it (true
    time and true position, label of the mark); plus the first and the
    last sample ("start", "end").

    Parameters
    ----------
    t : (N,) s ; xy : (N, 2) m, true positions ; markers_xy : (K, 2) m

    Returns
    -------
    Checkpoints sorted by time
    """
    t = np.asarray(t, float)
    xy = np.asarray(xy, float)
    markers_xy = np.asarray(markers_xy, float).reshape(-1, 2)
    rows = [(0, "start")]
    if markers_xy.size:
        d = np.hypot(xy[:, None, 0] - markers_xy[None, :, 0], xy[:, None, 1] - markers_xy[None, :, 1])  # (N, K)
        near = d < radius_m
        for k in np.flatnonzero(near.any(axis=0)):
            idx = np.flatnonzero(near[:, k])
            breaks = np.flatnonzero(np.diff(idx) > 1) + 1
            for run in np.split(idx, breaks):
                i = int(run[np.argmin(d[run, k])])
                rows.append((i, f"mark-{k:02d}"))
    rows.append((len(t) - 1, "end"))
    rows.sort()
    keep = []
    for i, lab in rows:
        if keep and t[i] - t[keep[-1][0]] < min_gap_s and lab not in ("end",):
            continue
        if keep and lab == "end" and t[i] - t[keep[-1][0]] < min_gap_s and keep[-1][1] != "start":
            keep.pop()
        keep.append((i, lab))
    idx = np.array([i for i, _ in keep])
    labels = np.array([lab for _, lab in keep])
    fl = None if floor is None else np.array([floor] * len(idx))
    return Checkpoints(t=t[idx], xy=xy[idx], floor=fl, label=labels)


def steel_clearance_of_edges(graph, field_model, *, height_m=1.1):
    """(E,) m, the smallest distance from an edge of ``graph`` (its ends and
    mid-point, at ``height_m``) to a dipole of the visible steel."""
    f = _steel_clearance(field_model, height_m)
    a, b = graph.nodes_xy[graph.edges[:, 0]], graph.nodes_xy[graph.edges[:, 1]]
    return np.minimum(np.minimum(f(a), f(b)), f(0.5 * (a + b)))


def _steel_clearance(field_model, height_m=1.1):
    """``f(xy (K, 2)) -> (K,)`` distance (m) from a point at hand height to
    the nearest dipole of the visible steel: everything but slab meshes."""
    from scipy.spatial import cKDTree

    kinds = np.asarray(field_model.kinds).astype(str)
    keep = np.char.find(kinds, "mesh") < 0
    pos = np.asarray(field_model.positions_m, float)[keep]
    if pos.shape[0] == 0:
        return lambda xy: np.zeros(len(xy))
    tree = cKDTree(pos)

    def clearance(xy):
        xy = np.asarray(xy, float).reshape(-1, 2)
        return tree.query(np.column_stack([xy, np.full(len(xy), float(height_m))]))[0]

    return clearance


def simulate_job(job, floor, field_model, route_graph, *, free=None, seed=0, settings=DatasetSettings(),
                 markers_xy=None):
    """Simulate one planned walk.

    Parameters
    ----------
    job : WalkJob from :func:`plan_floor`
    floor : str
    field_model : FieldModel of the floor
    route_graph : FloorGraph the job was planned on
    free : shapely geometry or None, free space the walk must stay in
    seed : int, the data set's seed (recorded in the log)
    markers_xy : (K, 2) or None, marked points (default from the graph)

    Returns
    -------
    SimulatedWalk
    """
    people, phones, robots, bots = _people_and_devices(job.cast_seed)
    rng = np.random.default_rng(job.seed)
    graph = route_graph if job.graph is None else job.graph
    survey_hh = job.platform == "handheld" and job.session.startswith("survey")
    route = job.route
    if survey_hh and settings.survey_calibration_s > 0 and settings.calibration_search_m > 0:
        # the surveyor turns the phone for its calibration away from the
        # steel they can see (columns, racking, plant: common practice, no
        # source), at the clearest spot near the start, and walks on from there
        route = start_from_best_nearby(graph, route, _steel_clearance(field_model),
                                       radius_m=settings.calibration_search_m)
    poly = route_polyline(graph, route)
    if job.platform == "handheld":
        base = people[job.walker_id]
        walker = HandheldWalker(**{**base.__dict__, "lateral_sd_m": job.lateral_sd_m,
                                   "pauses": int(rng.integers(0, 3))})
        device = phones[job.device_id]
        who = f"person-{job.walker_id}"
    else:
        base = bots[job.walker_id]
        walker = RobotWalker(**{**base.__dict__, "lateral_sd_m": job.lateral_sd_m})
        device = robots[job.device_id]
        who = f"robot-{job.walker_id}"
    device = Device(**{**device.__dict__, "rate_hz": float(settings.rate_hz)})
    # the session's own residual calibration offset, from a generator of its
    # own (so the walk itself does not depend on it)
    session_rng = np.random.default_rng(
        np.random.SeedSequence(job.seed.entropy, spawn_key=tuple(job.seed.spawn_key) + (7919,)))
    device = device.for_session(session_rng, residual_sd_ut=settings.session_residual_sd_ut)
    if survey_hh and settings.survey_raw_magnetometer:
        device = Device(**{**device.__dict__, "calibrated": False})
    traj = walker.walk(poly, rng=rng, free=free)
    if survey_hh and settings.survey_calibration_s > 0:
        traj = with_calibration_motion(traj, rng=session_rng, duration_s=settings.survey_calibration_s)
    meta = {
        "floor": floor,
        "seed": seed,
        "walk_seed": ".".join(str(v) for v in job.seed.spawn_key),
        "session": "survey" if job.session.startswith("survey") else "test",
        "walker": who,
        "site_simulation": "lodemap simulate",
    }
    t0 = float(np.round(rng.uniform(0.05, 0.2), 3))
    log, truth = synthesize_log(traj, field_model, device, rng=rng, t0=t0, meta=meta)
    marks = route_markers(route_graph, max_spacing_m=settings.checkpoint_spacing_m) if markers_xy is None else markers_xy
    cps = checkpoints_from_truth(truth.t, truth.xy, marks, radius_m=settings.checkpoint_radius_m, floor=floor)
    track = Track(t=truth.t.copy(), xy=truth.xy.copy(), heading_rad=truth.heading_rad.copy())
    params = {
        "walker": traj.params,
        "device": device.to_json(),
        "true_path_length_m": traj.path_length_m,
        "n_steps": int(traj.step_t.size),
        "duration_s": float(log.t[-1] - log.t[0]),
    }
    return SimulatedWalk(job.name, job.session, floor, log, cps, track, truth, params)


def write_walk(folder, walk):
    """Write ``<name>.log.csv``, ``.checkpoints.csv`` and ``.track.csv`` into
    ``folder`` (atomic writes via :mod:`fingerprint.logio`). Returns the
    log path."""
    from ..logio import write_checkpoints, write_track, write_walk_log

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    log_path = folder / f"{walk.name}.log.csv"
    write_walk_log(log_path, walk.log)
    write_checkpoints(folder / f"{walk.name}.checkpoints.csv", walk.checkpoints)
    write_track(folder / f"{walk.name}.track.csv", walk.track)
    return log_path
