"""The ``lodemap`` command line.

Each sub-command lives in its own module under ``mapping/commands`` and
exposes ``HELP`` (one line), ``add_arguments(parser)`` and ``run(args)``
(returns the exit status). Modules are imported only when their command
runs, so ``lodemap --help`` stays fast.

Errors raised on purpose (``fingerprint.errors.LodemapError``) and bad
files end the program with one line on stderr and exit status 2.
"""

from __future__ import annotations

import argparse
import importlib
import sys

__all__ = ["main", "COMMANDS"]

#: command name -> (module under mapping.commands, one-line help)
COMMANDS = {
    "inspect": ("inspect_log", "summarise a walk log: duration, rates, gaps, |B|, steps, distance, calibration verdict"),
    "calibrate": ("calibrate", "fit hard- and soft-iron magnetometer calibration from a log, write calibration.json"),
    "simulate": ("simulate", "generate survey and test walks with exact truth in a site (e.g. demo_building/)"),
    "build-map": ("build_map", "build a floor's field map from survey walks"),
    "map-info": ("map_info", "print what a map file holds: floor, size, kernel, survey walks, quality"),
    "map-image": ("map_image", "draw a map file (field, uncertainty, coverage, graph) to a PNG"),
    "map-query": ("map_query", "mapped field mean and sd at the points of a CSV with columns x,y"),
    "locate": ("locate", "localise a walk log on a map with the particle filter, write its track"),
    "evaluate": ("evaluate", "score localisation against checkpoints over many walks, with baselines and a report"),
    "sweep": ("sweep", "run a grid or random search over settings x walks x seeds (joblib or Dask), resumable"),
    "demo": ("demo", "run the whole chain on the invented demo building and write a report"),
    "bench": ("bench", "benchmarks: sensors, map, filter"),
}


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line (``lodemap COMMAND:
    error: ...``, exit status 2) like every other bad input; ``--help``
    shows the usage."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (--help shows the options)\n")


def _build_parser():
    parser = _Parser(
        prog="lodemap",
        description="Indoor magnetic-field fingerprint mapping and localisation.",
    )
    parser.add_argument("--version", action="version", version=_version())
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    return parser, sub


def _version():
    try:
        from importlib.metadata import version

        return f"lodemap {version('lodemap')}"
    except Exception:  # pragma: no cover - not installed
        return "lodemap (not installed)"


def _load(name):
    module, _ = COMMANDS[name]
    return importlib.import_module(f"mapping.commands.{module}")


def _show_warnings_as_lines(command):
    """Our warnings (``LodemapWarning``) as one line each on stderr,
    ``lodemap COMMAND: warning: ...``; others as Python shows them."""
    import warnings

    from fingerprint.errors import LodemapWarning

    shown = warnings.showwarning  # restored by main()

    def show(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, LodemapWarning):
            print(f"lodemap {command}: warning: {message}", file=sys.stderr if file is None else file)
        else:
            shown(message, category, filename, lineno, file, line)

    warnings.showwarning = show


def _one_line(message):
    """An error message on one line (a library's message may hold newlines)."""
    import re

    return re.sub(r"\s*[\r\n]+\s*", " ", str(message)).strip()


class _Terminated(BaseException):
    """SIGTERM (``kill``, a job scheduler's time limit) as an exception, so
    that a file being written is removed, not left as a temporary beside
    its target (``fingerprint._atomic``)."""


def _terminate_as_interrupt():
    """Raise :class:`_Terminated` on SIGTERM while a command runs (main
    thread only); returns the previous handler, or None if not installed."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return None

    def handler(signum, frame):
        raise _Terminated()

    return signal.signal(signal.SIGTERM, handler)


def main(argv=None):
    """Entry point of the ``lodemap`` console script."""
    from fingerprint.errors import LodemapError

    argv = sys.argv[1:] if argv is None else list(argv)
    parser, sub = _build_parser()
    # Only the chosen command's module is imported; the others get a stub
    # parser with their one-line help so that --help lists them all.
    chosen = next((a for a in argv if not a.startswith("-")), None)
    for name, (_, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if name == chosen:
            _load(name).add_arguments(p)
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    import warnings

    from fingerprint import _atomic

    saved = warnings.showwarning
    _show_warnings_as_lines(args.command)
    saved_term = _terminate_as_interrupt()
    _atomic._MADE.clear()
    failed = True  # a failed command leaves no empty output folder behind
    try:
        status = int(_load(args.command).run(args) or 0)
        failed = status != 0
        return status
    except LodemapError as err:
        print(f"lodemap {args.command}: error: {_one_line(err)}", file=sys.stderr)
        return 2
    except MemoryError:
        print(f"lodemap {args.command}: error: out of memory: a setting asks for more than this machine holds "
              "(particles, image size, sample rate, map resolution?)", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # the reader of our output went away (`lodemap ... | head`): not an error
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except OSError as err:
        # the system refused a file (missing, read-only, a folder for a
        # file, a full disk): not a bug, one line like any bad input
        where = f": {err.filename}" if err.filename else ""
        print(f"lodemap {args.command}: error: {_one_line(err.strerror or err)}{where}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"lodemap {args.command}: interrupted", file=sys.stderr)
        return 130
    except _Terminated:
        print(f"lodemap {args.command}: terminated", file=sys.stderr)
        return 143
    finally:
        warnings.showwarning = saved  # main() called from Python leaves no hook behind
        if saved_term is not None:
            import signal

            signal.signal(signal.SIGTERM, saved_term)
        if failed:
            _atomic.remove_empty_made()
        else:
            _atomic._MADE.clear()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
