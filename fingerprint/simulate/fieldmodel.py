"""The true field of a simulated floor: geomagnetic background plus the
dipoles of the building's steel, in the plan frame."""

from __future__ import annotations

import json
import math

import numpy as np

from .._atomic import atomic_write
from ..errors import DataError, MapFileError
from .building import floor_seed, steel_dipoles
from .dipoles import dipole_field_ut

__all__ = ["FieldModel", "earth_to_plan_vector", "field_model_for_floor"]

_FORMAT = "lodemap-field-model"
_VERSION = 1


def earth_to_plan_vector(enu_ut, plan_rotation_deg):
    """Rotate a true-north east/north/up vector into the plan frame.

    ``plan_rotation_deg`` (rho) is the clockwise angle from true north to
    the plan's +y axis (site.json), so plan = R(+rho) @ (east, north).

    Parameters
    ----------
    enu_ut : (..., 3) float
    plan_rotation_deg : float

    Returns
    -------
    (..., 3) float, (b_x, b_y, b_up)
    """
    v = np.asarray(enu_ut, dtype=float)
    r = math.radians(float(plan_rotation_deg))
    c, s = math.cos(r), math.sin(r)
    out = np.empty_like(v)
    out[..., 0] = c * v[..., 0] - s * v[..., 1]
    out[..., 1] = s * v[..., 0] + c * v[..., 1]
    out[..., 2] = v[..., 2]
    return out


class FieldModel:
    """Background plus dipoles; ``field(xyz)`` is the exact simulated field.

    Parameters
    ----------
    background_ut : (3,) float, µT, plan frame (b_x, b_y, b_up)
    positions_m : (M, 3) float, plan x, y and height above the floor
    moments_am2 : (M, 3) float
    floor : str
    kinds : (M,) str or None, element kind of each dipole
    meta : dict, JSON-able provenance (site, date, declination, ...)
    """

    def __init__(self, background_ut, positions_m, moments_am2, *, floor="", kinds=None, meta=None):
        self.background_ut = np.asarray(background_ut, dtype=float).reshape(3)
        self.positions_m = np.asarray(positions_m, dtype=float).reshape(-1, 3)
        self.moments_am2 = np.asarray(moments_am2, dtype=float).reshape(-1, 3)
        if self.positions_m.shape != self.moments_am2.shape:
            raise DataError("field model positions and moments differ in shape")
        self.floor = str(floor)
        self.kinds = np.asarray(kinds if kinds is not None else ["dipole"] * len(self.positions_m), dtype=str)
        self.meta = dict(meta or {})

    @property
    def n_dipoles(self) -> int:
        return int(self.positions_m.shape[0])

    def field(self, xyz_plan, *, exact=False):
        """Field at plan points.

        Parameters
        ----------
        xyz_plan : (N, 3) float, metres (x, y, height above the floor)
        exact : bool, float64 work arrays (default float32, ~1e-4 relative)

        Returns
        -------
        (N, 3) float, µT, (b_x, b_y, b_up)
        """
        xyz = np.asarray(xyz_plan, dtype=float)
        dt = np.float64 if exact else np.float32
        return self.background_ut + dipole_field_ut(xyz, self.positions_m, self.moments_am2, dtype=dt)

    def anomaly(self, xyz_plan, **kw):
        """``field(xyz) - background`` (N, 3) µT."""
        return self.field(xyz_plan, **kw) - self.background_ut

    def min_distance_m(self, xyz_plan, *, kinds=None):
        """(N,) distance from each point to the nearest dipole (of the given
        kinds, default all)."""
        q = self.positions_m if kinds is None else self.positions_m[np.isin(self.kinds, list(kinds))]
        xyz = np.asarray(xyz_plan, dtype=float).reshape(-1, 3)
        from scipy.spatial import cKDTree

        return cKDTree(q).query(xyz)[0]

    # -- files -------------------------------------------------------------
    def save(self, path):
        """Write as ``.npz`` (no pickle), atomically."""
        meta = json.dumps({"format": _FORMAT, "version": _VERSION, "floor": self.floor, **self.meta})
        with atomic_write(path, "wb") as fh:
            np.savez_compressed(
                fh,
                background_ut=self.background_ut,
                positions_m=self.positions_m,
                moments_am2=self.moments_am2,
                kinds=self.kinds.astype("U"),
                meta=np.array(meta),
            )

    @classmethod
    def load(cls, path):
        """Read a file written by :meth:`save`."""
        try:
            with np.load(path, allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
        except (OSError, ValueError, EOFError) as err:
            raise MapFileError(f"not a readable field model file: {err}", path=path) from err
        need = {"background_ut", "positions_m", "moments_am2", "kinds", "meta"}
        if not need <= set(arrays):
            raise MapFileError(f"field model file lacks {sorted(need - set(arrays))}", path=path)
        try:
            meta = json.loads(str(arrays["meta"]))
        except json.JSONDecodeError as err:
            raise MapFileError("field model metadata is not JSON", path=path) from err
        if meta.get("format") != _FORMAT or meta.get("version") != _VERSION:
            raise MapFileError(
                f"expected {_FORMAT} version {_VERSION}, got {meta.get('format')!r} version {meta.get('version')!r}",
                path=path,
            )
        floor = meta.pop("floor", "")
        meta.pop("format")
        meta.pop("version")
        return cls(arrays["background_ut"], arrays["positions_m"], arrays["moments_am2"], floor=floor,
                   kinds=arrays["kinds"], meta=meta)


def field_model_for_floor(steel_doc, floor, geofield, *, plan_rotation_deg=0.0):
    """The field model of one floor.

    Parameters
    ----------
    steel_doc : dict from :func:`fingerprint.simulate.building.load_steel`
    floor : str
    geofield : fingerprint.geomag.GeoField, background at the site
    plan_rotation_deg : float, rho (site.json)
    """
    if floor not in steel_doc["floors"]:
        raise DataError(f"no steel described for floor {floor!r}; floors: {sorted(steel_doc['floors'])}")
    bg = earth_to_plan_vector(geofield.enu_ut, plan_rotation_deg)
    pos, mom, kinds = steel_dipoles(steel_doc["floors"][floor], bg, rng=floor_seed(steel_doc, floor))
    meta = {
        "declination_deg": geofield.declination_deg,
        "inclination_deg": geofield.inclination_deg,
        "total_ut": geofield.total_ut,
        "plan_rotation_deg": float(plan_rotation_deg),
        "earth_to_plan_rad": math.radians(float(plan_rotation_deg) - geofield.declination_deg),
        "height_m": float(steel_doc["floors"][floor].get("height_m", 3.0)),
    }
    return FieldModel(bg, pos, mom, floor=floor, kinds=kinds, meta=meta)
