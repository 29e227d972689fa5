"""The command line end to end: ``lodemap demo --quick`` once (module
fixture) on a tiny invented one-floor site (tests/data/tiny_site: two
blocks with corridors around and between them, columns as steel, so the
whole chain runs in seconds), then ``lodemap evaluate`` and ``lodemap
sweep`` on what it left, and their error paths. The full demo building is
measured by command (``lodemap demo``), not here."""

import csv
import json
import textwrap
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from fingerprint.errors import ConfigError
from mapping.cli import main
from mapping.metrics import SUMMARY_KEYS

TINY = Path(__file__).parent / "data" / "tiny_site"


class _H2(HTMLParser):
    def __init__(self):
        super().__init__()
        self.h2, self.imgs, self._on = [], 0, False

    def handle_starttag(self, tag, attrs):
        if tag == "h2":
            self._on = True
            self.h2.append("")
        if tag == "img" and dict(attrs).get("src", "").startswith("data:image/png;base64,"):
            self.imgs += 1

    def handle_endtag(self, tag):
        if tag == "h2":
            self._on = False

    def handle_data(self, d):
        if self._on:
            self.h2[-1] += d


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = main(["demo", "--quick", "--site", str(TINY), "--out", str(out), "--seed", "3", "--no-progress",
                   "--jobs", "1"])
    assert rc == 0
    return out, buf.getvalue()


def test_demo_outputs(demo):
    out, stdout = demo
    lines = stdout.strip().splitlines()
    assert lines[-1].startswith("report: ") and lines[-1].endswith("report.html")
    assert "median m" in stdout and "DR median m" in stdout
    info = json.loads((out / "demo.json").read_text())
    assert info["seed"] == 3
    floors = sorted(p.name for p in (out / "maps").glob("*.map"))
    assert floors == ["T.map"]
    for mode in ("tracking", "global", "dead-reckoning"):
        per = info["summaries"][mode]
        assert set(per) == {"all", "T"}
        for s in per.values():
            assert tuple(s) == SUMMARY_KEYS
        # pooled counts are the sums over the floors
        assert per["all"]["walks"] == per["T"]["walks"] > 0
        assert per["all"]["checkpoints"] == per["T"]["checkpoints"] > 0
        for f in ("T",):
            s = json.loads((out / "eval" / f / mode / "summary.json").read_text())
            assert s == per[f]
    # in every floor's tracking run the DR baseline figure is the DR mode's figure on the same walks
    for f in ("T",):
        t = info["summaries"]["tracking"][f]
        d = info["summaries"]["dead-reckoning"][f]
        assert t["dead_reckoning_median_error_m"] == pytest.approx(d["median_error_m"], abs=1e-3)
    p = _H2()
    p.feed((out / "report.html").read_text(encoding="utf-8"))
    assert [h.strip() for h in p.h2] == ["Summary", "Method and settings", "Error CDF", "Tracks",
                                         "Per-walk results", "Baselines", "Cautions"]
    assert p.imgs >= 2  # CDF + one tracks figure per floor


def test_demo_errors_recomputed_from_the_written_tracks(demo):
    # Independent recomputation through the files: read every estimated
    # track back, interpolate it at the checkpoint times with np.interp and
    # measure the distance to the checkpoint; it must equal checkpoints.csv.
    # The simulator's truth track passes through its checkpoints, which pins
    # the time alignment of truth, checkpoints and estimate.
    from fingerprint.logio import read_track

    out, _ = demo
    ev = out / "eval" / "T" / "tracking"
    with open(ev / "checkpoints.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows
    for name in sorted({r["walk"] for r in rows}):
        tr = read_track(ev / "tracks" / f"{name}.track.csv")
        truth = read_track(out / "sim" / "T" / "test" / f"{name}.track.csv")
        mine = [r for r in rows if r["walk"] == name]
        t = np.array([float(r["t"]) for r in mine])
        xy = np.array([[float(r["x"]), float(r["y"])] for r in mine])
        est = np.column_stack([np.interp(t, tr.t, tr.xy[:, 0]), np.interp(t, tr.t, tr.xy[:, 1])])
        np.testing.assert_allclose(np.hypot(*(est - xy).T), [float(r["error_m"]) for r in mine], atol=2e-3)
        tru = np.column_stack([np.interp(t, truth.t, truth.xy[:, 0]), np.interp(t, truth.t, truth.xy[:, 1])])
        assert np.max(np.hypot(*(tru - xy).T)) < 0.7  # checkpoints are marked within 0.6 m of the walker


def test_evaluate_cli_json_matches_files(demo, tmp_path, capsys):
    out, _ = demo
    res = tmp_path / "ev"
    rc = main(["evaluate", "--map", str(out / "maps" / "T.map"), str(out / "sim" / "T" / "test"), "--out", str(res),
               "--mode", "dead-reckoning", "--baselines", "none", "--json", "--seed", "5", "--no-progress",
               "--set", "bias_corr_updates=none", "--set", "heading_kappa=3"])
    assert rc == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed == json.loads((res / "summary.json").read_text())
    assert tuple(printed) == SUMMARY_KEYS
    run = json.loads((res / "run.json").read_text())
    assert run["seed"] == 5
    # --set changes reach the recorded settings (the int 3 as the float setting it is)
    assert run["settings"]["bias_corr_updates"] is None and run["settings"]["heading_kappa"] == 3.0
    # the headline figures follow from the per-checkpoint table (recomputed here)
    with open(res / "checkpoints.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r["scored"] == "True"]
    e = np.array([float(r["error_m"]) for r in rows])
    assert printed["checkpoints"] == e.size
    assert printed["median_error_m"] == pytest.approx(np.median(e), abs=1e-3)
    assert printed["max_error_m"] == pytest.approx(e.max(), abs=1e-3)
    assert printed["no_field_median_error_m"] is None  # baselines off


def test_evaluate_cli_errors(demo, tmp_path, capsys):
    out, _ = demo
    rc = main(["evaluate", "--map", str(tmp_path / "missing.map"), str(out / "sim" / "T" / "test"),
               "--out", str(tmp_path / "x")])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("lodemap evaluate: error:")
    rc = main(["evaluate", "--map", str(out / "maps" / "T.map"), str(out / "sim" / "T" / "test"),
               "--out", str(tmp_path / "y"), "--baselines", "magic"])
    assert rc == 2 and "magic" in capsys.readouterr().err
    rc = main(["evaluate", "--map", str(out / "maps" / "T.map"), str(out / "sim" / "T" / "test"),
               "--out", str(tmp_path / "z"), "--preset", "bogus"])
    assert rc == 2 and "bogus" in capsys.readouterr().err
    rc = main(["evaluate", "--map", str(out / "maps" / "T.map"), str(out / "sim" / "T" / "test"),
               "--out", str(tmp_path / "w"), "--set", "feld=1"])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "unknown filter setting 'feld'" in err[0]


def test_sweep_cli_on_the_demo_map_and_resume(demo, tmp_path, capsys):
    out, _ = demo
    walks = sorted((out / "sim" / "T" / "test").glob("*.log.csv*"))[:2]
    cfg = tmp_path / "sweep.toml"
    cfg.write_text(textwrap.dedent(f"""
        [sweep]
        mode = "tracking"
        seeds = 1
        seed = 4
        [data]
        walks = {json.dumps([str(w) for w in walks])}
        map = "{out / 'maps' / 'T.map'}"
        [grid]
        n_particles = [200, 600]
    """), encoding="utf-8")
    rc = main(["sweep", str(cfg), "--out", str(tmp_path / "sw"), "--no-progress"])
    assert rc == 0
    text = capsys.readouterr().out
    assert "4 done now" in text
    with open(tmp_path / "sw" / "results.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 4 and {r["n_particles"] for r in rows} == {"200", "600"}
    _medians_match_the_stored_errors(rows, tmp_path / "sw")
    rc = main(["sweep", str(cfg), "--out", str(tmp_path / "sw"), "--no-progress"])
    assert rc == 0 and "0 done now, 4 already stored" in capsys.readouterr().out


def _medians_match_the_stored_errors(rows, out):
    """Each row's median error is numpy's median of the checkpoint errors
    stored with its run (numpy is the reference), and finite."""
    for r in rows:
        errors = json.loads((out / "runs" / f"{r['key']}.json").read_text())["result"]["errors_m"]
        assert errors and float(r["median_error_m"]) == pytest.approx(np.median(errors), abs=1e-4)


def test_sweep_cross_validation_scores_each_survey_walk_on_a_map_without_it(demo, tmp_path):
    """folds = 2 on the demo's survey walks: one map per fold, built from
    the other fold's walks only, and every walk scored on its fold's map."""
    from mapping.sweep import load_sweep_config, run_sweep

    out, _ = demo
    survey = out / "sim" / "T" / "survey"
    cfg = tmp_path / "cv.toml"
    cfg.write_text(textwrap.dedent(f"""
        [sweep]
        seeds = 1
        seed = 2
        folds = 2
        [data]
        walks = ["{survey}"]
        site = "{TINY / 'site.json'}"
        floor = "T"
        survey = ["{survey}"]
        [grid]
        use_field = [true, false]
        n_particles = [300]
    """), encoding="utf-8")
    res = run_sweep(load_sweep_config(cfg), tmp_path / "cv", progress=False)
    names = sorted(p.name.split(".")[0] for p in survey.glob("*.log.csv*"))
    assert res["counts"]["total"] == 2 * len(names)
    info = json.loads((tmp_path / "cv" / "sweep.json").read_text())
    fold_of = info["fold_of"]
    assert sorted(fold_of) == names and set(fold_of.values()) == {0, 1}
    assert len(info["maps"]) == 2 and sorted(m["fold"] for m in info["maps"]) == [0, 1]
    from fingerprint.mapfile import load_map

    for m in info["maps"]:
        built_from = sorted(w["name"] for w in load_map(m["path"]).meta["survey_walks"])
        assert built_from == sorted(n for n in names if fold_of[n] != m["fold"])
    with open(tmp_path / "cv" / "results.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 2 * len(names)
    assert all(int(r["fold"]) == fold_of[r["walk"]] for r in rows)
    _medians_match_the_stored_errors(rows, tmp_path / "cv")
    # a test walk cannot be scored by cross-validation over the survey walks
    test_walk = sorted((out / "sim" / "T" / "test").glob("*.log.csv*"))[0]
    bad = tmp_path / "bad.toml"
    bad.write_text(cfg.read_text().replace(f'walks = ["{survey}"]', f'walks = ["{test_walk}"]'), encoding="utf-8")
    with pytest.raises(ConfigError, match="survey walks only"):
        run_sweep(load_sweep_config(bad), tmp_path / "bad", progress=False)


def test_evaluate_bad_walk_stops_or_is_skipped(demo, tmp_path, capsys):
    import shutil

    out, _ = demo
    walks = tmp_path / "walks"
    walks.mkdir()
    src = out / "sim" / "T" / "test"
    first = sorted(src.glob("*.log.csv"))[0].name.replace(".log.csv", "")
    for suffix in (".log.csv", ".checkpoints.csv", ".track.csv"):
        shutil.copy(src / f"{first}{suffix}", walks / f"{first}{suffix}")
    (walks / "broken.log.csv").write_text("t,ax,ay,az,gx,gy,gz,mx,my,mz\n0.0,1,2\n", encoding="utf-8")
    (walks / "broken.checkpoints.csv").write_text("t,x,y\n0,1,1\n1,2,2\n", encoding="utf-8")
    argv = ["evaluate", "--map", str(out / "maps" / "T.map"), str(walks), "--mode", "dead-reckoning",
            "--baselines", "none", "--no-progress"]
    rc = main(argv + ["--out", str(tmp_path / "a")])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "broken.log.csv" in err[0]
    rc = main(argv + ["--out", str(tmp_path / "b"), "--skip-bad"])
    assert rc == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("lodemap evaluate: skipped broken: unreadable"), err
    run = json.loads((tmp_path / "b" / "run.json").read_text())
    assert run["walks"] == [first]
    assert [s["walk"] for s in run["skipped"]] == ["broken"] and "unreadable" in run["skipped"][0]["reason"]


def test_sweep_builds_one_map_per_map_setting_and_caches_it(demo, tmp_path, capsys):
    out, _ = demo
    walk = sorted((out / "sim" / "T" / "test").glob("*.log.csv"))[0]
    cfg = tmp_path / "maps.toml"
    cfg.write_text(textwrap.dedent(f"""
        [sweep]
        mode = "dead-reckoning"
        seeds = 2
        [data]
        walks = ["{walk}"]
        site = "{TINY / 'site.json'}"
        floor = "T"
        survey = ["{out / 'sim' / 'T' / 'survey'}"]
        [grid]
        map_resolution_m = [0.5, 1.0]
        map_n_basis = [64]
        noise_step_scale = [1.0, 1.1]
    """), encoding="utf-8")
    assert main(["sweep", str(cfg), "--out", str(tmp_path / "sw"), "--no-progress"]) == 0
    maps = sorted((tmp_path / "sw" / "maps").glob("*.map"))
    assert len(maps) == 2  # two map settings, four settings in all
    from fingerprint.mapfile import load_map

    assert sorted(load_map(m).resolution_m for m in maps) == [0.5, 1.0]
    stamps = [m.stat().st_mtime_ns for m in maps]
    with open(tmp_path / "sw" / "results.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 8
    # dead reckoning does not use the field: 10 % longer steps change the
    # error, the map resolution does not (same seed, same walk)
    by = {(r["map_resolution_m"], r["noise_step_scale"], r["seed_index"]): float(r["median_error_m"]) for r in rows}
    assert by[("0.5", "1.0", "0")] == pytest.approx(by[("1.0", "1.0", "0")], abs=1e-3)
    assert by[("0.5", "1.0", "0")] != pytest.approx(by[("0.5", "1.1", "0")], abs=1e-3)
    capsys.readouterr()
    assert main(["sweep", str(cfg), "--out", str(tmp_path / "sw"), "--no-progress"]) == 0
    assert "0 done now, 8 already stored" in capsys.readouterr().out
    assert [m.stat().st_mtime_ns for m in sorted((tmp_path / "sw" / "maps").glob("*.map"))] == stamps


def test_the_readme_python_example_runs_and_streaming_equals_batch(demo, capsys):
    """The README's "From Python" example, run as printed on the tiny demo's
    map and first test walk (paths and start swapped in); its live loop must
    give exactly the batch replay's track for the same seed."""
    import re

    from fingerprint.logio import read_checkpoints

    out, _ = demo
    text = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    code = re.search(r"## From Python.*?```python\n(.*?)```", text, re.S).group(1)
    log = sorted((out / "sim" / "T" / "test").glob("*.log.csv"))[0]
    first = read_checkpoints(log.with_name(log.name.replace(".log.csv", ".checkpoints.csv"))).xy[0]
    code = (code.replace("lodemap-demo/maps/G.map", str(out / "maps" / "T.map"))
                .replace("lodemap-demo/sim/G/test/hh_008.log.csv", str(log))
                .replace("(13.0, 8.0)", f"({first[0]!r}, {first[1]!r})"))
    assert str(log) in code and "T.map" in code
    ns = {}
    exec(compile(code, "README.md", "exec"), ns)  # noqa: S102 - our own README's example
    live, batch = ns["loc"].track(), ns["track"]
    np.testing.assert_array_equal(live.t, batch.t)
    np.testing.assert_array_equal(live.xy, batch.xy)
    assert "Estimate(" in capsys.readouterr().out
