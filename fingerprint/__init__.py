"""lodemap's engine: reading walk logs, calibration, attitude, field
features, dead reckoning, the field-map and floor-graph types, the particle
filter and the simulator. It knows nothing of how maps are made (that is
``mapping``)."""

from .errors import ConfigError, ConvergenceError, DataError, FormatError, LodemapError, MapFileError
from .fieldmap import COMPONENTS, FieldMap
from .floorgraph import FloorGraph
from .records import Checkpoints, Motion, ProcessedWalk, Track, WalkLog
from .logio import read_checkpoints, read_track, read_walk_log
from .pipeline import process_walk

__all__ = [
    "LodemapError",
    "DataError",
    "FormatError",
    "ConfigError",
    "ConvergenceError",
    "MapFileError",
    "FieldMap",
    "COMPONENTS",
    "FloorGraph",
    "WalkLog",
    "Checkpoints",
    "Track",
    "Motion",
    "ProcessedWalk",
    "read_walk_log",
    "read_checkpoints",
    "read_track",
    "process_walk",
]
