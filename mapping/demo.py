"""The whole chain on the invented demo building (``demo_building/``):
simulate survey and test walks, build each floor's map from its survey
walks, evaluate tracking, global and dead-reckoning modes on the test
walks, and write one HTML report over all floors.

Output layout (``out``)::

    sim/<floor>/survey|test/...   simulated walks with exact truth
    maps/<floor>.map              one map per floor
    eval/<floor>/<mode>/          lodemap evaluate outputs per floor and mode
    demo.json                     every summary (per floor and pooled, per mode)
    report.html                   the demo report
"""

from __future__ import annotations

import dataclasses
import json
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fingerprint._atomic import write_json_atomic
from fingerprint.errors import ConfigError, LodemapError

from . import evaluate as E

__all__ = ["DemoResult", "run_demo", "find_demo_site", "DEMO_MODES"]

DEMO_MODES = ("tracking", "global", "dead-reckoning")
#: filter settings preset used on the simulated walks
DEMO_PRESET = "simulated"
#: basis functions of the reduced-rank map in a quick run (the full run uses the map's default)
QUICK_BASIS = 256
#: version of the simulated data set; a finished simulation of another
#: version is made anew
SIM_VERSION = 2


@dataclass
class DemoResult:
    out: Path
    report: Path
    summaries: dict  # mode -> {"all": summary, floor: summary}
    timings_s: dict = field(default_factory=dict)


def find_demo_site(site_dir=None):
    """The demo building's folder: ``site_dir`` or ``demo_building/`` beside
    the installed package (editable install) or in the working folder."""
    if site_dir is not None:
        p = Path(site_dir)
        if not (p / "site.json").exists():
            raise ConfigError(f"no site.json in {p}")
        return p
    here = Path(__file__).resolve().parent.parent / "demo_building"
    for p in (here, Path.cwd() / "demo_building"):
        if (p / "site.json").exists():
            return p
    raise ConfigError("cannot find demo_building/site.json; pass --site DIR (the demo building folder)")


def _simulate(site_dir, sim_dir, *, seed, quick, progress=True):
    """Run ``lodemap simulate`` into ``sim_dir`` unless a finished run with
    the same seed and size is there already."""
    from .cli import main as cli_main

    marker = sim_dir / "demo-simulation.json"
    want = {"seed": int(seed), "quick": bool(quick), "site": str(site_dir), "version": SIM_VERSION}
    if marker.exists():
        try:
            if json.loads(marker.read_text(encoding="utf-8")) == want:
                return False
        except (OSError, ValueError):
            pass
    # the demo maps from the handheld survey only: no robot survey
    argv = ["simulate", str(site_dir), "--out", str(sim_dir), "--seed", str(seed), "--no-robot-survey"]
    if quick:
        argv += ["--walks", "2"]
    if not progress:
        argv += ["--no-progress"]
    rc = cli_main(argv)
    if rc != 0:
        raise LodemapError(f"lodemap {' '.join(argv)} failed with status {rc}")
    write_json_atomic(marker, want)
    return True


def _pool(evs, mode, seed):
    """One Evaluation holding the walks of several floors (names prefixed
    with the floor)."""
    walks, skipped, runtime = [], [], 0.0
    for floor, ev in evs.items():
        for w in ev.walks:
            walks.append(dataclasses.replace(w, name=f"{floor}/{w.name}"))
        skipped += [(f"{floor}/{n}", r) for n, r in ev.skipped]
        runtime += ev.runtime_s
    first = next(iter(evs.values()))
    pooled = E.Evaluation(mode=mode, seed=seed, settings=first.settings, walks=walks, skipped=skipped,
                          runtime_s=runtime, summary={}, map_info={"floor": "+".join(evs)}, baselines=first.baselines)
    pooled.summary = E.summary_of(pooled)
    return pooled


def run_demo(out, *, quick=False, seed=0, site_dir=None, progress=True, jobs=1, log=print):
    """Run the demo; returns a :class:`DemoResult`.

    Parameters
    ----------
    out : folder for everything (created)
    quick : fewer walks, a coarser map and fewer particles (a smoke run)
    seed : root seed of simulation, maps and filters
    """
    from fingerprint.localise import preset
    from fingerprint.mapfile import save_map

    from .mapbuild import build_floor_map
    from .site import load_site
    from .walkset import find_walks

    from fingerprint._atomic import check_writable

    out = Path(out)
    check_writable(out, folder=True)
    site_dir = find_demo_site(site_dir)
    site = load_site(site_dir / "site.json")
    timings = {}
    t0 = time.perf_counter()
    log(f"[1/3] simulating walks in {site.name} ...")
    _simulate(site_dir, out / "sim", seed=seed, quick=quick, progress=progress)
    timings["simulate_s"] = time.perf_counter() - t0

    # the simulator's walks: its own preset of the filter (an exactly known
    # field model, small residual offsets)
    settings = preset(DEMO_PRESET)
    if quick:
        settings = dataclasses.replace(settings, n_particles=min(settings.n_particles, 1000),
                                       n_particles_global=min(settings.n_particles_global, 8000))
    resolution = 0.5 if quick else 0.25
    fmaps = {}
    t1 = time.perf_counter()
    for floor in site.floors:
        survey = find_walks(out / "sim" / floor / "survey")
        log(f"[2/3] building the map of floor {floor} from {len(survey)} survey walks ...")
        fmap = build_floor_map(site, floor, survey, resolution_m=resolution, seed=seed, progress=progress,
                               kernel_params={"n_basis": QUICK_BASIS} if quick else None)
        save_map(out / "maps" / f"{floor}.map", fmap)
        fmaps[floor] = fmap
    timings["maps_s"] = time.perf_counter() - t1

    t2 = time.perf_counter()
    per_mode = {m: {} for m in DEMO_MODES}
    track_imgs = {}
    ss = np.random.SeedSequence(int(seed))
    mode_seeds = dict(zip(DEMO_MODES, (int(x) for x in ss.generate_state(len(DEMO_MODES)))))
    for floor, fmap in fmaps.items():
        info = {"floor": floor, "path": str(out / "maps" / f"{floor}.map"), "resolution_m": resolution,
                "kernel": fmap.meta.get("kernel", "?")}
        loaded = E.load_walks(find_walks(out / "sim" / floor / "test"), fmap=fmap)
        log(f"[3/3] floor {floor}: tracking with its baselines on {len(loaded)} test walks ...")
        tr = E.evaluate_walks(fmap, loaded, mode="tracking", settings=settings, seed=mode_seeds["tracking"],
                              baselines=("dead-reckoning", "no-field", "dtw"), jobs=jobs, progress=progress,
                              map_info=info)
        log(f"[3/3] floor {floor}: global start on {len(loaded)} test walks ...")
        gl = E.evaluate_walks(fmap, loaded, mode="global", settings=settings, seed=mode_seeds["global"],
                              baselines=(), jobs=jobs, progress=progress, map_info=info)
        # the baselines of the global run and the dead-reckoning mode are the
        # tracking run's own (same walks, same start checkpoint)
        by_name = {w.name: w for w in tr.walks}
        base = ("dead-reckoning", "no-field")
        gl.walks = [E.derive(w, "global", {**w.results, **{b: by_name[w.name].results[b] for b in base}})
                    if w.name in by_name else w for w in gl.walks]
        gl.baselines = base
        gl.summary = E.summary_of(gl)
        dr_walks = [E.derive(w, "dead-reckoning", {b: w.results[b] for b in base}) for w in tr.walks]
        dr = E.Evaluation(mode="dead-reckoning", seed=mode_seeds["tracking"], settings=tr.settings, walks=dr_walks,
                          skipped=tr.skipped, runtime_s=sum(w.results["dead-reckoning"].time_s for w in dr_walks),
                          summary={}, map_info=info, baselines=("no-field",))
        dr.summary = E.summary_of(dr)
        for mode, ev in (("tracking", tr), ("global", gl), ("dead-reckoning", dr)):
            paths = E.write_outputs(ev, fmap, out / "eval" / floor / mode,
                                    title=f"lodemap demo: floor {floor}, {mode}")
            per_mode[mode][floor] = ev
            if mode == "tracking":
                track_imgs[floor] = [b for k, b in paths["images"].items() if k.startswith("tracks")]
    timings["evaluate_s"] = time.perf_counter() - t2
    timings["total_s"] = time.perf_counter() - t0

    summaries = {}
    pooled = {}
    for mode, evs in per_mode.items():
        pooled[mode] = _pool(evs, mode, int(seed))
        summaries[mode] = {"all": pooled[mode].summary, **{f: ev.summary for f, ev in evs.items()}}
    write_json_atomic(out / "demo.json", {"seed": int(seed), "quick": bool(quick), "site": str(site_dir),
                                          "timings_s": {k: round(v, 2) for k, v in timings.items()},
                                          "summaries": summaries})
    report = out / "report.html"
    _write_demo_report(report, site, pooled, track_imgs, summaries, timings, seed=seed, quick=quick)
    return DemoResult(out=out, report=report, summaries=summaries, timings_s=timings)


_TABLE_KEYS = ("walks", "checkpoints", "median_error_m", "p95_error_m", "max_error_m", "converged_fraction",
               "median_convergence_distance_m", "dead_reckoning_median_error_m", "no_field_median_error_m",
               "realtime_factor")


_TABLE_HEADS = ("walks", "checkpoints", "median (m)", "p95 (m)", "max (m)", "converged", "to converge (m)",
                "DR median (m)", "no-field median (m)", "real-time x")


def summary_rows(summaries, *, short=False):
    """Rows (mode, scope, figures...) of the demo summary table (headers are
    the summary keys, or short labels with ``short``)."""
    rows = []
    for mode, per in summaries.items():
        for scope, s in per.items():
            rows.append([mode, scope] + [s[k] for k in _TABLE_KEYS])
    return ["mode", "floors"] + list(_TABLE_HEADS if short else _TABLE_KEYS), rows


def _write_demo_report(path, site, pooled, track_imgs, summaries, timings, *, seed, quick):
    import html as _html

    from . import report as R

    tr = pooled["tracking"]
    cols, rows = summary_rows(summaries, short=True)
    head = R.html_table(cols, rows, left=2)
    s_all = summaries["tracking"]["all"]
    med, dr = s_all["median_error_m"], s_all["dead_reckoning_median_error_m"]
    if med is not None and dr is not None and med > 0:
        rel = (f"{dr / med:.1f} times smaller" if dr >= med
               else f"dead reckoning alone is {med / dr:.1f} times better on these walks")
        head += (f"<p>Tracking on all floors: median error {med:.2f} m against {dr:.2f} m for dead reckoning "
                 f"alone ({rel}).</p>")
    secs, _ = E.report_sections(
        tr, None,
        tracks_body=E.TRACKS_NOTE + "".join(
            f"<h3>Floor {_html.escape(f)}</h3>" + "".join(R.img_tag(b, f"tracks floor {f}") for b in imgs)
            for f, imgs in track_imgs.items()
        ),
        extra_cautions=["All walks here are simulated in an invented building: the sensors, the field and the "
                        "walkers follow models, so real buildings and phones do worse (see the real-data numbers "
                        "in the README)."],
        extra_methods_rows=[["filter preset", DEMO_PRESET], ["site", site.name], ["floors", ", ".join(track_imgs)],
                            ["per-mode seeds", "derived from the root seed (numpy SeedSequence)"],
                            ["quick", quick], ["map resolution (m)", 0.5 if quick else 0.25]]
        + [[f"time {k}", round(v, 1)] for k, v in timings.items()],
    )
    # the pooled error CDF of all modes and baselines
    errs = {}
    for mode, ev in pooled.items():
        main = E.MODES[mode]
        errs[E.method_label(main)] = ev.pooled(main)
    for m in ("no-field", "dtw"):
        if any(m in w.results for w in tr.walks):
            errs[E.method_label(m)] = tr.pooled(m)
    cdf = R.figure_to_base64(R.plot_error_cdf(errs, title="Error at checkpoints, all floors, all modes"))
    for s in secs:
        if s.title == "Summary":
            s.body = head + "<h3>Tracking mode, all floors</h3>" + s.body
        if s.title == "Error CDF":
            g = pooled["global"]
            series = [(w.name, w.distance_m[w.main_result.scored], w.main_result.scored_errors_m) for w in g.walks]
            conv = R.figure_to_base64(R.plot_error_vs_distance(
                series, title="Global start: error along the walks (dashed: 3 m)"))
            s.body = (R.img_tag(cdf, "error CDF of all modes") + ('<p class="note">Global mode scores every '
                                                                  "checkpoint, the others all but the first.</p>")
                      + R.img_tag(conv, "global mode: error against distance walked"))
        if s.title == "Per-walk results":
            g = pooled["global"]
            gc, gr = E.per_walk_rows(g)
            s.body = "<h3>Tracking</h3>" + s.body + "<h3>Global</h3>" + R.html_table(gc, gr)
    R.write_report(path, "lodemap demo", secs,
                   subtitle=f"{site.name}; seed {seed}; {'quick run' if quick else 'full run'}")
