"""Routes through a floor graph: survey routes that cover every corridor and
aisle a given number of times, and random test routes between places.

A route is a sequence of graph node indices, consecutive nodes joined by
an edge. Coverage is counted on *segments*: maximal chains of edges between
nodes whose degree is not 2 (a corridor or an aisle between two junctions),
so a corridor drawn as many short edges counts once per pass.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError, DataError
from ..floorgraph import FloorGraph

__all__ = ["Segments", "graph_segments", "plan_survey_routes", "plan_edge_cover_routes", "plan_test_route",
           "route_polyline", "route_markers", "start_from_best_nearby"]


@dataclass(frozen=True, eq=False)
class Segments:
    """Chains of a graph between junctions/ends.

    Attributes
    ----------
    nodes : list of (L_i,) int arrays, node sequence of each segment (ends
        are junctions or dead ends)
    length_m : (S,) float
    edge_segment : (E,) int, segment each graph edge belongs to
    """

    nodes: list
    length_m: np.ndarray
    edge_segment: np.ndarray


def graph_segments(graph: FloorGraph) -> Segments:
    """Contract the degree-2 chains of ``graph`` into segments."""
    deg = graph.degree()
    ptr, inc = graph.incident_ptr, graph.incident_edges
    seg_of_edge = np.full(graph.n_edges, -1, dtype=np.int64)
    segs, lengths = [], []

    def other(e, n):
        a, b = graph.edges[e]
        return b if a == n else a

    def walk(start, e0):
        nodes = [start]
        length = 0.0
        e, n = e0, start
        while True:
            seg_of_edge[e] = len(segs)
            length += graph.length_m[e]
            n = other(e, n)
            nodes.append(n)
            if deg[n] != 2 or n == start:
                break
            es = inc[ptr[n] : ptr[n + 1]]
            e = es[0] if es[0] != e else es[1]
            if seg_of_edge[e] >= 0:
                break
        segs.append(np.array(nodes, dtype=np.int64))
        lengths.append(length)

    for n in np.flatnonzero(deg != 2):
        for e in inc[ptr[n] : ptr[n + 1]]:
            if seg_of_edge[e] < 0:
                walk(n, e)
    for e in range(graph.n_edges):  # closed loops without junctions
        if seg_of_edge[e] < 0:
            walk(graph.edges[e, 0], e)
    return Segments(segs, np.array(lengths), seg_of_edge)


def _seg_graph(graph, segs):
    """networkx multigraph of junction nodes, one edge per segment."""
    import networkx as nx

    g = nx.MultiGraph()
    for i, nodes in enumerate(segs.nodes):
        g.add_edge(int(nodes[0]), int(nodes[-1]), key=i, length=float(segs.length_m[i]))
    return g


def _traverse(segs, i, start):
    nodes = segs.nodes[i]
    return nodes if nodes[0] == start else nodes[::-1]


def plan_survey_routes(graph, *, rng, target_length_m=120.0, min_cover=2, min_segment_m=2.0, max_routes=200):
    """Routes that together pass every segment at least ``min_cover`` times.

    Greedy: from the current junction take the least-covered segment (ties
    broken at random, no immediate turning back unless it is a dead end);
    when every segment at hand is covered, go by the shortest path to the
    nearest one that is not. A route ends once it is longer than
    ``target_length_m`` (at a junction); the next one starts where coverage
    is still missing.

    Parameters
    ----------
    graph : FloorGraph, connected
    rng : numpy.random.Generator
    target_length_m : float, length of one route
    min_cover : int, passes required per segment
    min_segment_m : float, segments shorter than this (joins, bits of a
        lattice) need no coverage of their own

    Returns
    -------
    list of (L,) int arrays of graph node indices
    """
    import networkx as nx

    if target_length_m <= 0:
        raise ConfigError(f"target_length_m must be > 0, got {target_length_m}")
    segs = graph_segments(graph)
    if len(segs.nodes) == 0:
        raise DataError("the route graph has no edges")
    sg = _seg_graph(graph, segs)
    if not nx.is_connected(nx.Graph(sg)):
        raise DataError("the route graph is not connected; every part must be reachable for a survey")
    need = np.where(segs.length_m >= min_segment_m, min_cover, 0)
    cover = np.zeros(len(segs.nodes), dtype=np.int64)
    dist = dict(nx.all_pairs_dijkstra_path_length(nx.Graph(sg), weight="length"))
    routes = []
    while np.any(cover < need) and len(routes) < max_routes:
        missing = np.flatnonzero(cover < need)
        i0 = int(rng.choice(missing))
        ends = segs.nodes[i0][[0, -1]]
        node = int(ends[rng.integers(2)])
        path = [node]
        length = 0.0
        last_seg = -1
        while length < target_length_m and np.any(cover < need):
            options = [(k, i) for _, v, k in sg.edges(node, keys=True) for i in [k]]
            choice = [i for _, i in options if cover[i] < need[i] and i != last_seg]
            if not choice:
                choice = [i for _, i in options if cover[i] < need[i]]
            if choice:
                least = min(cover[i] for i in choice)
                cands = [i for i in choice if cover[i] == least]
                i = int(cands[rng.integers(len(cands))])
                seq = _traverse(segs, i, node)
                cover[i] += 1
                length += segs.length_m[i]
                path.extend(int(n) for n in seq[1:])
                node = int(seq[-1])
                last_seg = i
                continue
            # walk to the nearest junction that touches an uncovered segment
            missing = np.flatnonzero(cover < need)
            targets = {int(n) for i in missing for n in segs.nodes[i][[0, -1]]}
            goal = min(targets, key=lambda n: dist[node].get(n, np.inf))
            hops = nx.dijkstra_path(nx.Graph(sg), node, goal, weight="length")
            for a, b in zip(hops[:-1], hops[1:]):
                keys = [k for k in sg[a][b]]
                i = min(keys, key=lambda k: segs.length_m[k])
                seq = _traverse(segs, i, a)
                cover[i] += 1
                length += segs.length_m[i]
                path.extend(int(n) for n in seq[1:])
                last_seg = i
            node = goal
        routes.append(np.array(path, dtype=np.int64))
    return routes


def plan_edge_cover_routes(graph, *, rng, target_length_m=300.0, max_routes=500, need=None):
    """Routes that together walk every edge of ``graph`` at least once, in
    straight lanes where the graph allows.

    Unlike :func:`plan_survey_routes` this covers each edge, the short
    lattice edges over open areas included: a surveyor walks an open hall
    in straight lanes along the lattice rows and then across them (a
    lawnmower pattern in both directions, common practice, no source).
    Greedy: at each node take the uncovered incident edge that turns least
    from the direction walked (ties at random, no turning back while
    another edge is uncovered); with none at hand, walk the shortest path
    to the nearest node that has one. A route ends at the first node past
    ``target_length_m``; the next one starts at an uncovered edge, a dead
    end or a graph boundary first.

    Parameters
    ----------
    graph : FloorGraph, connected
    rng : numpy.random.Generator
    target_length_m : float, length of one route
    need : (E,) bool or None, the edges to cover (default all); the others
        are walked only on the way between needed ones

    Returns
    -------
    list of (L,) int arrays of graph node indices
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components, dijkstra

    if target_length_m <= 0:
        raise ConfigError(f"target_length_m must be > 0, got {target_length_m}")
    if graph.n_edges == 0:
        raise DataError("the route graph has no edges")
    k = graph.n_nodes
    a, b = graph.edges[:, 0], graph.edges[:, 1]
    adj = coo_matrix((np.concatenate([graph.length_m, graph.length_m]), (np.concatenate([a, b]),
                                                                      np.concatenate([b, a]))), shape=(k, k)).tocsr()
    used = np.unique(graph.edges)
    n_comp, lab = connected_components(adj, directed=False)
    if np.unique(lab[used]).size > 1:
        raise DataError("the route graph is not connected; every part must be reachable for a survey")
    ptr, inc = graph.incident_ptr, graph.incident_edges
    covered = np.zeros(graph.n_edges, dtype=bool) if need is None else ~np.asarray(need, dtype=bool).reshape(-1)
    if covered.shape != (graph.n_edges,):
        raise ConfigError(f"need must have one entry per edge ({graph.n_edges}), got {covered.shape}")
    # uncovered edges at each node
    open_count = (np.bincount(a[~covered], minlength=k) + np.bincount(b[~covered], minlength=k)).astype(np.int64)
    deg = graph.degree()

    def other(e, n):
        return int(b[e]) if a[e] == n else int(a[e])

    def step_dir(e, n):
        u = graph.unit[e]
        return u if a[e] == n else -u

    def take(e, n):
        if not covered[e]:
            covered[e] = True
            open_count[a[e]] -= 1
            open_count[b[e]] -= 1
        return other(e, n)

    routes = []
    while not covered.all() and len(routes) < max_routes:
        # start at an uncovered edge, preferring dead ends, then nodes of
        # low degree (the edge of a hall or a corridor end)
        cand = np.flatnonzero(open_count > 0)
        score = deg[cand] + 4 * (open_count[cand] != deg[cand]) + rng.uniform(0, 0.5, cand.size)
        node = int(cand[np.argmin(score)])
        path = [node]
        length = 0.0
        heading = None
        while not covered.all():
            es = inc[ptr[node] : ptr[node + 1]]
            free_es = es[~covered[es]]
            if free_es.size:
                if heading is None:
                    e = int(free_es[rng.integers(free_es.size)])
                else:
                    dirs = np.array([step_dir(e, node) for e in free_es])
                    turn = np.arccos(np.clip(dirs @ heading, -1.0, 1.0))
                    turn = turn + rng.uniform(0, 1e-3, turn.size)  # ties at random
                    if free_es.size > 1:  # not straight back while another edge waits
                        turn = np.where(turn > np.radians(170), turn + 10.0, turn)
                    e = int(free_es[np.argmin(turn)])
                heading = step_dir(e, node)
                length += float(graph.length_m[e])
                node = take(e, node)
                path.append(node)
            else:
                if length >= target_length_m:
                    break
                # the nearest node with an uncovered edge
                dist, pred = dijkstra(adj, indices=node, return_predecessors=True)
                targets = np.flatnonzero(open_count > 0)
                goal = int(targets[np.argmin(dist[targets])])
                hops = [goal]
                while hops[-1] != node:
                    hops.append(int(pred[hops[-1]]))
                hops = hops[::-1]
                for u, v in zip(hops[:-1], hops[1:]):
                    es_u = inc[ptr[u] : ptr[u + 1]]
                    cand_e = es_u[(a[es_u] == v) | (b[es_u] == v)]
                    e = int(cand_e[np.argmin(graph.length_m[cand_e])])
                    heading = step_dir(e, u)
                    length += float(graph.length_m[e])
                    take(e, u)
                    path.append(v)
                node = goal
            if length >= target_length_m and open_count[node] == 0:
                break
        routes.append(np.array(path, dtype=np.int64))
    return routes


def plan_test_route(graph, *, rng, length_m=80.0, avoid=None):
    """A route through random places: shortest paths between random graph
    nodes until the route is longer than ``length_m``.

    Parameters
    ----------
    graph : FloorGraph
    rng : numpy.random.Generator
    length_m : float
    avoid : (K,) int or None, nodes not to start at (spreads start points)

    Returns
    -------
    (L,) int array of graph node indices
    """
    import networkx as nx

    g = graph.to_networkx()
    segs = graph_segments(graph)
    junctions = np.unique(np.concatenate([s[[0, -1]] for s in segs.nodes]))
    if avoid is not None and len(np.setdiff1d(junctions, avoid)) > 0:
        starts = np.setdiff1d(junctions, avoid)
    else:
        starts = junctions
    node = int(rng.choice(starts))
    path = [node]
    total = 0.0
    for _ in range(50):
        remaining = length_m - total
        if remaining <= 0.15 * length_m:
            break
        dist = nx.single_source_dijkstra_path_length(g, node, weight="length")
        cands = [int(n) for n in junctions if 6.0 < dist.get(int(n), np.inf) <= max(remaining, 12.0)]
        if not cands:
            cands = [int(n) for n in junctions if dist.get(int(n), np.inf) > 6.0]
            if not cands:
                break
            cands = [min(cands, key=lambda n: dist[n])]
        # do not go straight back to where the route just came from
        if len(path) > 1 and len(cands) > 1:
            cands = [n for n in cands if n != path[-2]] or cands
        goal = int(rng.choice(cands))
        hops = nx.dijkstra_path(g, node, goal, weight="length")
        total += dist[goal]
        path.extend(hops[1:])
        node = goal
    return np.array(path, dtype=np.int64)


def route_polyline(graph, route):
    """(L, 2) plan positions of a route's nodes, repeated nodes removed."""
    route = np.asarray(route, dtype=np.int64)
    keep = np.concatenate([[True], route[1:] != route[:-1]])
    return graph.nodes_xy[route[keep]]


def route_markers(graph, *, max_spacing_m=12.0):
    """Marked points of a floor for checkpoints: every junction and dead end,
    and points along each segment no more than ``max_spacing_m`` apart.

    Returns
    -------
    (K, 2) float, plan metres
    """
    segs = graph_segments(graph)
    pts = [graph.nodes_xy[np.flatnonzero(graph.degree() != 2)]]
    for nodes, length in zip(segs.nodes, segs.length_m):
        n_in = int(np.ceil(length / max_spacing_m)) - 1
        if n_in <= 0:
            continue
        xy = graph.nodes_xy[nodes]
        d = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(xy, axis=0).T))])
        s = np.linspace(0, d[-1], n_in + 2)[1:-1]
        pts.append(np.column_stack([np.interp(s, d, xy[:, 0]), np.interp(s, d, xy[:, 1])]))
    xy = np.vstack(pts)
    # merge marks closer than 2 m (short joins between junctions)
    keep = []
    for i, p in enumerate(xy):
        if all(np.hypot(*(p - xy[j])) >= 2.0 for j in keep):
            keep.append(i)
    return xy[keep]


def start_from_best_nearby(graph, route, score_xy, *, radius_m=15.0):
    """The route begun at the best place near its start: the graph node
    within ``radius_m`` (along the graph) of ``route[0]`` with the highest
    ``score_xy`` (e.g. the clearance from steel, where a surveyor turns the
    phone for its calibration), then the shortest path to ``route[0]`` and
    the route itself.

    Parameters
    ----------
    graph : FloorGraph
    route : (L,) int
    score_xy : callable, (K, 2) plan positions -> (K,) float, higher is better
    radius_m : float

    Returns
    -------
    (L',) int, the route with the lead-in prepended (unchanged when its
    start scores best)
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import dijkstra

    route = np.asarray(route, dtype=np.int64)
    k = graph.n_nodes
    a, b = graph.edges[:, 0], graph.edges[:, 1]
    adj = coo_matrix((np.concatenate([graph.length_m, graph.length_m]), (np.concatenate([a, b]),
                                                                      np.concatenate([b, a]))), shape=(k, k)).tocsr()
    dist, pred = dijkstra(adj, indices=int(route[0]), return_predecessors=True, limit=float(radius_m))
    near = np.flatnonzero(np.isfinite(dist))
    sc = np.asarray(score_xy(graph.nodes_xy[near]), dtype=float)
    best = int(near[np.argmax(sc)])
    if best == int(route[0]) or not sc.max() > sc[near == route[0]].max():
        return route
    lead = [best]
    while lead[-1] != int(route[0]):
        lead.append(int(pred[lead[-1]]))
    return np.concatenate([np.array(lead[:-1], dtype=np.int64), route])
