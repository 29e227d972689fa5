"""Motion model: move every particle along the floor graph by one
dead-reckoning increment.

For an increment of length ``L`` and earth heading ``h`` each particle
travels ``L * scale * (1 + e1) + e2`` metres (``e1``, ``e2`` Gaussian) along
graph edges only, so walls are respected by construction. Its heading in the
plan is ``h + earth_to_plan + heading_offset``. Wherever the particle has to
choose a way (at the start of the increment: go on or turn back on its edge;
at each node it reaches: which incident edge to take) the options ``j`` are
scored with a von Mises agreement between the plan heading and the
direction of option ``j``::

    s_j = kappa * (cos(heading - angle_j) - 1) + log(prior_j)

with prior 1 for going on and ``reverse_prior`` for turning back (priors are
scaled so the best-placed option has prior 1: at a dead end turning back is
the only way and is not penalised). One option is drawn with probability
``softmax(s)`` (inverse CDF with one uniform per particle, vectorised over
a padded incidence table) and,
as the importance weight of that optimal proposal, the particle's log-weight
gains ``min(0, logsumexp(s))``: nothing when some edge follows the heading,
a penalty when none does (a particle that cannot follow the walker).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["GraphTables", "graph_tables", "move", "edge_point"]

_EPS_M = 1e-9


@dataclass(frozen=True, eq=False)
class GraphTables:
    """Padded per-node incidence tables of a FloorGraph for vectorised moves.

    Attributes
    ----------
    cand : (K, D) int64, incident edges of each node, -1 padded (D = max degree)
    out_dir : (K, D) int8, +1 if leaving the node along the edge's own
        direction (node is ``edges[e, 0]``), -1 otherwise
    out_cos, out_sin : (K, D) float, unit vector of leaving along the edge
    start_offset_m : (K, D) float, offset of the node on that edge (0 or length)
    pad_prior : (K, D) float, 0 for a real slot, -inf for padding
    dead_end : (K,) bool, node of degree 1 (the way back is the only way
        and gets prior 1)
    out_cs_t : (2, D, K) float, ``out_cos`` and ``out_sin`` stacked and
        transposed (one gather, options along the first axis)
    cand_t, pad_prior_t : (D, K), ``cand`` and ``pad_prior`` transposed
    edge_tab : (E, 5) float, per edge unit x, unit y, length (m), start x, y (one gather)
    end_node : (E, 2) int64, node reached travelling forward / backward
    """

    cand: np.ndarray
    out_dir: np.ndarray
    out_cos: np.ndarray
    out_sin: np.ndarray
    start_offset_m: np.ndarray
    pad_prior: np.ndarray
    dead_end: np.ndarray
    out_cs_t: np.ndarray
    cand_t: np.ndarray
    pad_prior_t: np.ndarray
    edge_tab: np.ndarray
    end_node: np.ndarray


def graph_tables(graph):
    """Build the :class:`GraphTables` of a ``FloorGraph``."""
    k = graph.n_nodes
    deg = np.diff(graph.incident_ptr)
    d = max(int(deg.max()) if deg.size else 1, 1)
    cand = np.full((k, d), -1, dtype=np.int64)
    rows = np.repeat(np.arange(k), deg)
    cols = np.arange(graph.incident_edges.size) - np.repeat(graph.incident_ptr[:-1], deg)
    cand[rows, cols] = graph.incident_edges
    valid = cand >= 0
    c = np.where(valid, cand, 0)
    leaves_forward = graph.edges[c, 0] == np.arange(k)[:, None]
    out_dir = np.where(leaves_forward, 1, -1).astype(np.int8)
    out_cos = np.where(valid, graph.unit[c, 0] * out_dir, 0.0)
    out_sin = np.where(valid, graph.unit[c, 1] * out_dir, 0.0)
    start = np.where(leaves_forward, 0.0, graph.length_m[c])
    pad_prior = np.where(valid, 0.0, -np.inf)
    edge_tab = np.zeros((graph.n_edges, 5))
    edge_tab[:, 0:2] = graph.unit
    edge_tab[:, 2] = graph.length_m
    edge_tab[:, 3:5] = graph.nodes_xy[graph.edges[:, 0]]
    end_node = np.ascontiguousarray(graph.edges[:, ::-1], dtype=np.int64)
    dead_end = deg == 1
    out_cs_t = np.ascontiguousarray(np.stack([out_cos.T, out_sin.T]))
    return GraphTables(
        cand=cand, out_dir=out_dir, out_cos=out_cos, out_sin=out_sin, start_offset_m=start, pad_prior=pad_prior,
        dead_end=dead_end, out_cs_t=out_cs_t, cand_t=np.ascontiguousarray(cand.T),
        pad_prior_t=np.ascontiguousarray(pad_prior.T), edge_tab=edge_tab, end_node=end_node,
    )


def edge_point(tables, edge, offset_m):
    """Plan positions (N, 2) of graph positions whose offsets are already
    within their edges (``FloorGraph.point`` without the clip, one gather)."""
    t = np.take(tables.edge_tab, edge, axis=0)
    return t[:, 3:5] + t[:, 0:2] * offset_m[:, None]


def _log_prior(p):
    return -np.inf if p <= 0 else float(np.log(p))


def move(state, length_m, heading_rad, *, graph, tables, settings, rng, earth_to_plan_rad=0.0, max_hops=64):
    """Move all particles by one increment.

    Parameters
    ----------
    state : ParticleState (N particles)
    length_m : float, increment length, metres
    heading_rad : float, increment heading, earth frame, CCW from east
    graph : FloorGraph ; tables : GraphTables of it
    settings : FilterSettings
    rng : numpy.random.Generator
    earth_to_plan_rad : float

    Returns
    -------
    state : ParticleState, moved, nuisance random walks applied
    log_lik : (N,) float, heading log-likelihood (0 when switched off)
    """
    s = settings
    n = state.n
    # all random numbers of the update in two calls (float32 normals are
    # plenty for the jitter); the uniforms are reused below
    z = rng.standard_normal((3, n), dtype=np.float32)
    u = rng.random(n)
    # nuisance random walks
    hoff = state.heading_offset_rad
    if s.heading_rw_rad > 0:
        hoff = hoff + s.heading_rw_rad * z[0]
    scale = state.scale
    if s.scale_rw > 0:
        scale = np.clip(scale + s.scale_rw * z[1], 0.5, 1.5)
    hp = hoff + (heading_rad + earth_to_plan_rad)
    hp32 = hp.astype(np.float32)  # float32 cos/sin: vectorised, ~1e-7 rad is plenty
    ch, sh = np.cos(hp32), np.sin(hp32)
    dist = length_m * scale
    # relative and absolute length noise: one Gaussian with both variances,
    # L s (1 + f e1) + m e2  ~  L s + sqrt((L s f)^2 + m^2) e
    f, m = s.length_sigma_frac, s.length_sigma_m
    if f > 0 or m > 0:
        sd = np.sqrt((dist * f) ** 2 + m * m) if f > 0 else m
        dist += sd * z[2]
    remaining = np.maximum(dist, 0.0, out=dist)

    kappa = s.heading_kappa
    lp_rev = _log_prior(s.reverse_prior)
    edge = state.edge.copy()

    # decision 1: go on or turn back on the current edge.
    # s_on = kappa (c - 1), s_back = kappa (-c - 1) + log p_rev, so with
    # x = exp(s_back - s_on): P(back) = x / (1 + x), lse = s_on + log1p(x)
    et = np.take(tables.edge_tab, edge, axis=0)  # (N, 5)
    direc = state.direction
    cosf = (ch * et[:, 0] + sh * et[:, 1]) * direc
    x = np.exp(lp_rev - 2.0 * kappa * cosf)
    p_back = x / (1.0 + x)
    back = u < p_back
    # the uniform, given the branch taken, is uniform again on [0, 1):
    # reuse it for the first node choice (one uniform draw per update)
    u = np.where(back, u / np.maximum(p_back, 1e-300), (u - p_back) / np.maximum(1.0 - p_back, 1e-300))
    np.clip(u, 0.0, np.nextafter(1.0, 0.0), out=u)
    direc = np.where(back, -direc, direc).astype(np.int8)
    log_lik = np.minimum(0.0, kappa * (cosf - 1.0) + np.log1p(x))

    # travel, choosing an edge at each node reached (inverse-CDF draw over
    # the padded incident edges). First leg on the full arrays.
    o = state.offset_m
    to_end = np.where(direc > 0, et[:, 2] - o, o)
    stp = np.minimum(remaining, to_end)
    off = o + direc * stp
    remaining -= stp
    moving = np.flatnonzero(remaining > _EPS_M)
    d_max = tables.cand.shape[1]
    # scores are <= 0 and the best real option scores >= -2 kappa, so
    # exp() cannot underflow for every option unless kappa is huge
    need_top = 2.0 * kappa > 600.0
    fresh = False
    for _ in range(max_hops):
        if moving.size == 0:
            break
        e = np.take(edge, moving)
        dr = np.take(direc, moving)
        node = np.take(tables.end_node, 2 * e + (dr < 0))
        # (D, m) layout: each option's row is contiguous
        cand = np.take(tables.cand_t, node, axis=1)  # (D, m)
        prior = np.where(cand == e, np.where(np.take(tables.dead_end, node), 0.0, lp_rev),
                         np.take(tables.pad_prior_t, node, axis=1))
        cs = np.take(tables.out_cs_t, node, axis=2)  # (2, D, m)
        score = np.take(ch, moving) * cs[0]
        score += np.take(sh, moving) * cs[1]
        score -= 1.0
        score *= kappa
        score += prior
        if need_top:
            top = score.max(axis=0)
            score -= top
        else:
            top = 0.0
        cdf = np.exp(score)
        for j in range(1, d_max):  # running sum over the D options (faster than cumsum here)
            cdf[j] += cdf[j - 1]
        total = cdf[-1]
        uu = rng.random(moving.size) if fresh else np.take(u, moving)
        fresh = True
        slot = np.count_nonzero(cdf < uu * total, axis=0)
        flat = node * d_max + np.minimum(slot, d_max - 1)
        log_lik[moving] += np.minimum(0.0, top + np.log(total))
        e = np.take(tables.cand, flat)
        dr = np.take(tables.out_dir, flat)
        o = np.take(tables.start_offset_m, flat)
        edge[moving] = e
        direc[moving] = dr
        rem = np.take(remaining, moving)
        to_end = np.where(dr > 0, np.take(tables.edge_tab[:, 2], e) - o, o)
        stp = np.minimum(rem, to_end)
        off[moving] = o + dr * stp
        rem -= stp
        remaining[moving] = rem
        moving = moving[rem > _EPS_M]
    if not s.use_heading_likelihood:
        log_lik = np.zeros(n)
    new = state.replace(edge=edge, offset_m=off, direction=direc, heading_offset_rad=hoff, scale=scale)
    return new, log_lik
