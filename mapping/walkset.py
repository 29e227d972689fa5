"""Finding walks: a WALK argument is a ``*.log.csv`` (or ``.log.csv.gz``)
file or a folder of them; the checkpoints and track files are found beside
each log by name (``walk_001.log.csv`` -> ``walk_001.checkpoints.csv``,
``walk_001.track.csv``, each optionally gzipped).

A ``split.json`` (``{"survey": [names], "test": [names]}``) picks the
survey or test walks of a folder.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

from fingerprint.errors import ConfigError, DataError, FormatError, LodemapWarning

from .site import read_json_file

__all__ = ["WalkFiles", "find_walks", "load_split", "select_walks", "walk_name"]

_LOG_SUFFIXES = (".log.csv", ".log.csv.gz")


@dataclass(frozen=True)
class WalkFiles:
    """The files of one walk.

    Attributes
    ----------
    name : str, the log's file name without ``.log.csv[.gz]``
    log : Path
    checkpoints : Path or None
    track : Path or None
    """

    name: str
    log: Path
    checkpoints: Path | None = None
    track: Path | None = None


def walk_name(path) -> str | None:
    """``walk_001`` for ``.../walk_001.log.csv[.gz]``; None for other files."""
    name = Path(path).name
    for suf in _LOG_SUFFIXES:
        if name.endswith(suf) and len(name) > len(suf):
            return name[: -len(suf)]
    return None


def _beside(log: Path, name: str, kind: str):
    for suffix in (f".{kind}.csv", f".{kind}.csv.gz"):
        cand = log.with_name(name + suffix)
        if cand.is_file():
            return cand
    return None


def _walk_files(log: Path) -> WalkFiles:
    name = walk_name(log)
    return WalkFiles(name=name, log=log, checkpoints=_beside(log, name, "checkpoints"), track=_beside(log, name, "track"))


def find_walks(paths, *, recursive=False, split=None, part=None) -> list:
    """Walks named by files and folders.

    Parameters
    ----------
    paths : path or sequence of paths; each a ``*.log.csv[.gz]`` file or a
        folder holding them
    recursive : bool, also look in sub-folders of folders
    split : dict from :func:`load_split`, path of a ``split.json``, or None
    part : "survey" or "test", which part of ``split`` to keep (needed when
        ``split`` is given)

    Returns
    -------
    list of WalkFiles, sorted by folder and name; a walk given twice is
    listed once

    Raises
    ------
    DataError
        A path that does not exist, a file that is not a walk log, a folder
        without logs, one walk stored twice in a folder (``.log.csv`` and
        ``.log.csv.gz``), two different logs with the same name (their split
        membership would be ambiguous) or no walk left after the split.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    found = {}
    for p in paths:
        p = Path(p)
        if p.is_dir():
            pattern = "**/*" if recursive else "*"
            logs = sorted(q for q in p.glob(pattern) if q.is_file() and walk_name(q))
            if not logs:
                raise DataError("no walk logs (*.log.csv or *.log.csv.gz) in folder", path=p)
        elif p.is_file():
            if not walk_name(p):
                raise DataError("not a walk log: expected a name ending in .log.csv or .log.csv.gz", path=p)
            logs = [p]
        else:
            raise DataError("no such file or folder", path=p)
        for log in logs:
            found[log.resolve()] = _walk_files(log.resolve())
    walks = sorted(found.values(), key=lambda w: (str(w.log.parent), w.name))
    for a, b in zip(walks, walks[1:]):
        if a.log.parent == b.log.parent and a.name == b.name:  # e.g. what `gzip -k` leaves
            raise DataError(f"walk {a.name!r} is stored twice in this folder, as {a.log.name} and {b.log.name}; "
                            "expected one log per walk (remove or move one)", path=a.log.parent)
    if split is not None:
        walks = select_walks(walks, split, part)
    return walks


def _bare_name(name):
    """A walk name as the split means it: a log file name is taken without
    its ``.log.csv`` / ``.log.csv.gz``."""
    name = name.strip()
    for suffix in (".log.csv.gz", ".log.csv"):
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return name


def load_split(path) -> dict:
    """Read a ``split.json``: ``{"survey": [names], "test": [names]}``.

    Returns
    -------
    dict(survey=list of str, test=list of str)
    """
    doc = read_json_file(path)
    if not isinstance(doc, dict):
        raise FormatError("a split file must hold a JSON object with lists 'survey' and 'test'", path=path)
    near = sorted(k for k in doc if str(k).strip().lower() in ("survey", "test") and k not in ("survey", "test"))
    if near or not ({"survey", "test"} & set(doc)):
        raise FormatError(f"a split file needs lists 'survey' and 'test' (lower case); got members "
                          f"{', '.join(map(repr, doc)) or 'none'}", path=path)
    out = {}
    for key in ("survey", "test"):
        names = doc.get(key, [])
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
            raise FormatError(f"split member {key!r} must be a list of walk names", path=path)
        out[key] = [_bare_name(n) for n in names]
    both = set(out["survey"]) & set(out["test"])
    if both:
        raise DataError(f"walks in both survey and test: {', '.join(sorted(both))}", path=path)
    return out


def select_walks(walks, split, part) -> list:
    """Keep the walks whose name is in ``split[part]``.

    Parameters
    ----------
    walks : list of WalkFiles
    split : dict from :func:`load_split` or a path to a split.json
    part : "survey" or "test"
    """
    if part not in ("survey", "test"):
        raise ConfigError(f"split part must be 'survey' or 'test', got {part!r}")
    split_path = None
    if not isinstance(split, dict):
        split_path = str(split)
        split = load_split(split)
    names = {}
    for w in walks:
        if w.name in names and names[w.name] != w.log:
            raise DataError(
                f"two logs named {w.name!r} ({names[w.name]} and {w.log}); a split by name would be ambiguous"
            )
        names[w.name] = w.log
    wanted = set(split[part])
    out = [w for w in walks if w.name in wanted]
    where = f"{split_path}: " if split_path else ""
    if not out:
        raise DataError(f"{where}no walk left after keeping the {part} part of the split ({len(wanted)} names, "
                        f"e.g. {', '.join(sorted(wanted)[:3]) or 'none'}; the walks given are named e.g. "
                        f"{', '.join(sorted(names)[:3]) or 'none'})")
    missing = sorted(wanted - set(names))
    if missing:
        warnings.warn(f"{where}{len(missing)} of the {len(wanted)} {part} walks of the split are not among the walks "
                      f"given: {', '.join(missing[:5])}{' ...' if len(missing) > 5 else ''}", LodemapWarning,
                      stacklevel=2)
    return out


def walk_floor(log, checkpoints=None):
    """The floor a walk says it was recorded on: the log's ``# floor``
    label, else the first non-empty ``floor`` of its checkpoints; None
    when neither says.

    Labels that disagree (a checkpoint against the log, or checkpoints
    among themselves) are worth a :class:`LodemapWarning` naming the
    checkpoints file and line: one walk is one floor. The log's label
    wins, then the first checkpoint's.
    """
    import numpy as np

    floor = log.floor
    cps = checkpoints
    if cps is None or cps.floor is None or not cps.n:
        return floor
    labels = np.array([str(v).strip() for v in cps.floor], dtype=object)
    given = np.flatnonzero(labels != "")
    if not given.size:
        return floor
    first = floor if floor is not None else labels[given[0]]
    other = given[labels[given] != first]
    if other.size:
        lines = cps.lines if cps.lines is not None else np.arange(cps.n) + 2
        i = int(other[0])
        if floor is not None:
            at = log.meta_lines.get("floor")
            said = f"{log.path or 'its log'}{f' line {at}' if at else ''} says {first!r}"
        else:
            said = f"line {int(lines[given[0]])} says {first!r}"
        warnings.warn(f"{cps.path or 'checkpoints'}: line {int(lines[i])} says floor {labels[i]!r}, {said}; "
                      f"{other.size} of {given.size} labelled checkpoints disagree, floor {first!r} is used",
                      LodemapWarning, stacklevel=2)
    return first
