"""``lodemap sweep``: a grid or random search over settings x walks x
seeds, on this machine (joblib) or a Dask cluster; resumable."""

from __future__ import annotations

HELP = "run a grid or random search over settings x walks x seeds (joblib or Dask), resumable"

_EPILOG = """\
CONFIG.toml (paths relative to it):

  [sweep]
  mode = "tracking"        # tracking | global | no-field | dead-reckoning
  preset = "default"       # filter preset the settings change ("simulated" for simulator walks)
  search = "grid"          # grid | random (with samples = N)
  seeds = 2                # seeds per settings and walk
  seed = 0                 # root seed (runs get SeedSequence(seed).spawn(seeds))
  folds = 0                # K >= 2: cross-validate on the survey walks (needs site, floor,
                           # survey; each survey walk scored on a map built without its fold)
  [data]
  walks = ["sim/G/test"]
  map = "G.map"            # or site = ..., floor = ..., survey = [...] to build maps
  # split = "split.json"; use = "test"   # score one part of a split (maps: its survey part)
  [grid]
  n_particles = [500, 2000]
  field_temper = [0.1, 0.2]
  # map_resolution_m, map_kernel, map_n_basis (maps built once each, cached in OUT/maps),
  # noise_mag_ut, noise_heading_deg, noise_step_scale, any FilterSettings field;
  # the text "none" stands for None (e.g. bias_corr_updates = [5.0, "none"])
  [random]                 # with search = "random"
  n_particles = {low = 200, high = 5000, log = true, integer = true}

Each finished run is stored at once in OUT/runs/<key>.json; running the
same command again skips them (an interrupted sweep loses nothing
finished). Writes OUT/results.csv (one row per run), OUT/ranking.csv
(settings ranked with bootstrap 95 % intervals), OUT/sweep.json and
OUT/report.html.
"""


def add_arguments(parser):
    import argparse

    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = _EPILOG
    parser.add_argument("config", metavar="CONFIG.toml", help="sweep description (TOML)")
    parser.add_argument("--out", required=True, metavar="DIR", help="results folder (created; reused to resume)")
    parser.add_argument("--jobs", type=int, default=1, metavar="N",
                        help="parallel runs on this machine with joblib (default: 1; -1 = all cores)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="address of a running Dask scheduler (e.g. tcp://scheduler-host:8786): runs go to its "
                             "workers, which must see the same walk and map paths; --jobs is then ignored")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def run(args):
    from fingerprint.errors import ConfigError
    from mapping.sweep import load_sweep_config, run_sweep

    if args.jobs == 0 or args.jobs < -1:
        raise ConfigError(f"--jobs must be >= 1 or -1, got {args.jobs}")
    if args.scheduler:
        try:
            import dask.distributed  # noqa: F401
        except ImportError as err:
            raise ConfigError("--scheduler needs dask.distributed: pip install 'lodemap[cluster]'") from err
    cfg = load_sweep_config(args.config)
    res = run_sweep(cfg, args.out, jobs=args.jobs, scheduler=args.scheduler, progress=not args.no_progress)
    c = res["counts"]
    print(f"runs: {c['done']} done now, {c['skipped']} already stored, {c['total']} in the sweep")
    rk = res["ranking"]
    if rk:
        w = min(60, max(len(r["settings"]) for r in rk))
        label = f"mean {cfg.metric}"
        print(f"{'rank':>4}  {'settings':<{w}}  {'runs':>4}  {label:>{max(14, len(label))}}  {'95% CI':<16}  "
              "all checkpoints: median / p95 m")
        for r in rk:
            pooled = ("" if r["pooled_median_m"] is None else
                      f"{r['pooled_median_m']:.3f} / {r['pooled_p95_m']:.3f} ({r['checkpoints']})")
            print(f"{r['rank']:>4}  {r['settings'][:w]:<{w}}  {r['runs']:>4}  {r['mean']:>{max(14, len(label))}.3f}  "
                  f"{'[' + format(r['ci_low'], '.3f') + ', ' + format(r['ci_high'], '.3f') + ']':<16}  {pooled}")
    print(f"results: {res['paths']['results']}")
    print(f"report: {res['paths']['report']}")
    return 0
