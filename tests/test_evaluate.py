"""The evaluation runner and its baselines on an invented corridor world
(tests/eval_fakes.py) with exact truth."""

import json
import math

import numpy as np
import pytest

from fingerprint.records import Checkpoints, Motion, ProcessedWalk
from mapping.baselines import dead_reckoning_track, densify_graph, dtw_cost, dtw_path, dtw_track, field_sequence
from mapping.evaluate import evaluate_walk, per_checkpoint_rows, per_walk_rows, summary_of, Evaluation
from mapping.metrics import SUMMARY_KEYS, checkpoint_errors

from eval_fakes import corridor_graph, fake_map, fake_walk


def _walk_from_motion(motion):
    t = np.linspace(0, motion.t[-1], 50)
    return ProcessedWalk(t=t, quat=np.tile([0, 0, 0, 1.0], (50, 1)), mag_earth_ut=np.zeros((50, 3)),
                         heading_rad=np.zeros(50), mag_noise_ut=0.5, motion=motion)


# -- dead reckoning ------------------------------------------------------------
def test_dead_reckoning_hand_worked_rotation():
    # Three 1 m steps heading east (0 rad) then one 2 m step north (pi/2), in
    # the earth frame. earth_to_plan = +90 deg turns east into plan +y and
    # north into plan -x. From (10, 5): (10,6), (10,7), (10,8), then (8,8).
    m = Motion(t=np.array([1.0, 2.0, 3.0, 4.0]), length_m=np.array([1.0, 1.0, 1.0, 2.0]),
               heading_rad=np.array([0.0, 0.0, 0.0, math.pi / 2]))
    tr = dead_reckoning_track(_walk_from_motion(m), (10.0, 5.0), start_time_s=0.0, earth_to_plan_rad=math.pi / 2)
    np.testing.assert_allclose(tr.xy, [[10, 5], [10, 6], [10, 7], [10, 8], [8, 8]], atol=1e-12)
    np.testing.assert_allclose(tr.t, [0, 1, 2, 3, 4])
    # starting at t = 2.5 integrates only the increments ending after it
    tr2 = dead_reckoning_track(_walk_from_motion(m), (0.0, 0.0), start_time_s=2.5, earth_to_plan_rad=0.0)
    np.testing.assert_allclose(tr2.xy, [[0, 0], [1, 0], [1, 2]], atol=1e-12)


def test_dead_reckoning_heading_bias_gives_the_chord_error():
    # On a straight first leg, a constant heading error theta after d metres
    # puts the estimate 2 d sin(theta / 2) from the truth (isosceles triangle,
    # law of cosines; common practice, no source).
    theta = math.radians(6.0)
    walk, cps, _ = fake_walk(heading_bias_rad=theta, noise_ut=0.0)
    tr = dead_reckoning_track(walk, cps.xy[0], start_time_s=cps.t[0])
    err = checkpoint_errors(tr, cps)
    first_leg = cps.xy[:, 1] == 5.0  # route starts along y = 5 for 30 m
    d = cps.xy[first_leg, 0] - 5.0
    np.testing.assert_allclose(err[first_leg], 2 * d * math.sin(theta / 2), atol=0.05)


# -- DTW --------------------------------------------------------------------
def _dtw_slow(a, b, band=None):
    """Obviously correct twin: full dynamic programme with Python loops."""
    n, m = len(a), len(b)
    D = [[math.inf] * (m + 1) for _ in range(n + 1)]
    D[0][0] = 0.0
    for i in range(1, n + 1):
        for j in range(1, m + 1):
            if band is not None and abs(i - j * n / m) > band + n / m:
                continue
            c = float(np.sum((np.atleast_1d(a[i - 1]) - np.atleast_1d(b[j - 1])) ** 2))
            D[i][j] = c + min(D[i - 1][j], D[i][j - 1], D[i - 1][j - 1])
    return D[n][m]


def test_dtw_hand_worked():
    # [0,1,2] vs [0,1,1,2]: the repeated 1 is absorbed by a horizontal step -> 0.
    assert dtw_cost([0.0, 1.0, 2.0], np.array([[0.0, 1.0, 1.0, 2.0]]))[0] == pytest.approx(0.0)
    # [1,2,3] vs [2,2,2,3,4]: 1 must meet the first 2 (cost 1) and 4 must meet
    # the last 3 (cost 1); everything else can align at zero cost -> 2.
    assert dtw_cost([1.0, 2.0, 3.0], np.array([[2.0, 2.0, 2.0, 3.0, 4.0]]))[0] == pytest.approx(2.0)
    cost, match = dtw_path([1.0, 2.0, 3.0], [2.0, 2.0, 2.0, 3.0, 4.0])
    assert cost == pytest.approx(2.0)
    assert match[0] == 0 and match[2] == 4  # 3 stays aligned with the end


def test_dtw_vectorised_equals_slow_twin():
    rng = np.random.default_rng(3)
    q = rng.normal(size=(12, 2))
    cands = rng.normal(size=(6, 15, 2))
    fast = dtw_cost(q, cands)
    slow = [_dtw_slow(q, c) for c in cands]
    np.testing.assert_allclose(fast, slow, rtol=1e-12)
    # band never lowers the cost
    assert np.all(dtw_cost(q, cands, band=3) >= fast - 1e-12)


def test_field_sequence_per_metre():
    walk, cps, truth = fake_walk(noise_ut=0.0)
    s, t, f = field_sequence(walk, start_time_s=0.0, step_m=1.0)
    assert np.allclose(np.diff(s), 1.0)
    # step lengths are exact, so the distance at time t is 1.2 t (1.2 m/s)
    np.testing.assert_allclose(t[1:], s[1:] / 1.2, atol=0.05)
    assert np.all(np.isfinite(f)) and f.shape == (s.size, 2)


def test_densify_graph_spacing():
    g = corridor_graph()
    pts = densify_graph(g, spacing_m=0.25)
    # every point lies on the graph
    assert np.max(g.project(pts)[2]) < 1e-9
    # and every graph point is within 0.125 m of one of them
    rng = np.random.default_rng(0)
    e, o = g.sample_uniform(500, rng)
    q = g.point(e, o)
    d = np.min(np.hypot(*(q[:, None, :] - pts[None, :, :]).transpose(2, 0, 1)), axis=1)
    assert d.max() <= 0.125 + 1e-9


def test_dtw_track_beats_drifting_dead_reckoning():
    # Heading bias 7 deg and steps 8 % long: dead reckoning drifts by metres;
    # matching the field against the map along the graph should not.
    walk, cps, _ = fake_walk(heading_bias_rad=math.radians(7), scale=1.08, noise_ut=0.3)
    fmap = fake_map()
    dr = checkpoint_errors(dead_reckoning_track(walk, cps.xy[0], start_time_s=cps.t[0]), cps)[1:]
    tr = dtw_track(walk, fmap, cps.xy[0], start_time_s=cps.t[0], rng=np.random.default_rng(1))
    dt = checkpoint_errors(tr, cps)[1:]
    assert np.median(dr) > 3.0
    assert np.median(dt) < 0.5 * np.median(dr)
    # estimates lie on the graph
    assert np.max(fmap.graph.project(tr.xy)[2]) < 1e-6


# -- the runner -------------------------------------------------------------
def test_evaluate_walk_dead_reckoning_mode_and_tables():
    theta = math.radians(6.0)
    walk, cps, truth = fake_walk(heading_bias_rad=theta, noise_ut=0.0)
    fmap = fake_map()
    we = evaluate_walk("w1", walk, cps, fmap, mode="dead-reckoning", baselines=("dtw",), seed=4, truth=truth)
    r = we.main_result
    assert we.main == "dead-reckoning" and set(we.results) == {"dead-reckoning", "dtw"}
    assert not r.scored[0] and r.scored[1:].all()
    first_leg = np.flatnonzero(cps.xy[:, 1] == 5.0)[1:]
    d = cps.xy[first_leg, 0] - 5.0
    np.testing.assert_allclose(r.errors_m[first_leg], 2 * d * math.sin(theta / 2), atol=0.05)
    ev = Evaluation(mode="dead-reckoning", seed=4, settings={}, walks=[we], skipped=[], runtime_s=1.0, summary={},
                    baselines=("dtw",))
    s = summary_of(ev)
    assert tuple(s) == SUMMARY_KEYS
    assert s["checkpoints"] == cps.n - 1
    assert s["median_error_m"] == pytest.approx(float(np.median(r.errors_m[1:])), abs=1e-3)
    assert s["dead_reckoning_median_error_m"] == s["median_error_m"]
    assert s["no_field_median_error_m"] is None  # not run here
    json.dumps(s, allow_nan=False)
    wc, wr = per_walk_rows(ev)
    assert wr[0][wc.index("scored")] == cps.n - 1
    cc, cr = per_checkpoint_rows(ev)
    assert len(cr) == cps.n
    assert cr[3][cc.index("error_m")] == pytest.approx(r.errors_m[3])


def test_evaluate_walk_needs_two_checkpoints():
    from fingerprint.errors import DataError

    walk, cps, _ = fake_walk()
    one = Checkpoints(t=cps.t[:1], xy=cps.xy[:1])
    with pytest.raises(DataError, match="at least 2"):
        evaluate_walk("w", walk, one, fake_map(), mode="dead-reckoning", baselines=())


# -- with the particle filter --------------------------------------------------
def test_tracking_filter_beats_dead_reckoning_and_runs_the_baselines():
    from fingerprint.localise import FilterSettings

    walk, cps, truth = fake_walk(heading_bias_rad=math.radians(7), scale=1.08, noise_ut=0.3)
    fmap = fake_map()
    # this walker's stride is 8 % longer than the step model's: the filter
    # needs its step-length scale state (off by default)
    stride = FilterSettings(n_particles=500, scale_sigma0=0.08, scale_rw=0.005, rough_scale=0.003)
    we = evaluate_walk("w", walk, cps, fmap, mode="tracking", settings=stride, seed=1)
    assert set(we.results) == {"filter", "dead-reckoning", "no-field", "dtw"}
    f = np.median(we.results["filter"].scored_errors_m)
    dr = np.median(we.results["dead-reckoning"].scored_errors_m)
    assert f <= 1.0 and 3 * f <= dr
    assert we.converged
    # same seed -> same result (every draw from the generator passed down)
    again = evaluate_walk("w", walk, cps, fmap, mode="tracking", settings=stride, seed=1)
    np.testing.assert_array_equal(again.results["filter"].errors_m, we.results["filter"].errors_m)


def test_global_mode_scores_all_and_records_convergence():
    from fingerprint.localise import FilterSettings

    walk, cps, _ = fake_walk(heading_bias_rad=math.radians(3), noise_ut=0.3)
    we = evaluate_walk("w", walk, cps, fake_map(), mode="global", settings=FilterSettings(n_particles_global=4000),
                       seed=2, baselines=())
    r = we.main_result
    assert r.scored.all()
    assert we.converged
    # the definition (README, summary.json): the distance walked at the first
    # checkpoint from which every error stays under 3 m, recomputed here
    k = int(np.flatnonzero(r.errors_m >= 3.0).max()) + 1 if np.any(r.errors_m >= 3.0) else 0
    assert we.convergence_distance_m == pytest.approx(we.distance_m[k])
    # the global-mode bar of the localisation issue: converged within 40 m walked
    assert k < len(r.errors_m) and we.convergence_distance_m <= 40.0


# -- the vertical offset a robot's planar self-calibration cannot see ----------
def test_map_vertical_field_is_the_mean_along_the_graph():
    # reference: points drawn uniformly along the graph with
    # FloorGraph.sample_uniform (an independent sampler)
    import _pf_synth as S
    from mapping.evaluate import map_vertical_ut

    g = S.grid_graph()
    fm = S.field_map(g)
    e, off = g.sample_uniform(200_000, np.random.default_rng(0))
    m, _, _ = fm.lookup(g.point(e, off))
    assert map_vertical_ut(fm) == pytest.approx(m[:, 2].mean(), abs=0.05)


def test_walks_read_for_a_map_take_the_robot_vertical_offset_from_it(tmp_path):
    # a bare robot magnetometer turning about z only, 55 µT of vertical
    # hard-iron offset (the construction's truth), on a floor whose mapped
    # vertical field is -41 µT everywhere: read for that map, the walk's
    # vertical field comes back to -41 µT; read without it, 55 µT stay in
    # (the offset along the turning axis is not observable: common
    # practice, no source)
    import _pf_synth as S
    from fingerprint.logio import write_walk_log
    from mapping.evaluate import load_walks
    from mapping.walkset import WalkFiles
    from test_pipeline import _robot_log

    log, _, _ = _robot_log(offset=(30.0, -80.0, 55.0))
    path = tmp_path / "rb.log.csv"
    write_walk_log(path, log)
    g = S.grid_graph()
    fm = S.field_map(g, field=lambda xy: np.broadcast_to([0.0, 22.0, -41.0], xy.shape[:-1] + (3,)).copy())
    wf = [WalkFiles(name="rb", log=path, checkpoints=None, track=None)]
    (with_map,) = load_walks(wf, fmap=fm)
    (plain,) = load_walks(wf)
    assert np.mean(with_map.walk.mag_earth_ut[:, 2]) == pytest.approx(-41.0, abs=0.5)
    assert np.mean(plain.walk.mag_earth_ut[:, 2]) > -41.0 + 40.0


def test_ground_truth_far_from_the_graph_is_a_warning():
    """A checkpoint 4 m beside the corridor grid (corridors at y = 5, 15, 25;
    x = 5, 20, 35): the graph's own distance to it is 4 m by construction,
    so the filter cannot come nearer; the run says so once."""
    import dataclasses

    from fingerprint.errors import LodemapWarning
    from mapping.evaluate import LoadedWalk, evaluate_walks

    walk, cps, truth = fake_walk(rng=np.random.default_rng(0))
    xy = cps.xy.copy()
    xy[-1] = [12.0, 19.0]  # 4 m from y = 15, 8 m from x = 5 and x = 20
    moved = dataclasses.replace(cps, xy=xy)
    with pytest.warns(LodemapWarning, match=r"1 of \d+ checkpoints lie more than 2 m from the map's floor graph "
                                            r"\(up to 4\.0 m; walks far\)"):
        ev = evaluate_walks(fake_map(), [LoadedWalk("far", walk, moved, truth), LoadedWalk("near", walk, cps, truth)],
                            mode="dead-reckoning", baselines=(), progress=False)
    assert len(ev.walks) == 2


def test_walks_marked_on_another_floor_than_the_map_are_a_warning():
    """The map is of floor "T"; a walk whose files say "U" is scored on the
    wrong map, and the run says so (one walk is one floor: common practice,
    no source)."""
    import dataclasses

    from fingerprint.errors import LodemapWarning
    from mapping.evaluate import LoadedWalk, evaluate_walks

    walk, cps, truth = fake_walk(rng=np.random.default_rng(0))
    other = dataclasses.replace(walk, meta={**walk.meta, "floor": "U"})
    here = dataclasses.replace(walk, meta={**walk.meta, "floor": "T"})
    with pytest.warns(LodemapWarning, match=r"1 of 3 walks are marked as recorded on another floor than the map's "
                                            r"\(T\): up \(U\)"):
        ev = evaluate_walks(fake_map(), [LoadedWalk("up", other, cps, truth), LoadedWalk("same", here, cps, truth),
                                         LoadedWalk("unmarked", walk, cps, truth)],
                            mode="dead-reckoning", baselines=(), progress=False)
    assert [w.floor for w in ev.walks] == ["U", "T", walk.meta.get("floor")]


def test_walk_floor_prefers_the_log_and_names_a_disagreeing_checkpoint():
    # one walk is one floor (common practice, no source): the log's label
    # wins; a checkpoint that says otherwise is named by file and line
    import warnings

    from fingerprint.errors import LodemapWarning
    from fingerprint.records import WalkLog
    from mapping.walkset import walk_floor

    t = np.arange(3.0)
    nan3 = np.full((3, 3), np.nan)
    log = WalkLog(t=t, acc=nan3, gyro=nan3, mag=nan3, meta={"floor": "F1"}, path="w.log.csv", meta_lines={"floor": 3})
    bare = WalkLog(t=t, acc=nan3, gyro=nan3, mag=nan3, path="w.log.csv")

    def cps(*labels):
        k = len(labels)
        return Checkpoints(t=np.arange(k, dtype=float), xy=np.zeros((k, 2)), floor=np.array(labels, dtype=object),
                           path="w.checkpoints.csv", lines=np.arange(k) + 2)

    with warnings.catch_warnings():
        warnings.simplefilter("error", LodemapWarning)  # agreeing labels: no warning
        assert walk_floor(log, cps("F1", "", "F1")) == "F1"
        assert walk_floor(bare, cps("", "B1", "B1")) == "B1"
        assert walk_floor(bare, None) is None
        assert walk_floor(log, cps("", "")) == "F1"
    with pytest.warns(LodemapWarning, match=r"w\.checkpoints\.csv: line 3 says floor 'B1', w\.log\.csv line 3 says 'F1'; "
                                            r"1 of 3 labelled checkpoints disagree, floor 'F1' is used"):
        assert walk_floor(log, cps("F1", "B1", "F1")) == "F1"
    with pytest.warns(LodemapWarning, match=r"line 4 says floor 'F2', line 2 says 'F1'"):
        assert walk_floor(bare, cps("F1", "", "F2")) == "F1"


def test_warnings_of_walks_read_in_worker_processes_reach_the_caller(tmp_path):
    # a checkpoint on another floor than its log is found while the walk is
    # read, in a joblib worker process with jobs=2; the caller still sees the
    # warning (one walk is one floor: common practice, no source), and the
    # report's cautions name the walk marked on another floor than the map's
    import dataclasses

    from fingerprint.errors import LodemapWarning
    from fingerprint.logio import write_checkpoints, write_walk_log
    from mapping.evaluate import evaluate_walks, report_sections
    from mapping.walkset import WalkFiles
    from test_pipeline import _robot_log

    log, _, _ = _robot_log(offset=(0.0, 0.0, 0.0))
    files = []
    for name, floors in (("mixed", ["U", "T", "U"]), ("plain", ["T", "T", "T"])):
        write_walk_log(tmp_path / f"{name}.log.csv", dataclasses.replace(log, meta={"platform": "robot"}))
        cps = Checkpoints(t=np.array([5.0, 20.0, 40.0]), xy=np.array([[5.0, 5.0], [6.0, 5.0], [7.0, 5.0]]),
                          floor=np.array(floors, dtype=object))
        write_checkpoints(tmp_path / f"{name}.checkpoints.csv", cps)
        files.append(WalkFiles(name=name, log=tmp_path / f"{name}.log.csv",
                               checkpoints=tmp_path / f"{name}.checkpoints.csv", track=None))
    with pytest.warns(LodemapWarning) as said:
        ev = evaluate_walks(fake_map(), files, mode="dead-reckoning", baselines=(), progress=False, jobs=2)
    text = [str(w.message) for w in said]
    assert any("mixed.checkpoints.csv: line 3 says floor 'T', line 2 says 'U'" in t for t in text), text
    assert any("1 of 2 walks are marked as recorded on another floor than the map's (T): mixed (U)" in t
               for t in text), text
    cautions = next(sec for sec in report_sections(ev, fake_map())[0] if sec.title == "Cautions")
    assert "mixed (U)" in cautions.body
