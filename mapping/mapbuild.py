"""Build a floor's field map from survey walks.

:func:`build_floor_map` runs the whole chain: floor plan and graph, walk
logs through the sensor chain, the earth-to-plan rotation (from the site's
plan rotation and the geomagnetic declination when both are known,
otherwise estimated from the survey walks), survey positions (track or
checkpoints), the field rotated into the plan frame and averaged over short
stretches of each walk, the model fit (:mod:`mapping.mapfit`) and the
raster over the plan (mean, variance, coverage).

The pieces are public so that evaluation code can reuse them on test walks
(:func:`load_walks`, :func:`walk_samples`, :func:`collect_samples`,
:func:`fit_samples`, :func:`raster_map`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.spatial import cKDTree
from scipy.spatial.transform import Rotation

from fingerprint.errors import ConfigError, ConvergenceError, DataError
from fingerprint.fieldmap import COMPONENTS, FieldMap

from .mapfit import MAP_KERNELS, make_model

__all__ = [
    "SurveyWalk",
    "SurveySamples",
    "load_walks",
    "earth_to_plan_for",
    "walk_samples",
    "collect_samples",
    "fit_samples",
    "raster_map",
    "build_floor_map",
    "outlying_walks",
    "plan_rotation_matrix",
    "track_heading_offset",
]

MAP_META_VERSION = 1


@dataclass(eq=False)
class SurveyWalk:
    """One walk read and processed.

    Attributes
    ----------
    name : str
    walk : ProcessedWalk
    checkpoints : Checkpoints or None
    track : Track or None
    floor : str or None, the floor the log or its checkpoints say it was
        recorded on
    """

    name: str
    walk: object
    checkpoints: object = None
    track: object = None
    floor: str | None = None


@dataclass(eq=False)
class SurveySamples:
    """Map-ready samples of a set of walks (stretch averages).

    Attributes
    ----------
    xy : (N, 2) float, metres, plan frame
    b_ut : (N, 3) float, µT, plan-frame field ``b_x, b_y, b_up``
    rotations : (N, 3, 3) float, device-to-plan rotation
    walk : (N,) int, index into ``names``
    names : list of str, walk names
    sigma_m : (N,) float, position uncertainty
    heading_rad : (N,) float, device heading in the plan frame
    n_raw : (N,) int, sensor samples averaged into each
    """

    xy: np.ndarray
    b_ut: np.ndarray
    rotations: np.ndarray
    walk: np.ndarray
    names: list
    sigma_m: np.ndarray
    heading_rad: np.ndarray
    n_raw: np.ndarray
    info: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.xy.shape[0])


def plan_rotation_matrix(earth_to_plan_rad):
    """(3, 3) rotation about the vertical taking earth (east, north, up)
    vectors into plan (x, y, up) components."""
    c, s = math.cos(earth_to_plan_rad), math.sin(earth_to_plan_rad)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def _tqdm(iterable, *, progress, **kw):
    if not progress:
        return iterable
    from tqdm import tqdm

    return tqdm(iterable, **kw)


def load_walks(walk_files, *, use_track=True, progress=True, desc="reading walks"):
    """Read and process walks.

    Parameters
    ----------
    walk_files : list of WalkFiles (or paths for ``mapping.walkset.find_walks``)
    use_track : bool, read ``*.track.csv`` beside a log when present

    Returns
    -------
    list of SurveyWalk
    """
    from fingerprint.logio import read_checkpoints, read_track, read_walk_log
    from fingerprint.pipeline import process_walk

    from .walkset import WalkFiles, find_walks, walk_floor

    files = list(walk_files) if not isinstance(walk_files, (str, bytes)) else [walk_files]
    if files and not all(isinstance(w, WalkFiles) for w in files):
        files = find_walks(files)
    if not files:
        raise DataError("no survey walks given")
    out = []
    for wf in _tqdm(files, progress=progress, desc=desc, unit="walk"):
        log = read_walk_log(wf.log)
        walk = process_walk(log)
        cps = read_checkpoints(wf.checkpoints) if wf.checkpoints is not None else None
        track = read_track(wf.track) if (use_track and wf.track is not None) else None
        floor = walk_floor(log, cps)
        out.append(SurveyWalk(wf.name, walk, cps, track, floor))
    return out


#: checkpoints farther than this from free space are reported (hand taps
#: on a plan are off by about a metre; common practice, no source)
CHECKPOINT_TOLERANCE_M = 1.0


def checkpoint_checks(walks, plan, *, tolerance_m=CHECKPOINT_TOLERANCE_M, floor=None):
    """Checkpoints that contradict their walk: times outside the log's span
    (a file on another clock is an error, raised here before any work) or
    positions more than ``tolerance_m`` from the plan's free space (not
    checked for walks marked as recorded on a floor other than ``floor``:
    those are reported as such).

    Returns
    -------
    list of dict, one per walk with a finding: ``walk``, ``file``,
    ``outside_log_time`` (file lines), ``outside_free_space`` (list of
    [file line, distance m])
    """
    from fingerprint.logio import check_checkpoint_clock

    from .floorplan import check_points

    out = []
    for w in walks:
        cps = w.checkpoints
        if cps is None or cps.n == 0:
            continue
        late = check_checkpoint_clock(cps, float(w.walk.t[0]), float(w.walk.t[-1]))
        if floor is not None and w.floor is not None and w.floor != floor:
            off, dist = np.zeros(cps.n, bool), np.zeros(cps.n)
        else:
            off, dist = check_points(plan, cps.xy, tolerance_m=tolerance_m)
        if late.any() or off.any():
            lines = cps.lines if cps.lines is not None else np.arange(cps.n) + 2
            out.append({"walk": w.name, "file": cps.path,
                        "outside_log_time": [int(v) for v in lines[late]],
                        "outside_free_space": [[int(v), round(float(d), 2)] for v, d in zip(lines[off], dist[off])]})
    return out


def earth_to_plan_for(site, walks):
    """The earth-to-plan rotation for a floor.

    From the site's plan rotation and the IGRF declination when both are
    known (``radians(rho - D)``); otherwise estimated from the walks'
    straight checkpoint segments (``mapping.alignment``). Both are reported
    when available.

    Returns
    -------
    angle_rad : float
    info : dict, JSON-able (source, estimate, declination, ...)
    """
    from .alignment import estimate_earth_to_plan, expected_earth_to_plan

    expected, decl = expected_earth_to_plan(site)
    info = {"declination_deg": decl}
    with_cp = [w for w in walks if w.checkpoints is not None and w.checkpoints.n >= 2]
    est = None
    if with_cp:
        try:
            est = estimate_earth_to_plan([w.walk for w in with_cp], [w.checkpoints for w in with_cp], site=site)
            info["estimate"] = est.to_dict()
        except ConvergenceError as err:
            info["estimate_error"] = str(err)
    if expected is not None:
        info.update(source="site plan rotation and IGRF declination", earth_to_plan_deg=math.degrees(expected))
        return float(expected), info
    if est is None:
        raise ConvergenceError(
            "cannot tell the earth-to-plan rotation: the site gives no plan rotation with latitude, longitude "
            "and date, and no survey walk has checkpoint segments to estimate it from"
            + (f" ({info['estimate_error']})" if "estimate_error" in info else "")
        )
    info.update(source="estimated from survey walks", earth_to_plan_deg=est.angle_deg)
    return float(est.angle_rad), info


def walk_samples(walk, positions, *, earth_to_plan_rad, spacing_m=0.25, tilt=False):
    """Average a walk's field over stretches of ``spacing_m`` travelled.

    Parameters
    ----------
    walk : ProcessedWalk
    positions : SurveyPositions (``index`` into the walk's samples, ``xy``,
        ``sigma_m``) or a (N, 2) array of positions of every sample
    earth_to_plan_rad : float
    spacing_m : float, > 0
    tilt : bool
        ``rotations`` are the full device-to-plan attitude (True) or only
        the heading turn about the vertical, ``Rz(plan heading)`` (False,
        default). The walk offsets are estimated in the frame these define;
        heading-only keeps a vertical offset exactly vertical, so that it is
        not traded against tilt-dependent attitude errors.

    Returns
    -------
    dict of arrays: xy (M, 2), b_ut (M, 3) plan frame, rotations (M, 3, 3),
    sigma_m (M,), heading_rad (M,), n_raw (M,)
    """
    if not spacing_m > 0:
        raise ConfigError(f"sample spacing must be > 0, got {spacing_m}")
    if isinstance(positions, np.ndarray):
        idx = np.arange(walk.n)
        xy = np.asarray(positions, float).reshape(-1, 2)
        sig = np.zeros(walk.n)
    else:
        idx = np.arange(walk.n) if positions.index is None else np.asarray(positions.index, dtype=np.int64)
        xy = np.asarray(positions.xy, float)
        sig = np.asarray(positions.sigma_m, float)
    rz = plan_rotation_matrix(earth_to_plan_rad)
    mag = walk.mag_earth_ut[idx] @ rz.T
    ok = np.all(np.isfinite(mag), axis=1) & np.all(np.isfinite(xy), axis=1) & np.all(np.isfinite(walk.quat[idx]), axis=1)
    idx, xy, sig, mag = idx[ok], xy[ok], sig[ok], mag[ok]
    empty = {
        "xy": np.zeros((0, 2)),
        "b_ut": np.zeros((0, 3)),
        "rotations": np.zeros((0, 3, 3)),
        "sigma_m": np.zeros(0),
        "heading_rad": np.zeros(0),
        "n_raw": np.zeros(0, dtype=np.int64),
    }
    if idx.size == 0:
        return empty
    s = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(xy, axis=0).T))])
    bins = np.floor(s / spacing_m).astype(np.int64)
    starts = np.flatnonzero(np.concatenate([[True], bins[1:] != bins[:-1]]))
    counts = np.diff(np.append(starts, bins.size))
    mid = starts + counts // 2
    heading = np.asarray(walk.heading_rad)[idx[mid]] + earth_to_plan_rad
    if tilt:
        rot = np.einsum("ij,njk->nik", rz, Rotation.from_quat(walk.quat[idx[mid]]).as_matrix())
    else:
        rot = Rotation.from_euler("z", heading[:, None]).as_matrix()
    return {
        "xy": np.add.reduceat(xy, starts, axis=0) / counts[:, None],
        "b_ut": np.add.reduceat(mag, starts, axis=0) / counts[:, None],
        "rotations": rot,
        "sigma_m": np.add.reduceat(sig, starts) / counts,
        "heading_rad": heading,
        "n_raw": counts.astype(np.int64),
    }


def track_heading_offset(walk, track, *, earth_to_plan_rad, min_speed_m_s=0.3):
    """The constant heading error of a processed walk against a track that
    knows the device heading (a robot localised by lidar, a simulator's
    truth): the circular mean of ``track heading - (walk heading +
    earth_to_plan)`` over the samples inside the track's time span where
    the track moves at least ``min_speed_m_s``.

    The attitude holds magnetic north by one robust offset per walk; where
    the steel of a building bends the field over much of a walk, that offset
    is off by a few degrees (up to 12° on short simulated demo walks), which
    turns the whole walk's horizontal field. A survey walk with a known
    heading need not carry that error into the map.

    Returns
    -------
    float, rad (add to ``earth_to_plan_rad`` for this walk), or None when
    the track has no heading or too few moving samples
    """
    if track is None or track.heading_rad is None or track.t.size < 2:
        return None
    t = np.asarray(walk.t, float)
    inside = (t >= track.t[0]) & (t <= track.t[-1])
    if inside.sum() < 10:
        return None
    tt = t[inside]
    c = np.interp(tt, track.t, np.cos(track.heading_rad))
    s = np.interp(tt, track.t, np.sin(track.heading_rad))
    vx = np.gradient(np.interp(tt, track.t, track.xy[:, 0]), tt)
    vy = np.gradient(np.interp(tt, track.t, track.xy[:, 1]), tt)
    moving = np.hypot(vx, vy) >= min_speed_m_s
    ok = moving & np.isfinite(np.asarray(walk.heading_rad)[inside])
    if ok.sum() < 10:
        return None
    d = np.arctan2(s, c)[ok] - (np.asarray(walk.heading_rad)[inside][ok] + earth_to_plan_rad)
    return float(np.arctan2(np.sin(d).mean(), np.cos(d).mean()))


def collect_samples(walks, *, plan=None, earth_to_plan_rad, spacing_m=0.25, positions=None, progress=False,
                    heading_from_track=True):
    """Survey positions and stretch-averaged samples of many walks.

    Parameters
    ----------
    walks : list of SurveyWalk
    plan : FloorPlan or None (positions are kept in its free space)
    earth_to_plan_rad : float
    spacing_m : float
    positions : dict name -> SurveyPositions or (N, 2) array, optional;
        default :func:`mapping.survey.reconstruct_positions`
    heading_from_track : bool
        For walks whose positions come from a track with a heading column,
        remove the walk's constant heading error against it
        (:func:`track_heading_offset`); ``info["heading_corrections_deg"]``
        lists them

    Returns
    -------
    SurveySamples
    """
    from .survey import reconstruct_positions

    parts, names, skipped = [], [], []
    corrections = {}
    for w in _tqdm(walks, progress=progress, desc="survey positions", unit="walk"):
        if positions is not None and w.name in positions:
            pos = positions[w.name]
        else:
            try:
                pos = reconstruct_positions(
                    w.walk, checkpoints=w.checkpoints, track=w.track, plan=plan, earth_to_plan_rad=earth_to_plan_rad
                )
            except DataError as err:
                skipped.append({"walk": w.name, "reason": str(err)})
                continue
        angle = earth_to_plan_rad
        if heading_from_track and w.track is not None and getattr(pos, "source", None) == "track":
            dh = track_heading_offset(w.walk, w.track, earth_to_plan_rad=earth_to_plan_rad)
            if dh is not None:
                angle = earth_to_plan_rad + dh
                corrections[w.name] = math.degrees(dh)
        smp = walk_samples(w.walk, pos, earth_to_plan_rad=angle, spacing_m=spacing_m)
        if smp["xy"].shape[0] == 0:
            skipped.append({"walk": w.name, "reason": "no usable samples"})
            continue
        smp["walk"] = np.full(smp["xy"].shape[0], len(names), dtype=np.int64)
        names.append(w.name)
        parts.append(smp)
    if not parts:
        raise DataError("none of the survey walks gave usable samples: " + "; ".join(s["reason"] for s in skipped))
    cat = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    return SurveySamples(
        xy=cat["xy"],
        b_ut=cat["b_ut"],
        rotations=cat["rotations"],
        walk=cat["walk"],
        names=names,
        sigma_m=cat["sigma_m"],
        heading_rad=cat["heading_rad"],
        n_raw=cat["n_raw"],
        info={"skipped": skipped, "heading_corrections_deg": corrections},
    )


def fit_samples(samples, *, kernel="curl-free", seed=0, domain=None, kernel_params=None):
    """Fit a :data:`~mapping.mapfit.MAP_KERNELS` model to survey samples
    (walk offsets in the device frame for the GP kernels).

    Returns
    -------
    fitted model
    """
    params = dict(kernel_params or {})
    if kernel not in MAP_KERNELS:
        make_model(kernel)  # raises the ConfigError listing the valid names
    if kernel in ("curl-free", "per-component"):
        params.setdefault("seed", int(seed))
        if domain is not None:
            params.setdefault("domain", domain)
    model = make_model(kernel, **params)
    return model.fit(samples.xy, samples.b_ut, groups=samples.walk, rotations=samples.rotations)


def raster_map(model, plan, *, resolution_m=0.25, survey_xy=None, var_step=None):
    """Predict the map on a raster over the plan's bounds.

    Parameters
    ----------
    model : fitted map model
    plan : FloorPlan
    resolution_m : float
    survey_xy : (N, 2) float or None, for ``coverage_m``
    var_step : int or None, compute the variance every ``var_step`` cells
        and interpolate (the variance is smooth on the length scale); None =
        chosen from the model's length scale

    Returns
    -------
    origin_xy (2,), mean (ny, nx, 3), var (ny, nx, 3), coverage (ny, nx), free (ny, nx)
    """
    if not resolution_m > 0:
        raise ConfigError(f"map resolution must be > 0, got {resolution_m}")
    xmin, ymin, xmax, ymax = plan.bounds
    nx = int(math.floor((xmax - xmin) / resolution_m)) + 1
    ny = int(math.floor((ymax - ymin) / resolution_m)) + 1
    if nx * ny > 40_000_000:
        raise ConfigError(f"raster of {nx} x {ny} cells is too large; use a coarser resolution than {resolution_m} m")
    xs = xmin + resolution_m * np.arange(nx)
    ys = ymin + resolution_m * np.arange(ny)
    gx, gy = np.meshgrid(xs, ys)
    centres = np.column_stack([gx.ravel(), gy.ravel()])
    free = plan.contains(centres).reshape(ny, nx)
    if hasattr(model, "predict_grid"):
        if var_step is None:
            ell = float(getattr(model, "hyper_", {}).get("length_scale_m", resolution_m))
            var_step = max(1, int(ell / (3.0 * resolution_m)))
        mean, var = _grid_with_coarse_var(model, xs, ys, int(var_step))
    else:
        mean = np.empty((ny * nx, 3))
        var = np.empty((ny * nx, 3))
        for s in range(0, centres.shape[0], 200_000):
            m, v = model.predict(centres[s : s + 200_000])
            mean[s : s + 200_000] = m
            var[s : s + 200_000] = v
        mean = mean.reshape(ny, nx, 3)
        var = var.reshape(ny, nx, 3)
    if survey_xy is not None and len(survey_xy):
        d, _ = cKDTree(np.asarray(survey_xy, float)).query(centres)
        coverage = d.reshape(ny, nx)
    else:
        coverage = np.full((ny, nx), np.inf)
    return np.array([xmin, ymin]), mean, var, coverage, free


def _grid_with_coarse_var(model, xs, ys, step):
    if step <= 1 or xs.size < 2 * step or ys.size < 2 * step:
        return model.predict_grid(xs, ys)
    from scipy.interpolate import RegularGridInterpolator

    mean = model.predict_grid(xs, ys, return_var=False)
    ix = np.unique(np.append(np.arange(0, xs.size, step), xs.size - 1))
    iy = np.unique(np.append(np.arange(0, ys.size, step), ys.size - 1))
    _, var_c = model.predict_grid(xs[ix], ys[iy])
    gx, gy = np.meshgrid(xs, ys)
    q = np.column_stack([gy.ravel(), gx.ravel()])
    var = np.empty(mean.shape)
    for c in range(3):
        f = RegularGridInterpolator((ys[iy], xs[ix]), var_c[..., c], method="linear")
        var[..., c] = f(q).reshape(ys.size, xs.size)
    return mean, var


def outlying_walks(names, offsets_ut, *, k=4.0, min_ut=6.0):
    """Survey walks whose device-frame offset stands out from the others'.

    A walk's offset (its residual calibration error, as the map fit
    estimates it) is compared with the median of all walks, per device
    axis; it is an outlier where it deviates by more than ``k`` robust
    standard deviations (1.4826 times the median absolute deviation) and
    by more than ``min_ut``. Such a walk (a device with a poor calibration,
    a robot with a magnet near its sensor) pulls the map towards its own
    level. Needs at least four walks; fewer give an empty list.

    Parameters
    ----------
    names : list of W walk names ; offsets_ut : (W, 3) float, µT

    Returns
    -------
    list of dict: ``walk``, ``offset_ut`` (3), ``deviation_ut`` (3),
    ``limit_ut`` (3), one per outlying walk
    """
    off = np.asarray(offsets_ut, dtype=float).reshape(-1, 3)
    if off.shape[0] < 4 or len(names) != off.shape[0]:
        return []
    dev = off - np.median(off, axis=0)
    limit = np.maximum(k * 1.4826 * np.median(np.abs(dev), axis=0), min_ut)
    out = []
    for i in np.flatnonzero(np.any(np.abs(dev) > limit, axis=1)):
        out.append({"walk": str(names[i]), "offset_ut": [round(float(v), 3) for v in off[i]],
                    "deviation_ut": [round(float(v), 3) for v in dev[i]],
                    "limit_ut": [round(float(v), 3) for v in limit]})
    return out


#: a graph node farther than this from the plan's free space is off the plan
GRAPH_OFF_PLAN_M = 1.0


def check_graph_on_plan(graph, plan, *, path=None, plan_path=None, limit_m=GRAPH_OFF_PLAN_M):
    """A hand-drawn floor graph against the plan: an error when more than
    half of its nodes lie over ``limit_m`` outside free space (another
    floor, another origin or unit), a warning naming the farthest node when
    some do (particles there would walk through walls)."""
    import warnings

    from fingerprint.errors import LodemapWarning

    if graph.n_nodes == 0:
        return
    d = plan.distance_to_free(graph.nodes_xy)
    off = d > limit_m
    if not off.any():
        return
    far = int(np.argmax(d))
    x, y = graph.nodes_xy[far]
    plan_name = f"the plan {plan_path}" if plan_path else "the plan"
    what = (f"{int(off.sum())} of the graph's {graph.n_nodes} nodes lie more than {limit_m:g} m outside the free "
            f"space of {plan_name} (farthest {d[far]:.1f} m, at x {x:.2f}, y {y:.2f})")
    if off.mean() > 0.5:
        raise DataError(f"{what}; expected a graph drawn over this floor's plan, in its metres", path=path)
    warnings.warn(f"{path}: {what}" if path else what, LodemapWarning, stacklevel=2)


def build_floor_map(
    site,
    floor,
    walk_files,
    *,
    resolution_m=0.25,
    kernel="curl-free",
    seed=0,
    progress=True,
    use_track=True,
    spacing_m=0.25,
    kernel_params=None,
    graph=None,
    heading_from_track=True,
    graph_source=None,
) -> FieldMap:
    """Build the field map of ``floor`` from survey walks.

    Parameters
    ----------
    site : Site or path of a ``site.json``
    floor : str, floor label in the site
    walk_files : list of WalkFiles, or files / folders for ``find_walks``
    resolution_m : float, raster cell size
    kernel : str, a :data:`~mapping.mapfit.MAP_KERNELS` name
    seed : int, recorded; seeds the model's fold assignment
    progress : bool, tqdm bars
    use_track : bool, take positions from ``*.track.csv`` where present
    spacing_m : float, walk distance per averaged survey sample
    kernel_params : dict or None, extra model parameters
    graph : FloorGraph or None (default: built from the plan); a given graph
        is checked against the plan (:func:`check_graph_on_plan`)
    graph_source : str or None, where ``graph`` came from (for its messages)
    heading_from_track : bool, correct each walk's constant heading error
        from its track's heading where there is one (see
        :func:`collect_samples`)

    Returns
    -------
    FieldMap (plan-frame components; ``meta`` holds provenance)
    """
    from .floorplan import load_floor_plan
    from .graphbuild import build_graph
    from .site import load_site

    if kernel not in MAP_KERNELS:
        make_model(kernel)
    if not hasattr(site, "floors"):
        site = load_site(site)
    floor = str(floor)
    plan_path = site.plan_path(floor)
    plan = load_floor_plan(plan_path)
    if graph is None:
        graph = build_graph(plan)
    else:
        check_graph_on_plan(graph, plan, path=graph_source, plan_path=plan_path)
    walks = load_walks(walk_files, use_track=use_track, progress=progress)
    checks = checkpoint_checks(walks, plan, floor=floor)
    angle, align = earth_to_plan_for(site, walks)
    samples = collect_samples(walks, plan=plan, earth_to_plan_rad=angle, spacing_m=spacing_m, progress=progress,
                              heading_from_track=heading_from_track)
    xmin, ymin, xmax, ymax = plan.bounds
    model = fit_samples(
        samples, kernel=kernel, seed=seed, domain=((xmin, ymin), (xmax, ymax)), kernel_params=kernel_params
    )
    origin, mean, var, coverage, free = raster_map(model, plan, resolution_m=resolution_m, survey_xy=samples.xy)
    counts = np.bincount(samples.walk, minlength=len(samples.names))
    summary = model.summary()
    offsets = {}
    if hasattr(model, "walk_offsets"):
        offsets = {samples.names[int(c)]: o for c, o in zip(model.walk_names_, model.walk_offsets())}
    meta = {
        "map_meta_version": MAP_META_VERSION,
        "floor": floor,
        "site": getattr(site, "name", None),
        "plan_path": str(plan_path),
        "plan_hash": plan.plan_hash,
        "frames": {
            "components": list(COMPONENTS),
            "earth_to_plan_rad": angle,
            "alignment": align,
        },
        "units": {"field": "µT", "variance": "µT²", "coverage": "m"},
        "variance": "var_ut2 = latent map variance + between-walk variance; add noise_sd_ut² for one measurement",
        "kernel": kernel,
        "model": summary,
        "noise_sd_ut": [float(v) for v in np.sqrt(getattr(model, "noise_var_", np.zeros(3)))],
        "survey_walks": [
            {"name": n, "samples": int(c),
             "offset_ut": None if n not in offsets else [round(float(v), 3) for v in offsets[n]]}
            for n, c in zip(samples.names, counts)
        ],
        "walks_marked_other_floor": [w.name for w in walks if w.floor is not None and w.floor != floor],
        "checkpoint_checks": checks,
        "offset_outliers": outlying_walks(list(offsets), np.array(list(offsets.values())).reshape(-1, 3)),
        "skipped_walks": samples.info.get("skipped", []),
        "n_samples": samples.n,
        "build": {
            "resolution_m": float(resolution_m),
            "spacing_m": float(spacing_m),
            "kernel": kernel,
            "kernel_params": {k: v for k, v in (kernel_params or {}).items()},
            "use_track": bool(use_track),
            "heading_from_track": bool(heading_from_track),
            "heading_corrections_deg": samples.info.get("heading_corrections_deg", {}),
            "seed": int(seed),
        },
        "seed": int(seed),
        "graph": {"nodes": graph.n_nodes, "edges": graph.n_edges, "length_m": graph.total_length_m},
    }
    return FieldMap(
        floor=floor,
        origin_xy=origin,
        resolution_m=float(resolution_m),
        mean_ut=mean,
        var_ut2=var,
        coverage_m=coverage,
        free=free,
        graph=graph,
        earth_to_plan_rad=float(angle),
        meta=meta,
    )
