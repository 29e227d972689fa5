"""The floor-plan graph that positions live on.

A :class:`FloorGraph` is an undirected graph embedded in the plan: nodes
with plan coordinates in metres and straight edges between them. Positions
on it are ``(edge, offset_m)`` pairs, offset measured from the edge's first
node ``edges[e, 0]``. The arrays are laid out for vectorised use by the
particle filter: ``incident_ptr``/``incident_edges`` give, for every node,
the edges that touch it (CSR layout).

The graph type knows nothing of how a graph is built from a floor plan;
that lives in ``mapping.graphbuild``.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import shapely

from .errors import DataError

__all__ = ["FloorGraph"]


@dataclass(frozen=True, eq=False)
class FloorGraph:
    """Nodes and edges of a floor graph.

    Attributes
    ----------
    nodes_xy : (K, 2) float, metres, plan frame
    edges : (E, 2) int, node indices; ``edges[e, 0] != edges[e, 1]``
    length_m : (E,) float, straight-line edge lengths
    unit : (E, 2) float, unit vector from ``edges[e, 0]`` to ``edges[e, 1]``
    incident_ptr : (K + 1,) int, CSR row pointer into ``incident_edges``
    incident_edges : (2E,) int, the edges incident to each node
    """

    nodes_xy: np.ndarray
    edges: np.ndarray
    length_m: np.ndarray
    unit: np.ndarray
    incident_ptr: np.ndarray
    incident_edges: np.ndarray

    @classmethod
    def from_arrays(cls, nodes_xy, edges):
        """Build from node positions (K, 2) and edge index pairs (E, 2).

        Zero-length edges and self-loops are rejected.
        """
        nodes_xy = np.ascontiguousarray(nodes_xy, dtype=float).reshape(-1, 2)
        edges = np.ascontiguousarray(edges, dtype=np.int64).reshape(-1, 2)
        k = nodes_xy.shape[0]
        if edges.size and (edges.min() < 0 or edges.max() >= k):
            raise DataError(f"graph edges refer to nodes outside 0..{k - 1}")
        if not np.all(np.isfinite(nodes_xy)):
            raise DataError("graph node positions must be finite")
        vec = nodes_xy[edges[:, 1]] - nodes_xy[edges[:, 0]]
        length = np.hypot(vec[:, 0], vec[:, 1])
        if np.any(length <= 0):
            raise DataError("graph has a zero-length edge or a self-loop")
        unit = vec / length[:, None]
        ends = np.concatenate([edges[:, 0], edges[:, 1]])
        eid = np.concatenate([np.arange(len(edges)), np.arange(len(edges))])
        order = np.argsort(ends, kind="stable")
        counts = np.bincount(ends, minlength=k)
        ptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        return cls(nodes_xy, edges, length, unit, ptr, eid[order].astype(np.int64))

    # -- basic properties -------------------------------------------------
    @property
    def n_nodes(self) -> int:
        return int(self.nodes_xy.shape[0])

    @property
    def n_edges(self) -> int:
        return int(self.edges.shape[0])

    @property
    def total_length_m(self) -> float:
        return float(self.length_m.sum())

    def degree(self):
        """(K,) int, number of incident edges of each node."""
        return np.diff(self.incident_ptr)

    # -- positions ---------------------------------------------------------
    def point(self, edge, offset_m):
        """Plan position of ``(edge, offset_m)`` pairs.

        Parameters
        ----------
        edge : (N,) int
        offset_m : (N,) float, clipped to ``[0, length_m[edge]]``

        Returns
        -------
        (N, 2) float, metres
        """
        edge = np.asarray(edge, dtype=np.int64)
        off = np.clip(np.asarray(offset_m, dtype=float), 0.0, self.length_m[edge])
        return self.nodes_xy[self.edges[edge, 0]] + self.unit[edge] * off[..., None]

    @functools.cached_property
    def _edge_tree(self):
        """shapely STRtree over the edges as LineStrings (built on first use)."""
        lines = shapely.linestrings(self.nodes_xy[self.edges])  # (E, 2, 2) coordinates
        return shapely.STRtree(lines)

    def project(self, xy):
        """Nearest point of the graph to each query point (exact).

        Candidate edges come from a shapely STRtree of the edges
        (``query_nearest``); the foot point on the chosen edge is computed
        here. :meth:`project_brute` is the slow, obviously correct twin.

        Parameters
        ----------
        xy : (N, 2) float, metres

        Returns
        -------
        edge : (N,) int
        offset_m : (N,) float
        distance_m : (N,) float
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        n = xy.shape[0]
        if n == 0:
            return np.zeros(0, np.int64), np.zeros(0), np.zeros(0)
        idx = self._edge_tree.query_nearest(shapely.points(xy), all_matches=False)
        edge = np.empty(n, dtype=np.int64)
        edge[idx[0]] = idx[1]
        a = self.nodes_xy[self.edges[edge, 0]]
        off = np.clip(np.sum((xy - a) * self.unit[edge], axis=1), 0.0, self.length_m[edge])
        foot = a + off[:, None] * self.unit[edge]
        return edge, off, np.hypot(*(xy - foot).T)

    def project_brute(self, xy, *, chunk=256):
        """Same as :meth:`project` by brute force over all edges, in chunks
        of ``chunk`` points (memory ``chunk x E x 2`` floats)."""
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        a = self.nodes_xy[self.edges[:, 0]]
        n = xy.shape[0]
        best_e = np.empty(n, dtype=np.int64)
        best_o = np.empty(n)
        best_d = np.empty(n)
        for s in range(0, n, chunk):
            q = xy[s : s + chunk]
            rel = q[:, None, :] - a[None, :, :]  # (n, E, 2)
            off = np.einsum("nej,ej->ne", rel, self.unit)
            off = np.clip(off, 0.0, self.length_m[None, :])
            foot = a[None, :, :] + off[..., None] * self.unit[None, :, :]
            d2 = np.sum((q[:, None, :] - foot) ** 2, axis=-1)
            e = np.argmin(d2, axis=1)
            rows = np.arange(q.shape[0])
            best_e[s : s + chunk] = e
            best_o[s : s + chunk] = off[rows, e]
            best_d[s : s + chunk] = np.sqrt(d2[rows, e])
        return best_e, best_o, best_d

    def sample_uniform(self, n, rng):
        """``n`` positions spread uniformly over the total edge length.

        Parameters
        ----------
        n : int
        rng : numpy.random.Generator

        Returns
        -------
        edge : (n,) int, offset_m : (n,) float
        """
        cum = np.cumsum(self.length_m)
        s = rng.uniform(0.0, cum[-1], size=n)
        edge = np.searchsorted(cum, s, side="right").clip(0, self.n_edges - 1)
        offset = s - (cum[edge] - self.length_m[edge])
        return edge, np.clip(offset, 0.0, self.length_m[edge])

    # -- conversions -------------------------------------------------------
    @classmethod
    def from_networkx(cls, graph, *, pos="pos"):
        """From a networkx graph whose nodes carry ``pos=(x, y)`` in metres."""
        names = list(graph.nodes)
        index = {name: i for i, name in enumerate(names)}
        xy = np.array([graph.nodes[name][pos] for name in names], dtype=float).reshape(-1, 2)
        edges = np.array([(index[u], index[v]) for u, v in graph.edges if u != v], dtype=np.int64).reshape(-1, 2)
        return cls.from_arrays(xy, edges)

    def to_networkx(self):
        """As a ``networkx.Graph`` with node attribute ``pos`` and edge
        attribute ``length``."""
        import networkx as nx

        g = nx.Graph()
        for i, (x, y) in enumerate(self.nodes_xy):
            g.add_node(i, pos=(float(x), float(y)))
        for e, (u, v) in enumerate(self.edges):
            g.add_edge(int(u), int(v), length=float(self.length_m[e]), edge=e)
        return g

    def to_geojson(self, *, floor=None):
        """GeoJSON FeatureCollection of the edges as LineStrings with
        ``kind: path`` (plan metres), the same shape a hand-drawn graph is
        read from."""
        feats = []
        for e, (u, v) in enumerate(self.edges):
            feats.append(
                {
                    "type": "Feature",
                    "properties": {"kind": "path", "edge": e, "length_m": round(float(self.length_m[e]), 4)},
                    "geometry": {
                        "type": "LineString",
                        "coordinates": [self.nodes_xy[u].round(4).tolist(), self.nodes_xy[v].round(4).tolist()],
                    },
                }
            )
        out = {"type": "FeatureCollection", "features": feats}
        if floor is not None:
            out["plan"] = {"floor": floor, "units": "m"}
        return out
