"""The simulator: a building's true magnetic field (geomagnetic background
plus the steel as dipoles), walkers (handheld phone, robot) that move along
routes of a floor graph, their sensors, and data sets of walks with exact
truth.

Modules: ``dipoles`` (the dipole law, vectorised), ``building`` (steel
description -> dipoles), ``fieldmodel`` (:class:`FieldModel`), ``routes``
(survey and test routes), ``walkers`` (trajectories), ``sensors`` (logs),
``datasets`` (planning and simulating a floor's walks).
"""

from .building import load_steel, steel_dipoles
from .datasets import DatasetSettings, SimulatedWalk, WalkJob, checkpoints_from_truth, plan_floor, simulate_job, write_walk
from .dipoles import dipole_field_ut
from .fieldmodel import FieldModel, earth_to_plan_vector, field_model_for_floor
from .routes import graph_segments, plan_survey_routes, plan_test_route, route_markers, route_polyline
from .sensors import Device, SensorTruth, synthesize_log
from .walkers import HandheldWalker, RobotWalker, Trajectory, turn_in_hand

__all__ = [
    "FieldModel",
    "field_model_for_floor",
    "earth_to_plan_vector",
    "dipole_field_ut",
    "load_steel",
    "steel_dipoles",
    "DatasetSettings",
    "WalkJob",
    "SimulatedWalk",
    "plan_floor",
    "simulate_job",
    "write_walk",
    "checkpoints_from_truth",
    "graph_segments",
    "plan_survey_routes",
    "plan_test_route",
    "route_markers",
    "route_polyline",
    "Device",
    "SensorTruth",
    "synthesize_log",
    "HandheldWalker",
    "RobotWalker",
    "Trajectory",
    "turn_in_hand",
]
