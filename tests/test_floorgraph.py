"""FloorGraph: the vectorised projection against shapely's exact
point-to-line distance (reference library), CSR incidence against
networkx's adjacency (reference library)."""

import networkx as nx
import numpy as np
import pytest
import shapely

from fingerprint import DataError, FloorGraph


def _grid_graph():
    g = nx.grid_2d_graph(4, 3)
    for n in g.nodes:
        g.nodes[n]["pos"] = (2.0 * n[0], 1.5 * n[1])
    return g


@pytest.mark.parametrize("method", ["project", "project_brute"])
def test_projection_matches_shapely_distance(method):
    fg = FloorGraph.from_networkx(_grid_graph())
    rng = np.random.default_rng(1)
    q = rng.uniform([-1, -1], [7, 4], size=(500, 2))
    edge, off, dist = getattr(fg, method)(q)
    lines = shapely.linestrings(fg.nodes_xy[fg.edges])  # (E, 2, 2)
    union = shapely.union_all(lines)
    # shapely's distance to the union of all edges is the exact nearest distance
    ref = shapely.distance(shapely.points(q), union)
    np.testing.assert_allclose(dist, ref, atol=1e-9)
    # and the reported (edge, offset) is a point at that distance
    p = fg.point(edge, off)
    np.testing.assert_allclose(np.hypot(*(p - q).T), ref, atol=1e-9)


def test_indexed_projection_equals_brute_force_on_a_random_graph():
    # the STRtree path against its slow twin on irregular geometry
    rng = np.random.default_rng(7)
    xy = rng.uniform(0, 50, size=(300, 2))
    edges = np.array([(i, j) for i in range(300) for j in rng.choice(300, 2) if i != j])
    fg = FloorGraph.from_arrays(xy, edges)
    q = rng.uniform(-5, 55, size=(2000, 2))
    _, _, d_fast = fg.project(q)
    _, _, d_slow = fg.project_brute(q)
    np.testing.assert_allclose(d_fast, d_slow, atol=1e-9)


def test_incidence_matches_networkx_degree():
    g = _grid_graph()
    fg = FloorGraph.from_networkx(g)
    names = list(g.nodes)
    np.testing.assert_array_equal(fg.degree(), [g.degree[n] for n in names])
    for i in range(fg.n_nodes):
        inc = fg.incident_edges[fg.incident_ptr[i] : fg.incident_ptr[i + 1]]
        assert np.all((fg.edges[inc] == i).any(axis=1))


def test_uniform_sampling_covers_length_proportionally():
    fg = FloorGraph.from_arrays([[0, 0], [1, 0], [1, 3]], [[0, 1], [1, 2]])
    edge, off = fg.sample_uniform(40000, np.random.default_rng(0))
    frac = np.mean(edge == 1)
    # binomial standard error sqrt(.75*.25/40000) = 0.0022; 4 sigma
    assert abs(frac - 0.75) < 0.009
    assert np.all(off >= 0) and np.all(off <= fg.length_m[edge])


def test_zero_length_edge_rejected():
    with pytest.raises(DataError, match="zero-length"):
        FloorGraph.from_arrays([[0, 0], [0, 0]], [[0, 1]])


def test_geojson_export_is_one_path_line_per_edge():
    # (read back into a graph in test_graphbuild.py::test_geojson_export_reads_back)
    fg = FloorGraph.from_networkx(_grid_graph())
    gj = fg.to_geojson(floor="G")
    assert len(gj["features"]) == fg.n_edges
    assert all(f["properties"]["kind"] == "path" for f in gj["features"])
    # each line runs between its edge's two nodes
    for f, (a, b) in zip(gj["features"], fg.edges):
        ends = np.array(f["geometry"]["coordinates"])[[0, -1]]
        np.testing.assert_allclose(ends, fg.nodes_xy[[a, b]])
