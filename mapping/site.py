"""The site description (``site.json``, README "Input files"): a name, the floors with their plan
files, and what is known of where the building is and how its plans are
turned against true north.

>>> import json, tempfile, pathlib
>>> d = pathlib.Path(tempfile.mkdtemp())
>>> _ = (d / "site.json").write_text(json.dumps({"name": "demo",
...     "floors": [{"floor": "G", "plan": "G/floor.plan.geojson"}]}))
>>> site = load_site(d / "site.json")
>>> site.name, list(site.floors), site.plan_rotation_deg is None
('demo', ['G'], True)
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

from fingerprint.errors import ConfigError, FormatError
from fingerprint.logio import read_text

__all__ = ["Site", "load_site", "read_json_file"]


@dataclass(frozen=True)
class Site:
    """What ``site.json`` says.

    Attributes
    ----------
    path : Path, the site file
    name : str
    floors : dict of floor label -> absolute Path of its ``*.plan.geojson``
    latitude_deg, longitude_deg : float or None, degrees (WGS84)
    date : datetime.date or None, when the survey was made (for the
        geomagnetic reference model)
    plan_rotation_deg : float or None, clockwise angle from true north to
        the plan's +y axis, degrees
    extra : dict, unknown top-level members, kept as read
    """

    path: Path
    name: str
    floors: dict
    latitude_deg: float | None = None
    longitude_deg: float | None = None
    date: _dt.date | None = None
    plan_rotation_deg: float | None = None
    extra: dict = field(default_factory=dict)

    @property
    def has_location(self) -> bool:
        """True when latitude, longitude and date are all known."""
        return self.latitude_deg is not None and self.longitude_deg is not None and self.date is not None

    def plan_path(self, floor) -> Path:
        """Absolute path of the plan of ``floor``; ConfigError listing the
        known floors otherwise."""
        try:
            return self.floors[str(floor)]
        except KeyError:
            raise ConfigError(
                f"site {self.name!r} has no floor {floor!r}; floors are: {', '.join(self.floors) or '(none)'}"
            ) from None


def read_json_file(path):
    """Parse a JSON file; a syntax error becomes a FormatError with the
    file, line and column (from :class:`json.JSONDecodeError`)."""
    path = Path(path)
    text = read_text(path)  # not UTF-8: FormatError with line and column
    try:
        return json.loads(text)
    except json.JSONDecodeError as err:
        raise FormatError(f"not valid JSON: {err.msg}", path=path, line=err.lineno, column=err.colno) from err


def _optional_number(doc, key, path, *, lo=None, hi=None):
    value = doc.get(key)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise FormatError(f"{key} must be a finite number or null, got {value!r}", path=path)
    value = float(value)
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        raise FormatError(f"{key} must be within [{lo}, {hi}], got {value}", path=path)
    return value


def load_site(path) -> Site:
    """Read and check a ``site.json``.

    Plan paths are resolved against the site file's folder. Plans are not
    opened here (see :func:`mapping.floorplan.load_floor_plan`).

    Raises
    ------
    FormatError
        Malformed JSON (with line and column), missing ``floors``, a floor
        entry without ``floor``/``plan``, a duplicate floor label, a bad
        number or date.
    """
    path = Path(path).resolve()
    doc = read_json_file(path)
    if not isinstance(doc, dict):
        raise FormatError(f"site file must hold a JSON object, got {type(doc).__name__}", path=path)
    floors_in = doc.get("floors")
    if not isinstance(floors_in, list) or not floors_in:
        raise FormatError("site file needs a non-empty list 'floors' of {floor, plan} objects", path=path)
    floors = {}
    for i, entry in enumerate(floors_in):
        if not isinstance(entry, dict) or not isinstance(entry.get("floor"), str) or not isinstance(entry.get("plan"), str):
            raise FormatError(
                f"floors[{i}] must be an object with string members 'floor' and 'plan', got {entry!r}", path=path
            )
        label = entry["floor"].strip()
        if not label:
            raise FormatError(f"floors[{i}] has an empty floor label", path=path)
        if label in floors:
            raise FormatError(f"floor {label!r} is listed twice (floors[{i}])", path=path)
        floors[label] = (path.parent / entry["plan"]).resolve()
    date = doc.get("date")
    if date is not None:
        if not isinstance(date, str):
            raise FormatError(f"date must be an ISO date string 'YYYY-MM-DD' or null, got {date!r}", path=path)
        try:
            # a calendar date, optionally with a time after "T" or a space (not used)
            if not re.fullmatch(r"\d{4}-\d{2}-\d{2}([T ].*)?", date.strip()):
                raise ValueError(date)
            date = _dt.date.fromisoformat(date.strip()[:10])
        except ValueError as err:
            raise FormatError(f"date must be an ISO date 'YYYY-MM-DD', got {date!r}", path=path) from err
    name = doc.get("name")
    if name is None:
        name = path.parent.name
    if not isinstance(name, str):
        raise FormatError(f"name must be a string, got {name!r}", path=path)
    known = {"name", "floors", "latitude_deg", "longitude_deg", "date", "plan_rotation_deg"}
    return Site(
        path=path,
        name=name,
        floors=floors,
        latitude_deg=_optional_number(doc, "latitude_deg", path, lo=-90.0, hi=90.0),
        longitude_deg=_optional_number(doc, "longitude_deg", path, lo=-180.0, hi=360.0),
        date=date,
        plan_rotation_deg=_optional_number(doc, "plan_rotation_deg", path, lo=-360.0, hi=360.0),
        extra={k: v for k, v in doc.items() if k not in known},
    )
