"""Nearest point of a floor graph for many query points, through a shapely 2
STRtree of the edges (the brute-force ``FloorGraph.project`` is the slow
twin it is tested against)."""

from __future__ import annotations

import numpy as np
import shapely

__all__ = ["GraphProjector"]


class GraphProjector:
    """Exact projection onto the graph's edges with a spatial index.

    Parameters
    ----------
    graph : FloorGraph
    """

    def __init__(self, graph):
        self.graph = graph
        a = graph.nodes_xy[graph.edges[:, 0]]
        b = graph.nodes_xy[graph.edges[:, 1]]
        coords = np.stack([a, b], axis=1)  # (E, 2, 2)
        self._lines = shapely.linestrings(coords)
        self._tree = shapely.STRtree(self._lines)
        self._a = a

    def project(self, xy):
        """Nearest graph position of (N, 2) plan points.

        Returns
        -------
        edge : (N,) int ; offset_m : (N,) float ; distance_m : (N,) float
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        n = xy.shape[0]
        g = self.graph
        if n == 0:
            return np.zeros(0, np.int64), np.zeros(0), np.zeros(0)
        idx = self._tree.query_nearest(shapely.points(xy), all_matches=False)
        edge = np.empty(n, dtype=np.int64)
        edge[idx[0]] = idx[1]
        rel = xy - self._a[edge]
        off = np.clip(np.sum(rel * g.unit[edge], axis=1), 0.0, g.length_m[edge])
        foot = self._a[edge] + off[:, None] * g.unit[edge]
        return edge, off, np.hypot(*(xy - foot).T)
