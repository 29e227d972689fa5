"""Fast bilinear lookup of a FieldMap's mean, variance and coverage in one
gather (the filter's hot path); same numbers as ``FieldMap.lookup``."""

from __future__ import annotations

import numpy as np

__all__ = ["MapTable"]


class MapTable:
    """The map's ``mean_ut``, ``var_ut2`` and ``coverage_m`` stacked as one
    ``(ny * nx, 7)`` table for a single gather per corner.

    Parameters
    ----------
    fmap : FieldMap
    """

    def __init__(self, fmap):
        ny, nx = fmap.free.shape
        self.nx, self.ny = nx, ny
        self.x0, self.y0 = float(fmap.origin_xy[0]), float(fmap.origin_xy[1])
        self.res = float(fmap.resolution_m)
        self.table = np.ascontiguousarray(
            np.concatenate([fmap.mean_ut, fmap.var_ut2, fmap.coverage_m[..., None]], axis=-1).reshape(ny * nx, 7)
        )

    def lookup(self, xy):
        """Bilinear lookup at (N, 2) plan positions.

        Returns
        -------
        mean_ut : (N, 3) ; var_ut2 : (N, 3) ; coverage_m : (N,), inf outside
        """
        nx, ny = self.nx, self.ny
        fx = (xy[:, 0] - self.x0) / self.res
        fy = (xy[:, 1] - self.y0) / self.res
        inside = (fx >= 0) & (fx <= nx - 1) & (fy >= 0) & (fy <= ny - 1)
        fx = np.clip(fx, 0, nx - 1)
        fy = np.clip(fy, 0, ny - 1)
        ix = np.minimum(fx.astype(np.int64), max(nx - 2, 0))
        iy = np.minimum(fy.astype(np.int64), max(ny - 2, 0))
        wx = (fx - ix)[:, None]
        wy = (fy - iy)[:, None]
        dx = 1 if nx > 1 else 0
        dy = nx if ny > 1 else 0
        i00 = iy * nx + ix
        t = self.table
        a = t[i00]
        b = t[i00 + dx]
        c = t[i00 + dy]
        d = t[i00 + dy + dx]
        top = a + (b - a) * wx
        bot = c + (d - c) * wx
        out = top + (bot - top) * wy
        cov = np.where(inside, out[:, 6], np.inf)
        return out[:, 0:3], out[:, 3:6], cov
