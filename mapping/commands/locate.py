"""``lodemap locate``: localise one walk log on a floor's map with the
particle filter and write the estimated track."""

from __future__ import annotations

import dataclasses
import json
import math
import re
import sys
import time

import numpy as np

from fingerprint.errors import ConfigError

from . import seed_arg

HELP = "localise a walk log on a map with the particle filter, write its track"

COLUMNS = ("t", "x", "y", "sigma_m", "confidence", "converged", "lost")


def add_arguments(parser):
    from fingerprint.pf.settings import FilterSettings

    parser.description = (
        "Localise a walk log on a floor's field map with the particle filter (steps or odometry "
        "moving particles along the floor graph, the live magnetic field weighing them). Writes a "
        "track CSV with columns " + ",".join(COLUMNS) + " (one row per filter update); the seed and "
        "settings are recorded in '#' comment lines at its top."
    )
    parser.add_argument("log", metavar="LOG", help="walk log (.log.csv or .log.csv.gz; README, 'Input files')")
    parser.add_argument("--map", dest="map_path", metavar="FLOOR.map", required=True,
                        help="field map of the floor the walk is on (written by 'lodemap build-map')")
    parser.add_argument("--start", metavar="X,Y[,SIGMA]", default=None,
                        help="known start in plan metres with an optional 1-sigma spread in metres "
                             "(default spread 1.0); leave out for global mode (start unknown, particles "
                             "over the whole floor)")
    parser.add_argument("--start-time", type=float, default=None, metavar="S",
                        help="time (s, log clock) at which the walker was at --start; samples and steps "
                             "before it are skipped (default: the start of the log)")
    parser.add_argument("--out", required=True, metavar="TRACK.csv", help="output track CSV (written atomically)")
    parser.add_argument("--geojson", default=None, metavar="TRACK.geojson",
                        help="also write the track as GeoJSON in plan metres: one LineString and one Point "
                             "per update with its sigma_m, confidence, converged and lost")
    parser.add_argument("--seed", type=seed_arg, default=0, metavar="N", help="random seed of the filter, recorded in the outputs (default 0)")
    parser.add_argument("--particles", type=int, default=None, metavar="N",
                        help=f"number of particles (default {FilterSettings().n_particles}, or "
                             f"{FilterSettings().n_particles_global} in global mode: the settings n_particles "
                             "and n_particles_global)")
    parser.add_argument("--no-field", action="store_true",
                        help="switch the field updates off: the same filter on steps and floor graph only")
    parser.add_argument("--preset", default="default", metavar="NAME",
                        help="starting settings: default (tuned on real phone walks) or simulated "
                             "(simulator walks: full field vector, Gaussian, temper 0.2); the options "
                             "below change it further")
    parser.add_argument("--features", default=None, metavar="NAME",
                        help="feature set: vertical+horizontal (default), full or total")
    parser.add_argument("--likelihood", default=None, metavar="NAME", help="student-t (default) or gaussian")
    parser.add_argument("--temper", type=float, default=None, metavar="TAU",
                        help=f"exponent on the field likelihood (default {FilterSettings().field_temper:g})")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="change any other filter setting (repeatable), e.g. --set heading_kappa=3 or --set "
                             "bias_corr_updates=none; often changed: n_particles, feature_set, likelihood, "
                             "field_temper, use_field, bias_corr_updates, recovery_chi2, heading_kappa, "
                             "ess_threshold; an unknown NAME lists them all")
    parser.add_argument("--calibration", default=None, metavar="calibration.json",
                        help="magnetometer calibration to apply (from 'lodemap calibrate')")
    parser.add_argument("--step-constant", type=float, default=None, metavar="K",
                        help="Weinberg step-length constant of the walker (handheld logs)")
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")


def parse_start(text):
    """``"X,Y"`` or ``"X,Y,SIGMA"`` -> ((x, y), sigma_m)."""
    parts = [p.strip() for p in str(text).split(",")]
    try:
        vals = [float(p) for p in parts]
    except ValueError:
        raise ConfigError(f"--start: expected X,Y or X,Y,SIGMA (numbers), got {text!r}") from None
    if len(vals) not in (2, 3) or not all(math.isfinite(v) for v in vals):
        raise ConfigError(f"--start: expected X,Y or X,Y,SIGMA (finite numbers), got {text!r}")
    sigma = vals[2] if len(vals) == 3 else 1.0
    if not sigma > 0:
        raise ConfigError(f"--start: SIGMA must be > 0, got {sigma}")
    return (vals[0], vals[1]), sigma


def _parse_value(text):
    low = text.strip().lower()
    if low in ("true", "yes", "on"):
        return True
    if low in ("false", "no", "off"):
        return False
    if low in ("none", "null"):
        return None
    for cast in (int, float):
        try:
            return cast(text)
        except ValueError:
            pass
    return text


def build_settings(args, *, global_mode):
    """FilterSettings from the command-line options."""
    from fingerprint.localise import preset

    changes = parse_set_options(args.set)
    source = {name: f"--set {name}" for name in changes}  # which option set what, for errors
    if args.particles is not None:
        if args.particles < 1:
            raise ConfigError(f"--particles must be >= 1, got {args.particles}")
        changes["n_particles_global" if global_mode else "n_particles"] = int(args.particles)
    if args.no_field:
        changes["use_field"] = False
    for option, name in (("features", "feature_set"), ("likelihood", "likelihood"), ("temper", "field_temper")):
        if getattr(args, option) is not None:
            changes[name] = getattr(args, option)
            source[name] = f"--{option}"
    return with_changes(preset(getattr(args, "preset", "default")), changes, sources=source)


def parse_set_options(items, *, option="--set"):
    """``NAME=VALUE`` items of the command-line ``option`` -> dict of
    FilterSettings changes (values: true/false, none/null, numbers, else
    text); unknown names list the valid ones."""
    from fingerprint.localise import FilterSettings

    valid = {f.name for f in dataclasses.fields(FilterSettings)}
    changes = {}
    for item in items:
        name, sep, value = str(item).partition("=")
        name = name.strip()
        if not sep or not name:
            raise ConfigError(f"{option}: expected NAME=VALUE, got {item!r}")
        if name not in valid:
            raise ConfigError(f"{option}: unknown filter setting {name!r}; valid: {sorted(valid)}")
        changes[name] = _parse_value(value)
    return changes


def with_changes(base, changes, *, option="--set", sources=None):
    """``base`` FilterSettings with ``changes`` (an integer given for a float
    setting becomes a float). A bad value is reported under the option that
    gave it: ``sources`` maps a setting name to it (default ``option NAME``)."""
    changes = dict(changes)
    for name, value in changes.items():
        if isinstance(getattr(base, name), float) and isinstance(value, int) and not isinstance(value, bool):
            changes[name] = float(value)
    try:
        return dataclasses.replace(base, **changes)
    except ConfigError as err:
        m = re.match(r"filter setting (\w+): (.*)", str(err))
        if m and m.group(1) in changes:
            where = (sources or {}).get(m.group(1), f"{option} {m.group(1)}")
            raise ConfigError(f"{where}: {m.group(2)}") from None
        raise


def track_csv_text(track, *, comments):
    """The track as CSV text with ``# key: value`` comment lines first."""
    lines = [f"# {k}: {v}" for k, v in comments.items()]
    lines.append(",".join(COLUMNS))
    ex = track.extra
    for i in range(track.t.shape[0]):
        lines.append(
            f"{track.t[i]:.3f},{track.xy[i, 0]:.4f},{track.xy[i, 1]:.4f},{ex['sigma_m'][i]:.4f},"
            f"{ex['confidence'][i]:.4f},{int(ex['converged'][i])},{int(ex['lost'][i])}"
        )
    return "\n".join(lines) + "\n"


def track_geojson(track, *, floor=None, properties=None):
    """GeoJSON FeatureCollection (plan metres) of a localised track."""
    coords = np.round(track.xy, 4).tolist()
    feats = [{"type": "Feature", "properties": {"kind": "track", **(properties or {})},
              "geometry": {"type": "LineString", "coordinates": coords}}]
    ex = track.extra
    for i, c in enumerate(coords):
        feats.append({
            "type": "Feature",
            "properties": {"kind": "estimate", "t": round(float(track.t[i]), 3),
                           "sigma_m": round(float(ex["sigma_m"][i]), 4),
                           "confidence": round(float(ex["confidence"][i]), 4),
                           "converged": bool(ex["converged"][i]), "lost": bool(ex["lost"][i])},
            "geometry": {"type": "Point", "coordinates": c},
        })
    out = {"type": "FeatureCollection", "features": feats}
    if floor is not None:
        out["plan"] = {"floor": floor, "units": "m"}
    return out


def run(args):
    from fingerprint._atomic import check_writable, write_json_atomic, write_text_atomic
    from fingerprint.localise import localise
    from fingerprint.logio import read_walk_log
    from fingerprint.mapfile import load_map
    from fingerprint.pipeline import process_walk

    start_xy, sigma = (None, 1.0) if args.start is None else parse_start(args.start)
    if args.start_time is not None and not math.isfinite(args.start_time):
        raise ConfigError(f"--start-time: expected a finite time in seconds, got {args.start_time:g}")
    settings = build_settings(args, global_mode=start_xy is None)
    for out in (args.out, args.geojson):
        if out is not None:
            check_writable(out, inputs=[args.map_path, args.log, args.calibration])
    fmap = load_map(args.map_path)
    log = read_walk_log(args.log)
    calibration = None
    if args.calibration is not None:
        from fingerprint.calibration import Calibration

        calibration = Calibration.from_json(args.calibration)  # FormatError with line and column
    if log.floor is not None and log.floor != fmap.floor:
        print(f"lodemap locate: warning: {args.log} is marked as recorded on floor {log.floor}, the map is of floor {fmap.floor}",
              file=sys.stderr)
    if start_xy is not None:
        _, _, dist = fmap.graph.project(np.asarray(start_xy, dtype=float).reshape(1, 2))
        if dist[0] > max(5.0, 3.0 * sigma):
            x0, y0 = fmap.graph.nodes_xy.min(axis=0)
            x1, y1 = fmap.graph.nodes_xy.max(axis=0)
            raise ConfigError(
                f"--start {start_xy[0]:g},{start_xy[1]:g} is {dist[0]:.1f} m from the floor graph of map "
                f"{args.map_path} (its nodes span x {x0:.1f}..{x1:.1f}, y {y0:.1f}..{y1:.1f} m); expected a "
                "point on the floor in plan metres"
            )
    from ..evaluate import map_vertical_ut

    # a robot's planar self-calibration takes the offset along z from the map
    walk = process_walk(log, calibration=calibration, step_constant=args.step_constant,
                        expected_up_ut=map_vertical_ut(fmap))
    if args.start_time is not None and walk.motion.n and not np.any(walk.motion.t > args.start_time):
        raise ConfigError(f"--start-time {args.start_time:g} s is after the last step of {args.log} "
                          f"(at {float(walk.motion.t[-1]):.1f} s): nothing left to localise")
    t0 = time.perf_counter()
    track = localise(walk, fmap, settings=settings, start_xy=start_xy, start_sigma_m=sigma,
                     start_time_s=args.start_time, rng=np.random.default_rng(args.seed))
    elapsed = time.perf_counter() - t0
    comments = {
        "seed": args.seed,
        "mode": "global" if start_xy is None else "tracking",
        "start": "none" if start_xy is None else f"{start_xy[0]},{start_xy[1]},{sigma}",
        "map": args.map_path,
        "log": args.log,
        "floor": fmap.floor,
        "settings": json.dumps(settings.to_dict(), sort_keys=True),
    }
    write_text_atomic(args.out, track_csv_text(track, comments=comments))
    if args.geojson:
        write_json_atomic(args.geojson, track_geojson(track, floor=fmap.floor,
                                                      properties={"seed": args.seed, "log": args.log}))
    if not args.quiet:
        n = track.t.shape[0]
        conv = float(np.mean(track.extra["converged"])) if n else 0.0
        dur = walk.t[-1] - walk.t[0] if walk.n > 1 else 0.0
        rtf = dur / elapsed if elapsed > 0 else math.inf
        print(f"{args.out}: {n} updates, converged {100 * conv:.0f} % of them, "
              f"final sigma {track.extra['sigma_m'][-1] if n else float('nan'):.2f} m, "
              f"lost flagged {int(np.sum(track.extra['lost']))} times, real-time factor {rtf:.0f} (seed {args.seed})")
    return 0
