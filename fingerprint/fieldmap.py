"""The field-map type: mean and variance of the magnetic field vector on a
raster over a floor's free space, with the floor graph it belongs to.

Components are in the plan frame: ``b_x`` and ``b_y`` along the plan's x and
y axes, ``b_up`` vertical (µT). The map is built elsewhere
(``mapping.mapfit``); this module only stores it and looks it up. The file
format is in ``fingerprint.mapfile``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import DataError
from .floorgraph import FloorGraph

__all__ = ["FieldMap", "COMPONENTS"]

#: Names of the three mapped components, in array order.
COMPONENTS = ("b_x", "b_y", "b_up")


@dataclass(frozen=True, eq=False)
class FieldMap:
    """A floor's field map.

    Attributes
    ----------
    floor : str
    origin_xy : (2,) float, metres, plan position of raster cell ``[0, 0]``
        (cell centre)
    resolution_m : float, cell size
    mean_ut : (ny, nx, 3) float, µT, mapped field ``b_x, b_y, b_up``
    var_ut2 : (ny, nx, 3) float, µT², predictive variance of the mean
        (map uncertainty, excluding sensor noise)
    coverage_m : (ny, nx) float, metres, distance to the nearest survey sample
    free : (ny, nx) bool, cell centre in free space
    graph : FloorGraph
    earth_to_plan_rad : float
        Rotation that takes earth-frame (east, north) horizontal vectors and
        headings into the plan frame (counter-clockwise positive).
    meta : dict
        JSON-able provenance: format version, plan hash, kernel and
        hyperparameters, survey walks, build settings.
    """

    floor: str
    origin_xy: np.ndarray
    resolution_m: float
    mean_ut: np.ndarray
    var_ut2: np.ndarray
    coverage_m: np.ndarray
    free: np.ndarray
    graph: FloorGraph
    earth_to_plan_rad: float = 0.0
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        ny, nx = self.free.shape
        for name in ("mean_ut", "var_ut2"):
            arr = getattr(self, name)
            if arr.shape != (ny, nx, 3):
                raise DataError(f"field map {name} has shape {arr.shape}, expected {(ny, nx, 3)}")
        if self.coverage_m.shape != (ny, nx):
            raise DataError(f"field map coverage_m has shape {self.coverage_m.shape}, expected {(ny, nx)}")
        if not self.resolution_m > 0:
            raise DataError(f"field map resolution must be > 0, got {self.resolution_m}")

    # -- things derived from the arrays, kept with the map --------------
    def derived(self, name, build):
        """``build(self)``, made once and kept with this map object (the
        filter's lookup tables: an evaluation localises many walks on one
        map). Rebuilt when the arrays were changed in place since (a cheap
        fingerprint of them is compared); not carried along when the map is
        copied or sent to a worker process."""
        cache = self.__dict__.get("_derived")
        stamp = self._stamp()
        if cache is None or cache[0] != stamp:
            cache = (stamp, {})
            object.__setattr__(self, "_derived", cache)  # a cache, not a field
        if name not in cache[1]:
            cache[1][name] = build(self)
        return cache[1][name]

    def _stamp(self):
        """Fingerprint of the arrays: their sums as bytes (NaN-safe to
        compare), shapes and the graph's size."""
        g = self.graph
        parts = [np.sum(a, dtype=np.float64).tobytes() for a in (self.mean_ut, self.var_ut2, self.coverage_m)]
        parts.append(int(np.count_nonzero(self.free)).to_bytes(8, "little"))
        parts.append(np.sum(g.nodes_xy, dtype=np.float64).tobytes())
        return (b"".join(parts), self.free.shape, g.n_nodes, g.n_edges, float(self.earth_to_plan_rad),
                float(self.resolution_m), tuple(np.asarray(self.origin_xy, float).tolist()))

    def __getstate__(self):
        state = dict(self.__dict__)
        state.pop("_derived", None)
        return state

    @property
    def shape(self):
        return self.free.shape

    @property
    def extent(self):
        """(xmin, xmax, ymin, ymax) of the cell centres, metres."""
        ny, nx = self.free.shape
        x0, y0 = self.origin_xy
        return (x0, x0 + (nx - 1) * self.resolution_m, y0, y0 + (ny - 1) * self.resolution_m)

    def cell_centres(self):
        """(ny, nx, 2) plan positions of the cell centres."""
        ny, nx = self.free.shape
        xs = self.origin_xy[0] + self.resolution_m * np.arange(nx)
        ys = self.origin_xy[1] + self.resolution_m * np.arange(ny)
        gx, gy = np.meshgrid(xs, ys)
        return np.stack([gx, gy], axis=-1)

    def _bilinear(self, xy):
        xy = np.asarray(xy, dtype=float)
        ny, nx = self.free.shape
        fx = (xy[..., 0] - self.origin_xy[0]) / self.resolution_m
        fy = (xy[..., 1] - self.origin_xy[1]) / self.resolution_m
        inside = (fx >= 0) & (fx <= nx - 1) & (fy >= 0) & (fy <= ny - 1)
        fx = np.clip(fx, 0, nx - 1)
        fy = np.clip(fy, 0, ny - 1)
        ix = np.minimum(np.floor(fx).astype(np.int64), max(nx - 2, 0))
        iy = np.minimum(np.floor(fy).astype(np.int64), max(ny - 2, 0))
        wx = fx - ix
        wy = fy - iy
        ix1 = np.minimum(ix + 1, nx - 1)
        iy1 = np.minimum(iy + 1, ny - 1)
        return ix, iy, ix1, iy1, wx, wy, inside

    @staticmethod
    def _mix(arr, ix, iy, ix1, iy1, wx, wy):
        if arr.ndim == 3:
            wx = wx[..., None]
            wy = wy[..., None]
        return (
            arr[iy, ix] * (1 - wx) * (1 - wy)
            + arr[iy, ix1] * wx * (1 - wy)
            + arr[iy1, ix] * (1 - wx) * wy
            + arr[iy1, ix1] * wx * wy
        )

    def lookup(self, xy):
        """Bilinear lookup of the map at plan positions.

        Parameters
        ----------
        xy : (..., 2) float, metres

        Returns
        -------
        mean_ut : (..., 3) float
        var_ut2 : (..., 3) float
        coverage_m : (...,) float; ``inf`` outside the raster
        """
        ix, iy, ix1, iy1, wx, wy, inside = self._bilinear(xy)
        mean = self._mix(self.mean_ut, ix, iy, ix1, iy1, wx, wy)
        var = self._mix(self.var_ut2, ix, iy, ix1, iy1, wx, wy)
        cov = self._mix(self.coverage_m, ix, iy, ix1, iy1, wx, wy)
        cov = np.where(inside, cov, np.inf)
        return mean, var, cov
