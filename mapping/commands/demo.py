"""``lodemap demo``: the whole chain on the invented demo building."""

from __future__ import annotations

from . import seed_arg

HELP = "run the whole chain on the invented demo building and write a report"

_EPILOG = """\
Simulates survey and test walks in demo_building/ (an invented site), builds
each floor's map from its survey walks, evaluates tracking, global and
dead-reckoning modes on the test walks, prints a summary table and the path
of the HTML report. A second run with the same --out and --seed reuses the
simulated walks.
"""


def add_arguments(parser):
    import argparse

    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = _EPILOG
    parser.add_argument("--out", default="lodemap-demo", metavar="DIR",
                        help="folder for walks, maps, evaluations and the report (default: ./lodemap-demo)")
    parser.add_argument("--quick", action="store_true",
                        help="fewer walks, a coarser map and fewer particles (a quick smoke run)")
    parser.add_argument("--seed", type=seed_arg, default=0, help="root seed of everything (default: 0)")
    parser.add_argument("--site", metavar="DIR", help="the demo building folder (default: the bundled demo_building/)")
    parser.add_argument("--jobs", type=int, default=2, metavar="N", help="walks evaluated in parallel (default: 2)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")


def run(args):
    import sys

    from mapping.demo import run_demo, summary_rows

    res = run_demo(args.out, quick=args.quick, seed=args.seed, site_dir=args.site, progress=not args.no_progress,
                   jobs=args.jobs, log=lambda m: print(m, file=sys.stderr))
    cols, rows = summary_rows(res.summaries)
    show = ["mode", "floors", "walks", "checkpoints", "median_error_m", "p95_error_m", "converged_fraction",
            "dead_reckoning_median_error_m", "no_field_median_error_m"]
    idx = [cols.index(c) for c in show]
    short = ["mode", "floors", "walks", "cps", "median m", "p95 m", "converged", "DR median m", "no-field median m"]
    table = [short] + [["-" if r[i] is None else str(r[i]) for i in idx] for r in rows]
    widths = [max(len(row[j]) for row in table) for j in range(len(short))]
    for k, row in enumerate(table):
        print("  ".join(c.rjust(w) if j > 1 else c.ljust(w) for j, (c, w) in enumerate(zip(row, widths))))
        if k == 0:
            print("  ".join("-" * w for w in widths))
    print(f"total time: {res.timings_s['total_s']:.1f} s")
    print(f"report: {res.report.resolve()}")
    return 0
