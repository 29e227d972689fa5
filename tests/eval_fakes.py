"""Small invented world for the evaluation tests: a grid of corridors, an
analytic field, a walk along the corridors with exact truth, and dead
reckoning with a known heading bias and step-length error."""

from __future__ import annotations

import numpy as np

from fingerprint.fieldmap import FieldMap
from fingerprint.floorgraph import FloorGraph
from fingerprint.records import Checkpoints, Motion, ProcessedWalk, Track


def field_at(xy):
    """Analytic plan-frame field (N, 3) µT at (N, 2) metres."""
    x, y = xy[..., 0], xy[..., 1]
    bx = 20 + 8 * np.sin(x / 2.5) * np.cos(y / 3.0)
    by = 5 + 6 * np.cos(x / 3.5 + y / 4.0)
    bu = -40 + 10 * np.sin(x / 3.0 + y / 2.0) + 4 * np.cos(y / 1.7)
    return np.stack([bx, by, bu], axis=-1)


def corridor_graph():
    """Corridors y = 5, 15, 25 (x 5..35) and x = 5, 20, 35 (y 5..25), 1 m edges."""
    nodes = {}
    edges = set()

    def nid(p):
        p = (round(p[0], 6), round(p[1], 6))
        if p not in nodes:
            nodes[p] = len(nodes)
        return nodes[p]

    for y in (5, 15, 25):
        for x in range(5, 35):
            edges.add(tuple(sorted((nid((x, y)), nid((x + 1, y))))))
    for x in (5, 20, 35):
        for y in range(5, 25):
            edges.add(tuple(sorted((nid((x, y)), nid((x, y + 1))))))
    xy = np.array(sorted(nodes, key=nodes.get), dtype=float)
    return FloorGraph.from_arrays(xy, np.array(sorted(edges)))


def fake_map(*, earth_to_plan_rad=0.0):
    res = 0.25
    origin = np.array([0.0, 0.0])
    nx, ny = 161, 121  # 40 m x 30 m
    xs = origin[0] + res * np.arange(nx)
    ys = origin[1] + res * np.arange(ny)
    gx, gy = np.meshgrid(xs, ys)
    mean = field_at(np.stack([gx, gy], axis=-1))
    return FieldMap(
        floor="T",
        origin_xy=origin,
        resolution_m=res,
        mean_ut=mean,
        var_ut2=np.full((ny, nx, 3), 0.25),
        coverage_m=np.zeros((ny, nx)),
        free=np.ones((ny, nx), dtype=bool),
        graph=corridor_graph(),
        earth_to_plan_rad=earth_to_plan_rad,
        meta={"kernel": "analytic", "plan_hash": "test"},
    )


ROUTE = np.array([[5, 5], [35, 5], [35, 25], [20, 25], [20, 5]], dtype=float)


def fake_walk(*, heading_bias_rad=0.0, scale=1.0, noise_ut=0.3, speed=1.2, step=0.6, rate=50.0,
              rng=None, cp_every_m=10.0, route=ROUTE, earth_to_plan_rad=0.0):
    """A walk along ``route`` with exact truth.

    Returns
    -------
    walk : ProcessedWalk (earth frame = plan rotated by -earth_to_plan_rad)
    checkpoints : Checkpoints every ``cp_every_m`` of true path (first at 0)
    truth : Track (true path, 50 Hz)
    """
    rng = np.random.default_rng(0) if rng is None else rng
    seg = np.diff(route, axis=0)
    seg_len = np.hypot(seg[:, 0], seg[:, 1])
    cum = np.concatenate([[0.0], np.cumsum(seg_len)])
    total = cum[-1]

    def pos(s):
        s = np.clip(s, 0, total)
        i = np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(seg) - 1)
        f = (s - cum[i]) / seg_len[i]
        return route[i] + f[:, None] * seg[i], np.arctan2(seg[i, 1], seg[i, 0])

    t = np.arange(0.0, total / speed, 1.0 / rate)
    xy, hd_plan = pos(t * speed)
    b_plan = field_at(xy)
    a = -earth_to_plan_rad  # plan -> earth
    c, s_ = np.cos(a), np.sin(a)
    b_earth = b_plan.copy()
    b_earth[:, 0] = c * b_plan[:, 0] - s_ * b_plan[:, 1]
    b_earth[:, 1] = s_ * b_plan[:, 0] + c * b_plan[:, 1]
    b_earth += rng.normal(0, noise_ut, size=b_earth.shape)
    hd_earth = hd_plan - earth_to_plan_rad
    n_steps = int(total // step)
    s_steps = step * np.arange(1, n_steps + 1)
    t_steps = s_steps / speed
    _, hd_steps = pos(s_steps - step / 2)  # heading of the step's middle
    motion = Motion(
        t=t_steps,
        length_m=np.full(n_steps, step * scale),
        heading_rad=hd_steps - earth_to_plan_rad + heading_bias_rad,
        kind="steps",
    )
    quat = np.tile([0.0, 0.0, 0.0, 1.0], (t.size, 1))
    walk = ProcessedWalk(t=t, quat=quat, mag_earth_ut=b_earth, heading_rad=hd_earth,
                         mag_noise_ut=noise_ut, motion=motion, platform="handheld")
    s_cp = np.arange(0.0, total, cp_every_m)
    cp_xy, _ = pos(s_cp)
    cps = Checkpoints(t=s_cp / speed, xy=cp_xy)
    truth = Track(t=t, xy=xy, heading_rad=hd_plan)
    return walk, cps, truth


def slow_run(task):
    """A sweep run that takes a while (for the kill-and-resume test)."""
    import time

    time.sleep(0.25)
    return {"median_error_m": float(task["seed_index"]) + 0.5}
