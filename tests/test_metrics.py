"""Metrics on hand-worked cases: every expected number below is worked out
by hand in the comments, not produced by the code under test."""

import json
import math

import numpy as np
import pytest
from scipy.stats.mstats import mquantiles

from fingerprint.records import Checkpoints, Motion, Track
from mapping.metrics import (
    SUMMARY_KEYS,
    checkpoint_errors,
    convergence,
    distance_walked_m,
    error_stats,
    scored_mask,
    summarise,
    walk_bootstrap_ci,
)


def _straight_track():
    # Estimated track: from (0, 0) at t=0 to (10, 0) at t=10, i.e. x = t, y = 0.
    return Track(t=np.array([0.0, 10.0]), xy=np.array([[0.0, 0.0], [10.0, 0.0]]))


def test_checkpoint_errors_hand_worked():
    # Checkpoints at t = 0, 2, 5, 8 at (0,0), (2,3), (5,-4), (6,0).
    # Interpolated estimates: (0,0), (2,0), (5,0), (8,0).
    # Errors by hand: 0, |3| = 3, |-4| = 4, |8-6| = 2.
    cps = Checkpoints(t=np.array([0.0, 2.0, 5.0, 8.0]), xy=np.array([[0, 0], [2, 3], [5, -4], [6, 0.0]]))
    err = checkpoint_errors(_straight_track(), cps)
    np.testing.assert_allclose(err, [0.0, 3.0, 4.0, 2.0], atol=1e-12)


def test_checkpoint_errors_diagonal_and_clamped():
    # A checkpoint at t=12 after the track's end: estimate held at (10, 0);
    # truth (13, 4): error sqrt(3^2 + 4^2) = 5 (3-4-5 triangle).
    cps = Checkpoints(t=np.array([12.0]), xy=np.array([[13.0, 4.0]]))
    np.testing.assert_allclose(checkpoint_errors(_straight_track(), cps), [5.0])


def test_scored_mask_modes():
    assert scored_mask(4, "tracking").tolist() == [False, True, True, True]
    assert scored_mask(4, "dead-reckoning").tolist() == [False, True, True, True]
    assert scored_mask(4, "global").tolist() == [True, True, True, True]


def test_distance_walked_hand_worked():
    # Increments ending at t = 1, 2, 3, 4 of 0.5, 0.7, 0.6, 0.8 m.
    m = Motion(t=np.array([1.0, 2.0, 3.0, 4.0]), length_m=np.array([0.5, 0.7, 0.6, 0.8]), heading_rad=np.zeros(4))
    # at t=0.5: nothing yet -> 0; t=2.5: 0.5 + 0.7 = 1.2; t=4: all = 2.6;
    # from t0=1.5 to t=3: 0.7 + 0.6 = 1.3
    np.testing.assert_allclose(distance_walked_m(m, [0.5, 2.5, 4.0]), [0.0, 1.2, 2.6])
    np.testing.assert_allclose(distance_walked_m(m, [3.0], t0=1.5), [1.3])


def test_convergence_rule():
    d = np.array([10.0, 20.0, 30.0, 40.0])
    # under 3 m from index 2 on (3.0 itself is not "under")
    assert convergence([5.0, 3.0, 1.0, 2.9], d) == (True, 30.0, 2)
    # never stays under: the last one is above
    ok, dist, idx = convergence([1.0, 1.0, 1.0, 4.0], d)
    assert not ok and math.isnan(dist) and idx == -1
    # under from the start
    assert convergence([0.5, 0.5, 0.5, 0.5], d) == (True, 10.0, 0)
    # dips under and back out, then under again from index 3
    assert convergence([1.0, 5.0, 7.0, 1.0], d) == (True, 40.0, 3)


def test_error_stats_hand_worked_and_against_scipy():
    # Pooled errors 3, 4, 2 (walk A) and 1, 0 (walk B): sorted 0 1 2 3 4.
    # median 2; mean 10/5 = 2; type-7 quantile h = (n-1) p (Hyndman & Fan
    # 1996, definition 7): p75 -> h = 3 -> 3; p95 -> h = 3.8 -> 3 + 0.8 = 3.8.
    e = [3.0, 4.0, 2.0, 1.0, 0.0]
    s = error_stats(e)
    assert s["median"] == pytest.approx(2.0)
    assert s["mean"] == pytest.approx(2.0)
    assert s["p75"] == pytest.approx(3.0)
    assert s["p95"] == pytest.approx(3.8)
    assert s["max"] == pytest.approx(4.0)
    assert s["n"] == 5
    # Reference: scipy's mquantiles with alphap = betap = 1 is type 7.
    ref = mquantiles(e, prob=[0.5, 0.75, 0.95], alphap=1, betap=1)
    np.testing.assert_allclose([s["median"], s["p75"], s["p95"]], ref)


def test_summary_keys_hand_worked():
    # Walk A: checkpoints scored errors 3, 4, 2 at distances 5, 12, 20 m:
    #   errors under 3 m from the third on -> converged at 20 m.
    # Walk B: errors 1, 0 at distances 4, 9 -> converged at 4 m.
    # Walk C: errors 1, 6 -> not converged.
    walks_err = [[3.0, 4.0, 2.0], [1.0, 0.0], [1.0, 6.0]]
    walks_dist = [[5.0, 12.0, 20.0], [4.0, 9.0], [3.0, 8.0]]
    conv = [convergence(e, d) for e, d in zip(walks_err, walks_dist)]
    assert [c[0] for c in conv] == [True, True, False]
    pooled = np.concatenate(walks_err)  # 3 4 2 1 0 1 6 -> sorted 0 1 1 2 3 4 6
    # median = 2; mean = 17 / 7; p75: h = 6*0.75 = 4.5 -> 3 + 0.5*(4-3) = 3.5;
    # p95: h = 5.7 -> 4 + 0.7*(6-4) = 5.4; max 6.
    # DR errors 2, 8, 10, 4 -> sorted 2 4 8 10, median (4+8)/2 = 6.
    # No-field errors 1, 2, 3, 4, 5: median 3; p95 h = 3.8 -> 4.8.
    # converged 2 of 3; median convergence distance of (20, 4) = 12.
    # real-time factor: 300 s of walks localised in 6 s -> 50.
    s = summarise(
        pooled,
        walks=3,
        converged=[c[0] for c in conv],
        convergence_distance_m=[c[1] for c in conv],
        dead_reckoning_errors_m=[2.0, 8.0, 10.0, 4.0],
        no_field_errors_m=[1.0, 2.0, 3.0, 4.0, 5.0],
        runtime_s=12.5,
        walk_duration_s=300.0,
        localise_time_s=6.0,
    )
    assert tuple(s) == SUMMARY_KEYS
    assert set(s) == {
        "walks", "checkpoints", "median_error_m", "mean_error_m", "p75_error_m", "p95_error_m",
        "max_error_m", "converged_fraction", "median_convergence_distance_m",
        "dead_reckoning_median_error_m", "no_field_median_error_m", "no_field_p95_error_m",
        "runtime_s", "realtime_factor",
    }  # fmt: skip
    assert s["walks"] == 3
    assert s["checkpoints"] == 7
    assert s["median_error_m"] == pytest.approx(2.0)
    assert s["mean_error_m"] == pytest.approx(17 / 7, abs=1e-4)
    assert s["p75_error_m"] == pytest.approx(3.5)
    assert s["p95_error_m"] == pytest.approx(5.4)
    assert s["max_error_m"] == pytest.approx(6.0)
    assert s["converged_fraction"] == pytest.approx(2 / 3, abs=1e-4)
    assert s["median_convergence_distance_m"] == pytest.approx(12.0)
    assert s["dead_reckoning_median_error_m"] == pytest.approx(6.0)
    assert s["no_field_median_error_m"] == pytest.approx(3.0)
    assert s["no_field_p95_error_m"] == pytest.approx(4.8)
    assert s["runtime_s"] == pytest.approx(12.5)
    assert s["realtime_factor"] == pytest.approx(50.0)
    json.dumps(s, allow_nan=False)  # JSON-clean


def test_summary_without_baselines_or_convergence_is_json_clean():
    s = summarise(
        [1.0],
        walks=1,
        converged=[False],
        convergence_distance_m=[math.nan],
        dead_reckoning_errors_m=None,
        no_field_errors_m=[],
        runtime_s=1.0,
        walk_duration_s=10.0,
        localise_time_s=0.0,
    )
    assert s["median_convergence_distance_m"] is None
    assert s["no_field_median_error_m"] is None
    assert s["realtime_factor"] is None
    json.dumps(s, allow_nan=False)


def test_walk_bootstrap_one_error_per_walk_matches_scipy():
    # with one error per walk, resampling walks is the ordinary bootstrap:
    # the percentile interval of the mean against scipy.stats.bootstrap
    # (percentile method), within Monte-Carlo noise
    from scipy.stats import bootstrap

    e = np.random.default_rng(3).gamma(2.0, 1.0, size=30)
    lo, hi = walk_bootstrap_ci([(v,) for v in e], np.mean, n_boot=4000, rng=np.random.default_rng(0))
    ref = bootstrap((e,), np.mean, n_resamples=4000, method="percentile", rng=np.random.default_rng(1))
    width = ref.confidence_interval.high - ref.confidence_interval.low
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.15 * width)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.15 * width)
    assert walk_bootstrap_ci([(e[:1],)], np.mean) is None  # one walk: no interval


def test_walk_bootstrap_keeps_pairs_and_walks_together():
    rng = np.random.default_rng(4)
    walks = [rng.gamma(2.0, 1.0, size=rng.integers(1, 6)) for _ in range(12)]
    # the second method is the first plus 0.5 m at every checkpoint: in every
    # paired resample the median moves by exactly 0.5 (hand-worked: a shift
    # moves every order statistic), so the interval is a point
    lo, hi = walk_bootstrap_ci([(w, w + 0.5) for w in walks], lambda a, b: np.median(b) - np.median(a), n_boot=300)
    assert lo == pytest.approx(0.5) and hi == pytest.approx(0.5)
    # resampling whole walks: a walk-constant error gives the same interval
    # as one error per walk, whatever the number of checkpoints in each walk
    # (the mean over equal-sized walks is the mean of walk levels)
    levels = rng.normal(size=10)
    per_walk = [(np.full(4, v),) for v in levels]
    one_each = [(np.array([v]),) for v in levels]
    assert walk_bootstrap_ci(per_walk, np.mean, rng=np.random.default_rng(5)) == pytest.approx(
        walk_bootstrap_ci(one_each, np.mean, rng=np.random.default_rng(5)))


def test_paired_difference_of_real_bench_is_exact_for_a_shift():
    from mapping.benchmarks.filter_real import paired_difference_ci

    rng = np.random.default_rng(6)
    ref = {f"w{i}": rng.gamma(2.0, 1.0, size=(3, 4)) for i in range(8)}
    # hand-worked: a constant 0.25 m better everywhere moves both the median
    # and the 95th percentile by -0.25, in every resample
    d = paired_difference_ci({k: v - 0.25 for k, v in ref.items()}, ref, n_boot=200)
    for key in ("median", "p95"):
        assert d[key] == pytest.approx((-0.25, -0.25, -0.25))


def test_seed_wins_of_real_bench_hand_worked():
    from mapping.benchmarks.filter_real import seed_wins

    rng = np.random.default_rng(7)
    ref = {f"w{i}": rng.gamma(2.0, 1.0, size=(3, 5)) for i in range(4)}
    # hand-worked: seed 0 shifted 0.5 m better, seed 1 0.2 m worse, seed 2
    # unchanged; a constant shift of every error moves every percentile by it
    shift = np.array([-0.5, 0.2, 0.0])[:, None]
    d = seed_wins({k: v + shift for k, v in ref.items()} | {"only-here": np.zeros((3, 2))}, ref)
    for key in ("median", "p95"):
        assert d[key] == pytest.approx([-0.5, 0.2, 0.0])
    # one seed by hand, two walks pooled: errors 1, 2, 3 and 1, 1, 4 (sorted
    # 1, 1, 1, 2, 3, 4: median 1.5) against 2, 2, 2 and 3, 3, 3 (median 2.5)
    d = seed_wins({"a": np.array([[1.0, 2.0, 3.0]]), "b": np.array([[1.0, 1.0, 4.0]])},
                  {"a": np.array([[2.0, 2.0, 2.0]]), "b": np.array([[3.0, 3.0, 3.0]])})
    assert d["median"] == pytest.approx([1.5 - 2.5])
    assert seed_wins({}, {})["median"].size == 0


def test_percentile_difference_hand_worked():
    from mapping.metrics import percentile_difference

    # one walk: A = 1, 2, 3 (median 2), B = 2, 3, 5 (median 3): difference
    # 1.0; no interval from a single walk
    d, lo, hi = percentile_difference([(np.array([1.0, 2.0, 3.0]), np.array([2.0, 3.0, 5.0]))], 50)
    assert d == pytest.approx(1.0) and math.isnan(lo) and math.isnan(hi)
    assert all(math.isnan(v) for v in percentile_difference([], 50))
