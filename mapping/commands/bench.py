"""``lodemap bench TARGET``: benchmarks (speed and memory are measured here,
never in timed tests)."""

from __future__ import annotations

import importlib

HELP = "benchmarks: sensors, map, filter"

#: target -> module under mapping.benchmarks with ``add_arguments`` and ``run``
TARGETS = {
    "sensors": "sensors",
    "map": "map",
    "filter": "filter",
}


def add_arguments(parser):
    sub = parser.add_subparsers(dest="target", metavar="TARGET", required=True)
    for name, module in TARGETS.items():
        mod = importlib.import_module(f"mapping.benchmarks.{module}")
        p = sub.add_parser(name, help=mod.HELP, description=mod.HELP)
        mod.add_arguments(p)


def run(args):
    mod = importlib.import_module(f"mapping.benchmarks.{TARGETS[args.target]}")
    return mod.run(args)
