"""``lodemap build-map``: build a floor's field map from survey walks."""

from __future__ import annotations

import sys
import time

from fingerprint.errors import ConfigError

from . import seed_arg

HELP = "build a floor's field map from survey walks"


def add_arguments(parser):
    parser.description = (
        "Build the field map of one floor from survey walks: each WALK is a *.log.csv[.gz] with its "
        "*.checkpoints.csv (and optionally *.track.csv) beside it, or a folder of them. The map "
        "(mean and variance of b_x, b_y, b_up in the plan frame on a raster, coverage, floor graph) "
        "is written to one checksummed file; with --quality a JSON summary and PNG beside it."
    )
    parser.add_argument("walks", nargs="+", metavar="WALK", help="survey walk log or folder of logs")
    parser.add_argument("--site", required=True, metavar="SITE.json", help="site description (README, 'Input files')")
    parser.add_argument("--floor", required=True, metavar="F", help="floor label in the site file")
    parser.add_argument("--out", required=True, metavar="FLOOR.map", help="output map file (written atomically)")
    parser.add_argument("--kernel", default="curl-free", metavar="NAME",
                        help="map model: curl-free (default), per-component, nearest, constant")
    parser.add_argument("--resolution", type=float, default=0.25, metavar="M", help="raster cell size in metres (default 0.25)")
    parser.add_argument("--spacing", type=float, default=0.25, metavar="M",
                        help="walk distance averaged into one survey sample, metres (default 0.25)")
    parser.add_argument("--n-basis", type=int, default=None, metavar="N",
                        help="reduced-rank basis functions per block for the GP kernels (default 1024)")
    parser.add_argument("--graph", default=None, metavar="GRAPH.geojson",
                        help="hand-drawn floor graph instead of the one built from the plan: GeoJSON LineStrings "
                             "with properties.kind 'path', plan metres (long lines are split every metre)")
    parser.add_argument("--tracks", choices=("use", "ignore"), default="use",
                        help="take survey positions from *.track.csv beside a log when there is one (default use)")
    parser.add_argument("--split", default=None, metavar="split.json", help="keep only the walks of one part of a split file")
    parser.add_argument("--use", choices=("survey", "test"), default="survey", help="which part of --split (default survey)")
    parser.add_argument("--seed", type=seed_arg, default=0, metavar="N", help="seed recorded in the map (default 0)")
    parser.add_argument("--quality", action="store_true", help="also write FLOOR.quality.json and FLOOR.quality.png")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")


def run(args):
    from fingerprint._atomic import check_writable
    from fingerprint.mapfile import save_map

    from ..mapbuild import build_floor_map
    from ..site import load_site
    from ..walkset import find_walks

    if args.resolution <= 0:
        raise ConfigError(f"--resolution must be > 0, got {args.resolution}")
    check_writable(args.out, inputs=[args.site, args.graph, args.split, *args.walks])  # before minutes of fitting
    site = load_site(args.site)
    walks = find_walks(args.walks, split=args.split, part=args.use if args.split else None)
    params = {}
    if args.n_basis is not None:
        if args.kernel not in ("curl-free", "per-component"):
            raise ConfigError("--n-basis applies to the curl-free and per-component kernels only")
        params["n_basis"] = int(args.n_basis)
    graph = None
    if args.graph is not None:
        from ..graphbuild import load_graph_geojson

        graph = load_graph_geojson(args.graph)
    t0 = time.perf_counter()
    fmap = build_floor_map(
        site,
        args.floor,
        walks,
        resolution_m=args.resolution,
        kernel=args.kernel,
        seed=args.seed,
        progress=not args.no_progress,
        use_track=args.tracks == "use",
        spacing_m=args.spacing,
        kernel_params=params or None,
        graph=graph,
        graph_source=None if args.graph is None else str(args.graph),
    )
    fmap.meta["build"]["command"] = "build-map"
    fmap.meta["build"]["graph"] = "built from the plan" if args.graph is None else str(args.graph)
    fmap.meta["build"]["time_s"] = round(time.perf_counter() - t0, 3)
    save_map(args.out, fmap)
    model = fmap.meta.get("model", {})
    hyper = model.get("hyperparameters", {})
    print(
        f"map of floor {fmap.floor}: {len(fmap.meta['survey_walks'])} survey walks, {fmap.meta['n_samples']} samples, "
        f"kernel {fmap.meta['kernel']}, raster {fmap.shape[1]} x {fmap.shape[0]} at {fmap.resolution_m} m"
    )
    if hyper:
        from .map_info import hyperparameter_lines

        print("hyperparameters:")
        for line in hyperparameter_lines(model):
            print(f"  {line}")
    cal = model.get("calibration", {})
    if cal:
        print("held-out walks (group k-fold): RMSE b_x,b_y,b_up = "
              + ", ".join(f"{v:.2f}" for v in cal["heldout_rmse_ut"]) + " µT; between-walk sd = "
              + ", ".join(f"{v:.2f}" for v in model.get("between_walk_sd_ut", [])) + " µT")
    skipped = (model.get("optimisation") or {}).get("refine_skipped")
    if skipped:
        print(f"note: the fitted length scale ends on the shortest the basis resolves; a refit on "
              f"{skipped['tiles']} finer tiles would need about {skipped['estimated_gb']:g} GB (budget "
              f"{skipped['budget_gb']:g} GB), so the map keeps the coarser basis", file=sys.stderr)
    other = fmap.meta.get("walks_marked_other_floor", [])
    if other:
        print(f"lodemap build-map: warning: {len(other)} survey walks are marked as recorded on another floor than {fmap.floor}: "
              + ", ".join(other[:10]) + (" ..." if len(other) > 10 else ""), file=sys.stderr)
    for c in fmap.meta.get("checkpoint_checks", []):
        parts = []
        if c["outside_free_space"]:
            far = ", ".join(f"line {ln} ({d:g} m)" for ln, d in c["outside_free_space"][:5])
            parts.append(f"{len(c['outside_free_space'])} checkpoint(s) outside the plan's free space: {far}"
                         + (" ..." if len(c["outside_free_space"]) > 5 else ""))
        if c["outside_log_time"]:
            parts.append(f"{len(c['outside_log_time'])} checkpoint(s) outside the log's time span: lines "
                         + ", ".join(str(v) for v in c["outside_log_time"][:5]))
        print(f"lodemap build-map: warning: {c['file']}: " + "; ".join(parts), file=sys.stderr)
    for o in fmap.meta.get("offset_outliers", []):
        print(f"lodemap build-map: warning: survey walk {o['walk']}: device-frame offset "
              + ", ".join(f"{v:+.1f}" for v in o["offset_ut"]) + " µT (forward, left, up) differs from the other walks' by "
              + ", ".join(f"{v:+.1f}" for v in o["deviation_ut"]) + " µT, beyond "
              + ", ".join(f"{v:.1f}" for v in o["limit_ut"]) + " µT; check its calibration or leave it out",
              file=sys.stderr)
    print(f"earth_to_plan = {fmap.meta['frames']['alignment'].get('earth_to_plan_deg', 0.0):.2f} deg "
          f"({fmap.meta['frames']['alignment'].get('source')})")
    print(f"wrote {args.out} ({fmap.meta['build']['time_s']:.1f} s)")
    if args.quality:
        from pathlib import Path

        from fingerprint._atomic import write_json_atomic

        from ..quality import map_quality, quality_image

        q = map_quality(fmap)
        stem = Path(args.out).with_suffix("")
        write_json_atomic(f"{stem}.quality.json", q)
        quality_image(fmap, f"{stem}.quality.png", quality=q)
        print(f"wrote {stem}.quality.json and {stem}.quality.png; "
              f"{len(q['stretches'])} graph stretches need another survey walk")
    return 0

