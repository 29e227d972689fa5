"""The field-map file (``*.map``): one file per floor.

Layout (a format of our own, built from open pieces):

- a ZIP container (``zipfile``, deflate) with members
  ``meta.json`` and ``arrays/<name>.npy`` (``numpy.save`` format, read back
  with ``allow_pickle=False``);
- ``meta.json`` holds ``format`` (``"lodemap-fieldmap"``), ``version``, the
  floor, raster geometry, ``earth_to_plan_rad``, frames and units, the plan
  hash, for every array its member name, dtype, shape and SHA-256, and the
  map's own provenance (``FieldMap.meta``: kernel, hyperparameters, survey
  walks, build settings, seed);
- the ZIP comment is ``lodemap-sha256:`` followed by the hex SHA-256 of every
  byte of the file before those 64 hex digits, so any changed or missing
  byte is detected before anything is parsed.

Every problem with a file (truncated, corrupted, another format or version,
another plan) raises :class:`fingerprint.errors.MapFileError`. Writing is
atomic.
"""

from __future__ import annotations

import hashlib
import io
import json
import zipfile
from pathlib import Path

import numpy as np

from ._atomic import atomic_write
from .errors import DataError, MapFileError
from .fieldmap import COMPONENTS, FieldMap
from .floorgraph import FloorGraph

__all__ = ["save_map", "load_map", "read_map_meta", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "lodemap-fieldmap"
FORMAT_VERSION = 1

_TRAILER = b"lodemap-sha256:"
_DIGEST_LEN = 64
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)  # fixed, so equal maps give equal files

#: array name -> (FieldMap attribute or graph attribute, dtype)
_ARRAYS = {
    "origin_xy": float,
    "mean_ut": float,
    "var_ut2": float,
    "coverage_m": float,
    "free": bool,
    "graph_nodes_xy": float,
    "graph_edges": np.int64,
}


def _jsonable(obj):
    """numpy scalars/arrays -> Python; non-finite floats -> None."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _npy_bytes(arr):
    buf = io.BytesIO()
    np.save(buf, arr, allow_pickle=False)
    return buf.getvalue()


def _pack(doc, members):
    """Bytes of a map file from the meta document and {member: bytes}."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=6) as zf:
        zf.comment = _TRAILER + b"0" * _DIGEST_LEN
        info = zipfile.ZipInfo("meta.json", date_time=_ZIP_TIME)
        info.compress_type = zipfile.ZIP_DEFLATED
        zf.writestr(info, json.dumps(doc, indent=1, allow_nan=False).encode("utf-8"))
        for name, data in members.items():
            info = zipfile.ZipInfo(name, date_time=_ZIP_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            zf.writestr(info, data)
    raw = buf.getvalue()
    body = raw[:-_DIGEST_LEN]
    if not body.endswith(_TRAILER):  # pragma: no cover - zipfile always puts the comment last
        raise RuntimeError("zip comment not at the end of the container")
    return body + hashlib.sha256(body).hexdigest().encode("ascii")


def save_map(path, fmap):
    """Write ``fmap`` (FieldMap) to ``path`` atomically.

    Parameters
    ----------
    path : str or Path
    fmap : FieldMap
    """
    arrays = {
        "origin_xy": np.asarray(fmap.origin_xy, dtype=float),
        "mean_ut": np.asarray(fmap.mean_ut, dtype=float),
        "var_ut2": np.asarray(fmap.var_ut2, dtype=float),
        "coverage_m": np.asarray(fmap.coverage_m, dtype=float),
        "free": np.asarray(fmap.free, dtype=bool),
        "graph_nodes_xy": np.asarray(fmap.graph.nodes_xy, dtype=float),
        "graph_edges": np.asarray(fmap.graph.edges, dtype=np.int64),
    }
    members = {}
    index = {}
    for name, arr in arrays.items():
        data = _npy_bytes(np.ascontiguousarray(arr))
        member = f"arrays/{name}.npy"
        members[member] = data
        index[name] = {
            "member": member,
            "dtype": arr.dtype.str,
            "shape": list(arr.shape),
            "sha256": hashlib.sha256(data).hexdigest(),
        }
    meta = _jsonable(dict(fmap.meta))
    doc = {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "floor": str(fmap.floor),
        "resolution_m": float(fmap.resolution_m),
        "shape": list(fmap.free.shape),
        "earth_to_plan_rad": float(fmap.earth_to_plan_rad),
        "plan_hash": meta.get("plan_hash"),
        "frames": {
            "plan": "x, y of the floor plan drawing, metres; headings CCW from plan +x",
            "components": list(COMPONENTS),
            "earth_to_plan": "plan vector = R(earth_to_plan_rad) @ earth (east, north) vector",
        },
        "units": {"mean_ut": "µT", "var_ut2": "µT²", "coverage_m": "m", "origin_xy": "m"},
        "arrays": index,
        "meta": meta,
    }
    data = _pack(doc, members)
    with atomic_write(path, "wb") as fh:
        fh.write(data)


def _fail(path, message):
    return MapFileError(message, path=str(path))


def _open(path):
    path = Path(path)
    raw = path.read_bytes()
    tail = len(_TRAILER) + _DIGEST_LEN
    if len(raw) < tail + 22:
        raise _fail(path, f"not a lodemap map file or truncated: only {len(raw)} bytes")
    body, digest = raw[:-_DIGEST_LEN], raw[-_DIGEST_LEN:]
    if not body.endswith(_TRAILER):
        raise _fail(path, "not a lodemap map file or truncated: the checksum trailer is missing at the end")
    if hashlib.sha256(body).hexdigest().encode("ascii") != digest:
        raise _fail(path, "checksum mismatch: the file is corrupted (SHA-256 of its bytes differs from the stored one)")
    try:
        zf = zipfile.ZipFile(io.BytesIO(raw))
        doc = json.loads(zf.read("meta.json").decode("utf-8"))
    except (zipfile.BadZipFile, KeyError, ValueError, EOFError, OSError) as err:
        raise _fail(path, f"unreadable map container: {err}") from err
    if not isinstance(doc, dict) or doc.get("format") != FORMAT_NAME:
        got = doc.get("format") if isinstance(doc, dict) else type(doc).__name__
        raise _fail(path, f"not a lodemap field map: format is {got!r}, expected {FORMAT_NAME!r}")
    if doc.get("version") != FORMAT_VERSION:
        raise _fail(
            path, f"map file format version {doc.get('version')!r} is not supported; this lodemap reads version {FORMAT_VERSION}"
        )
    return zf, doc


def read_map_meta(path):
    """The checked ``meta.json`` document of a map file (dict), without
    loading the arrays."""
    zf, doc = _open(path)
    zf.close()
    return doc


def load_map(path, *, expected_plan_hash=None):
    """Read a map file written by :func:`save_map`.

    Parameters
    ----------
    path : str or Path
    expected_plan_hash : str or None
        When given, the map must have been built for this floor plan.

    Returns
    -------
    FieldMap

    Raises
    ------
    MapFileError
        Truncated or corrupted file, another format or version, or a plan
        hash other than ``expected_plan_hash``.
    """
    zf, doc = _open(path)
    arrays = {}
    try:
        index = doc["arrays"]
        for name, dtype in _ARRAYS.items():
            entry = index[name]
            data = zf.read(entry["member"])
            if hashlib.sha256(data).hexdigest() != entry["sha256"]:
                raise _fail(path, f"checksum mismatch in member {entry['member']!r}: the file is corrupted")
            arr = np.load(io.BytesIO(data), allow_pickle=False)
            if arr.dtype != np.dtype(dtype) or list(arr.shape) != list(entry["shape"]):
                raise _fail(
                    path,
                    f"array {name!r} has dtype {arr.dtype} and shape {arr.shape}, "
                    f"expected {np.dtype(dtype)} and {tuple(entry['shape'])}",
                )
            arrays[name] = arr
        floor = str(doc["floor"])
        resolution = float(doc["resolution_m"])
        angle = float(doc["earth_to_plan_rad"])
        meta = doc.get("meta") or {}
    except MapFileError:
        raise
    except (KeyError, TypeError, ValueError, zipfile.BadZipFile, EOFError, OSError) as err:
        raise _fail(path, f"map file content is incomplete or malformed: {err!r}") from err
    finally:
        zf.close()
    if expected_plan_hash is not None and doc.get("plan_hash") != expected_plan_hash:
        raise _fail(
            path,
            f"map was built for floor plan {doc.get('plan_hash')!r}, expected plan {expected_plan_hash!r}; rebuild the map",
        )
    try:
        graph = FloorGraph.from_arrays(arrays["graph_nodes_xy"], arrays["graph_edges"])
        return FieldMap(
            floor=floor,
            origin_xy=arrays["origin_xy"],
            resolution_m=resolution,
            mean_ut=arrays["mean_ut"],
            var_ut2=arrays["var_ut2"],
            coverage_m=arrays["coverage_m"],
            free=arrays["free"],
            graph=graph,
            earth_to_plan_rad=angle,
            meta=meta,
        )
    except DataError as err:
        raise _fail(path, f"map file arrays are inconsistent: {err}") from err
