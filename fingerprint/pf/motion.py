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

from dataclasses import dataclass, field

import numpy as np

from ._noise import normal32

__all__ = ["GraphTables", "graph_tables", "move", "move_arrays", "edge_point", "edge_xy"]

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
    edge_ux, edge_uy, edge_x0, edge_y0, edge_len : (E,) float, per edge unit
        vector, first node and length as contiguous arrays (one 1-D gather each)
    edge_u32 : (2, E) float32, unit x and y (for the float32 heading terms)
    arr_cs : (2, D, 2 E) float32, ``out_cos``, ``out_sin`` of the node reached along
        edge ``e`` travelling forward (column ``2 e``) or backward (``2 e + 1``)
    arr_valid : (D, 2 E) float32, 1 for a real slot of that node, 0 for padding
    arr_back : (D, 2 E) bool, the slot is the way back (edge ``e`` itself) and
        the node is not a dead end
    arr_cand, arr_dir, arr_start, arr_len : (2 E * D,), for arrival ``a``
        and slot ``j`` (entry ``a * D + j``): edge, direction, start offset and
        length of leaving along that slot (length 0 for padding)
    _prior_cache : dict, option prior weights per ``reverse_prior`` (see
        :meth:`arrival_prior`)
    """

    cand: np.ndarray
    out_dir: np.ndarray
    out_cos: np.ndarray
    out_sin: np.ndarray
    start_offset_m: np.ndarray
    edge_ux: np.ndarray
    edge_uy: np.ndarray
    edge_x0: np.ndarray
    edge_y0: np.ndarray
    edge_len: np.ndarray
    edge_u32: np.ndarray
    arr_cs: np.ndarray
    arr_valid: np.ndarray
    arr_back: np.ndarray
    arr_cand: np.ndarray
    arr_dir: np.ndarray
    arr_start: np.ndarray
    arr_len: np.ndarray
    _prior_cache: dict = field(default_factory=dict, repr=False)

    def arrival_prior(self, reverse_prior):
        """(D, 2 E) float32 prior weight of each option on arrival: 1, or
        ``reverse_prior`` for the way back (not at a dead end), 0 for padding;
        and its log (-inf for padding). Cached per ``reverse_prior``."""
        key = float(reverse_prior)
        if key not in self._prior_cache:
            w = np.where(self.arr_back, np.float32(max(key, 0.0)), np.float32(1.0)) * self.arr_valid
            with np.errstate(divide="ignore"):
                self._prior_cache[key] = (w.astype(np.float32), np.log(w).astype(np.float32))
        return self._prior_cache[key]


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
    end_node = graph.edges[:, ::-1]  # node reached travelling forward / backward
    dead_end = deg == 1
    out_cs_t = np.stack([out_cos.T, out_sin.T])  # (2, D, K)
    arrive = end_node.reshape(-1)  # node reached by arrival 2 e + (d < 0)
    came = np.repeat(np.arange(graph.n_edges), 2)
    arr_back = (cand[arrive] == came[:, None]) & ~dead_end[arrive][:, None]
    slot_len = np.where(valid, graph.length_m[c], 0.0)
    x0 = graph.nodes_xy[graph.edges[:, 0]]
    return GraphTables(
        cand=cand, out_dir=out_dir, out_cos=out_cos, out_sin=out_sin, start_offset_m=start,
        edge_ux=np.ascontiguousarray(graph.unit[:, 0], dtype=float),
        edge_uy=np.ascontiguousarray(graph.unit[:, 1], dtype=float),
        edge_x0=np.ascontiguousarray(x0[:, 0], dtype=float), edge_y0=np.ascontiguousarray(x0[:, 1], dtype=float),
        edge_len=np.ascontiguousarray(graph.length_m, dtype=float),
        edge_u32=np.ascontiguousarray(graph.unit.T, dtype=np.float32),
        arr_cs=np.ascontiguousarray(out_cs_t[:, :, arrive], dtype=np.float32),
        arr_valid=np.ascontiguousarray(valid[arrive].T, dtype=np.float32),
        arr_back=np.ascontiguousarray(arr_back.T),
        arr_cand=cand[arrive].reshape(-1), arr_dir=out_dir[arrive].reshape(-1),
        arr_start=start[arrive].reshape(-1), arr_len=slot_len[arrive].reshape(-1),
    )


def edge_point(tables, edge, offset_m):
    """Plan positions (N, 2) of graph positions whose offsets are already
    within their edges (``FloorGraph.point`` without the clip)."""
    x, y = edge_xy(tables, edge, offset_m)
    return np.column_stack([x, y])


def edge_xy(tables, edge, offset_m, *, out=None):
    """:func:`edge_point` as two (N,) arrays ``x``, ``y`` (1-D gathers);
    ``out`` : optional (2, N) float array to hold them."""
    if out is None:
        out = np.empty((2, np.shape(edge)[0]))
    x, y = out
    np.take(tables.edge_ux, edge, out=x)
    x *= offset_m
    x += tables.edge_x0.take(edge)
    np.take(tables.edge_uy, edge, out=y)
    y *= offset_m
    y += tables.edge_y0.take(edge)
    return x, y


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
    arrays, log_lik = move_arrays(state, length_m, heading_rad, tables=tables, settings=settings, rng=rng,
                                  earth_to_plan_rad=earth_to_plan_rad, max_hops=max_hops)
    return state.replace(**arrays), log_lik


def move_arrays(state, length_m, heading_rad, *, tables, settings, rng, earth_to_plan_rad=0.0, max_hops=64):
    """:func:`move` returning the changed arrays (dict: ``edge``,
    ``offset_m``, ``direction``, ``heading_offset_rad``, ``scale``) instead
    of a new state, and the (N,) heading log-likelihood."""
    s = settings
    n = state.n
    f, m = s.length_sigma_frac, s.length_sigma_m
    # the jitter normals of the update in one call (float32 is plenty), as
    # many blocks of n as there are jitters switched on
    jitters = [s.heading_rw_rad > 0, s.scale_rw > 0, f > 0 or m > 0]
    z = normal32(rng, sum(jitters) * n)
    blocks = iter(range(0, z.size, n))
    # nuisance random walks
    hoff = state.heading_offset_rad
    if jitters[0]:
        i = next(blocks)
        hoff = hoff + np.float32(s.heading_rw_rad) * z[i : i + n]
    scale = state.scale
    if jitters[1]:
        i = next(blocks)
        scale = scale + np.float32(s.scale_rw) * z[i : i + n]
        np.clip(scale, 0.5, 1.5, out=scale)
    hp32 = np.add(hoff, heading_rad + earth_to_plan_rad, dtype=np.float32)
    ch, sh = np.cos(hp32), np.sin(hp32)  # float32 cos/sin: vectorised, ~1e-7 rad is plenty
    dist = length_m * scale
    # relative and absolute length noise: one Gaussian with both variances,
    # L s (1 + f e1) + m e2  ~  L s + sqrt((L s f)^2 + m^2) e
    if jitters[2]:
        i = next(blocks)
        if f > 0:
            sd = np.multiply(dist, f, dtype=np.float32)  # the noise is float32 anyway
            sd *= sd
            sd += np.float32(m * m)
            np.sqrt(sd, out=sd)
            sd *= z[i : i + n]
        else:
            sd = m * z[i : i + n]
        dist += sd
    remaining = np.maximum(dist, 0.0, out=dist)

    kappa = float(s.heading_kappa)
    p_rev = max(float(s.reverse_prior), 0.0)
    lp_rev = _log_prior(p_rev)
    edge = state.edge

    # decision 1: go on or turn back on the current edge.
    # s_on = kappa (c - 1), s_back = kappa (-c - 1) + log p_rev, so with
    # x = exp(s_back - s_on): P(back) = x / (1 + x), lse = s_on + log1p(x)
    direc0 = state.direction
    cosf = tables.edge_u32[0].take(edge)
    cosf *= ch
    t = tables.edge_u32[1].take(edge)
    t *= sh
    cosf += t
    cosf *= direc0
    x = cosf * np.float32(-2.0 * kappa)
    x += np.float32(lp_rev)
    np.exp(x, out=x)
    p_back = x + np.float32(1.0)
    np.divide(x, p_back, out=p_back)
    back = rng.random(n, dtype=np.float32) < p_back
    direc = back.view(np.int8) * np.int8(-2)
    direc += np.int8(1)
    direc *= direc0  # -direction where turning back
    log_lik = cosf - np.float32(1.0)
    log_lik *= np.float32(kappa)
    log_lik += np.log1p(x)
    np.minimum(log_lik, 0.0, out=log_lik)

    # travel, choosing an edge at each node reached (inverse-CDF draw over
    # the padded incident edges). First leg on the full arrays.
    o = state.offset_m
    # distance to the edge's end ahead: len - o forwards, o backwards,
    # = len / 2 + d (len / 2 - o)
    half = tables.edge_len.take(edge)
    half *= 0.5
    to_end = half - o
    to_end *= direc
    to_end += half
    stp = np.minimum(remaining, to_end, out=to_end)
    off = stp * direc
    off += o
    remaining -= stp
    moving = np.flatnonzero(remaining > _EPS_M)
    if moving.size:
        edge = edge.copy()
    d_max = tables.cand.shape[1]
    # option weights exp(kappa (cos - 1)) are in [exp(-2 kappa), 1]: float32
    # cannot underflow for every option unless kappa is large; then the best
    # score is taken out first
    need_top = 2.0 * kappa > 80.0
    prior_w, prior_log = tables.arrival_prior(p_rev)
    ch_k = ch * np.float32(kappa)
    sh_k = sh * np.float32(kappa)
    for _ in range(max_hops):
        if moving.size == 0:
            break
        mm = moving.size
        ae = edge.take(moving)
        ae *= 2
        ae += direc.take(moving) < 0  # arrival index 2 e + (d < 0)
        # (D, m) layout: each option's row is contiguous
        cs = tables.arr_cs.take(ae, axis=2)  # (2, D, m)
        score = cs[0]
        score *= ch_k.take(moving)
        cs[1] *= sh_k.take(moving)
        score += cs[1]
        score -= np.float32(kappa)  # kappa (cos(h - angle) - 1)
        if need_top:
            score += prior_log.take(ae, axis=1)
            top = score.max(axis=0)
            score -= top
            w = np.exp(score, out=score)
        else:
            w = np.exp(score, out=score)
            w *= prior_w.take(ae, axis=1)  # way back p_rev, padding 0
        for j in range(1, d_max):  # running sum over the D options (faster than cumsum here)
            w[j] += w[j - 1]
        total = w[-1]
        # threshold in (0, total]: the first option whose running sum reaches
        # it has weight > 0
        thr = rng.random(mm, dtype=np.float32)
        thr *= total
        np.maximum(thr, np.float32(np.finfo(np.float32).smallest_subnormal), out=thr)
        flat = ae * d_max
        flat += w[0] < thr
        for j in range(1, d_max - 1):
            flat += w[j] < thr
        lse = np.log(total)
        if need_top:
            lse += top
        np.minimum(lse, 0.0, out=lse)
        log_lik[moving] += lse
        edge[moving] = tables.arr_cand.take(flat)
        dr = tables.arr_dir.take(flat)
        direc[moving] = dr
        rem = remaining.take(moving)
        # leaving a node, the whole edge lies ahead
        stp = np.minimum(rem, tables.arr_len.take(flat))
        rem -= stp
        stp *= dr
        stp += tables.arr_start.take(flat)
        off[moving] = stp
        remaining[moving] = rem
        moving = moving[rem > _EPS_M]
    if not s.use_heading_likelihood:
        log_lik = np.zeros(n)
    arrays = {"edge": edge, "offset_m": off, "direction": direc, "heading_offset_rad": hoff, "scale": scale}
    return arrays, log_lik
