"""Regenerate the invented demo building: floor plans, route graphs and the
steel description.

    python demo_building/make_plans.py

Writes, next to this script: site.json, steel.json, G/floor.plan.geojson,
G/routes.geojson, L1/floor.plan.geojson, L1/routes.geojson. Everything is
drawn in plan metres from the rectangles below; the output is deterministic.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from shapely import box, unary_union
from shapely.geometry import mapping

HERE = Path(__file__).resolve().parent

SITE = {
    "name": "Brackenmoor Logistics Hall (invented demo site)",
    "floors": [
        {"floor": "G", "plan": "G/floor.plan.geojson"},
        {"floor": "L1", "plan": "L1/floor.plan.geojson"},
    ],
    # Invented site: the coordinates only set the geomagnetic background.
    "latitude_deg": 46.8,
    "longitude_deg": -71.95,
    "date": "2026-03-15",
    "plan_rotation_deg": 20.0,
}

# ---------------------------------------------------------------- ground floor
# Warehouse, 60 m x 40 m, 8 m clear height. South: loading docks and an open
# marshalling area; middle: eight 3.0 m racking aisles running north-south;
# north: a 3.5 m cross aisle; east: a packing area with benches, plant rooms
# (transformer) and the stair and lift core in the north-east corner.
G_HEIGHT_M = 8.0
DOCK_X = [6.0, 14.0, 22.0, 30.0]  # west edge of each 3.5 m dock bay
RACK_Y = (11.5, 33.5)
RACK_ROWS = [(0.0, 1.1)] + [(4.1 + 5.2 * k, 6.3 + 5.2 * k) for k in range(7)] + [(40.5, 41.6)]
AISLE_X = [2.6 + 5.2 * k for k in range(8)]


def ground_floor():
    walkable = unary_union([box(0, 0, 60, 40)] + [box(x, -3.5, x + 3.5, 0) for x in DOCK_X])
    obstacles = [box(x0, RACK_Y[0], x1, RACK_Y[1]) for x0, x1 in RACK_ROWS]
    obstacles += [
        box(0, 37.0, 52, 40),  # north wall racking and battery charging bays
        box(45, 15, 51, 20),  # packing bench
        box(45, 24, 51, 29),  # packing bench
        box(56, 11, 60, 31),  # plant rooms (transformer, sprinkler valves)
        box(52, 33, 60, 40),  # stair and lift core
    ]
    # guard blocks around the free-standing columns at the rack ends
    col_front = [(x, 11.0) for x in (5.2, 15.6, 26.0, 36.4)]
    obstacles += [box(x - 0.5, y - 0.5, x + 0.5, y + 0.5) for x, y in col_front]
    obstacles = unary_union(obstacles)

    routes = []
    for x in AISLE_X:
        routes.append([(x, 8.0), (x, 35.25)])
    routes.append([(x, 35.25) for x in AISLE_X + [43.5]])  # north cross aisle
    lane8 = [(x, 8.0) for x in AISLE_X + [43.5, 53.5]]
    routes.append(lane8)
    dock_cx = [x + 1.75 for x in DOCK_X]
    lane35 = sorted({2.6, 28.6, 43.5, 53.5, *dock_cx})
    routes.append([(x, 3.5) for x in lane35])
    for x in dock_cx:
        routes.append([(x, -1.75), (x, 3.5)])
    for x in (2.6, 28.6, 43.5, 53.5):
        routes.append([(x, 3.5), (x, 8.0)])
    routes.append([(43.5, 8.0), (43.5, 22.0), (43.5, 31.0), (43.5, 35.25)])  # east lane by the racks
    routes.append([(53.5, 8.0), (53.5, 22.0), (53.5, 31.0)])  # lane by the plant rooms
    routes.append([(43.5, 22.0), (53.5, 22.0)])  # between the benches
    routes.append([(43.5, 31.0), (48.5, 31.0), (53.5, 31.0)])  # north of the benches

    # -- steel
    columns = []
    for x in (5.2, 15.6, 26.0, 36.4):  # inside the double racks + rack ends
        columns += [(x, 22.5), (x, 32.5), (x, 11.0)]
    columns += [(x, -0.3) for x in (4.0, 12.0, 20.0, 28.0, 36.0, 44.0, 52.0)]  # south wall
    columns += [(-0.3, y) for y in (12.0, 24.0, 36.0)]  # west wall
    columns += [(48.0, 17.5), (48.0, 26.5)]  # in the packing benches
    columns += [(x, 40.3) for x in (12.0, 24.0, 36.0, 48.0)]  # north wall
    columns += [(60.3, y) for y in (10.0, 20.0, 30.0)]  # east wall
    uprights = []
    for x0, x1 in RACK_ROWS:
        ys = np.arange(RACK_Y[0] + 0.1, RACK_Y[1], 2.7)
        for x in (x0 + 0.05, x1 - 0.05):
            if 0.5 < x < 59.5:  # the racks' faces; the wall-side face of a single rack too
                uprights += [(round(x, 3), round(float(y), 3)) for y in ys]
    steel = {
        "height_m": G_HEIGHT_M,
        "chains": [
            {"kind": "column", "xy": columns, "z_m": [0.0, G_HEIGHT_M], "spacing_m": 1.0,
             "chi_volume_m3": 10.0, "remanent_element_rms_am2": 250.0, "remanent_rms_am2": 15.0},
            {"kind": "rack_upright", "xy": uprights, "z_m": [0.0, 6.0], "spacing_m": 1.0,
             "chi_volume_m3": 0.8, "remanent_element_rms_am2": 18.0, "remanent_rms_am2": 4.0},
        ],
        # slab meshes: the coarse dipole grid stands for the reinforcement
        # spread through the slab; it sits 0.45 m down so that a robot's
        # sensor (0.35-0.45 m up) stays 0.8 m away from every dipole
        "meshes": [
            {"kind": "ground_slab_mesh", "bounds": [0, -3.5, 60, 40], "z_m": -0.45, "spacing_m": 2.5,
             "chi_volume_m3": 0.05, "remanent_rms_am2": 0.6},
        ],
        "sources": [
            {"kind": "transformer", "xyz": [58.5, 15.0, 1.0], "moment_am2": [1500.0, -2500.0, -4000.0]},
            {"kind": "lift_pit_machinery", "xyz": [56.0, 36.5, -1.0], "moment_am2": [800.0, 1200.0, -2500.0]},
            {"kind": "dock_leveller_hydraulics", "xyz": [23.75, -3.0, -0.8], "moment_am2": [300.0, 200.0, -600.0]},
        ],
    }
    return walkable, obstacles, routes, steel


# ------------------------------------------------------------------- L1 floor
# Offices, 60 m x 40 m, 3.4 m floor to ceiling: three east-west corridors
# (2.4 m), three north-south corridors, an open-plan office and a break area
# (both wider than 3 m), a lift lobby and the stair and lift core above the
# one of the ground floor. Everything else is rooms (drawn as obstacles).
L1_HEIGHT_M = 3.4


def office_floor():
    walkable = box(0, 0, 60, 40)
    free = unary_union(
        [
            box(2.0, 18.8, 52.0, 21.2),  # main corridor
            box(2.0, 6.8, 58.0, 9.2),  # south corridor
            box(2.0, 30.8, 52.0, 33.2),  # north corridor
            box(2.0, 6.8, 4.4, 33.2),  # west corridor
            box(28.8, 6.8, 31.2, 33.2),  # centre corridor
            box(49.6, 6.8, 52.0, 33.2),  # east corridor
            box(46.0, 33.2, 52.0, 38.0),  # lift lobby
            box(6.4, 21.2, 26.4, 29.0),  # open-plan office
            box(33.0, 9.2, 45.0, 15.0),  # break area
        ]
    )
    open_columns = [(12.75, 23.6), (20.25, 23.6), (39.0, 11.0)]
    obstacles = unary_union(
        [walkable.difference(free)] + [box(x - 0.3, y - 0.3, x + 0.3, y + 0.3) for x, y in open_columns]
    )
    routes = [
        [(x, 20.0) for x in (3.2, 9.0, 16.5, 24.0, 30.0, 50.8)],
        [(x, 8.0) for x in (3.2, 30.0, 36.0, 42.0, 50.8, 56.8)],
        [(x, 32.0) for x in (3.2, 30.0, 49.0, 50.8)],
        [(3.2, 8.0), (3.2, 20.0), (3.2, 32.0)],
        [(30.0, 8.0), (30.0, 20.0), (30.0, 32.0)],
        [(50.8, 8.0), (50.8, 20.0), (50.8, 32.0)],
        [(49.0, 32.0), (49.0, 35.6)],  # into the lift lobby
        [(9.0, 20.0), (9.0, 27.0), (16.5, 27.0), (24.0, 27.0), (24.0, 20.0)],  # open plan
        [(16.5, 20.0), (16.5, 27.0)],
        [(36.0, 8.0), (36.0, 12.6), (42.0, 12.6), (42.0, 8.0)],  # break area
    ]
    # columns stand in the corridor walls and rooms on a 7.5 m grid, kept
    # at least 1 m from the free space (2.2 m from a corridor centre line)
    grid = [(x, y) for x in np.arange(3.75, 60.0, 7.5) for y in (5.6, 10.4, 14.0, 17.6, 22.4, 29.6, 34.4)]
    grid += [(x, y) for x in (0.8, 5.6, 27.6, 32.4, 48.4, 53.2) for y in (13.5, 26.0)]
    columns = [(float(x), float(y)) for x, y in grid if free.distance(_pt(x, y)) >= 1.0] + open_columns
    steel = {
        "height_m": L1_HEIGHT_M,
        "chains": [
            {"kind": "column", "xy": columns, "z_m": [0.0, L1_HEIGHT_M], "spacing_m": 0.85,
             "chi_volume_m3": 6.0, "remanent_element_rms_am2": 160.0, "remanent_rms_am2": 12.0},
        ],
        "meshes": [
            {"kind": "floor_slab_mesh", "bounds": [0, 0, 60, 40], "z_m": -0.45, "spacing_m": 2.5,
             "chi_volume_m3": 0.08, "remanent_rms_am2": 0.8},
            {"kind": "ceiling_slab_mesh", "bounds": [0, 0, 60, 40], "z_m": L1_HEIGHT_M + 0.2, "spacing_m": 2.5,
             "chi_volume_m3": 0.3, "remanent_rms_am2": 4.0},
        ],
        "sources": [
            {"kind": "lift_machinery", "xyz": [56.0, 36.5, 2.8], "moment_am2": [-1500.0, 900.0, -3500.0]},
            {"kind": "ups_batteries", "xyz": [40.0, 17.0, 0.5], "moment_am2": [600.0, -400.0, -900.0]},
            {"kind": "steel_filing_store", "xyz": [16.0, 4.5, 1.0], "moment_am2": [-500.0, 700.0, -800.0]},
        ],
    }
    return walkable, obstacles, routes, steel


def _pt(x, y):
    from shapely import Point

    return Point(x, y)


def _plan_geojson(floor, walkable, obstacles):
    return {
        "type": "FeatureCollection",
        "plan": {"floor": floor, "units": "m"},
        "features": [
            {"type": "Feature", "properties": {"kind": "walkable"}, "geometry": mapping(walkable)},
            {"type": "Feature", "properties": {"kind": "obstacle"}, "geometry": mapping(obstacles)},
        ],
    }


def _routes_geojson(floor, routes):
    feats = [
        {
            "type": "Feature",
            "properties": {"kind": "path"},
            "geometry": {"type": "LineString", "coordinates": [[round(x, 3), round(y, 3)] for x, y in line]},
        }
        for line in routes
    ]
    return {"type": "FeatureCollection", "plan": {"floor": floor, "units": "m"}, "features": feats}


def _dump(path, obj):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(obj, indent=1) + "\n", encoding="utf-8")


def main():
    steel = {
        "version": 1,
        "description": "Steel of the invented demo building as magnetic dipoles (see fingerprint.simulate.building)",
        "remanence_seed": 20260315,
        "floors": {},
    }
    for floor, make in (("G", ground_floor), ("L1", office_floor)):
        walkable, obstacles, routes, floor_steel = make()
        _dump(HERE / floor / "floor.plan.geojson", _plan_geojson(floor, walkable, obstacles))
        _dump(HERE / floor / "routes.geojson", _routes_geojson(floor, routes))
        steel["floors"][floor] = floor_steel
    _dump(HERE / "steel.json", steel)
    _dump(HERE / "site.json", SITE)


if __name__ == "__main__":
    main()
