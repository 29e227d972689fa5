"""Floor plans (README "Input files"): GeoJSON in plan metres to shapely free space.

Free space is ``union(walkable) - union(obstacle)``. Invalid polygons are
repaired with :func:`shapely.make_valid` when the repair is unambiguous (the
"linework" and "structure" repair methods agree on the area), else the
plan is rejected naming the file and the feature index.

Point tests are vectorised: the free-space geometry is prepared once and
queried with :func:`shapely.contains_xy`.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import shapely

from fingerprint.errors import DataError, FormatError

from .site import read_json_file

__all__ = ["FloorPlan", "load_floor_plan", "plan_from_geojson", "check_points", "feature_label", "KINDS"]

#: Feature kinds a plan may hold.
KINDS = ("walkable", "obstacle")
_POLYGONAL = ("Polygon", "MultiPolygon")
#: Relative area difference below which two repairs are taken to agree.
_REPAIR_RTOL = 1e-6


def _polygonal_part(geom):
    """The polygons of a (possibly mixed) geometry, as one geometry."""
    parts = shapely.get_parts(geom)
    polys = [p for p in parts if shapely.get_type_id(p) in (3, 6)]
    if not polys:
        return shapely.Polygon()
    return shapely.union_all(polys)


@dataclass(frozen=True, eq=False)
class FloorPlan:
    """One floor's plan as shapely geometry.

    Attributes
    ----------
    floor : str or None, from the collection's ``plan.floor`` member
    free : shapely (Multi)Polygon, metres: walkable minus obstacles
    walkable : shapely (Multi)Polygon, union of the walkable features
    obstacles : shapely geometry, union of the obstacle features
    n_obstacles : int, number of obstacle features
    path : str or None
    repaired : list of int, indices of features that were repaired
    """

    floor: str | None
    free: object
    walkable: object
    obstacles: object
    n_obstacles: int = 0
    path: str | None = None
    repaired: list = field(default_factory=list)

    def __post_init__(self):
        shapely.prepare(self.free)

    @property
    def bounds(self):
        """(xmin, ymin, xmax, ymax) of the walkable area, metres."""
        return tuple(float(v) for v in self.walkable.bounds)

    @property
    def plan_hash(self) -> str:
        """``sha256:<hex>`` of the normalised free-space geometry (WKB), so
        that the same plan gives the same hash whatever the file layout."""
        wkb = shapely.to_wkb(shapely.normalize(self.free), output_dimension=2, byte_order=1)
        return "sha256:" + hashlib.sha256(wkb).hexdigest()

    def contains(self, xy):
        """Whether each point is inside free space.

        Parameters
        ----------
        xy : (N, 2) float, metres

        Returns
        -------
        (N,) bool (points on the boundary count as outside)
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        return shapely.contains_xy(self.free, xy[:, 0], xy[:, 1])

    def distance_to_free(self, xy):
        """Distance of each point to free space, metres (0 inside).

        Parameters
        ----------
        xy : (N, 2) float, metres

        Returns
        -------
        (N,) float
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        return shapely.distance(self.free, shapely.points(xy))

    def nearest_free(self, xy, *, inset_m=0.05):
        """Each point moved to the nearest point of free space, pulled a
        further ``inset_m`` inside when it had to move.

        Parameters
        ----------
        xy : (N, 2) float, metres

        Returns
        -------
        (N, 2) float, metres; points already inside are returned unchanged
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2).copy()
        out = ~self.contains(xy)
        if not out.any():
            return xy
        target = self.free
        if inset_m > 0:
            shrunk = shapely.buffer(self.free, -inset_m)
            if not shrunk.is_empty:
                target = shrunk
        pts = shapely.points(xy[out])
        lines = shapely.shortest_line(pts, target)
        xy[out] = shapely.get_coordinates(lines).reshape(-1, 2, 2)[:, 1]
        return xy

    @property
    def free_area_m2(self) -> float:
        return float(self.free.area)


def feature_label(index):
    """How messages name the ``index``-th feature (0-based): counted from 1
    as people count, with its JSON index."""
    return f"feature {index + 1} (features[{index}])"


def _feature_geometry(feat, index, path):
    if not isinstance(feat, dict):
        raise FormatError(f"{feature_label(index)} must be a GeoJSON Feature object, got {type(feat).__name__}",
                          path=path)
    props = feat.get("properties") or {}
    if not isinstance(props, dict):
        raise FormatError(f"{feature_label(index)}: properties must be an object", path=path)
    kind = props.get("kind")
    if kind not in KINDS:
        raise FormatError(
            f"{feature_label(index)}: properties.kind must be one of {', '.join(KINDS)}, got {kind!r}", path=path
        )
    gj = feat.get("geometry")
    if not isinstance(gj, dict) or gj.get("type") not in _POLYGONAL:
        got = gj.get("type") if isinstance(gj, dict) else gj
        raise FormatError(f"{feature_label(index)} ({kind}): geometry must be Polygon or MultiPolygon, got {got!r}",
                          path=path)
    try:
        geom = shapely.from_geojson(json.dumps(gj))
    except Exception as err:  # shapely raises GEOSException / ValueError on bad coordinates
        raise FormatError(f"{feature_label(index)} ({kind}): unreadable geometry: {err}", path=path) from err
    return kind, geom


def _repair(geom, index, kind, path):
    """Return a valid polygonal geometry, or raise when the repair is
    ambiguous."""
    if geom.is_valid:
        return geom, False
    reason = shapely.is_valid_reason(geom)
    a = _polygonal_part(shapely.make_valid(geom, method="linework"))
    b = _polygonal_part(shapely.make_valid(geom, method="structure", keep_collapsed=False))
    area_a, area_b = a.area, b.area
    if a.is_empty or b.is_empty or abs(area_a - area_b) > _REPAIR_RTOL * max(area_a, area_b, 1e-12):
        raise FormatError(
            f"{feature_label(index)} ({kind}) is an invalid polygon ({reason}) and its repair is ambiguous "
            f"(two repair methods give areas {area_a:.3f} and {area_b:.3f} m²); fix the drawing",
            path=path,
        )
    return a, True


#: less free space than this means the coordinates are not metres (degrees)
MIN_FREE_AREA_M2 = 0.5
#: a plan wider or deeper than this is not in metres (millimetres,
#: centimetres); the largest buildings are about 1-2 km across
MAX_EXTENT_M = 5000.0
#: coordinates beyond this are no plan's metres (map-grid northings reach 1e7)
MAX_COORDINATE_M = 1e8


def _extent(geom):
    x0, y0, x1, y1 = geom.bounds
    return f"x {x0:.6g}..{x1:.6g}, y {y0:.6g}..{y1:.6g}"


def plan_from_geojson(doc, *, path=None) -> FloorPlan:
    """Build a :class:`FloorPlan` from a parsed GeoJSON FeatureCollection.

    Raises
    ------
    FormatError
        Not a FeatureCollection, a feature of unknown kind or with a
        non-polygonal geometry, an ambiguous invalid polygon.
    DataError
        No walkable feature, or empty free space.
    """
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        got = doc.get("type") if isinstance(doc, dict) else type(doc).__name__
        raise FormatError(f"a floor plan must be a GeoJSON FeatureCollection, got {got!r}", path=path)
    feats = doc.get("features")
    if not isinstance(feats, list):
        raise FormatError("a floor plan needs a list 'features'", path=path)
    crs = json.dumps(doc["crs"]) if "crs" in doc else ""
    # OGC CRS84 and the EPSG codes of WGS 84 (2-D, 3-D) and NAD83: longitude and latitude
    if re.search(r"CRS84|EPSG:{1,2}(4326|4979|4269)\b|EPSG/0/(4326|4979|4269)\b", crs.upper()):
        raise FormatError(f"the plan declares a longitude/latitude CRS ({crs[:80]}); expected coordinates "
                          "in metres in the plan frame", path=path)
    walk, obst, repaired = [], [], []
    for i, feat in enumerate(feats):
        kind, geom = _feature_geometry(feat, i, path)
        if not geom.is_empty:
            big = max(abs(v) for v in geom.bounds)
            if not big <= MAX_COORDINATE_M:
                raise FormatError(f"{feature_label(i)}: a coordinate of {big:.3g}; expected plan metres (within "
                                  f"±{MAX_COORDINATE_M:.0e} m)", path=path)
        geom, fixed = _repair(geom, i, kind, path)
        if fixed:
            repaired.append(i)
        if geom.is_empty:
            continue
        (walk if kind == "walkable" else obst).append(geom)
    if not walk:
        raise DataError("floor plan has no non-empty walkable feature", path=path)
    walkable = shapely.union_all(walk)
    x0, y0, x1, y1 = walkable.bounds
    if max(x1 - x0, y1 - y0) > MAX_EXTENT_M:
        raise DataError(f"the walkable area spans {x1 - x0:.6g} x {y1 - y0:.6g} units ({_extent(walkable)}); "
                        f"expected metres (at most {MAX_EXTENT_M:.0f} m across): a plan drawn in millimetres "
                        "or centimetres must be scaled to metres", path=path)
    obstacles = shapely.union_all(obst) if obst else shapely.Polygon()
    free = _polygonal_part(shapely.difference(walkable, obstacles))
    if free.is_empty or free.area <= 0:
        raise DataError("floor plan has no free space (walkable area entirely covered by obstacles)", path=path)
    if free.area < MIN_FREE_AREA_M2:
        raise DataError(f"the plan's free space is only {free.area:.3g} m² across {_extent(free)}; expected "
                        "coordinates in metres in the plan frame, not longitude and latitude", path=path)
    meta = doc.get("plan") if isinstance(doc.get("plan"), dict) else {}
    units = meta.get("units", "m")
    if units not in ("m", None):
        raise FormatError(f"plan units must be 'm', got {units!r}", path=path)
    floor = meta.get("floor")
    return FloorPlan(
        floor=None if floor is None else str(floor),
        free=free,
        walkable=walkable,
        obstacles=obstacles,
        n_obstacles=len(obst),
        path=None if path is None else str(path),
        repaired=repaired,
    )


def load_floor_plan(path) -> FloorPlan:
    """Read a ``*.plan.geojson`` file (see :func:`plan_from_geojson`).

    JSON syntax errors give a FormatError with the file, line and column.
    """
    path = Path(path)
    return plan_from_geojson(read_json_file(path), path=str(path))


def check_points(plan: FloorPlan, xy, *, tolerance_m=0.0):
    """Flag points (e.g. checkpoints) that lie outside free space.

    Parameters
    ----------
    plan : FloorPlan
    xy : (N, 2) float, metres
    tolerance_m : float, points closer than this to free space are not
        flagged

    Returns
    -------
    outside : (N,) bool, True where the point is farther than
        ``tolerance_m`` from free space
    distance_m : (N,) float, distance to free space (0 inside)
    """
    dist = plan.distance_to_free(xy)
    return dist > tolerance_m, dist
