"""The HTML report: its sections, embedded images, and that it refers to
nothing outside itself; plus the files ``write_outputs`` leaves."""

import base64
import csv
import io
import json
import math
from html.parser import HTMLParser

import numpy as np
import pytest

from mapping.evaluate import Evaluation, evaluate_walk, summary_of, write_outputs
from mapping.metrics import SUMMARY_KEYS
from mapping.report import Section, build_html, html_table

from eval_fakes import fake_map, fake_walk

SECTIONS = ["Summary", "Method and settings", "Error CDF", "Tracks", "Per-walk results", "Baselines", "Cautions"]


class _Collect(HTMLParser):
    """Collects h2 titles, img sources and every URL-bearing attribute, using
    the standard library's HTML parser as the reference reader."""

    def __init__(self):
        super().__init__()
        self.h2, self.imgs, self.urls, self.tags = [], [], [], []
        self._in_h2 = False

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        a = dict(attrs)
        if tag == "h2":
            self._in_h2 = True
            self.h2.append("")
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        for k in ("src", "href"):
            if k in a:
                self.urls.append(a[k])

    def handle_endtag(self, tag):
        if tag == "h2":
            self._in_h2 = False

    def handle_data(self, data):
        if self._in_h2:
            self.h2[-1] += data


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    out = tmp_path_factory.mktemp("eval")
    fmap = fake_map()
    walks = []
    for i, bias in enumerate((5.0, -4.0)):
        walk, cps, truth = fake_walk(heading_bias_rad=math.radians(bias), scale=1.05, rng=np.random.default_rng(i))
        walks.append(evaluate_walk(f"walk_{i:03d}", walk, cps, fmap, mode="dead-reckoning", baselines=("dtw",),
                                   seed=i, truth=truth))
    ev = Evaluation(mode="dead-reckoning", seed=3, settings={"example": 1}, walks=walks, skipped=[("walk_009", "no checkpoints file")],
                    runtime_s=2.0, summary={}, map_info={"floor": "T", "kernel": "analytic"}, baselines=("dtw",))
    ev.summary = summary_of(ev)
    paths = write_outputs(ev, fmap, out)
    return out, paths, ev


def test_report_sections_and_embedded_images(written):
    out, paths, ev = written
    text = (out / "report.html").read_text(encoding="utf-8")
    p = _Collect()
    p.feed(text)
    p.close()
    assert [h.strip() for h in p.h2] == SECTIONS
    # at least the CDF and one tracks figure, all inline PNGs that decode
    assert len(p.imgs) >= 2
    import matplotlib.image as mpimg

    for src in p.imgs:
        assert src.startswith("data:image/png;base64,")
        raw = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert raw[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, section 5.2)
        img = mpimg.imread(io.BytesIO(raw), format="png")
        assert img.shape[0] > 100 and img.shape[1] > 100
    # self-contained: every src/href is inline data or an in-page anchor
    assert all(u.startswith("data:") or u.startswith("#") for u in p.urls), p.urls
    assert "script" not in p.tags and "link" not in p.tags
    # the summary table shows every summary key
    for k in SUMMARY_KEYS:
        assert f">{k}<" in text
    # the skipped walk and a caution about it are named
    assert "walk_009" in text and "skipped" in text


def test_output_files(written):
    out, paths, ev = written
    s = json.loads((out / "summary.json").read_text())
    assert tuple(s) == SUMMARY_KEYS
    assert s == ev.summary
    run = json.loads((out / "run.json").read_text())
    assert run["seed"] == 3 and run["mode"] == "dead-reckoning"
    with open(out / "walks.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["walk"] for r in rows] == ["walk_000", "walk_001"]
    # the per-walk median equals the median of that walk's per-checkpoint errors
    with open(out / "checkpoints.csv", newline="") as fh:
        cps = list(csv.DictReader(fh))
    e0 = [float(r["error_m"]) for r in cps if r["walk"] == "walk_000" and r["scored"] == "True"]
    assert float(rows[0]["median_error_m"]) == pytest.approx(np.median(e0), abs=1e-3)
    assert "dtw_error_m" in cps[0]
    for name in ("error_cdf.png", "tracks.png"):
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (out / "tracks" / "walk_000.track.csv").exists()
    assert not list(out.glob(".*.tmp"))


def test_html_escapes_text():
    html = build_html("a <b> & c", [Section("S <1>", html_table(["x<"], [["<script>"]]))])
    assert "<script>" not in html and "&lt;script&gt;" in html
    assert "<title>a &lt;b&gt; &amp; c</title>" in html


def test_report_baselines_give_the_paired_difference(written):
    # the method under test minus DTW, pooled over the two walks, recomputed
    # here from the per-walk errors with numpy's percentile
    out, _, ev = written
    text = (out / "report.html").read_text(encoding="utf-8")
    assert "median difference (m)" in text and "p95 difference (m)" in text
    main = np.concatenate([w.results["dead-reckoning"].scored_errors_m for w in ev.walks])
    dtw = np.concatenate([w.results["dtw"].scored_errors_m for w in ev.walks])
    d50 = np.percentile(main, 50) - np.percentile(dtw, 50)
    assert f"{d50:+.2f} [" in text


def test_a_second_run_into_the_same_folder_leaves_none_of_the_first(written, tmp_path):
    """Evaluating fewer walks into the folder of an earlier run: no track of
    a walk outside this run is left to pass for one of its results (common
    practice, no source)."""
    import dataclasses
    import shutil

    out, _, ev = written
    again = tmp_path / "again"
    shutil.copytree(out, again)
    (again / "tracks" / "user_note.txt").write_text("mine")  # not ours: kept
    one = dataclasses.replace(ev, walks=ev.walks[:1])
    one.summary = summary_of(one)
    write_outputs(one, fake_map(), again)
    assert sorted(p.name for p in (again / "tracks").glob("*.track.csv")) == ["walk_000.track.csv"]
    assert (again / "tracks" / "user_note.txt").read_text() == "mine"
    with open(again / "walks.csv", newline="") as fh:
        assert [r["walk"] for r in csv.DictReader(fh)] == ["walk_000"]
