"""Fast bilinear lookup of a FieldMap's mean, variance and coverage (the
filter's hot path); the same numbers as ``FieldMap.lookup`` to float32
precision.

Particles live on the floor graph, so only the raster cells that the graph
passes through are ever looked up. :class:`MapTable` keeps, for those cells
only, the four bilinear coefficients ``A, B, C, D`` of the eight channels
(mean 3, coverage 1, variance 3, padding 1) in float32: one lookup is one
gather of 32 numbers per particle and ``A + B wx + (C + D wx) wy``.

Layout: the eight channels of one coefficient (32 bytes) form one opaque
item, so the table is (4, M) items. ``np.take`` along the cell axis then
copies 32-byte items (much faster than 4-byte ones, and twice as fast as
16-byte ones); viewed as float32 the result is (4, 8 N): one row per
coefficient, particle-major inside a row, and the arithmetic runs on
contiguous rows with the weights repeated eight times. The (N, 3) results
are strided views. A query in a cell that
is not in the table (a point off the graph) falls back to ``FieldMap.lookup``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["MapTable"]

#: coverage values beyond this are stored as this (float32 arithmetic on inf
#: would give NaN coefficients); any real coverage limit is far below
_COVERAGE_CAP_M = 1e6

#: one table item: the eight float32 channels of one coefficient
_ITEM = np.dtype((np.void, 32))


def _graph_cells(fmap, nx, ny):
    """(ny * nx,) bool: cells that a point on an edge of the graph can fall in."""
    g = fmap.graph
    res = float(fmap.resolution_m)
    hit = np.zeros(ny * nx, dtype=bool)
    if g.n_edges == 0:
        return hit
    # points every res / 4 along every edge (and both ends), a 3 x 3 block
    # of cells around each
    k = np.maximum(np.ceil(g.length_m / (0.25 * res)).astype(np.int64), 1)
    e = np.repeat(np.arange(g.n_edges), k + 1)
    frac = np.arange(e.size) - np.repeat(np.cumsum(k + 1) - (k + 1), k + 1)
    off = frac / np.repeat(k, k + 1) * g.length_m[e]
    xy = g.point(e, off)
    ix = np.floor((xy[:, 0] - fmap.origin_xy[0]) / res).astype(np.int64)
    iy = np.floor((xy[:, 1] - fmap.origin_xy[1]) / res).astype(np.int64)
    for dy in (-1, 0, 1):  # 9 shifts, setup only
        for dx in (-1, 0, 1):
            jx = np.clip(ix + dx, 0, max(nx - 2, 0))
            jy = np.clip(iy + dy, 0, max(ny - 2, 0))
            hit[jy * nx + jx] = True
    return hit


class MapTable:
    """Bilinear coefficients of the map's cells along the graph.

    Parameters
    ----------
    fmap : FieldMap (its graph says which cells are needed)

    Attributes
    ----------
    row : (ny * nx,) int32, row of each cell in ``coef`` (-1 = not stored)
    coef : (4, M) items of 32 bytes holding eight float32: item ``(k, m)``
        is the channels of coefficient ``k`` (``A, B, C, D``) of stored cell
        ``m``; channels: mean east, north, up, coverage, variance east, north,
        up, 0
    """

    def __init__(self, fmap):
        ny, nx = fmap.free.shape
        self.fmap = fmap
        self.nx, self.ny = nx, ny
        self.x0, self.y0 = float(fmap.origin_xy[0]), float(fmap.origin_xy[1])
        self.res = float(fmap.resolution_m)
        cells = np.flatnonzero(_graph_cells(fmap, nx, ny))
        iy, ix = np.divmod(cells, nx)
        ix1 = np.minimum(ix + 1, nx - 1)
        iy1 = np.minimum(iy + 1, ny - 1)
        cov = np.minimum(fmap.coverage_m, _COVERAGE_CAP_M)[..., None]
        pad = np.zeros(cov.shape)
        chans = [np.concatenate([fmap.mean_ut[j, i], cov[j, i], fmap.var_ut2[j, i], pad[j, i]], axis=-1)
                 for j, i in ((iy, ix), (iy, ix1), (iy1, ix), (iy1, ix1))]
        a, b, c, d = chans  # (M, 8) float64 each
        octs = np.zeros((4, cells.size, 8), dtype=np.float32)
        for k, v in enumerate((a, b - a, c - a, d - c - b + a)):
            octs[k] = v
        self.coef = octs.view(_ITEM).reshape(4, cells.size)
        self.row = np.full(ny * nx, -1, dtype=np.int32)
        self.row[cells] = np.arange(cells.size, dtype=np.int32)

    def lookup(self, xy):
        """Bilinear lookup at (N, 2) plan positions.

        Returns
        -------
        mean_ut : (N, 3) ; var_ut2 : (N, 3) ; coverage_m : (N,), inf outside
            (float32 where the table has the cell)
        """
        return self.lookup_xy(xy[:, 0], xy[:, 1])

    def lookup_xy(self, x, y):
        """:meth:`lookup` at positions given as (N,) ``x`` and ``y``."""
        nx, ny = self.nx, self.ny
        n = x.shape[0]
        fx = x - self.x0
        fx *= 1.0 / self.res
        fy = y - self.y0
        fy *= 1.0 / self.res
        inside = None
        if not (fx.min(initial=0.0) >= 0 and fx.max(initial=0.0) <= nx - 1
                and fy.min(initial=0.0) >= 0 and fy.max(initial=0.0) <= ny - 1):
            inside = (fx >= 0) & (fx <= nx - 1) & (fy >= 0) & (fy <= ny - 1)
            np.clip(fx, 0, nx - 1, out=fx)
            np.clip(fy, 0, ny - 1, out=fy)
        ix = fx.astype(np.int32)  # fx >= 0: truncation is floor
        np.minimum(ix, max(nx - 2, 0), out=ix)
        iy = fy.astype(np.int32)
        np.minimum(iy, max(ny - 2, 0), out=iy)
        wx = np.subtract(fx, ix, dtype=np.float32).repeat(8)  # one weight per channel
        wy = np.subtract(fy, iy, dtype=np.float32).repeat(8)
        iy *= nx
        iy += ix
        row = self.row.take(iy)
        # one gather; rows of cells not in the table (-1) are replaced below
        g = self.coef.take(row, axis=1).view(np.float32)  # (4, 8 N)
        out, b, c, d = g
        b *= wx
        out += b
        d *= wx
        d += c
        d *= wy
        out += d  # A + B wx + (C + D wx) wy
        q = out.reshape(n, 8)
        mean, cov, var = q[:, 0:3], q[:, 3], q[:, 4:7]
        if inside is not None and not inside.all():
            cov = np.where(inside, cov, np.inf)
        if row.size and row.min() < 0:
            missing = row < 0
            xy = np.column_stack([x[missing], y[missing]])
            m, v, c = self.fmap.lookup(xy)
            mean, var, cov = mean.astype(float), var.astype(float), cov.astype(float)
            mean[missing], var[missing], cov[missing] = m, v, c
        return mean, var, cov
