"""``lodemap bench filter``: particle-filter speed.

Prints particle-updates per second (one update = move + heading and field
weights + resampling when due, for every particle) at several particle
counts, with and without the per-update estimate, and the real-time factor
(walk duration / time to localise it) of the default settings on one walk:
a demo walk given with ``--map``/``--log`` (e.g. from ``lodemap simulate``)
or, by default, a synthetic walk on a synthetic floor built here.

With ``--real SITE_DIR`` it measures accuracy instead: the filter with and
without the field on every floor of a real site (see
``mapping.benchmarks.filter_real``), e.g.
``lodemap bench filter --real ../shared/real_data/siteA``.
"""

from __future__ import annotations

import math
import time

import numpy as np

from ..commands import seed_arg

HELP = "particle-filter speed: particle-updates per second and real-time factor"


def add_arguments(parser):
    parser.add_argument("--particles", default="1000,10000,100000", metavar="N[,N...]",
                        help="particle counts to time (default 1000,10000,100000)")
    parser.add_argument("--updates", type=int, default=60, metavar="K", help="updates timed per count (default 60)")
    parser.add_argument("--map", dest="map_path", default=None, metavar="FLOOR.map",
                        help="map for the real-time factor (with --log)")
    parser.add_argument("--log", default=None, metavar="LOG", help="walk log for the real-time factor (with --map)")
    parser.add_argument("--start", default=None, metavar="X,Y[,SIGMA]",
                        help="start for --log (default: global mode)")
    parser.add_argument("--seed", type=seed_arg, default=0, metavar="N", help="random seed (default 0)")
    parser.add_argument("--real", default=None, metavar="SITE_DIR",
                        help="instead of the speed runs: field vs no-field accuracy on the real floors of "
                             "SITE_DIR (site.json, <floor>/split.json; maps built from the survey split and "
                             "cached, test walks started at their first checkpoint); minutes per floor")
    parser.add_argument("--real-seeds", default="0,1,2", metavar="S[,S...]",
                        help="filter seeds for --real (default 0,1,2)")
    parser.add_argument("--real-cache", default=None, metavar="DIR",
                        help="where --real keeps its maps (default SITE_DIR/.lodemap_cache)")
    parser.add_argument("--real-floors", default=None, metavar="F[,F...]", help="floors for --real (default all)")
    parser.add_argument("--real-set", action="append", default=[], metavar="NAME=VALUE",
                        help="for --real: change a filter setting of the field variant (repeatable; e.g. "
                             "field_temper=0.1, feature_set=full; a FilterSettings field name); the no-field "
                             "variant is unchanged")


def synthetic_floor(*, nx=61, ny=41, spacing_m=1.0, seed=0):
    """A lattice floor (nx * ny nodes, 4-connected) with a smooth synthetic
    field (background plus Gaussian bumps) on a 0.25 m raster."""
    from fingerprint import FieldMap, FloorGraph

    rng = np.random.default_rng(seed)
    xs, ys = np.meshgrid(np.arange(nx) * spacing_m, np.arange(ny) * spacing_m)
    nodes = np.column_stack([xs.ravel(), ys.ravel()])
    idx = np.arange(nx * ny).reshape(ny, nx)
    edges = np.vstack([np.column_stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()]),
                       np.column_stack([idx[:-1].ravel(), idx[1:].ravel()])])
    graph = FloorGraph.from_arrays(nodes, edges)
    res = 0.25
    gx = np.arange(-1.0, (nx - 1) * spacing_m + 1.0 + 1e-9, res)
    gy = np.arange(-1.0, (ny - 1) * spacing_m + 1.0 + 1e-9, res)
    mx, my = np.meshgrid(gx, gy)
    centres = rng.uniform([gx[0], gy[0]], [gx[-1], gy[-1]], size=(120, 2))
    amp = rng.normal(0, 10, size=(120, 3))
    width = rng.uniform(1.5, 4.0, size=120)
    field = np.tile(np.array([12.0, 18.0, -42.0]), mx.shape + (1,))
    for c, a, w in zip(centres, amp, width):  # setup only, 120 bumps
        field += np.exp(-0.5 * ((mx - c[0]) ** 2 + (my - c[1]) ** 2) / w**2)[..., None] * a
    shape = mx.shape
    fmap = FieldMap("bench", np.array([gx[0], gy[0]]), res, field, np.full(shape + (3,), 0.5), np.zeros(shape),
                    np.ones(shape, bool), graph)
    return fmap


def synthetic_walk(fmap, *, seed=0, legs=60, rate_hz=50.0, speed_mps=1.2, step_m=0.7):
    """A walk along the floor's graph edges (a ProcessedWalk with steps)."""
    from fingerprint.records import Motion, ProcessedWalk

    g = fmap.graph
    rng = np.random.default_rng(seed)
    adj = [[] for _ in range(g.n_nodes)]
    for u, v in g.edges:
        adj[u].append(v)
        adj[v].append(u)
    node, prev = int(rng.integers(g.n_nodes)), -1
    pts = [g.nodes_xy[node]]
    for _ in range(legs):  # setup only
        opts = [v for v in adj[node] if v != prev] or adj[node]
        prev, node = node, opts[int(rng.integers(len(opts)))]
        pts.append(g.nodes_xy[node])
    pts = np.array(pts)
    cum = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(pts, axis=0).T))])
    t = np.arange(0.0, cum[-1] / speed_mps, 1.0 / rate_hz)
    s = t * speed_mps
    xy = np.column_stack([np.interp(s, cum, pts[:, 0]), np.interp(s, cum, pts[:, 1])])
    mean, _, _ = fmap.lookup(xy)
    ts = np.arange(step_m / speed_mps, t[-1], step_m / speed_mps)
    pos = np.column_stack([np.interp(ts, t, xy[:, 0]), np.interp(ts, t, xy[:, 1])])
    d = np.diff(np.vstack([xy[:1], pos]), axis=0)
    head_step = np.arctan2(d[:, 1], d[:, 0])
    k = np.clip(np.searchsorted(ts, t), 0, len(ts) - 1)
    heading = head_step[k]
    mag = mean + 0.5 * rng.standard_normal(mean.shape)
    motion = Motion(ts, np.hypot(d[:, 0], d[:, 1]), head_step, "steps")
    return ProcessedWalk(t, np.tile([0.0, 0.0, 0.0, 1.0], (t.size, 1)), mag, heading, 0.5, motion), xy[0]


def time_updates(fmap, n, *, updates, seed=0, with_estimate=False):
    """Seconds per update at ``n`` particles (tracking from a random start)."""
    import dataclasses

    from fingerprint.localise import FilterSettings, Localiser
    from fingerprint.pf.loop import filter_step
    from fingerprint.pf.measurement import window_observation

    rng = np.random.default_rng(seed)
    walk, start = synthetic_walk(fmap, seed=seed, legs=max(20, updates))
    s = dataclasses.replace(FilterSettings(), n_particles=n)
    loc = Localiser(fmap, settings=s, start_xy=start, start_sigma_m=1.0, rng=rng, sensor_noise_ut=0.5)
    m = walk.motion
    k = min(updates, m.n)
    cuts = np.searchsorted(walk.t, m.t[:k])
    obs = [window_observation(walk.mag_earth_ut[a:b], walk.heading_rad[a:b])
           for a, b in zip(np.concatenate([[0], cuts[:-1]]), cuts)]
    state, tracker = loc.state, loc._tracker
    t0 = time.perf_counter()
    for i in range(k):
        state, tracker, _ = filter_step(state, m.length_m[i], m.heading_rad[i], obs[i], loc._ctx, loc.rng, tracker)
        if with_estimate:
            loc.state = state
            loc._estimate(m.t[i])
    return (time.perf_counter() - t0) / k


def run(args):
    from fingerprint.errors import ConfigError
    from fingerprint.localise import FilterSettings, localise

    if getattr(args, "real", None):
        from ..commands.locate import parse_set_options, with_changes
        from .filter_real import run_real

        try:
            seeds = tuple(int(x) for x in str(args.real_seeds).split(",") if x.strip())
        except ValueError:
            raise ConfigError(f"--real-seeds: expected comma-separated integers, got {args.real_seeds!r}") from None
        floors = None if not args.real_floors else [f.strip() for f in args.real_floors.split(",") if f.strip()]
        changes = parse_set_options(args.real_set, option="--real-set")
        with_changes(FilterSettings(), changes, option="--real-set")  # names and values checked up front
        label = "field" + "".join(f", {k}={v}" for k, v in changes.items())
        variants = {"no-field": {"use_field": False}, label: changes}
        run_real(args.real, floors=floors, seeds=seeds or (0,), cache_dir=args.real_cache, variants=variants)
        return 0
    try:
        counts = [int(x) for x in str(args.particles).split(",") if x.strip()]
    except ValueError:
        raise ConfigError(f"--particles: expected comma-separated integers, got {args.particles!r}") from None
    if not counts or min(counts) < 1:
        raise ConfigError(f"--particles: expected integers >= 1, got {args.particles!r}")
    fmap = synthetic_floor(seed=args.seed)
    g = fmap.graph
    print(f"synthetic floor: {g.n_nodes} nodes, {g.n_edges} edges, raster {fmap.shape[1]} x {fmap.shape[0]}; "
          f"default settings (feature set {FilterSettings().feature_set}), {args.updates} updates per count")
    print(f"{'particles':>10} {'ms/update':>10} {'particle-updates/s':>19} {'with estimate':>14}")
    for n in counts:
        time_updates(fmap, n, updates=3, seed=args.seed)  # warm-up
        dt = time_updates(fmap, n, updates=args.updates, seed=args.seed)
        dte = time_updates(fmap, n, updates=args.updates, seed=args.seed, with_estimate=True)
        print(f"{n:>10d} {1e3 * dt:>10.2f} {n / dt:>19.3g} {n / dte:>14.3g}")
    if args.map_path and args.log:
        from fingerprint.logio import read_walk_log
        from fingerprint.mapfile import load_map
        from fingerprint.pipeline import process_walk

        from ..commands.locate import parse_start
        from ..evaluate import map_vertical_ut

        dmap = load_map(args.map_path)
        walk = process_walk(read_walk_log(args.log), expected_up_ut=map_vertical_ut(dmap))
        start, sigma = (None, 1.0) if args.start is None else parse_start(args.start)
        label = f"walk {args.log}"
    else:
        dmap = fmap
        walk, start = synthetic_walk(fmap, seed=args.seed + 1, legs=60)
        sigma = 1.0
        label = "synthetic walk (give --map and --log for a demo walk)"
    t0 = time.perf_counter()
    tr = localise(walk, dmap, start_xy=start, start_sigma_m=sigma, rng=args.seed)
    dt = time.perf_counter() - t0
    dur = float(walk.t[-1] - walk.t[0])
    mode = "global" if start is None else "tracking"
    print(f"real-time factor, default settings, {mode} mode, {label}: {dur:.1f} s of walk, "
          f"{tr.t.size} updates in {dt:.2f} s -> {dur / dt if dt > 0 else math.inf:.0f} x real time")
    return 0
