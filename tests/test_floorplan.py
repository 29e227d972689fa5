"""Floor plans: GeoJSON to free space.

References: shapely's scalar predicates and distances (a slow, obviously
correct twin of the vectorised point tests), the measured areas and
checkpoint counts in shared/real_data/README.md, Python's json module for
syntax-error positions, and hand-computed areas of small polygons."""

import json
from pathlib import Path

import numpy as np
import pytest
import shapely
from shapely.geometry import Point

from fingerprint.errors import DataError, FormatError
from mapping.floorplan import check_points, load_floor_plan, plan_from_geojson
from _geojson import feat, fc, rect
from _realdata import FULL, needs_full, real_dir

ROOT = Path(__file__).resolve().parent


def _real_dir():
    return real_dir("F1/floor.plan.geojson")


REAL = _real_dir()
needs_real = pytest.mark.skipif(REAL is None, reason="real-data sample not available")


# a 10 x 6 m room with a 2 x 2 m pillar in it: free area 60 - 4 = 56 m² by hand
ROOM = fc(feat("walkable", rect(0, 0, 10, 6)), feat("obstacle", rect(4, 2, 6, 4)), plan={"floor": "G", "units": "m"})


def test_room_with_pillar_area_and_floor():
    plan = plan_from_geojson(ROOM)
    assert plan.floor == "G"
    assert plan.free_area_m2 == pytest.approx(56.0)
    assert plan.bounds == (0.0, 0.0, 10.0, 6.0)
    assert plan.n_obstacles == 1


def test_contains_and_distance_match_shapely_scalar_twin():
    plan = plan_from_geojson(ROOM)
    rng = np.random.default_rng(3)
    xy = rng.uniform([-2, -2], [12, 8], size=(400, 2))
    inside = plan.contains(xy)
    dist = plan.distance_to_free(xy)
    # slow twin: shapely's scalar predicates on Point objects
    ref_in = np.array([plan.free.contains(Point(p)) for p in xy])
    ref_d = np.array([plan.free.distance(Point(p)) for p in xy])
    np.testing.assert_array_equal(inside, ref_in)
    np.testing.assert_allclose(dist, ref_d, atol=1e-12)
    # inside the pillar: the distance to the pillar's edge, by hand
    assert plan.distance_to_free([[5.0, 3.0]])[0] == pytest.approx(1.0)
    assert not plan.contains([[5.0, 3.0]])[0]


def test_check_points_and_nearest_free():
    plan = plan_from_geojson(ROOM)
    pts = np.array([[1.0, 1.0], [5.0, 3.5], [11.0, 3.0], [5.0, 2.1]])
    outside, dist = check_points(plan, pts)
    np.testing.assert_array_equal(outside, [False, True, True, True])
    np.testing.assert_allclose(dist, [0.0, 0.5, 1.0, 0.1], atol=1e-12)  # by hand
    outside_tol, _ = check_points(plan, pts, tolerance_m=0.2)
    np.testing.assert_array_equal(outside_tol, [False, True, True, False])
    moved = plan.nearest_free(pts, inset_m=0.05)
    assert plan.contains(moved).all()
    np.testing.assert_array_equal(moved[0], pts[0])
    # moved by the distance to free space plus the inset, not more
    shift = np.hypot(*(moved - pts).T)
    np.testing.assert_allclose(shift[1:], dist[1:] + 0.05, atol=1e-6)


def test_bow_tie_is_repaired_unambiguously():
    # a self-intersecting "bow tie" over the unit square corners: two
    # triangles of area 1 each (hand computation), both repair methods agree
    bow = [[[0, 0], [2, 2], [2, 0], [0, 2], [0, 0]]]
    plan = plan_from_geojson(fc(feat("walkable", bow)))
    assert plan.repaired == [0]
    assert plan.free.is_valid
    assert plan.free_area_m2 == pytest.approx(2.0)


def test_self_overlapping_ring_is_rejected_as_ambiguous():
    # a ring that winds over itself: the two repair methods disagree (11 vs 15 m²)
    loop = [[[0, 0], [4, 0], [4, 4], [1, 4], [1, 1], [3, 1], [3, 3], [0, 3], [0, 0]]]
    with pytest.raises(FormatError, match=r"feature 2 \(features\[1\]\) \(walkable\).*ambiguous"):
        plan_from_geojson(fc(feat("walkable", rect(10, 10, 12, 12)), feat("walkable", loop)), path="x.plan.geojson")


@pytest.mark.parametrize(
    "doc, err, match",
    [
        (fc(feat("walkable", rect(0, 0, 1, 1)), feat("shelf", rect(0, 0, 1, 1))), FormatError, r"feature 2 \(features\[1\]\).*kind"),
        (fc(feat("walkable", [[0, 0], [1, 1]], "LineString")), FormatError, "Polygon or MultiPolygon"),
        (fc(), DataError, "no non-empty walkable"),
        (fc(feat("obstacle", rect(0, 0, 1, 1))), DataError, "no non-empty walkable"),
        (fc(feat("walkable", rect(0, 0, 1, 1)), feat("obstacle", rect(-1, -1, 2, 2))), DataError, "no free space"),
        ({"type": "Feature"}, FormatError, "FeatureCollection"),
        (fc(feat("walkable", rect(0, 0, 1, 1)), plan={"units": "ft"}), FormatError, "units"),
        (fc(feat("walkable", [[["a", 0], [1, 0], [1, 1], [0, 0]]])), FormatError, r"feature 1 \(features\[0\]\)"),
        # the data contract (README, "Input files"): metres in the plan frame, not longitude and latitude
        (fc(feat("walkable", rect(13.405, 52.52, 13.406, 52.5205))), DataError,
         r"free space is only 5e-07 m² across x 13\.405\.\.13\.406.*not longitude and latitude"),
        ({**fc(feat("walkable", rect(0, 0, 10, 10))), "crs": {"type": "name", "properties": {
            "name": "urn:ogc:def:crs:OGC:1.3:CRS84"}}}, FormatError, "longitude/latitude CRS"),
        # a 60 m x 40 m hall drawn in millimetres: refused at once, with the hint
        (fc(feat("walkable", rect(0, 0, 60000, 40000))), DataError,
         r"spans 60000 x 40000 units .*expected metres .*millimetres"),
        (fc(feat("walkable", rect(0, 0, 10, 10)), feat("obstacle", rect(0, 0, 1e300, 1))), FormatError,
         r"feature 2 \(features\[1\]\): a coordinate of 1e\+300; expected plan metres"),
    ],
)
def test_bad_plans_raise_clear_errors(doc, err, match):
    with pytest.raises(err, match=match):
        plan_from_geojson(doc, path="p.plan.geojson")


def test_json_syntax_error_position(tmp_path):
    text = '{"type": "FeatureCollection",\n "features": [\n   {"type": "Feature",, }\n]}\n'
    p = tmp_path / "bad.plan.geojson"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(json.JSONDecodeError) as ref:  # reference: Python's json parser
        json.loads(text)
    with pytest.raises(FormatError) as got:
        load_floor_plan(p)
    assert (got.value.line, got.value.column) == (ref.value.lineno, ref.value.colno) == (3, 23)  # the second comma, by hand
    assert got.value.path == str(p)


def test_plan_hash_ignores_layout_not_geometry(tmp_path):
    a = tmp_path / "a.plan.geojson"
    b = tmp_path / "b.plan.geojson"
    a.write_text(json.dumps(ROOM), encoding="utf-8")
    reordered = fc(ROOM["features"][1], ROOM["features"][0], plan=ROOM["plan"])
    b.write_text(json.dumps(reordered, indent=3), encoding="utf-8")
    assert load_floor_plan(a).plan_hash == load_floor_plan(b).plan_hash
    moved = fc(feat("walkable", rect(0, 0, 10, 6)), feat("obstacle", rect(4, 2, 6, 4.5)))
    assert plan_from_geojson(moved).plan_hash != load_floor_plan(a).plan_hash


@needs_full
@pytest.mark.realdata
@pytest.mark.parametrize(
    # README "Measured summary": walkable area, free-space area, obstacles,
    # share of checkpoints inside the free space
    "floor, walkable_m2, free_m2, n_obst, share_free",
    [("F1", 24641, 7904, 172, 1.000), ("B1", 60057, 19180, 711, 0.983)],
)
def test_real_plans_match_readme(floor, walkable_m2, free_m2, n_obst, share_free):
    from fingerprint.logio import read_checkpoints

    plan = load_floor_plan(FULL / floor / "floor.plan.geojson")
    assert plan.floor == floor
    assert plan.walkable.area == pytest.approx(walkable_m2, abs=1.0)
    assert plan.free_area_m2 == pytest.approx(free_m2, abs=1.0)
    assert plan.n_obstacles == n_obst
    cps = np.vstack([read_checkpoints(p).xy for p in sorted((FULL / floor).glob("*.checkpoints.csv"))])
    outside, dist = check_points(plan, cps)
    assert 1 - outside.mean() == pytest.approx(share_free, abs=0.0006)
    if floor == "B1":
        # README: 16 of 965 checkpoints inside obstacles, 0.2-6 m from free space
        assert outside.sum() == 16 and len(cps) == 965
        assert 0.1 < dist[outside].min() and dist[outside].max() < 6.5
    # every checkpoint inside the walkable outline (README: 100 %)
    assert shapely.contains_xy(plan.walkable, cps[:, 0], cps[:, 1]).all()


@needs_real
@pytest.mark.realdata
def test_vendored_plans_are_the_shared_plans():
    # the vendored plan must give the README's free area (7904 / 19180 m²)
    for floor, free_m2 in (("F1", 7904), ("B1", 19180)):
        plan = load_floor_plan(REAL / floor / "floor.plan.geojson")
        assert plan.free_area_m2 == pytest.approx(free_m2, abs=1.0)
