"""Dead reckoning: Weinberg's step-length formula on a worked example,
step counting on a synthetic gait (acceptance: within 2 %), the step
constant fit, and odometry grouping against plain loops (slow twins)."""

import numpy as np
import pytest

from fingerprint.odometry import OdometrySettings, odometry_motion
from fingerprint.records import Checkpoints, Motion
from fingerprint.steps import (
    StepSettings,
    checkpoint_segments,
    detect_steps,
    fit_step_constant,
    motion_positions,
    weinberg_length,
)

G = 9.80665


def test_weinberg_worked_example():
    # Weinberg (2002), Analog Devices AN-602: L = K * (a_max - a_min)^(1/4).
    # By hand: 16^(1/4) = 2, 81^(1/4) = 3, 0.0625^(1/4) = 0.5.
    np.testing.assert_allclose(weinberg_length([G + 8, G + 81, 1.0625], [G - 8, G, 1.0], 0.5), [1.0, 1.5, 0.25])
    assert weinberg_length(5.0, 7.0, 0.5) == 0.0  # no negative lengths


def _gait(seed=0, fs=50.0):
    """|a| of a walker: cadence drifting 1.5-2.3 Hz, a second harmonic,
    sensor noise, and two standing pauses. Returns t, acc (N, 3), the true
    number of steps (complete gait cycles while walking) and the phase."""
    rng = np.random.default_rng(seed)
    t = np.arange(0, 240, 1 / fs)
    f = 1.9 + 0.4 * np.sin(2 * np.pi * t / 70.0)
    walking = ~(((t > 60) & (t < 75)) | ((t > 150) & (t < 170)))
    phase = 2 * np.pi * np.cumsum(np.where(walking, f, 0.0)) / fs
    amp = rng.uniform(1.8, 3.0) * walking
    a = G + amp * (np.sin(phase) + 0.3 * np.sin(2 * phase + 0.8)) + rng.normal(0, 0.15, t.size)
    acc = np.column_stack([rng.normal(0, 0.2, t.size), rng.normal(0, 0.2, t.size), a])
    return t, acc, int(np.floor(phase[-1] / (2 * np.pi))), phase


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_step_count_synthetic_gait_within_2_percent(seed):
    t, acc, n_true, _ = _gait(seed)
    ev = detect_steps(t, acc)
    assert abs(ev.n - n_true) <= 0.02 * n_true
    # no steps while standing
    assert not np.any((ev.t > 61) & (ev.t < 74))
    assert np.all(np.diff(ev.t) >= StepSettings().min_interval_s - 1e-9)


def test_no_steps_when_still():
    rng = np.random.default_rng(4)
    t = np.arange(0, 30, 0.02)
    acc = rng.normal(0, 0.05, (t.size, 3)) + [0, 0, G]
    assert detect_steps(t, acc).n == 0


def test_fit_step_constant_recovers_true_length():
    """A walker with a fixed stride (0.7 m per gait cycle) east; checkpoints
    from the true path. The fitted K must give 0.7 m per step."""
    t, acc, n_true, phase = _gait(seed=5)
    ev = detect_steps(t, acc)
    steps = Motion(t=ev.end_s, length_m=ev.factor * 1.0, heading_rad=np.zeros(ev.n))
    tc = np.arange(2.0, 236.0, 9.0)
    x_true = 0.7 * np.interp(tc, t, phase) / (2 * np.pi)
    cps = Checkpoints(t=tc, xy=np.column_stack([x_true, np.zeros_like(tc)]))
    k, info = fit_step_constant([(steps, cps, 1.0)])
    assert info["n_segments"] >= 15
    assert k * np.median(ev.factor) == pytest.approx(0.7, rel=0.03)


def test_motion_positions_against_loop():
    rng = np.random.default_rng(6)
    m = Motion(t=np.cumsum(rng.uniform(0.4, 0.7, 40)), length_m=rng.uniform(0.5, 0.9, 40),
               heading_rad=rng.uniform(-np.pi, np.pi, 40))
    tq = np.sort(rng.uniform(m.t[0] - 1, m.t[-1] + 1, 50))
    got = motion_positions(m, tq)
    dur = np.median(np.diff(m.t))
    starts = np.concatenate([[m.t[0] - dur], m.t[:-1]])
    for q, g in zip(tq, got):
        p = np.zeros(2)
        for s, e, L, h in zip(starts, m.t, m.length_m, m.heading_rad):
            frac = np.clip((q - s) / (e - s), 0, 1)
            p += frac * L * np.array([np.cos(h), np.sin(h)])
        np.testing.assert_allclose(g, p, atol=1e-9)
    d, r = checkpoint_segments(m, Checkpoints(t=m.t[[0, 10, 20]], xy=np.array([[0, 0], [5, 0], [5, 0.5]])))
    assert d.tolist() == [5.0]  # the 0.5 m pair is under min_distance_m


def test_odometry_against_loop():
    rng = np.random.default_rng(7)
    n = 2000
    t = np.arange(n) * 0.01
    dyaw = np.where((np.arange(n) // 400) % 2 == 1, 0.004, 0.0)
    odom = np.column_stack([np.full(n, 0.006), rng.normal(0, 0.0005, n), dyaw])
    heading = 0.3 + np.cumsum(dyaw)
    m = odometry_motion(t, odom, heading, settings=OdometrySettings(group_m=0.5, group_s=0.5))
    assert m.kind == "odometry"
    # slow twin: integrate row by row in the earth frame
    p = np.zeros(2)
    for i in range(n):
        h = heading[i] - 0.5 * dyaw[i]
        c, s = np.cos(h), np.sin(h)
        p += [c * odom[i, 0] - s * odom[i, 1], s * odom[i, 0] + c * odom[i, 1]]
    np.testing.assert_allclose(m.path()[-1], p, atol=1e-9)
    # groups: a few updates per second, none longer than 0.5 s
    assert np.all(np.diff(m.t) <= 0.5 + 1e-9)
    assert 1.9 <= m.n / (t[-1] - t[0]) <= 4.1
    # a group is the chord of its rows: shorter than their sum by the lateral
    # zig-zag and by (kappa L)^2 / 24 on arcs (elementary geometry), under 1 % here
    assert m.length_m.sum() == pytest.approx(np.hypot(odom[:, 0], odom[:, 1]).sum(), rel=1e-2)
    assert m.length_m.sum() < np.hypot(odom[:, 0], odom[:, 1]).sum()
