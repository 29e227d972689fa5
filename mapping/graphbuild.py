"""Automatic floor-plan graph: corridor centre lines plus a lattice over
wide spaces, joined into one connected graph (returned as
:class:`fingerprint.floorgraph.FloorGraph`).

Method
------
1. *Centre lines* (medial axis). The free-space boundary is densified and
   the Voronoi diagram of those points is computed
   (:class:`scipy.spatial.Voronoi`); Voronoi edges with both ends inside free
   space, and wholly inside it, approximate the medial axis (a standard
   construction: the Voronoi vertices of dense boundary samples converge
   to the medial axis). Each vertex's clearance (distance to the nearest
   boundary sample) is kept. Short side branches towards convex corners are
   pruned (a leaf branch shorter than ``spur_factor`` times the clearance at
   its junction), and passages with clearance below ``min_clearance_m`` are
   dropped.
2. *Lattice.* Spaces wider than ``wide_threshold_m`` are found by a
   morphological opening of free space with a disc of that diameter
   (shapely buffers); a regular lattice (square by default) of
   ``lattice_spacing_m`` covers them, keeping ``wall_margin_m`` from the
   walls. Its rows run along the dominant wall direction of each separate
   part of the lattice zone, so that walks
   along walls, aisles and halls have straight lines to follow (optionally
   each separate part of it is centred on its own bounds). Centre lines are
   replaced by the lattice where it covers them (within 0.75 spacing of a
   lattice node), and kept elsewhere.
3. *Joining.* Centre-line ends are tied to the nearest lattice node in
   reach (a corridor opening into a hall is entered there); remaining
   pieces are joined by the shortest straight links that lie inside free
   space (Kruskal order); pieces in free-space parts that touch nowhere (the
   drawing closes them off, e.g. doors drawn shut) are tied by the shortest
   *bridge* links up to ``max_bridge_m``, reported as such. What still cannot
   be reached is dropped and reported.
4. Every edge is split so none is longer than ``max_edge_m``.

Every non-bridge edge is checked to lie inside free space with shapely.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import shapely
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import Voronoi, cKDTree

from fingerprint.errors import ConfigError, DataError, FormatError
from fingerprint.floorgraph import FloorGraph

from .floorplan import feature_label
from .site import read_json_file

__all__ = [
    "build_graph",
    "build_graph_with_report",
    "GraphBuildReport",
    "load_graph_geojson",
    "graph_from_lines",
    "plan_summary",
    "graph_components",
    "LATTICE_KINDS",
    "dominant_wall_angle",
]

#: Lattice layouts over wide spaces (see ``_lattice``).
LATTICE_KINDS = ("triangular", "square", "diagonal")


@dataclass
class GraphBuildReport:
    """What :func:`build_graph_with_report` did.

    Attributes
    ----------
    build_time_s : float
    n_nodes, n_edges : int
    total_length_m, centreline_length_m, lattice_length_m : float
    n_free_parts : int, parts of the free space
    dropped_parts : int, free-space parts too small to hold a graph
    dropped_area_m2 : float, their area
    dropped_pieces : int, graph pieces that could not be joined
    dropped_length_m : float, their edge length
    bridge_edges : list of int, indices (in the final graph) of edges that
        leave free space to join parts the drawing closes off
    bridge_length_m : float
    edges_outside_free : int, non-bridge edges not inside free space (0)
    lattice_angles_deg : list of float, distinct angles of the lattice rows
        to plan +x (one per separate part of the lattice zone)
    """

    build_time_s: float = 0.0
    n_nodes: int = 0
    n_edges: int = 0
    total_length_m: float = 0.0
    centreline_length_m: float = 0.0
    lattice_length_m: float = 0.0
    n_free_parts: int = 0
    dropped_parts: int = 0
    dropped_area_m2: float = 0.0
    dropped_pieces: int = 0
    dropped_length_m: float = 0.0
    bridge_edges: list = field(default_factory=list)
    bridge_length_m: float = 0.0
    edges_outside_free: int = 0
    lattice_angles_deg: list = field(default_factory=list)

    def to_dict(self):
        d = dict(self.__dict__)
        d["n_bridges"] = len(self.bridge_edges)
        d["bridge_edges"] = [int(e) for e in self.bridge_edges]
        return {k: (round(v, 4) if isinstance(v, float) else v) for k, v in d.items()}


# --------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------
def _segments_inside(region, a, b):
    """(S,) bool: segment a[i]-b[i] lies inside ``region`` (prepared)."""
    if len(a) == 0:
        return np.zeros(0, dtype=bool)
    lines = shapely.linestrings(np.stack([a, b], axis=1))
    return shapely.contains(region, lines)


def _lengths(xy, edges):
    d = xy[edges[:, 1]] - xy[edges[:, 0]]
    return np.hypot(d[:, 0], d[:, 1])


def _dedupe(xy, edges, flags=None, *, tol=1e-6):
    """Merge coincident nodes, drop self-loops and repeated edges."""
    key = np.round(xy / tol).astype(np.int64)
    _, first, inv = np.unique(key, axis=0, return_index=True, return_inverse=True)
    inv = inv.reshape(-1)
    xy2 = xy[first]
    e = inv[edges]
    keep = e[:, 0] != e[:, 1]
    e = np.sort(e[keep], axis=1)
    f = None if flags is None else flags[keep]
    e, idx = np.unique(e, axis=0, return_index=True)
    if f is not None:
        f = f[idx]
    return xy2, e, f


def _subdivide(xy, edges, max_edge_m, flags=None):
    """Split each edge into equal pieces no longer than ``max_edge_m``
    (vectorised). Returns new xy, edges and per-edge flags."""
    if flags is None:
        flags = np.zeros(len(edges), dtype=bool)
    if len(edges) == 0 or max_edge_m is None:
        return xy, edges, flags
    length = _lengths(xy, edges)
    # 0.1 % slack so that edges of exactly max_edge_m read back from rounded
    # coordinates are not split in two
    pieces = np.maximum(1, np.ceil(length / max_edge_m - 1e-3).astype(np.int64))
    n_new = pieces - 1
    total_new = int(n_new.sum())
    if total_new == 0:
        return xy, edges, flags
    k = len(xy)
    owner = np.repeat(np.arange(len(edges)), n_new)
    start = np.concatenate([[0], np.cumsum(n_new)[:-1]])
    j = np.arange(total_new) - np.repeat(start, n_new) + 1  # 1..n_new
    frac = j / pieces[owner]
    a = xy[edges[owner, 0]]
    b = xy[edges[owner, 1]]
    new_xy = a + (b - a) * frac[:, None]
    new_ids = k + np.arange(total_new)
    # chain of node ids per edge: u, new..., v
    chain_len = pieces + 1
    chain_start = np.concatenate([[0], np.cumsum(chain_len)[:-1]])
    chain = np.empty(int(chain_len.sum()), dtype=np.int64)
    chain[chain_start] = edges[:, 0]
    chain[chain_start + pieces] = edges[:, 1]
    pos_in_chain = np.repeat(chain_start, n_new) + j
    chain[pos_in_chain] = new_ids
    # edges: consecutive pairs within each chain
    last = np.zeros(len(chain), dtype=bool)
    last[chain_start + pieces] = True
    src = np.nonzero(~last)[0]
    out_edges = np.column_stack([chain[src], chain[src + 1]])
    out_flags = np.repeat(flags, pieces)
    return np.vstack([xy, new_xy]), out_edges, out_flags


def _components(n, edges):
    if n == 0:
        return 0, np.zeros(0, dtype=np.int64)
    m = coo_matrix((np.ones(len(edges)), (edges[:, 0], edges[:, 1])), shape=(n, n))
    return connected_components(m, directed=False)


class _UnionFind:
    def __init__(self, n):
        self.p = np.arange(n)

    def find(self, i):
        p = self.p
        root = i
        while p[root] != root:
            root = p[root]
        while p[i] != root:
            p[i], i = root, p[i]
        return root

    def union(self, a, b):
        ra, rb = self.find(a), self.find(b)
        if ra == rb:
            return False
        self.p[rb] = ra
        return True


# --------------------------------------------------------------------------
# centre lines
# --------------------------------------------------------------------------
def _medial_axis(free, *, boundary_step_m, min_clearance_m, spur_factor, spur_extra_m):
    """Voronoi medial-axis approximation of ``free``.

    Returns
    -------
    xy : (V, 2) float, vertex positions, metres
    radius_m : (V,) float, clearance of each vertex
    edges : (S, 2) int
    """
    boundary = shapely.segmentize(shapely.boundary(free), boundary_step_m)
    pts = np.unique(np.round(shapely.get_coordinates(boundary), 6), axis=0)
    if len(pts) < 4:
        return np.zeros((0, 2)), np.zeros(0), np.zeros((0, 2), dtype=np.int64)
    vor = Voronoi(pts)
    vx = vor.vertices
    inside = shapely.contains_xy(free, vx[:, 0], vx[:, 1])
    radius = np.full(len(vx), -1.0)
    radius[inside] = cKDTree(pts).query(vx[inside])[0]
    rv = np.asarray(vor.ridge_vertices, dtype=np.int64).reshape(-1, 2)  # 2-D: two vertices per ridge
    rv = rv[(rv >= 0).all(axis=1)]
    ok = inside[rv[:, 0]] & inside[rv[:, 1]]
    ok &= (radius[rv[:, 0]] >= min_clearance_m) & (radius[rv[:, 1]] >= min_clearance_m)
    rv = rv[ok]
    rv = rv[rv[:, 0] != rv[:, 1]]
    rv = rv[_segments_inside(free, vx[rv[:, 0]], vx[rv[:, 1]])]
    used = np.unique(rv)
    remap = np.full(len(vx), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    xy, radius, edges = vx[used], radius[used], remap[rv]
    xy, edges, _ = _dedupe(xy, edges)
    radius = cKDTree(pts).query(xy)[0] if len(xy) else np.zeros(0)
    edges = _prune_spurs(xy, radius, edges, spur_factor=spur_factor, spur_extra_m=spur_extra_m)
    return xy, radius, edges


def _prune_spurs(xy, radius, edges, *, spur_factor, spur_extra_m, rounds=3):
    """Remove leaf branches shorter than ``spur_factor * r_junction +
    spur_extra_m`` (r_junction = clearance where the branch meets the rest).
    All short branches of a round go at once (so both corner branches at
    the end of a corridor go); a junction keeps its longest branch when all
    of its branches are short. A few rounds so that forks of spurs go too."""
    g = nx.Graph()
    g.add_nodes_from(range(len(xy)))
    g.add_edges_from(map(tuple, edges))
    for _ in range(rounds):
        by_junction = {}
        for leaf in [n for n, d in g.degree() if d == 1]:
            chain, prev, cur, length = [leaf], None, leaf, 0.0
            while True:
                nbrs = [m for m in g.neighbors(cur) if m != prev]
                if not nbrs:
                    break
                nxt = nbrs[0]
                length += float(np.hypot(*(xy[nxt] - xy[cur])))
                prev, cur = cur, nxt
                if g.degree(cur) != 2:
                    break
                chain.append(cur)
            if g.degree(cur) >= 3:
                by_junction.setdefault(cur, []).append((length, chain))
        removed = False
        for junction, branches in by_junction.items():
            limit = spur_factor * radius[junction] + spur_extra_m
            short = [b for b in branches if b[0] < limit]
            if len(short) >= g.degree(junction):
                short.remove(max(short, key=lambda b: b[0]))
            for _, chain in short:
                g.remove_nodes_from(chain)
                removed = True
        if not removed:
            break
    g.remove_nodes_from([n for n, d in g.degree() if d == 0])
    return np.array(list(g.edges), dtype=np.int64).reshape(-1, 2)


def _simplify_chains(xy, edges, free, *, tolerance_m):
    """Replace runs of degree-2 nodes by simplified polylines (shapely
    simplify), keeping junctions and ends; a simplified run that would leave
    free space keeps its original vertices."""
    if len(edges) == 0 or tolerance_m <= 0:
        return xy, edges
    g = nx.Graph()
    g.add_edges_from(map(tuple, edges))
    key = {n for n, d in g.degree() if d != 2}
    # pure cycles have no key node: pick one per cycle
    for comp in nx.connected_components(g):
        if not key.intersection(comp):
            key.add(next(iter(comp)))
    seen = set()
    chains = []
    for k in key:
        for nb in g.neighbors(k):
            if (k, nb) in seen:
                continue
            chain = [k, nb]
            seen.add((k, nb))
            seen.add((nb, k))
            while chain[-1] not in key:
                cur = chain[-1]
                nxt = next(m for m in g.neighbors(cur) if m != chain[-2])
                seen.add((cur, nxt))
                seen.add((nxt, cur))
                chain.append(nxt)
            chains.append(chain)
    flat = np.concatenate(chains)
    owner = np.repeat(np.arange(len(chains)), [len(c) for c in chains])
    lines = shapely.linestrings(xy[flat], indices=owner)
    simple = shapely.simplify(lines, tolerance_m, preserve_topology=False)
    good = shapely.contains(free, simple)
    out_xy = [xy]
    out_edges = []
    nxt_id = len(xy)
    for chain, line, ok in zip(chains, simple, good):
        if not ok:
            out_edges.extend(zip(chain[:-1], chain[1:]))
            continue
        coords = shapely.get_coordinates(line)
        ids = [chain[0]]
        inner = coords[1:-1]
        if len(inner):
            out_xy.append(inner)
            ids.extend(range(nxt_id, nxt_id + len(inner)))
            nxt_id += len(inner)
        ids.append(chain[-1])
        out_edges.extend(zip(ids[:-1], ids[1:]))
    xy2 = np.vstack(out_xy)
    e = np.array(out_edges, dtype=np.int64).reshape(-1, 2)
    used = np.unique(e)
    remap = np.full(len(xy2), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    return xy2[used], remap[e]


# --------------------------------------------------------------------------
# lattice
# --------------------------------------------------------------------------
def dominant_wall_angle(free, *, step_deg=0.5, spread_deg=3.0):
    """Direction of the walls of ``free`` modulo 90 degrees, radians in
    [-pi/4, pi/4): the peak of the length-weighted density of the boundary
    segment angles folded onto a quarter turn (a von Mises kernel of about
    ``spread_deg`` on four times the angle). The peak, not the mean, so that
    a plan with two wings at different angles gets the angle of the longer
    walls rather than one in between (common practice, no source).

    Parameters
    ----------
    free : shapely (multi)polygon, plan metres

    Returns
    -------
    float, radians
    """
    rings = shapely.get_parts(shapely.boundary(free))
    d_all = [np.diff(c, axis=0) for c in map(shapely.get_coordinates, rings) if len(c) >= 2]
    if not d_all:
        return 0.0
    d = np.vstack(d_all)
    w = np.hypot(d[:, 0], d[:, 1])
    if not w.sum() > 0:
        return 0.0
    a4 = 4.0 * np.arctan2(d[:, 1], d[:, 0])
    cand = np.radians(np.arange(-45.0, 45.0, step_deg))
    kappa = 1.0 / np.radians(4.0 * spread_deg) ** 2
    dens = np.exp(kappa * (np.cos(4.0 * cand[:, None] - a4[None, :]) - 1.0)) @ w
    return float(cand[int(np.argmax(dens))])


def _rotate_xy(xy, angle_rad):
    """(N, 2) points rotated by ``angle_rad`` (CCW) about the plan origin."""
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.column_stack([c * xy[:, 0] - s * xy[:, 1], s * xy[:, 0] + c * xy[:, 1]])


def _lattice(free, wide, *, spacing_m, wall_margin_m, kind="square", angle_rad=None, centred=False):
    """Regular lattice over ``wide``, nodes at least ``wall_margin_m`` from
    walls, edges inside free space.

    kind : "square" (4 neighbours), "diagonal" (square plus both diagonals
        of each cell, crossing at a cell-centre node) or "triangular"
        (6 neighbours, rows ``spacing_m * sqrt(3) / 2`` apart)
    angle_rad : float, lattice rows run at this angle to plan +x (CCW); None
        = each separate part of the lattice zone along its own dominant wall
        direction (:func:`dominant_wall_angle`), so that a walk along a wall
        or an aisle has a straight lattice line to follow, not a zigzag
    centred : bool, each separate part of the lattice zone gets its own
        phase, a node at the centre of the part's bounds (a hall of about the
        threshold width gets a lattice line down its middle); False = nodes
        on multiples of the spacing (in the rotated frame)

    Returns xy (L, 2), edges (M, 2) and the (P,) angles used (radians)."""
    if kind not in LATTICE_KINDS:
        raise ConfigError(f"unknown lattice kind {kind!r}; valid: {', '.join(LATTICE_KINDS)}")
    zone = shapely.intersection(wide, shapely.buffer(free, -wall_margin_m, quad_segs=4))
    if zone.is_empty:
        return np.zeros((0, 2)), np.zeros((0, 2), dtype=np.int64), np.zeros(0)
    from shapely import affinity

    pieces = list(shapely.get_parts(zone)) if (centred or angle_rad is None) else [zone]
    all_xy, all_e, angles, n = [], [], [], 0
    for piece in pieces:
        ang = dominant_wall_angle(piece) if angle_rad is None else float(angle_rad)
        rot = affinity.rotate(piece, -ang, origin=(0.0, 0.0), use_radians=True) if ang else piece
        xy, e = _lattice_piece(rot, spacing_m=spacing_m, kind=kind, centred=centred)
        all_xy.append(_rotate_xy(xy, ang) if ang and len(xy) else xy)
        all_e.append(e + n)
        angles.append(ang)
        n += len(xy)
    xy = np.vstack(all_xy)
    e = np.vstack(all_e)
    if len(e):
        e = e[_segments_inside(free, xy[e[:, 0]], xy[e[:, 1]])]
    return xy, e, np.array(angles)


def _lattice_piece(zone, *, spacing_m, kind, centred):
    """Lattice nodes inside one zone polygon (lattice frame) and the edges
    between neighbours (not yet checked against free space)."""
    shapely.prepare(zone)
    x0, y0, x1, y1 = zone.bounds
    dy = spacing_m * (np.sqrt(3.0) / 2.0 if kind == "triangular" else 1.0)
    if centred:
        px, py = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    else:
        px = py = 0.0
    i = np.arange(np.floor((x0 - px) / spacing_m) - 1, np.ceil((x1 - px) / spacing_m) + 2)
    j = np.arange(np.floor((y0 - py) / dy), np.ceil((y1 - py) / dy) + 1)
    gi, gj = np.meshgrid(i, j)
    gx = gi * spacing_m + px
    if kind == "triangular":
        gx = gx + 0.5 * spacing_m * (gj.astype(np.int64) % 2)
    gy = gj * dy + py
    mask = shapely.contains_xy(zone, gx, gy)
    ids = np.full(mask.shape, -1, dtype=np.int64)
    ids[mask] = np.arange(int(mask.sum()))
    xy = np.column_stack([gx[mask], gy[mask]])

    def link(a_ids, b_ids):
        ok = (a_ids >= 0) & (b_ids >= 0)
        return np.column_stack([a_ids[ok], b_ids[ok]])

    parts = [link(ids[:, :-1], ids[:, 1:])]  # along rows
    if kind == "triangular":
        odd = (j.astype(np.int64) % 2 == 1)[:-1]  # parity of the lower row
        lo, up = ids[:-1, :], ids[1:, :]
        ev, od = ~odd, odd
        # even lower row: up-left (i-1) and up-right (i); odd: (i) and (i+1)
        parts.append(link(lo[ev, 1:], up[ev, :-1]))
        parts.append(link(lo[ev, :], up[ev, :]))
        parts.append(link(lo[od, :], up[od, :]))
        parts.append(link(lo[od, :-1], up[od, 1:]))
    else:
        parts.append(link(ids[:-1, :], ids[1:, :]))
    e = np.vstack(parts)
    if kind == "diagonal":
        full = (ids[:-1, :-1] >= 0) & (ids[:-1, 1:] >= 0) & (ids[1:, :-1] >= 0) & (ids[1:, 1:] >= 0)
        cy, cx = np.nonzero(full)
        centre = np.column_stack([gx[cy, cx] + 0.5 * spacing_m, gy[cy, cx] + 0.5 * spacing_m])
        cid = len(xy) + np.arange(len(centre))
        corners = [ids[cy, cx], ids[cy, cx + 1], ids[cy + 1, cx], ids[cy + 1, cx + 1]]
        e = np.vstack([e] + [np.column_stack([cid, c]) for c in corners])
        xy = np.vstack([xy, centre])
    return xy, e


# --------------------------------------------------------------------------
# joining
# --------------------------------------------------------------------------
def _tie_ends(xy, edges, sk_e, n_sk, la_e, free, *, radius_m, k=8):
    """Link each centre-line end (degree 1 among centre-line edges) to the
    nearest lattice node within ``radius_m`` whose link lies inside free
    space. ``xy`` holds the ``n_sk`` centre-line nodes first."""
    if len(sk_e) == 0 or len(la_e) == 0:
        return edges
    deg = np.bincount(sk_e.ravel(), minlength=n_sk)
    leaves = np.nonzero(deg == 1)[0]
    if len(leaves) == 0:
        return edges
    lat = np.unique(la_e) + n_sk
    dist, idx = cKDTree(xy[lat]).query(xy[leaves], k=min(k, len(lat)), distance_upper_bound=radius_m)
    dist = dist.reshape(len(leaves), -1)
    idx = idx.reshape(len(leaves), -1)
    done = np.zeros(len(leaves), dtype=bool)
    new = []
    for col in range(dist.shape[1]):
        todo = np.nonzero(~done & np.isfinite(dist[:, col]))[0]
        if len(todo) == 0:
            break
        a = leaves[todo]
        b = lat[idx[todo, col]]
        ok = _segments_inside(free, xy[a], xy[b])
        new.extend(zip(a[ok], b[ok]))
        done[todo[ok]] = True
    if new:
        edges = np.vstack([edges, np.array(new, dtype=np.int64)])
    return edges


def _join_local(xy, edges, free, *, radius_m):
    """Kruskal over candidate links between different pieces, shortest
    first, keeping links inside free space."""
    n_comp, label = _components(len(xy), edges)
    if n_comp <= 1:
        return edges
    tree = cKDTree(xy)
    pairs = tree.query_pairs(radius_m, output_type="ndarray")
    if len(pairs) == 0:
        return edges
    pairs = pairs[label[pairs[:, 0]] != label[pairs[:, 1]]]
    if len(pairs) == 0:
        return edges
    d = _lengths(xy, pairs)
    order = np.argsort(d, kind="stable")
    pairs = pairs[order]
    uf = _UnionFind(n_comp)
    new = []
    # check in blocks so shapely works on arrays
    block = 4096
    for s in range(0, len(pairs), block):
        p = pairs[s : s + block]
        la, lb = label[p[:, 0]], label[p[:, 1]]
        # skip candidates already in the same set
        cand = np.array([uf.find(a) != uf.find(b) for a, b in zip(la, lb)], dtype=bool)
        if not cand.any():
            continue
        inside = np.zeros(len(p), dtype=bool)
        inside[cand] = _segments_inside(free, xy[p[cand, 0]], xy[p[cand, 1]])
        for i in np.nonzero(cand & inside)[0]:
            if uf.union(la[i], lb[i]):
                new.append(p[i])
    if new:
        edges = np.vstack([edges, np.array(new, dtype=np.int64)])
    return edges


def _join_bridges(xy, edges, flags, free, *, max_bridge_m):
    """Tie remaining pieces together by the shortest link between each pair
    of pieces (Kruskal, lengths up to ``max_bridge_m``). Links inside free
    space are not flagged; others are bridges."""
    n_comp, label = _components(len(xy), edges)
    if n_comp <= 1:
        return edges, flags
    groups = [np.nonzero(label == c)[0] for c in range(n_comp)]
    trees = [cKDTree(xy[g]) for g in groups]
    cand = []
    for i in range(n_comp):
        for j in range(i + 1, n_comp):
            small, big = (i, j) if len(groups[i]) <= len(groups[j]) else (j, i)
            dist, idx = trees[big].query(xy[groups[small]], distance_upper_bound=max_bridge_m)
            k = int(np.argmin(dist))
            if np.isfinite(dist[k]):
                cand.append((float(dist[k]), groups[small][k], groups[big][idx[k]], i, j))
    cand.sort()
    uf = _UnionFind(n_comp)
    new, new_flags = [], []
    for dist, a, b, i, j in cand:
        if uf.union(i, j):
            new.append((a, b))
            new_flags.append(not bool(_segments_inside(free, xy[[a]], xy[[b]])[0]))
    if new:
        edges = np.vstack([edges, np.array(new, dtype=np.int64)])
        flags = np.concatenate([flags, np.array(new_flags, dtype=bool)])
    return edges, flags


# --------------------------------------------------------------------------
# public
# --------------------------------------------------------------------------
def build_graph_with_report(
    plan,
    *,
    lattice_spacing_m=1.0,
    wide_threshold_m=3.0,
    lattice="square",
    lattice_angle_rad=None,
    lattice_centred=False,
    max_edge_m=1.0,
    boundary_step_m=0.3,
    min_clearance_m=0.3,
    wall_margin_m=0.3,
    spur_factor=1.6,
    spur_extra_m=0.5,
    simplify_m=0.1,
    min_part_area_m2=2.0,
    max_bridge_m=40.0,
):
    """Build the floor graph of ``plan`` and say how (see module docstring).

    Parameters
    ----------
    plan : mapping.floorplan.FloorPlan
    lattice_spacing_m : float, lattice spacing over wide spaces (<= 1 m
        keeps lattice edges within ``max_edge_m``)
    wide_threshold_m : float, spaces at least this wide get a lattice;
        ``inf`` for centre lines only
    lattice : one of LATTICE_KINDS; "square" (default) four directions
        along the walls, "diagonal" eight, "triangular" six 60° apart with
        the fewest edges per m². A walk along a wall direction follows a
        straight line of the square lattice; on the triangular one a walk
        across its rows zigzags at ±30° and the filter's particles fall
        15 % short of the distance walked
    lattice_angle_rad : float or None, angle of the lattice rows to plan +x;
        None = each separate part of the lattice zone along its own
        dominant wall direction (:func:`dominant_wall_angle`)
    lattice_centred : bool, each separate part of the lattice zone is
        centred on its own bounds (see ``_lattice``); default False, nodes
        on multiples of the spacing (on the demo walks both lie as close
        to the true tracks)
    max_edge_m : float, longest edge after subdivision
    boundary_step_m : float, boundary sampling for the medial axis
    min_clearance_m : float, passages with less clearance (half-width) are
        not walkable
    wall_margin_m : float, lattice nodes keep this far from walls
    spur_factor, spur_extra_m : float, spur pruning (see module docstring)
    simplify_m : float, tolerance for simplifying centre lines
    min_part_area_m2 : float, free-space parts smaller than this are dropped
    max_bridge_m : float, longest link allowed across closed-off drawing

    Returns
    -------
    graph : FloorGraph
    report : GraphBuildReport
    """
    t0 = time.perf_counter()
    for name, val in (("lattice_spacing_m", lattice_spacing_m), ("max_edge_m", max_edge_m),
                      ("boundary_step_m", boundary_step_m)):
        if not (val > 0):
            raise ConfigError(f"{name} must be > 0, got {val}")
    if not wide_threshold_m > 0:
        raise ConfigError(f"wide_threshold_m must be > 0, got {wide_threshold_m}")
    rep = GraphBuildReport()
    parts = list(shapely.get_parts(plan.free))
    rep.n_free_parts = len(parts)
    kept = [p for p in parts if p.area >= min_part_area_m2]
    rep.dropped_parts = len(parts) - len(kept)
    rep.dropped_area_m2 = float(sum(p.area for p in parts if p.area < min_part_area_m2))
    if not kept:
        raise DataError(f"no free-space part of at least {min_part_area_m2} m² to build a graph on", path=plan.path)
    free = shapely.union_all(kept)
    shapely.prepare(free)

    # 1. centre lines
    sk_xy, sk_r, sk_e = _medial_axis(
        free, boundary_step_m=boundary_step_m, min_clearance_m=min_clearance_m,
        spur_factor=spur_factor, spur_extra_m=spur_extra_m,
    )

    # 2. lattice over wide spaces
    r_wide = 0.5 * wide_threshold_m
    if np.isfinite(wide_threshold_m):
        wide = shapely.buffer(shapely.buffer(free, -r_wide, quad_segs=8), r_wide, quad_segs=8)
        wide = shapely.intersection(wide, free)
        la_xy, la_e, angles = _lattice(free, wide, spacing_m=lattice_spacing_m, wall_margin_m=wall_margin_m,
                                       kind=lattice, angle_rad=lattice_angle_rad, centred=lattice_centred)
        rep.lattice_angles_deg = sorted({round(float(np.degrees(a)), 2) for a in angles})
    else:
        la_xy, la_e = np.zeros((0, 2)), np.zeros((0, 2), dtype=np.int64)
    rep.lattice_length_m = float(_lengths(la_xy, la_e).sum()) if len(la_e) else 0.0

    # 3. centre lines give way where the lattice covers them (a vertex
    # within 0.75 spacing of a lattice node), so passages of about the
    # threshold width, too narrow for the opening, keep their centre line
    if len(la_e) and len(sk_e):
        cover = cKDTree(la_xy[np.unique(la_e)]).query(sk_xy, distance_upper_bound=0.75 * lattice_spacing_m)[0]
        keep = ~np.isfinite(cover)
        sk_e = sk_e[keep[sk_e[:, 0]] & keep[sk_e[:, 1]]]
    sk_xy, sk_e = _simplify_chains(sk_xy, sk_e, free, tolerance_m=simplify_m)
    rep.centreline_length_m = float(_lengths(sk_xy, sk_e).sum()) if len(sk_e) else 0.0

    xy = np.vstack([sk_xy, la_xy])
    edges = np.vstack([sk_e, la_e + len(sk_xy)]).astype(np.int64)
    # centre-line ends near the lattice are tied to it (a corridor opening
    # into a hall), even when the two are already joined elsewhere
    join_r = max(2.0 * lattice_spacing_m, wide_threshold_m if np.isfinite(wide_threshold_m) else 3.0)
    edges = _tie_ends(xy, edges, sk_e, len(sk_xy), la_e, free, radius_m=join_r)
    # keep only nodes that belong to an edge
    used = np.unique(edges)
    if len(used) == 0:
        raise DataError("free space too narrow to build a graph (no centre line or lattice)", path=plan.path)
    remap = np.full(len(xy), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    xy, edges = xy[used], remap[edges]
    xy, edges, _ = _dedupe(xy, edges)

    # 4. join pieces: inside free space first, then bridges
    edges = _join_local(xy, edges, free, radius_m=join_r)
    flags = np.zeros(len(edges), dtype=bool)
    edges, flags = _join_bridges(xy, edges, flags, free, max_bridge_m=max_bridge_m)

    # keep the piece holding most edge length
    n_comp, label = _components(len(xy), edges)
    if n_comp > 1:
        elen = _lengths(xy, edges)
        per = np.bincount(label[edges[:, 0]], weights=elen, minlength=n_comp)
        main = int(np.argmax(per))
        keep_e = label[edges[:, 0]] == main
        rep.dropped_pieces = n_comp - 1
        rep.dropped_length_m = float(elen[~keep_e].sum())
        edges, flags = edges[keep_e], flags[keep_e]
        used = np.unique(edges)
        remap = np.full(len(xy), -1, dtype=np.int64)
        remap[used] = np.arange(len(used))
        xy, edges = xy[used], remap[edges]

    # 5. subdivide
    xy, edges, flags = _subdivide(xy, edges, max_edge_m, flags)
    graph = FloorGraph.from_arrays(xy, edges)
    inside = _segments_inside(free, xy[edges[:, 0]], xy[edges[:, 1]])
    rep.edges_outside_free = int(np.sum(~inside & ~flags))
    rep.bridge_edges = np.nonzero(flags)[0].tolist()
    rep.bridge_length_m = float(graph.length_m[flags].sum())
    rep.n_nodes, rep.n_edges, rep.total_length_m = graph.n_nodes, graph.n_edges, graph.total_length_m
    rep.build_time_s = time.perf_counter() - t0
    return graph, rep


def build_graph(plan, *, lattice_spacing_m=1.0, wide_threshold_m=3.0, **options) -> FloorGraph:
    """The floor graph of ``plan``: centre lines of corridors and aisles plus
    a lattice over spaces wider than ``wide_threshold_m``, as one connected
    :class:`FloorGraph` with edges no longer than ``max_edge_m`` (1 m).

    See :func:`build_graph_with_report` for the options and for what was
    dropped or bridged.
    """
    graph, _ = build_graph_with_report(
        plan, lattice_spacing_m=lattice_spacing_m, wide_threshold_m=wide_threshold_m, **options
    )
    return graph


# --------------------------------------------------------------------------
# hand-drawn graphs
# --------------------------------------------------------------------------
def graph_from_lines(lines, *, snap_m=0.05, max_edge_m=1.0) -> FloorGraph:
    """A graph from polylines: lines are noded where they cross; an end
    point within ``snap_m`` of another line is joined to it (T-junctions
    drawn a little short), dangling bits shorter than ``snap_m`` (lines
    drawn a little past another) are removed; each piece of line becomes
    edges between its vertices.

    Parameters
    ----------
    lines : sequence of shapely LineString, metres
    snap_m : float, snapping tolerance, metres (0 = none)
    max_edge_m : float or None, split longer edges

    Returns
    -------
    FloorGraph
    """
    lines = [ln for ln in lines if not ln.is_empty and ln.length > 0]
    if not lines:
        raise DataError("no path lines to build a graph from")
    parts = [p for p in shapely.get_parts(shapely.union_all(lines)) if p.length > 0]
    if snap_m and snap_m > 0 and len(parts) > 1:
        ends = np.vstack([shapely.get_coordinates(p)[[0, -1]] for p in parts])
        key, counts = np.unique(np.round(ends, 9), axis=0, return_counts=True)
        leaves = key[counts == 1]
        tree = shapely.STRtree(parts)
        pts = shapely.points(leaves)
        q_pt, q_part = tree.query(pts, predicate="dwithin", distance=snap_m)
        connectors = []
        best = {}
        for i, j in zip(q_pt, q_part):
            d = shapely.distance(pts[i], parts[j])
            if d > 1e-9 and (i not in best or d < best[i][0]):
                best[i] = (d, j)
        for i, (d, j) in best.items():
            a = leaves[i]
            b = shapely.get_coordinates(shapely.shortest_line(pts[i], parts[j]))[1]
            u = (b - a) / np.hypot(*(b - a))
            connectors.append(shapely.LineString([a, b + 1e-6 * u]))  # just across, so noding splits the line
        if connectors:
            parts = [p for p in shapely.get_parts(shapely.union_all(parts + connectors)) if p.length > 0]
    coords = [shapely.get_coordinates(ln) for ln in parts]
    xy = np.vstack(coords)
    last = np.zeros(len(xy), dtype=bool)
    last[np.cumsum([len(c) for c in coords]) - 1] = True
    idx = np.arange(len(xy))
    edges = np.column_stack([idx[~last], idx[~last] + 1])
    xy, edges, _ = _dedupe(xy, edges, tol=1e-5)
    if snap_m and snap_m > 0:
        for _ in range(2):  # dangling stubs shorter than the tolerance
            deg = np.bincount(edges.ravel(), minlength=len(xy))
            stub = (_lengths(xy, edges) < snap_m) & ((deg[edges[:, 0]] == 1) | (deg[edges[:, 1]] == 1))
            if not stub.any():
                break
            edges = edges[~stub]
        used = np.unique(edges)
        remap = np.full(len(xy), -1, dtype=np.int64)
        remap[used] = np.arange(len(used))
        xy, edges = xy[used], remap[edges]
    xy, edges, _ = _subdivide(xy, edges, max_edge_m)
    return FloorGraph.from_arrays(xy, edges)


def load_graph_geojson(path, *, snap_m=0.05, max_edge_m=1.0) -> FloorGraph:
    """Read a hand-drawn graph: a GeoJSON FeatureCollection of LineStrings
    (or MultiLineStrings) with ``properties.kind == "path"``, plan metres.
    Plan features (``walkable``, ``obstacle``) in the same file are ignored;
    any other kind is an error. See :func:`graph_from_lines`.
    """
    doc = read_json_file(path)
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        raise FormatError("a graph file must be a GeoJSON FeatureCollection", path=path)
    feats = doc.get("features")
    if not isinstance(feats, list):
        raise FormatError("a graph file needs a list 'features'", path=path)
    lines = []
    for i, feat in enumerate(feats):
        props = (feat.get("properties") or {}) if isinstance(feat, dict) else None
        if not isinstance(props, dict):
            raise FormatError(f"{feature_label(i)} must be a Feature with properties", path=path)
        kind = props.get("kind")
        if kind in ("walkable", "obstacle"):
            continue
        if kind != "path":
            raise FormatError(f"{feature_label(i)}: properties.kind must be 'path' in a graph file, got {kind!r}",
                              path=path)
        gj = feat.get("geometry")
        if not isinstance(gj, dict) or gj.get("type") not in ("LineString", "MultiLineString"):
            got = gj.get("type") if isinstance(gj, dict) else gj
            raise FormatError(f"{feature_label(i)} (path): geometry must be LineString or MultiLineString, got {got!r}",
                              path=path)
        try:
            geom = shapely.from_geojson(json.dumps(gj))
        except Exception as err:
            raise FormatError(f"{feature_label(i)} (path): unreadable geometry: {err}", path=path) from err
        lines.extend(p for p in shapely.get_parts(geom) if not p.is_empty and p.length > 0)
    if not lines:
        raise DataError("graph file has no path line of non-zero length", path=path)
    return graph_from_lines(lines, snap_m=snap_m, max_edge_m=max_edge_m)


# --------------------------------------------------------------------------
# summaries
# --------------------------------------------------------------------------
def graph_components(graph: FloorGraph):
    """Number of connected components of ``graph`` and the (K,) label of
    each node."""
    return _components(graph.n_nodes, graph.edges)


def plan_summary(plan, graph: FloorGraph | None = None) -> dict:
    """JSON-able facts about a plan (and its graph): areas in m², obstacle
    count, free-space parts; graph nodes, edges, total length, components."""
    out = {
        "floor": plan.floor,
        "plan_hash": plan.plan_hash,
        "bounds_m": [round(v, 3) for v in plan.bounds],
        "walkable_area_m2": round(float(plan.walkable.area), 3),
        "free_area_m2": round(float(plan.free.area), 3),
        "obstacles": int(plan.n_obstacles),
        "free_parts": int(len(shapely.get_parts(plan.free))),
    }
    if graph is not None:
        n_comp, _ = graph_components(graph)
        out.update(
            {
                "graph_nodes": graph.n_nodes,
                "graph_edges": graph.n_edges,
                "graph_length_m": round(graph.total_length_m, 3),
                "graph_components": int(n_comp),
                "graph_max_edge_m": round(float(graph.length_m.max()), 4) if graph.n_edges else 0.0,
            }
        )
    return out
