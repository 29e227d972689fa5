"""``lodemap evaluate``: score localisation against checkpoints over many
walks, with baselines, tables, plots and an HTML report."""

from __future__ import annotations

import json
import math
import sys

from . import seed_arg

HELP = "score localisation against checkpoints over many walks, with baselines and a report"

_EPILOG = """\
Writes into --out: summary.json (the headline figures), run.json (seed,
settings, map, walks), walks.csv (one row per walk), checkpoints.csv (one
row per checkpoint), error_cdf.png, error_distance.png, tracks*.png,
tracks/<walk>.track.csv and report.html (self-contained, opens offline).
Evaluating into the folder of an earlier run replaces its files; tracks
and track images of walks not in this run are removed.

Example:
  lodemap evaluate --map G.map sim/G/test --out eval-G --mode tracking --seed 1
  lodemap evaluate --map F1.map data/F1 --split data/F1/split.json --out eval-F1
"""


def add_arguments(parser):
    import argparse

    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = _EPILOG
    parser.add_argument("--map", required=True, metavar="FLOOR.map", help="the floor's map file (lodemap build-map)")
    parser.add_argument("walks", nargs="+", metavar="WALK",
                        help="walk logs (*.log.csv[.gz]) with *.checkpoints.csv beside them, or folders of them")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the results (created)")
    parser.add_argument("--mode", default="tracking", choices=["tracking", "global", "no-field", "dead-reckoning"],
                        help="method under test: filter started at the first checkpoint (tracking), filter with "
                             "no start (global), filter without the field (no-field), or dead reckoning alone "
                             "(default: tracking)")
    parser.add_argument("--split", metavar="SPLIT.json", help="keep only the walks of one part of this split file")
    parser.add_argument("--use", default="test", choices=["survey", "test"],
                        help="which part of --split to evaluate (default: test)")
    parser.add_argument("--seed", type=seed_arg, default=0, help="root random seed, recorded in run.json (default: 0)")
    parser.add_argument("--preset", default="default", metavar="NAME",
                        help="filter settings preset: 'default' (chosen on real phone walks) or 'simulated' "
                             "(simulator walks) (default: default)")
    parser.add_argument("--particles", type=int, metavar="N",
                        help="particles of the filter (tracking and global; default: the filter's own defaults)")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="change any filter setting of the preset (repeatable), e.g. --set bias_corr_updates=none; "
                             "`lodemap locate --help` names the often changed ones, an unknown NAME lists them all")
    parser.add_argument("--start-sigma", type=float, default=1.0, metavar="M",
                        help="spread of the start around the first checkpoint in metres (default: 1.0)")
    parser.add_argument("--baselines", default="dead-reckoning,no-field,dtw", metavar="LIST",
                        help="comma-separated baselines run on the same walks: dead-reckoning, no-field, dtw, "
                             "or 'none' (default: all three)")
    parser.add_argument("--skip-bad", action="store_true",
                        help="list walks whose files cannot be read as skipped instead of stopping")
    parser.add_argument("--jobs", type=int, default=1, metavar="N", help="walks evaluated in parallel (default: 1)")
    parser.add_argument("--json", action="store_true", help="print summary.json on stdout instead of the summary table")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def map_info(fmap, path=None):
    """Short JSON-able description of a map for reports."""
    meta = fmap.meta or {}
    info = {"floor": fmap.floor, "resolution_m": fmap.resolution_m,
            "earth_to_plan_deg": round(math.degrees(fmap.earth_to_plan_rad), 3)}
    if path is not None:
        info["path"] = str(path)
    for k in ("kernel", "plan_hash"):
        if k in meta:
            info[k] = meta[k] if isinstance(meta[k], (str, int, float)) else json.dumps(meta[k])[:80]
    sw = meta.get("survey_walks")
    if isinstance(sw, list):
        info["survey_walks"] = len(sw)
    return info


def parse_baselines(text):
    from fingerprint.errors import ConfigError
    from mapping.evaluate import METHODS

    if text.strip().lower() in ("", "none"):
        return ()
    names = tuple(n.strip() for n in text.split(",") if n.strip())
    bad = [n for n in names if n not in METHODS]
    if bad:
        raise ConfigError(f"--baselines: unknown {bad}; valid: dead-reckoning, no-field, dtw (or none)")
    return names


def run(args):
    from fingerprint._atomic import check_writable
    from fingerprint.errors import ConfigError
    from fingerprint.mapfile import load_map
    from mapping.evaluate import evaluate_walks, write_outputs
    from mapping.walkset import find_walks

    if args.particles is not None and args.particles < 1:
        raise ConfigError(f"--particles must be >= 1, got {args.particles}")
    if not (args.start_sigma > 0):
        raise ConfigError(f"--start-sigma must be > 0, got {args.start_sigma}")
    baselines = parse_baselines(args.baselines)
    check_writable(args.out, folder=True)  # before localising every walk, not after
    from fingerprint.localise import preset

    from .locate import parse_set_options, with_changes

    settings = with_changes(preset(args.preset), parse_set_options(args.set))
    fmap = load_map(args.map)
    walks = find_walks(args.walks, split=args.split, part=args.use if args.split else None)
    ev = evaluate_walks(fmap, walks, mode=args.mode, settings=settings, n_particles=args.particles, seed=args.seed,
                        baselines=baselines, start_sigma_m=args.start_sigma, jobs=args.jobs,
                        progress=not args.no_progress, map_info=map_info(fmap, args.map),
                        on_error="skip" if args.skip_bad else "raise")
    if not ev.walks:
        raise ConfigError("no walk could be scored: " + "; ".join(f"{n}: {r}" for n, r in ev.skipped))
    for name, reason in ev.skipped:  # also in run.json and the report
        print(f"lodemap evaluate: skipped {name}: {reason}", file=sys.stderr)
    paths = write_outputs(ev, fmap, args.out)
    if args.json:
        print(json.dumps(ev.summary, indent=2))
    else:
        print_summary(ev.summary, file=sys.stdout)
        print(f"report: {paths['report']}")
    return 0


def print_summary(summary, *, file):
    width = max(len(k) for k in summary)
    for k, v in summary.items():
        print(f"  {k:<{width}}  {'-' if v is None else v}", file=file)
