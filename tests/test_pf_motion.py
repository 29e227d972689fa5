"""Motion model on the floor graph, and the filter's fast map lookup.

Sources: an inverse-CDF draw over the options must give the softmax
probabilities of their scores (common practice, no source), checked here by
chi-square against the analytic values; von Mises agreement exp(kappa cos(d)) (Mardia & Jupp,
Directional Statistics, 2000); neighbour lists checked against networkx
(reference library); bilinear lookup checked against FieldMap.lookup, which
tests/test_fieldmap.py checks against scipy's RegularGridInterpolator.
"""

import dataclasses

import numpy as np
import pytest
from scipy import stats

from fingerprint import FloorGraph
from fingerprint.localise import FilterSettings
from fingerprint.pf._lookup import MapTable
from fingerprint.pf.motion import graph_tables, move
from fingerprint.pf.state import ParticleState

from _pf_synth import field_map, grid_graph

QUIET = FilterSettings(
    length_sigma_frac=0.0, length_sigma_m=0.0, scale_rw=0.0, heading_rw_rad=0.0, reverse_prior=0.0
)


def state_at(edge, offset, direction, n, *, scale=1.0):
    return ParticleState(
        edge=np.full(n, edge, dtype=np.int64),
        offset_m=np.full(n, float(offset)),
        direction=np.full(n, direction, dtype=np.int8),
        heading_offset_rad=np.zeros(n),
        scale=np.full(n, float(scale)),
        bias_ut=np.zeros((n, 3)),
        bias_var_ut2=np.zeros((n, 3)),
        log_w=np.full(n, -np.log(n)),
    )


def corridor(n_nodes=11, spacing=2.0):
    xs = np.arange(n_nodes) * spacing
    return FloorGraph.from_arrays(np.column_stack([xs, 0 * xs]), np.column_stack([np.arange(n_nodes - 1), np.arange(1, n_nodes)]))


def cross():
    # node 0 at the centre, arms east (1), north (2), west (3), south (4)
    nodes = np.array([[0, 0], [5, 0], [0, 5], [-5, 0], [0, -5]], float)
    return FloorGraph.from_arrays(nodes, [[0, 1], [0, 2], [3, 0], [0, 4]])


def test_tables_match_networkx_neighbours():
    g = grid_graph(5, 4, 2.0)
    tab = graph_tables(g)
    nxg = g.to_networkx()
    for node in range(g.n_nodes):
        edges = tab.cand[node][tab.cand[node] >= 0]
        far = {int(g.edges[e, 1] if tab.out_dir[node][k] > 0 else g.edges[e, 0]) for k, e in enumerate(edges)}
        assert far == set(nxg.neighbors(node))
        for k, e in enumerate(edges):
            start = g.point([e], [tab.start_offset_m[node, k]])[0]
            np.testing.assert_allclose(start, g.nodes_xy[node])
            np.testing.assert_allclose([tab.out_cos[node, k], tab.out_sin[node, k]], g.unit[e] * tab.out_dir[node, k])


def test_moves_exact_distance_across_nodes_and_scale():
    g = corridor()
    tab = graph_tables(g)
    rng = np.random.default_rng(0)
    st = state_at(0, 0.5, 1, 50, scale=1.0).replace(scale=np.linspace(0.8, 1.2, 50))
    new, ll = move(st, 7.3, 0.0, graph=g, tables=tab, settings=QUIET, rng=rng)
    xy = g.point(new.edge, new.offset_m)
    np.testing.assert_allclose(xy[:, 0], 0.5 + 7.3 * np.linspace(0.8, 1.2, 50), atol=1e-9)
    np.testing.assert_allclose(ll, 0.0, atol=1e-12)  # heading follows the corridor
    assert np.all(new.direction == 1)


def test_stays_on_graph_with_noise_and_random_headings():
    g = grid_graph(6, 5, 1.5)
    tab = graph_tables(g)
    rng = np.random.default_rng(1)
    st = state_at(3, 0.2, 1, 2000)
    for k in range(40):
        st, ll = move(st, 0.7, rng.uniform(-np.pi, np.pi), graph=g, tables=tab, settings=FilterSettings(), rng=rng)
        assert np.all(ll <= 0) and np.all(np.isfinite(ll))
    assert np.all((st.offset_m >= 0) & (st.offset_m <= g.length_m[st.edge] + 1e-9))
    _, _, d = g.project(g.point(st.edge, st.offset_m))
    assert d.max() < 1e-9


@pytest.mark.parametrize("heading_deg", [0.0, 30.0, 100.0, 180.0])
def test_turn_choice_frequencies_follow_von_mises(heading_deg):
    # A particle arriving at the cross centre from the west arm, travelling
    # east; it must pick among the 4 arms with probability
    # prior_j * exp(kappa cos(h - angle_j)) / sum (edge 2, the way back west,
    # has prior p_rev; edge 2 runs from node 3 (west) to node 0).
    g = cross()
    tab = graph_tables(g)
    s = dataclasses.replace(QUIET, heading_kappa=2.0, reverse_prior=0.2, use_heading_likelihood=True)
    n = 20000
    h = np.radians(heading_deg)
    # particles 1 mm before the centre node, stepping 0.5 m
    st = state_at(2, 5.0 - 1e-3, 1, n)
    new, ll = move(st, 0.5, h, graph=g, tables=tab, settings=s, rng=np.random.default_rng(3))
    arm_angle = {0: 0.0, 1: np.pi / 2, 3: -np.pi / 2}
    probs = []
    labels = [0, 1, 2, 3]
    for e in labels:
        ang = arm_angle.get(e, np.pi)
        prior = s.reverse_prior if e == 2 else 1.0
        probs.append(prior * np.exp(s.heading_kappa * np.cos(h - ang)))
    probs = np.array(probs) / np.sum(probs)
    # particles that reversed on edge 2 before reaching the node are also on
    # edge 2; their share is exp-small unless the heading points back
    first_back = np.exp(s.heading_kappa * (-np.cos(h)) + np.log(s.reverse_prior))
    first_on = np.exp(s.heading_kappa * np.cos(h))
    p_first_back = first_back / (first_back + first_on)
    expected = (1 - p_first_back) * probs
    expected[2] += p_first_back
    counts = np.array([np.sum(new.edge == e) for e in labels])
    chi2 = np.sum((counts - n * expected) ** 2 / (n * expected))
    assert stats.chi2.sf(chi2, 3) > 1e-3, (counts, n * expected)


def test_heading_likelihood_values():
    # mid-corridor with a perpendicular heading: both options score -kappa,
    # so log-lik = -kappa + log(1 + p_rev); at a dead end walking on into
    # the wall, the only option (turn back, prior rescaled to 1) scores
    # kappa * (cos(pi) - 1) = -2 kappa.
    g = corridor(3, 2.0)
    tab = graph_tables(g)
    s = dataclasses.replace(QUIET, heading_kappa=3.0, reverse_prior=0.1)
    rng = np.random.default_rng(4)
    _, ll = move(state_at(0, 1.0, 1, 10), 0.1, np.pi / 2, graph=g, tables=tab, settings=s, rng=rng)
    # the particle headings' cos/sin are float32 (relative error ~1e-7)
    np.testing.assert_allclose(ll, -3.0 + np.log(1.1), rtol=1e-6)
    # at x = 3.9 on the last edge heading east, 0.5 m step: reaches the dead end
    st = state_at(1, 1.9, 1, 10)
    new, ll = move(st, 0.5, 0.0, graph=g, tables=tab, settings=s, rng=rng)
    np.testing.assert_allclose(ll, -2 * 3.0 + 0.0, atol=1e-6)
    assert np.all(new.direction == -1)
    np.testing.assert_allclose(g.point(new.edge, new.offset_m)[:, 0], 4.0 - 0.4, atol=1e-9)


def test_reverse_on_edge_probability():
    # heading straight back: turn back with probability
    # p e^{kappa} / (p e^{kappa} + e^{-kappa})
    g = corridor(3, 10.0)
    tab = graph_tables(g)
    s = dataclasses.replace(QUIET, heading_kappa=1.0, reverse_prior=0.05)
    n = 40000
    new, _ = move(state_at(0, 5.0, 1, n), 0.5, np.pi, graph=g, tables=tab, settings=s, rng=np.random.default_rng(5))
    p = 0.05 * np.e / (0.05 * np.e + np.exp(-1.0))
    k = int(np.sum(new.direction == -1))
    assert stats.binomtest(k, n, p).pvalue > 1e-3


def test_map_table_lookup_equals_fieldmap_lookup():
    # float32 coefficient table on the graph's cells; points off the graph
    # (most of these random queries) take the FieldMap.lookup fallback
    g = grid_graph(4, 3, 2.0)
    fm = field_map(g, resolution_m=0.4)
    rng = np.random.default_rng(6)
    fm.coverage_m[...] = rng.uniform(0, 5, fm.coverage_m.shape)
    fm.var_ut2[...] = rng.uniform(0.5, 4.0, fm.var_ut2.shape)
    tab = MapTable(fm)
    assert 0 < np.mean(tab.row >= 0) < 1  # only the cells along the graph are stored
    x0, x1, y0, y1 = fm.extent
    q = rng.uniform([x0 - 1, y0 - 1], [x1 + 1, y1 + 1], size=(2000, 2))
    q[:5] = [[x0, y0], [x1, y1], [x0, y1], [x1, y0], [x1 + 3, y0]]
    e = rng.integers(g.n_edges, size=3000)
    on_graph = g.point(e, rng.uniform(0, 1, 3000) * g.length_m[e])
    assert np.all(tab.row[np.floor((on_graph - fm.origin_xy) / fm.resolution_m).astype(int) @ [1, fm.shape[1]]] >= 0)
    for pts in (q, on_graph, g.nodes_xy):
        a = tab.lookup(pts)
        b = fm.lookup(pts)
        for u, v in zip(a, b):
            fin = np.isfinite(v)
            np.testing.assert_array_equal(np.isfinite(u), fin)
            # float32 table: relative precision about 1e-7
            np.testing.assert_allclose(u[fin], v[fin], rtol=1e-5, atol=1e-4)
