"""lodemap's engine: reading walk logs, calibration, attitude, field
features, dead reckoning, the field-map and floor-graph types, the particle
filter and the simulator. It knows nothing of how maps are made (that is
``mapping``)."""

from .errors import ConfigError, ConvergenceError, DataError, FormatError, LodemapError, MapFileError
from .fieldmap import COMPONENTS, FieldMap
from .floorgraph import FloorGraph
from .records import Checkpoints, Motion, ProcessedWalk, Track, WalkLog

# The sensor chain pulls in pandas and scipy.signal; importing it lazily keeps
# ``import fingerprint.errors`` (and so ``lodemap --help``) fast.
_LAZY = {
    "read_walk_log": "logio",
    "read_checkpoints": "logio",
    "read_track": "logio",
    "process_walk": "pipeline",
}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'fingerprint' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value

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
