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

__all__ = ["GraphTables", "graph_tables", "move"]

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
    """

    cand: np.ndarray
    out_dir: np.ndarray
    out_cos: np.ndarray
    out_sin: np.ndarray
    start_offset_m: np.ndarray


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
    return GraphTables(cand, out_dir, out_cos, out_sin, start)


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
    z = rng.standard_normal((4, n))
    # nuisance random walks
    hoff = state.heading_offset_rad
    if s.heading_rw_rad > 0:
        hoff = hoff + s.heading_rw_rad * z[0]
    scale = state.scale
    if s.scale_rw > 0:
        scale = np.clip(scale + s.scale_rw * z[1], 0.5, 1.5)
    hp = heading_rad + earth_to_plan_rad + hoff
    ch, sh = np.cos(hp), np.sin(hp)
    dist = length_m * scale
    if s.length_sigma_frac > 0:
        dist = dist * (1.0 + s.length_sigma_frac * z[2])
    if s.length_sigma_m > 0:
        dist = dist + s.length_sigma_m * z[3]
    remaining = np.maximum(dist, 0.0)

    kappa = s.heading_kappa
    lp_rev = _log_prior(s.reverse_prior)
    edge = state.edge.copy()
    off = state.offset_m.copy()
    direc = state.direction.copy()

    # decision 1: go on or turn back on the current edge.
    # s_on = kappa (c - 1), s_back = kappa (-c - 1) + log p_rev, so with
    # x = exp(s_back - s_on): P(back) = x / (1 + x), lse = s_on + log1p(x)
    unit = graph.unit[edge]
    cosf = (ch * unit[:, 0] + sh * unit[:, 1]) * direc
    x = np.exp(lp_rev - 2.0 * kappa * cosf)
    u = rng.random(n)
    back = u * (1.0 + x) < x
    direc = np.where(back, -direc, direc).astype(np.int8)
    log_lik = np.minimum(0.0, kappa * (cosf - 1.0) + np.log1p(x))

    # travel, choosing an edge at each node reached (inverse-CDF draw over
    # the padded incident edges)
    moving = np.flatnonzero(remaining > 0)
    lengths = graph.length_m
    for _ in range(max_hops):
        if moving.size == 0:
            break
        e = edge[moving]
        o = off[moving]
        dr = direc[moving]
        el = lengths[e]
        to_end = np.where(dr > 0, el - o, o)
        rem = remaining[moving]
        stp = np.minimum(rem, to_end)
        off[moving] = o + dr * stp
        rem = rem - stp
        cross = rem > _EPS_M
        remaining[moving] = np.where(cross, rem, 0.0)
        moving = moving[cross]
        if moving.size == 0:
            break
        e = e[cross]
        node = np.where(dr[cross] > 0, graph.edges[e, 1], graph.edges[e, 0])
        cand = tables.cand[node]  # (m, D)
        valid = cand >= 0
        prior = np.where(cand == e[:, None], lp_rev, 0.0)
        prior = np.where(valid, prior, -np.inf)
        prior = prior - prior.max(axis=1, keepdims=True)
        cosang = ch[moving, None] * tables.out_cos[node] + sh[moving, None] * tables.out_sin[node]
        score = kappa * (cosang - 1.0) + prior
        top = score.max(axis=1)
        cdf = np.cumsum(np.exp(score - top[:, None]), axis=1)
        total = cdf[:, -1]
        slot = np.sum(cdf < rng.random(moving.size)[:, None] * total[:, None], axis=1)
        slot = np.minimum(slot, cand.shape[1] - 1)
        log_lik[moving] += np.minimum(0.0, top + np.log(total))
        edge[moving] = cand[np.arange(moving.size), slot]
        direc[moving] = tables.out_dir[node, slot]
        off[moving] = tables.start_offset_m[node, slot]
    if not s.use_heading_likelihood:
        log_lik = np.zeros(n)
    new = state.replace(edge=edge, offset_m=off, direction=direc, heading_offset_rad=hoff, scale=scale)
    return new, log_lik
