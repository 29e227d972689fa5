"""The sweep machinery on a fake run function: expansion, keys, seeds,
joblib and Dask execution, resume after an interruption, tidy CSV and the
bootstrap ranking."""

import csv
import json
import textwrap
from pathlib import Path

import numpy as np
import pytest

from fingerprint.errors import ConfigError, FormatError
from mapping.sweep import (
    RunStore,
    execute,
    expand_settings,
    load_sweep_config,
    make_tasks,
    parse_sweep_config,
    rank_settings,
    run_key,
    write_tidy_csv,
)


def fake_run(task):
    """A stand-in for one localisation run: an 'error' that depends on the
    settings and on a draw from the task's own seed."""
    ss = np.random.SeedSequence(task["seed"]["entropy"], spawn_key=tuple(task["seed"]["spawn_key"]))
    rng = np.random.default_rng(ss)
    n = task["settings"].get("n_particles", 100)
    return {"median_error_m": 10.0 / np.sqrt(n) + 0.01 * rng.standard_normal(), "draw": float(rng.uniform())}


class Boom(RuntimeError):
    pass


_CALLS = {"n": 0, "limit": None, "seen": []}


def counting_run(task):
    _CALLS["n"] += 1
    _CALLS["seen"].append(task["key"])
    if _CALLS["limit"] is not None and _CALLS["n"] > _CALLS["limit"]:
        raise Boom("interrupted on purpose")
    return fake_run(task)


def _cfg(tmp_path, body):
    p = tmp_path / "sweep.toml"
    p.write_text(textwrap.dedent(body), encoding="utf-8")
    return load_sweep_config(p)


BASE = """
[sweep]
seeds = 2
seed = 7
[data]
walks = ["walks"]
map = "floor.map"
"""


def test_grid_expansion_is_the_cartesian_product(tmp_path):
    cfg = _cfg(tmp_path, BASE + '[grid]\nn_particles = [100, 400, 900]\nfeature_set = ["total", "full"]\n')
    s = expand_settings(cfg)
    assert len(s) == 6  # 3 x 2
    assert {(d["n_particles"], d["feature_set"]) for d in s} == {
        (n, f) for n in (100, 400, 900) for f in ("total", "full")
    }
    assert cfg.walks[0] == (tmp_path / "walks").resolve()  # relative to the config file


def test_none_word_in_a_grid_is_none_and_valid_settings(tmp_path):
    # TOML (tomllib, the standard library's reader) has no null: "none" is None
    from mapping.sweep import filter_settings

    cfg = _cfg(tmp_path, BASE + '[grid]\nbias_corr_updates = [5.0, "none"]\n')
    s = expand_settings(cfg)
    assert [d["bias_corr_updates"] for d in s] == [5.0, None]
    assert filter_settings(s[1]).bias_corr_updates is None


def test_random_expansion_seeded_and_within_bounds(tmp_path):
    body = BASE.replace("seeds = 2", 'seeds = 2\nsearch = "random"\nsamples = 30') + (
        "[random]\nn_particles = {low = 100, high = 10000, log = true, integer = true}\n"
        "field_temper = {low = 0.05, high = 0.5}\nlikelihood = [\"gaussian\", \"student-t\"]\n"
    )
    cfg = _cfg(tmp_path, body)
    a, b = expand_settings(cfg), expand_settings(cfg)
    assert a == b  # same root seed -> same draws
    assert 1 < len(a) <= 30
    n = np.array([d["n_particles"] for d in a])
    t = np.array([d["field_temper"] for d in a])
    assert np.all((n >= 100) & (n <= 10000)) and n.dtype.kind == "i"
    assert np.all((t >= 0.05) & (t <= 0.5))
    assert {d["likelihood"] for d in a} == {"gaussian", "student-t"}
    # log-uniform: about half the draws below the geometric mean 1000
    assert 0.2 < np.mean(n < 1000) < 0.8
    c = expand_settings(cfg, rng=np.random.default_rng(99))
    assert c != a


def test_config_errors(tmp_path):
    with pytest.raises(FormatError, match="TOML"):
        _cfg(tmp_path, "[sweep\nseeds = 1")
    # the place in our usual form (the parser's own 1-based line and column)
    with pytest.raises(FormatError, match=r"sweep\.toml, line 2, column 9: not valid TOML: Invalid value$"):
        _cfg(tmp_path, "[sweep]\nseeds = = 2\n")
    with pytest.raises(ConfigError, match="mode"):
        _cfg(tmp_path, BASE.replace("seeds = 2", 'seeds = 2\nmode = "sideways"'))
    with pytest.raises(ConfigError, match="unknown key"):
        _cfg(tmp_path, BASE.replace("seeds = 2", "seedz = 2"))
    with pytest.raises(ConfigError, match="map settings"):
        _cfg(tmp_path, BASE + "[grid]\nmap_resolution_m = [0.25, 0.5]\n")
    with pytest.raises(ConfigError, match="non-empty list"):
        _cfg(tmp_path, BASE + "[grid]\nn_particles = 100\n")
    with pytest.raises(ConfigError, match="low must be"):
        parse_sweep_config({"data": {"walks": ["w"], "map": "m"}, "sweep": {"search": "random"},
                            "random": {"x": {"low": 2, "high": 1}}})
    # cross-validation: K >= 2, maps built per fold (so no fixed map)
    for bad in (1, -2, 2.5, True):
        with pytest.raises(ConfigError, match="folds must be"):
            parse_sweep_config({"data": {"walks": ["w"], "map": "m"}, "sweep": {"folds": bad}})
    with pytest.raises(ConfigError, match="needs \\[data\\] site, floor and survey"):
        parse_sweep_config({"data": {"walks": ["w"], "map": "m"}, "sweep": {"folds": 3}})
    with pytest.raises(ConfigError, match="remove \\[data\\] map"):
        parse_sweep_config({"data": {"walks": ["w"], "map": "m", "site": "s.json", "floor": "F", "survey": ["w"]},
                            "sweep": {"folds": 3}})


def test_fold_assignment_balanced_seeded_and_order_free():
    from mapping.sweep import fold_assignment

    names = [f"walk_{i:03d}" for i in range(23)]
    a = fold_assignment(names, 4, seed=5)
    assert set(a) == set(names)
    sizes = np.bincount(list(a.values()), minlength=4)
    assert sizes.max() - sizes.min() <= 1 and sizes.sum() == 23  # 6, 6, 6, 5
    assert fold_assignment(names[::-1], 4, seed=5) == a  # input order does not matter
    assert fold_assignment(names, 4, seed=6) != a  # the seed does


def test_tasks_keys_and_spawned_seeds():
    settings = [{"n_particles": 100}, {"n_particles": 400}]
    tasks = make_tasks(settings, ["w1", "w2", "w3"], seeds=2, root_seed=7)
    assert len(tasks) == 2 * 3 * 2
    assert len({t["key"] for t in tasks}) == len(tasks)
    # keys are a pure function of the task, stable across calls
    again = make_tasks(settings, ["w1", "w2", "w3"], seeds=2, root_seed=7)
    assert [t["key"] for t in tasks] == [t["key"] for t in again]
    assert run_key(tasks[0]) == tasks[0]["key"]
    # seeds are numpy's SeedSequence(7).spawn(2) children (numpy reference)
    ref = np.random.SeedSequence(7).spawn(2)
    for t in tasks:
        ss = np.random.SeedSequence(t["seed"]["entropy"], spawn_key=tuple(t["seed"]["spawn_key"]))
        r = ref[t["seed_index"]]
        assert ss.generate_state(4).tolist() == r.generate_state(4).tolist()
    # a different root seed changes the keys
    other = make_tasks(settings, ["w1"], seeds=1, root_seed=8)
    assert other[0]["key"] != tasks[0]["key"]
    # the resolved filter settings are part of the key: the same changes on
    # other defaults (a run stored by an older version) are another run
    import dataclasses

    from mapping.sweep import filter_settings

    now = make_tasks(settings, ["w1"], seeds=1, root_seed=7, resolve=lambda st: filter_settings(st).to_dict())
    older = make_tasks(settings, ["w1"], seeds=1, root_seed=7,
                       resolve=lambda st: dataclasses.replace(filter_settings(st), bias_corr_updates=None).to_dict())
    assert now[0]["filter"]["n_particles"] == 100
    assert now[0]["key"] != older[0]["key"] != tasks[0]["key"]
    assert run_key(now[0]) == now[0]["key"]


def test_joblib_two_processes_store_every_run(tmp_path):
    tasks = make_tasks([{"n_particles": 100}, {"n_particles": 400}], ["a", "b"], seeds=2, root_seed=1)
    store = RunStore(tmp_path / "runs")
    out = execute(tasks, fake_run, store=store, jobs=2, progress=False)
    assert out == {"done": 8, "skipped": 0, "total": 8}
    assert sorted(store.keys()) == sorted(t["key"] for t in tasks)
    # results equal the same function run here (process-independent seeding)
    for t in tasks:
        assert store.load(t["key"])["result"] == fake_run(t)


def test_resume_after_interruption_repeats_nothing(tmp_path):
    tasks = make_tasks([{"n_particles": n} for n in (100, 200, 300)], ["a", "b"], seeds=2, root_seed=3)
    store = RunStore(tmp_path / "runs")
    _CALLS.update(n=0, limit=5, seen=[])
    with pytest.raises(Boom):
        execute(tasks, counting_run, store=store, jobs=1, progress=False)
    finished = set(store.keys())
    assert len(finished) == 5  # everything finished before the interruption is kept
    # no half-written files left behind
    assert not list((tmp_path / "runs").glob(".*.tmp"))
    _CALLS.update(n=0, limit=None, seen=[])
    out = execute(tasks, counting_run, store=store, jobs=1, progress=False)
    assert out["skipped"] == 5 and out["done"] == len(tasks) - 5
    assert not finished & set(_CALLS["seen"])  # no finished run was repeated
    assert set(store.keys()) == {t["key"] for t in tasks}
    _CALLS.update(n=0, seen=[])
    out = execute(tasks, counting_run, store=store, jobs=1, progress=False)
    assert out["done"] == 0 and _CALLS["n"] == 0


def test_dask_local_cluster(tmp_path):
    import dask.distributed as distributed
    tasks = make_tasks([{"n_particles": 100}, {"n_particles": 900}], ["a", "b", "c"], seeds=1, root_seed=5)
    store = RunStore(tmp_path / "runs")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        out = execute(tasks, fake_run, store=store, scheduler=cluster.scheduler_address, progress=False)
        assert out == {"done": 6, "skipped": 0, "total": 6}
        again = execute(tasks, fake_run, store=store, scheduler=cluster.scheduler_address, progress=False)
        assert again["done"] == 0 and again["skipped"] == 6
    for t in tasks:
        assert store.load(t["key"])["result"] == fake_run(t)


def test_tidy_csv_and_ranking(tmp_path):
    tasks = make_tasks([{"n_particles": n} for n in (100, 400, 1600)], ["a", "b", "c", "d"], seeds=3, root_seed=11)
    store = RunStore(tmp_path / "runs")
    execute(tasks, fake_run, store=store, jobs=1, progress=False)
    records = [store.load(k) for k in store.keys()]
    write_tidy_csv(tmp_path / "results.csv", records)
    with open(tmp_path / "results.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 36
    assert {"key", "walk", "seed_index", "n_particles", "median_error_m"} <= set(rows[0])
    rank = rank_settings(records, rng=np.random.default_rng(0))
    # 10/sqrt(n): 1.0, 0.5, 0.25 -> most particles first
    assert [r["settings"] for r in rank] == ["n_particles=1600", "n_particles=400", "n_particles=100"]
    assert [r["rank"] for r in rank] == [1, 2, 3]
    assert rank[0]["best_overlap"] and not rank[2]["best_overlap"]
    # bootstrap CI of the mean against scipy.stats.bootstrap (percentile method)
    from scipy.stats import bootstrap

    vals = np.array([r["result"]["median_error_m"] for r in records if r["settings"]["n_particles"] == 100])
    ref = bootstrap((vals,), np.mean, n_resamples=4000, method="percentile", rng=np.random.default_rng(1))
    lo, hi = ref.confidence_interval
    r100 = rank[2]
    width = hi - lo
    assert r100["ci_low"] == pytest.approx(lo, abs=0.25 * width)
    assert r100["ci_high"] == pytest.approx(hi, abs=0.25 * width)
    assert r100["ci_low"] < r100["mean"] < r100["ci_high"]
    # reproducible ranking for the same generator seed
    assert rank_settings(records, rng=np.random.default_rng(0)) == rank
    json.dumps(rank)


def test_ranking_pools_every_checkpoint_error():
    # two runs of one setting with 3 and 2 scored checkpoints; hand-worked:
    # all five errors sorted 0.2 0.5 1.0 2.0 4.0 -> median 1.0; p95 with
    # linear interpolation (numpy's default) at rank 0.95 * 4 = 3.8:
    # 2.0 + 0.8 * (4.0 - 2.0) = 3.6
    recs = [{"settings": {"n_particles": 10}, "result": {"median_error_m": 1.0, "errors_m": [0.5, 1.0, 4.0]}},
            {"settings": {"n_particles": 10}, "result": {"median_error_m": 1.1, "errors_m": [0.2, 2.0]}},
            {"settings": {"n_particles": 20}, "result": {"median_error_m": 0.3}}]
    rank = {r["settings"]: r for r in rank_settings(recs, rng=np.random.default_rng(0))}
    r = rank["n_particles=10"]
    assert r["checkpoints"] == 5 and r["pooled_median_m"] == pytest.approx(1.0)
    assert r["pooled_p95_m"] == pytest.approx(3.6)
    none = rank["n_particles=20"]  # a run without error lists has no pooled figures
    assert none["checkpoints"] == 0 and none["pooled_median_m"] is None and none["pooled_p95_m"] is None


def test_run_sweep_end_to_end_with_a_fake_run(tmp_path):
    from mapping.sweep import run_sweep

    walks = tmp_path / "walks"
    walks.mkdir()
    for n in ("walk_000", "walk_001"):
        (walks / f"{n}.log.csv").write_text("t\n")
        (walks / f"{n}.checkpoints.csv").write_text("t,x,y\n")
    (tmp_path / "floor.map").write_bytes(b"")
    cfg = _cfg(tmp_path, BASE + "[grid]\nn_particles = [100, 400]\nfield_temper = [0.1, 0.2]\n")
    res = run_sweep(cfg, tmp_path / "out", jobs=1, progress=False, run_fn=fake_run)
    assert res["counts"] == {"done": 16, "skipped": 0, "total": 16}  # 4 settings x 2 walks x 2 seeds
    with open(tmp_path / "out" / "results.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 16 and {r["walk"] for r in rows} == {"walk_000", "walk_001"}
    assert res["ranking"][0]["settings"].startswith("field_temper=") and "n_particles=400" in res["ranking"][0]["settings"]
    html = (tmp_path / "out" / "report.html").read_text()
    assert "Ranking" in html and "data:image/png;base64," in html
    with open(tmp_path / "out" / "ranking.csv", newline="") as fh:
        ranked = list(csv.DictReader(fh))
    assert [int(r["rank"]) for r in ranked] == [1, 2, 3, 4]
    best = res["ranking"][0]
    assert float(ranked[0]["mean_median_error_m"]) == pytest.approx(best["mean"], abs=5e-5)  # rounded to 0.1 mm
    again = run_sweep(cfg, tmp_path / "out", jobs=1, progress=False, run_fn=fake_run)
    assert again["counts"]["done"] == 0 and again["counts"]["skipped"] == 16
    # a re-recorded walk is run again (its 4 settings x 2 seeds), the other kept
    (walks / "walk_001.checkpoints.csv").write_text("t,x,y\n0.0,1.0,2.0\n")
    redo = run_sweep(cfg, tmp_path / "out", jobs=1, progress=False, run_fn=fake_run)
    assert redo["counts"] == {"done": 8, "skipped": 8, "total": 16}
    # a map rebuilt into the same path: every run again
    (tmp_path / "floor.map").write_bytes(b"rebuilt")
    remap = run_sweep(cfg, tmp_path / "out", jobs=1, progress=False, run_fn=fake_run)
    assert remap["counts"] == {"done": 16, "skipped": 0, "total": 16}
    with pytest.raises(ConfigError, match="unknown setting"):
        bad = _cfg(tmp_path, BASE + "[grid]\nn_partickles = [100]\n")
        run_sweep(bad, tmp_path / "out2", progress=False, run_fn=fake_run)


def test_perturb_walk_noise_settings():
    import math as _m

    from eval_fakes import fake_walk
    from mapping.sweep import perturb_walk

    walk, _, _ = fake_walk(noise_ut=0.0)
    p = perturb_walk(walk, {"noise_mag_ut": 2.0, "noise_heading_deg": 10.0, "noise_step_scale": 1.1},
                     np.random.default_rng(0))
    diff = p.mag_earth_ut - walk.mag_earth_ut
    assert abs(diff.std() - 2.0) < 0.1  # sample sd of 3N normal draws
    np.testing.assert_allclose(p.motion.heading_rad - walk.motion.heading_rad, _m.radians(10.0))
    np.testing.assert_allclose(p.motion.length_m, 1.1 * walk.motion.length_m)
    assert p.mag_noise_ut == pytest.approx(2.0)
    assert perturb_walk(walk, {}, np.random.default_rng(0)) is walk


def test_killed_sweep_subprocess_loses_nothing_finished(tmp_path):
    import os
    import signal
    import subprocess
    import sys
    import time

    tasks = make_tasks([{"n_particles": n} for n in range(1, 31)], ["a"], seeds=1, root_seed=2)
    (tmp_path / "tasks.json").write_text(json.dumps(tasks))
    runs = tmp_path / "runs"
    code = (
        "import json, sys; sys.path.insert(0, %r)\n"
        "from eval_fakes import slow_run\n"
        "from mapping.sweep import RunStore, execute\n"
        "tasks = json.load(open(%r))\n"
        "execute(tasks, slow_run, store=RunStore(%r), jobs=1, progress=False)\n"
    ) % (os.path.dirname(__file__), str(tmp_path / "tasks.json"), str(runs))
    proc = subprocess.Popen([sys.executable, "-c", code])
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and len(list(runs.glob("*.json"))) < 3:
            time.sleep(0.05)
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait()
    finished = {p.stem for p in runs.glob("*.json")}
    assert 3 <= len(finished) < len(tasks)  # killed part-way
    store = RunStore(runs)
    for k in finished:  # every stored run is complete JSON
        assert store.load(k)["result"]["median_error_m"] == 0.5
    _CALLS.update(n=0, limit=None, seen=[])
    out = execute(tasks, counting_run, store=store, jobs=1, progress=False)
    assert out["skipped"] == len(finished) and out["done"] == len(tasks) - len(finished)
    assert not finished & set(_CALLS["seen"])


def test_filter_settings_from_a_preset():
    from fingerprint.localise import PRESETS
    from mapping.sweep import filter_settings

    s = filter_settings({"n_particles": 123}, preset_name="simulated")
    assert s.n_particles == 123
    for k, v in PRESETS["simulated"].items():
        assert getattr(s, k) == v
    with pytest.raises(ConfigError, match="preset"):
        filter_settings({}, preset_name="bogus")


def test_map_inputs_are_part_of_the_data_identity(tmp_path):
    """The maps a sweep builds are keyed by the contents of the site, its
    plan and the survey walks, so a changed plan or a re-recorded survey
    walk is not served from OUT/maps (common practice, no source: a cache
    keyed by content, not by name)."""
    import shutil

    site = tmp_path / "site"
    shutil.copytree(Path(__file__).parent / "data" / "tiny_site", site)
    survey = tmp_path / "survey"
    survey.mkdir()
    (survey / "walk_000.log.csv").write_text("t\n")
    (survey / "walk_000.checkpoints.csv").write_text("t,x,y\n")
    body = ("[data]\nwalks = [\"survey\"]\nsite = \"site/site.json\"\nfloor = \"T\"\n"
            "survey = [\"survey\"]\n[grid]\nn_particles = [100]\n")
    first = _cfg(tmp_path, body).data_identity()
    assert _cfg(tmp_path, body).data_identity() == first  # stable
    (survey / "walk_000.checkpoints.csv").write_text("t,x,y\n0,1,2\n")
    second = _cfg(tmp_path, body).data_identity()
    plan = site / "T" / "floor.plan.geojson"
    plan.write_text(plan.read_text() + "\n")
    third = _cfg(tmp_path, body).data_identity()
    digests = [d["content_sha256"] for d in (first, second, third)]
    assert len(set(digests)) == 3
    assert first["survey"] == third["survey"]  # the paths alone did not change


@pytest.mark.parametrize("line, column, words", [
    ("  field_tempr = [0.1]", 3, "[grid] unknown setting(s) ['field_tempr']; did you mean 'field_temper'?"),
    ('n_particles = ["many"]', 1, "[grid] n_particles: expected an integer >= 1, got 'many'"),
    ('use_field = ["no"]', 1, "[grid] use_field: expected true or false, got 'no'"),
    ("field_temper = [0.1, inf]", 1, "[grid] field_temper: expected a finite number > 0, got inf"),
    ("noise_mag_ut = [0.5, -1.0]", 1, "[grid] noise_mag_ut: expected a finite number >= 0, got -1.0"),
    ('noise_step_scale = ["x"]', 1, "[grid] noise_step_scale: expected a finite number > 0, got 'x'"),
])
def test_a_bad_setting_is_reported_at_its_line(tmp_path, line, column, words):
    """A bad name or value in [grid] names the file, line, column and table
    before anything runs (common practice, no source: errors point at the
    text the user wrote)."""
    from mapping.sweep import run_sweep

    (tmp_path / "walks").mkdir()
    (tmp_path / "walks" / "walk_000.log.csv").write_text("t\n")
    (tmp_path / "walks" / "walk_000.checkpoints.csv").write_text("t,x,y\n")
    (tmp_path / "floor.map").write_bytes(b"")
    # the same name in [random] (not searched here) comes first in the file
    cfg = _cfg(tmp_path, BASE + "[random]\nn_particles = {low = 1, high = 5}\n[grid]\n" + line + "\n")
    lineno = Path(cfg.path).read_text().splitlines().index(line) + 1
    with pytest.raises(ConfigError) as info:
        run_sweep(cfg, tmp_path / "out", progress=False, run_fn=fake_run)
    assert str(info.value) == f"{cfg.path}, line {lineno}, column {column}: {words}"
    assert not (tmp_path / "out" / "runs").exists()  # nothing ran
