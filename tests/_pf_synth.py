"""Synthetic floors and walks for the particle-filter tests: a corridor
grid, an analytic field raster and a walk along the graph with noisy dead
reckoning. Everything is drawn from a seeded numpy Generator."""

from __future__ import annotations

import numpy as np

from fingerprint import FieldMap, FloorGraph
from fingerprint.records import Motion, ProcessedWalk


def grid_graph(nx=11, ny=7, spacing_m=3.0):
    """Corridors on a rectangular grid of nodes ``spacing_m`` apart."""
    xs, ys = np.meshgrid(np.arange(nx) * spacing_m, np.arange(ny) * spacing_m)
    nodes = np.column_stack([xs.ravel(), ys.ravel()])
    idx = np.arange(nx * ny).reshape(ny, nx)
    edges = np.vstack(
        [np.column_stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()]), np.column_stack([idx[:-1].ravel(), idx[1:].ravel()])]
    )
    return FloorGraph.from_arrays(nodes, edges)


def bump_field(xy, *, seed=0, n_bumps=40, extent=(0, 30, 0, 18)):
    """Plan-frame field (N, 3) µT: a uniform background plus Gaussian bumps
    (a smooth stand-in for the disturbances of steel in a building)."""
    rng = np.random.default_rng(seed)
    x0, x1, y0, y1 = extent
    c = rng.uniform([x0 - 2, y0 - 2], [x1 + 2, y1 + 2], size=(n_bumps, 2))
    amp = rng.normal(0, 12, size=(n_bumps, 3))
    width = rng.uniform(1.5, 4.0, size=n_bumps)
    d2 = np.sum((xy[..., None, :] - c) ** 2, axis=-1)
    g = np.exp(-0.5 * d2 / width**2)
    return np.array([12.0, 18.0, -42.0]) + g @ amp


def field_map(graph, *, seed=0, resolution_m=0.25, var_ut2=0.25, coverage_m=0.0, earth_to_plan_rad=0.0, field=None):
    """A FieldMap holding ``field`` (default :func:`bump_field`) exactly on a
    raster around the graph."""
    lo = graph.nodes_xy.min(axis=0) - 1.0
    hi = graph.nodes_xy.max(axis=0) + 1.0
    nx = int(np.ceil((hi[0] - lo[0]) / resolution_m)) + 1
    ny = int(np.ceil((hi[1] - lo[1]) / resolution_m)) + 1
    xs = lo[0] + resolution_m * np.arange(nx)
    ys = lo[1] + resolution_m * np.arange(ny)
    gx, gy = np.meshgrid(xs, ys)
    xy = np.stack([gx, gy], axis=-1)
    f = bump_field(xy, seed=seed) if field is None else field(xy)
    return FieldMap(
        "T", lo.astype(float), resolution_m, f, np.full(f.shape, var_ut2), np.full((ny, nx), float(coverage_m)),
        np.ones((ny, nx), bool), graph, earth_to_plan_rad=earth_to_plan_rad,
    )


def rot(vec, ang):
    c, s = np.cos(ang), np.sin(ang)
    return np.column_stack([c * vec[:, 0] - s * vec[:, 1], s * vec[:, 0] + c * vec[:, 1]])


def graph_walk(graph, rng, *, n_legs=25, speed_mps=1.2, step_m=0.7, rate_hz=10.0, start_node=None):
    """Truth: a walk along graph edges from node to node (no U-turns unless
    at a dead end). Returns (t (N,), xy (N, 2), heading_plan (N,))."""
    adj = [[] for _ in range(graph.n_nodes)]
    for u, v in graph.edges:
        adj[u].append(v)
        adj[v].append(u)
    node = int(rng.integers(graph.n_nodes)) if start_node is None else start_node
    prev = -1
    pts = [graph.nodes_xy[node]]
    for _ in range(n_legs):
        options = [v for v in adj[node] if v != prev] or adj[node]
        nxt = options[int(rng.integers(len(options)))]
        pts.append(graph.nodes_xy[nxt])
        prev, node = node, nxt
    pts = np.array(pts)
    seg = np.diff(pts, axis=0)
    seglen = np.hypot(seg[:, 0], seg[:, 1])
    cum = np.concatenate([[0], np.cumsum(seglen)])
    total = cum[-1]
    t = np.arange(0, total / speed_mps, 1.0 / rate_hz)
    s = t * speed_mps
    xy = np.column_stack([np.interp(s, cum, pts[:, 0]), np.interp(s, cum, pts[:, 1])])
    k = np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(seg) - 1)
    head = np.arctan2(seg[k, 1], seg[k, 0])
    return t, xy, head


def processed_walk(fmap_field, t, xy, head_plan, rng, *, earth_to_plan_rad=0.0, step_m=0.7, speed_mps=1.2,
                   noise_ut=0.5, bias_dev_ut=(0.0, 0.0, 0.0), heading_noise_rad=0.05, length_noise=0.05,
                   heading_bias_rad=0.0):
    """A ProcessedWalk observing the plan-frame field function along the
    truth, with a device-frame bias, sensor noise and noisy steps."""
    b_plan = fmap_field(xy)
    head_earth = head_plan - earth_to_plan_rad
    bh_earth = rot(b_plan[:, :2], -earth_to_plan_rad)
    bias = np.asarray(bias_dev_ut, float)
    c, s = np.cos(head_earth), np.sin(head_earth)
    bias_earth = np.column_stack([bias[0] * c - bias[1] * s, bias[0] * s + bias[1] * c])
    mag = np.column_stack([bh_earth + bias_earth, b_plan[:, 2] + bias[2]])
    mag = mag + noise_ut * rng.standard_normal(mag.shape)
    # steps every step_m of truth path
    dt_step = step_m / speed_mps
    ts = np.arange(dt_step, t[-1], dt_step)
    pos = np.column_stack([np.interp(ts, t, xy[:, 0]), np.interp(ts, t, xy[:, 1])])
    prev = np.vstack([xy[:1], pos[:-1]])
    d = pos - prev
    length = np.hypot(d[:, 0], d[:, 1]) * (1 + length_noise * rng.standard_normal(len(ts)))
    hstep = np.arctan2(d[:, 1], d[:, 0]) - earth_to_plan_rad + heading_bias_rad
    hstep = hstep + heading_noise_rad * rng.standard_normal(len(ts))
    motion = Motion(ts, np.maximum(length, 0), hstep, "steps")
    quat = np.tile([0.0, 0.0, 0.0, 1.0], (len(t), 1))
    return ProcessedWalk(t, quat, mag, head_earth + heading_bias_rad, noise_ut, motion)


def errors(track, t, xy):
    """Error (K,) metres of the track's updates against the truth."""
    tx = np.column_stack([np.interp(track.t, t, xy[:, 0]), np.interp(track.t, t, xy[:, 1])])
    return np.hypot(*(track.xy - tx).T)


def feed(loc, walk):
    """Push a ProcessedWalk into a Localiser sample by sample and increment
    by increment, as a live app would, then flush; returns ``loc``."""
    m = walk.motion
    k = 0
    for i in range(walk.n):
        while k < m.n and m.t[k] < walk.t[i]:
            loc.push_motion(m.t[k], m.length_m[k], m.heading_rad[k])
            k += 1
        loc.push(walk.t[i], walk.mag_earth_ut[i], walk.heading_rad[i])
    while k < m.n:
        loc.push_motion(m.t[k], m.length_m[k], m.heading_rad[k])
        k += 1
    loc.flush()
    return loc
