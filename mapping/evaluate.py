"""The evaluation runner: localise walks on a map, score them at their
checkpoints, run the baselines on the same walks, write the tables, plots
and the HTML report.

Modes (the method under test):

- ``tracking``: the particle filter started at the first checkpoint
  (``start_sigma_m`` around it); the other checkpoints are scored;
- ``global``: the filter with no start (particles over the whole graph);
  every checkpoint is scored and convergence recorded;
- ``no-field``: the same filter with the field updates off (the graph and
  dead reckoning only), started like tracking;
- ``dead-reckoning``: the motion increments alone from the first checkpoint.

Baselines run in the same call on the same walks: dead reckoning, the
no-field filter and DTW sequence matching (``mapping.baselines``); they all
start at the first checkpoint and score the others. Metric definitions are
in ``mapping.metrics``.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
import platform as _platform
import re
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fingerprint._atomic import write_json_atomic, write_text_atomic
from fingerprint.errors import ConfigError, DataError
from fingerprint.records import Track

from . import metrics as M

__all__ = [
    "MODES",
    "METHODS",
    "BASELINES",
    "MethodResult",
    "WalkEvaluation",
    "Evaluation",
    "run_method",
    "evaluate_walk",
    "evaluate_walks",
    "load_walk",
    "load_walks",
    "map_vertical_ut",
    "LoadedWalk",
    "derive",
    "write_outputs",
    "summary_of",
    "report_sections",
    "tracks_html",
    "per_walk_rows",
    "per_checkpoint_rows",
    "method_label",
]

#: mode -> the method under test
MODES = {"tracking": "filter", "global": "global", "no-field": "no-field", "dead-reckoning": "dead-reckoning"}
#: every method the runner knows
METHODS = ("filter", "global", "no-field", "dead-reckoning", "dtw")
#: baselines run beside the method under test by default
BASELINES = ("dead-reckoning", "no-field", "dtw")

_LABELS = {
    "filter": "particle filter (tracking)",
    "global": "particle filter (global start)",
    "no-field": "no-field filter (graph + dead reckoning)",
    "dead-reckoning": "dead reckoning",
    "dtw": "DTW sequence matching",
}


def method_label(method):
    return _LABELS.get(method, method)


@dataclass
class MethodResult:
    """One method's result on one walk.

    track : Track, estimated positions
    errors_m : (C,) float, error at every checkpoint (scored or not)
    scored : (C,) bool
    time_s : float, processing time of the method
    """

    track: Track
    errors_m: np.ndarray
    scored: np.ndarray
    time_s: float

    @property
    def scored_errors_m(self):
        return self.errors_m[self.scored]


@dataclass
class WalkEvaluation:
    """Everything measured on one walk."""

    name: str
    platform: str
    duration_s: float
    checkpoints: object
    distance_m: np.ndarray
    main: str
    results: dict
    converged: bool
    convergence_distance_m: float
    truth: Track | None = None
    floor: str | None = None  # the floor the walk's files say it was recorded on

    @property
    def main_result(self):
        return self.results[self.main]


@dataclass
class Evaluation:
    """A whole evaluation run."""

    mode: str
    seed: int
    settings: dict
    walks: list
    skipped: list
    runtime_s: float
    summary: dict
    map_info: dict = field(default_factory=dict)
    baselines: tuple = BASELINES

    def pooled(self, method):
        """Scored errors of ``method`` over all walks (C,)."""
        parts = [w.results[method].scored_errors_m for w in self.walks if method in w.results]
        return np.concatenate(parts) if parts else np.zeros(0)


def _settings(settings, n_particles=None):
    from fingerprint.localise import FilterSettings

    s = FilterSettings() if settings is None else settings
    if n_particles is not None:
        s = dataclasses.replace(s, n_particles=int(n_particles), n_particles_global=int(n_particles))
    return s


def run_method(method, walk, fmap, *, start_xy, start_time_s, settings=None, start_sigma_m=1.0, rng):
    """Estimated track of ``walk`` by ``method`` (one of :data:`METHODS`).

    Parameters
    ----------
    walk : ProcessedWalk
    fmap : FieldMap
    start_xy : (2,) float, metres, the first checkpoint (ignored by ``global``)
    start_time_s : float, its time
    settings : FilterSettings or None (defaults)
    rng : numpy.random.Generator
    """
    from . import baselines as B

    if method == "dead-reckoning":
        return B.dead_reckoning_track(walk, start_xy, start_time_s=start_time_s,
                                      earth_to_plan_rad=fmap.earth_to_plan_rad)
    if method == "dtw":
        return B.dtw_track(walk, fmap, start_xy, start_time_s=start_time_s, rng=rng)
    if method not in ("filter", "global", "no-field"):
        raise ConfigError(f"unknown method {method!r}; valid: {list(METHODS)}")
    from fingerprint.localise import localise

    s = _settings(settings)
    if method == "no-field":
        s = dataclasses.replace(s, use_field=False)
    if method == "global":
        return localise(walk, fmap, settings=s, start_xy=None, rng=rng)
    return localise(walk, fmap, settings=s, start_xy=np.asarray(start_xy, float), start_sigma_m=start_sigma_m,
                    start_time_s=start_time_s, rng=rng)


def evaluate_walk(name, walk, checkpoints, fmap, *, mode="tracking", settings=None, seed=0,
                  baselines=BASELINES, start_sigma_m=1.0, truth=None):
    """Run the method of ``mode`` and the baselines on one walk and score
    them at its checkpoints.

    Parameters
    ----------
    name : str
    walk : ProcessedWalk
    checkpoints : Checkpoints, at least 2 (1 in global mode)
    fmap : FieldMap
    seed : int or numpy.random.SeedSequence; each method gets its own child
    baselines : iterable of method names run beside the main one

    Returns
    -------
    WalkEvaluation
    """
    if mode not in MODES:
        raise ConfigError(f"unknown mode {mode!r}; valid: {list(MODES)}")
    need = 1 if mode == "global" else 2
    if checkpoints.n < need:
        raise DataError(f"walk {name} has {checkpoints.n} checkpoint(s); mode {mode} needs at least {need}",
                        path=checkpoints.path)
    main = MODES[mode]
    methods = [main] + [b for b in baselines if b != main]
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(int(seed))
    children = dict(zip(METHODS, ss.spawn(len(METHODS))))
    start_xy = checkpoints.xy[0]
    start_t = float(checkpoints.t[0])
    results = {}
    for m in methods:
        t0 = time.perf_counter()
        track = run_method(m, walk, fmap, start_xy=start_xy, start_time_s=start_t, settings=settings,
                           start_sigma_m=start_sigma_m, rng=np.random.default_rng(children[m]))
        dt = time.perf_counter() - t0
        err = M.checkpoint_errors(track, checkpoints)
        results[m] = MethodResult(track, err, M.scored_mask(checkpoints.n, "global" if m == "global" else "tracking"), dt)
    dist = M.distance_walked_m(walk.motion, checkpoints.t)
    r = results[main]
    conv, cdist, _ = M.convergence(r.errors_m[r.scored], dist[r.scored])
    dur = float(walk.t[-1] - walk.t[0]) if walk.n > 1 else 0.0
    return WalkEvaluation(name=name, platform=walk.platform, duration_s=dur, checkpoints=checkpoints,
                          distance_m=dist, main=main, results=results, converged=conv,
                          convergence_distance_m=cdist, truth=truth, floor=walk.meta.get("floor"))


def map_vertical_ut(fmap):
    """Mean vertical field of ``fmap`` along its graph (µT, up positive,
    every metre of graph counted alike): the vertical field a walk on the
    floor is expected to measure on average, for the offset along z that a
    planar self-calibration (a robot turning about z alone) cannot see
    (``process_walk(expected_up_ut=...)``)."""
    from fingerprint.pf.measurement import floor_background

    return float(floor_background(fmap).mean_ut[2])


def load_walk(walk_files, *, expected_up_ut=None):
    """Read and process one walk (a ``mapping.walkset.WalkFiles``);
    ``expected_up_ut``: see :func:`map_vertical_ut`.

    Returns
    -------
    (ProcessedWalk, Checkpoints or None, Track or None)
    """
    from fingerprint.logio import read_checkpoints, read_track, read_walk_log
    from fingerprint.pipeline import process_walk

    from .walkset import walk_floor

    log = read_walk_log(walk_files.log)
    walk = process_walk(log, expected_up_ut=expected_up_ut)
    cps = read_checkpoints(walk_files.checkpoints) if walk_files.checkpoints else None
    if cps is not None:
        from fingerprint.logio import check_checkpoint_clock

        check_checkpoint_clock(cps, float(log.t[0]), float(log.t[-1]))  # another clock: an error
    floor = walk_floor(log, cps)
    if floor is not None:
        walk.meta["floor"] = floor
    truth = read_track(walk_files.track) if getattr(walk_files, "track", None) else None
    return walk, cps, truth


@dataclass(frozen=True)
class LoadedWalk:
    """A walk already read and processed (to evaluate it several times)."""

    name: str
    walk: object
    checkpoints: object
    truth: object = None


def load_walks(walk_files, *, fmap=None):
    """Read and process walks once: list of :class:`LoadedWalk`; with the
    floor's map ``fmap``, a planar self-calibration takes its vertical
    offset from the map (:func:`map_vertical_ut`)."""
    up = None if fmap is None else map_vertical_ut(fmap)
    out = []
    for wf in walk_files:
        walk, cps, truth = load_walk(wf, expected_up_ut=up)
        out.append(LoadedWalk(wf.name, walk, cps, truth))
    return out


def derive(we, main, results):
    """The same walk scored for another method under test: ``results``
    (method -> MethodResult, reused from runs already made on this walk)
    with ``main`` among them; convergence recomputed for ``main``."""
    r = results[main]
    conv, cdist, _ = M.convergence(r.errors_m[r.scored], we.distance_m[r.scored])
    return dataclasses.replace(we, main=main, results=dict(results), converged=conv, convergence_distance_m=cdist)


def _one_caught(*args):
    """:func:`_one` and the warnings it raised, as (message, category)
    pairs: a worker process's warnings would otherwise never reach the
    user."""
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        out = _one(*args)
    return out, [(str(w.message), w.category) for w in said]


def _one(wf, fmap, mode, settings, seed, baselines, start_sigma_m, on_error="raise", expected_up_ut=None):
    from fingerprint.errors import LodemapError

    if isinstance(wf, LoadedWalk):
        walk, cps, truth = wf.walk, wf.checkpoints, wf.truth
    else:
        try:
            walk, cps, truth = load_walk(wf, expected_up_ut=expected_up_ut)
        except LodemapError as err:
            if on_error == "skip":
                return wf.name, f"unreadable: {err}"
            raise
    if cps is None:
        return wf.name, "no checkpoints file"
    need = 1 if mode == "global" else 2
    if cps.n < need:
        return wf.name, f"{cps.n} checkpoint(s), mode {mode} needs {need}"
    return evaluate_walk(wf.name, walk, cps, fmap, mode=mode, settings=settings, seed=seed,
                         baselines=baselines, start_sigma_m=start_sigma_m, truth=truth)


#: ground truth farther than this from the floor graph is worth a warning
#: (the filter moves on the graph; hand taps are off by about a metre)
OFF_GRAPH_M = 2.0


def _warn_off_graph(walks, fmap, *, limit_m=OFF_GRAPH_M):
    """One warning (``LodemapWarning``) when checkpoints lie more than
    ``limit_m`` from the map's floor graph: a filter on the graph cannot come
    nearer to them than that, so their errors say more about the graph or
    the taps than about the localisation."""
    from fingerprint.errors import LodemapWarning

    far, total, names, worst = 0, 0, [], 0.0
    for w in walks:
        if w.checkpoints is None or w.checkpoints.n == 0:
            continue
        _, _, d = fmap.graph.project(w.checkpoints.xy)
        total += d.size
        if np.any(d > limit_m):
            far += int(np.sum(d > limit_m))
            names.append(w.name)
            worst = max(worst, float(d.max()))
    if far:
        warnings.warn(f"{far} of {total} checkpoints lie more than {limit_m:g} m from the map's floor graph (up to "
                      f"{worst:.1f} m; walks {', '.join(names[:5])}{' ...' if len(names) > 5 else ''}): the filter "
                      "moves on the graph, so their errors are at least that", LodemapWarning, stacklevel=3)


def _on_other_floor(walks, fmap, shown):
    """The walks that say they were recorded on another floor than the
    map's (log ``# floor`` or checkpoint ``floor``): (count, the first
    ``shown`` as "name (floor)" joined, with " ..." when there are more)."""
    if fmap is None or fmap.floor is None:
        return 0, ""
    other = [f"{w.name} ({w.floor})" for w in walks if w.floor is not None and w.floor != fmap.floor]
    return len(other), ", ".join(other[:shown]) + (" ..." if len(other) > shown else "")


def _warn_other_floor(walks, fmap):
    """One warning (``LodemapWarning``) when walks say they were recorded
    on another floor than the map's: their errors measure the wrong map."""
    from fingerprint.errors import LodemapWarning

    count, names = _on_other_floor(walks, fmap, 5)
    if count:
        warnings.warn(f"{count} of {len(walks)} walks are marked as recorded on another floor than the map's "
                      f"({fmap.floor}): {names}", LodemapWarning, stacklevel=3)


def evaluate_walks(fmap, walk_files, *, mode="tracking", settings=None, n_particles=None, seed=0,
                   baselines=BASELINES, start_sigma_m=1.0, jobs=1, progress=True, map_info=None,
                   on_error="raise"):
    """Evaluate many walks on one map.

    Parameters
    ----------
    fmap : FieldMap
    walk_files : list of ``mapping.walkset.WalkFiles`` (name, log,
        checkpoints, track), read here (a planar self-calibration takes its
        vertical offset from ``fmap``, :func:`map_vertical_ut`), or of
        :class:`LoadedWalk`
    settings : FilterSettings or None; ``n_particles`` overrides its particle
        counts (tracking and global)
    seed : int, root seed; walk ``i`` gets ``SeedSequence(seed).spawn(n)[i]``
    jobs : int, walks processed in parallel (joblib processes)
    on_error : "raise" (default) or "skip": a walk whose files cannot be
        read (our DataError/FormatError) stops the run, or is listed as
        skipped with the reason

    Returns
    -------
    Evaluation
    """
    if mode not in MODES:
        raise ConfigError(f"unknown mode {mode!r}; valid: {list(MODES)}")
    if on_error not in ("raise", "skip"):
        raise ConfigError(f"on_error must be 'raise' or 'skip', got {on_error!r}")
    bad = [b for b in baselines if b not in METHODS]
    if bad:
        raise ConfigError(f"unknown baseline(s) {bad}; valid: {list(METHODS)}")
    needs_filter = MODES[mode] in ("filter", "global", "no-field") or "no-field" in baselines
    s = _settings(settings, n_particles) if needs_filter else settings
    t_start = time.perf_counter()
    seeds = np.random.SeedSequence(int(seed)).spawn(max(1, len(walk_files)))
    up = map_vertical_ut(fmap) if any(not isinstance(wf, LoadedWalk) for wf in walk_files) else None
    from tqdm.auto import tqdm

    if jobs and int(jobs) != 1 and len(walk_files) > 1:
        from joblib import Parallel, delayed

        caught = Parallel(n_jobs=int(jobs))(
            delayed(_one_caught)(wf, fmap, mode, s, seeds[i], tuple(baselines), start_sigma_m, on_error, up)
            for i, wf in enumerate(walk_files)
        )
    else:
        caught = [
            _one_caught(wf, fmap, mode, s, seeds[i], tuple(baselines), start_sigma_m, on_error, up)
            for i, wf in enumerate(tqdm(walk_files, desc=f"evaluate ({mode})", unit="walk", disable=not progress))
        ]
    outs = []
    for out, said in caught:  # warnings of worker processes shown here, in walk order
        for message, category in said:
            warnings.warn(message, category, stacklevel=2)
        outs.append(out)
    walks = [o for o in outs if isinstance(o, WalkEvaluation)]
    skipped = [o for o in outs if not isinstance(o, WalkEvaluation)]
    _warn_off_graph(walks, fmap)
    _warn_other_floor(walks, fmap)
    runtime = time.perf_counter() - t_start
    settings_dict = dataclasses.asdict(s) if dataclasses.is_dataclass(s) else dict(s or {})
    ev = Evaluation(mode=mode, seed=int(seed), settings=settings_dict, walks=walks, skipped=skipped,
                    runtime_s=runtime, summary={}, map_info=dict(map_info or {}), baselines=tuple(baselines))
    ev.summary = summary_of(ev)
    return ev


def summary_of(ev, *, runtime_s=None):
    """The ``summary.json`` object of an evaluation (or of several pooled:
    pass an Evaluation whose ``walks`` are the union)."""
    main = MODES[ev.mode]
    return M.summarise(
        ev.pooled(main),
        walks=len(ev.walks),
        converged=[w.converged for w in ev.walks],
        convergence_distance_m=[w.convergence_distance_m for w in ev.walks],
        dead_reckoning_errors_m=ev.pooled("dead-reckoning") if any("dead-reckoning" in w.results for w in ev.walks) else None,
        no_field_errors_m=ev.pooled("no-field") if any("no-field" in w.results for w in ev.walks) else None,
        runtime_s=ev.runtime_s if runtime_s is None else runtime_s,
        walk_duration_s=sum(w.duration_s for w in ev.walks),
        localise_time_s=sum(w.main_result.time_s for w in ev.walks),
    )


# -- outputs -----------------------------------------------------------------
def _csv(cols, rows):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(cols)
    for r in rows:
        w.writerow(["" if v is None else (f"{v:.4f}" if isinstance(v, float) else v) for v in r])
    return buf.getvalue()


def _num(x):
    return None if x is None or not np.isfinite(x) else float(x)


def per_walk_rows(ev):
    """(columns, rows) of the per-walk table."""
    methods = [m for m in METHODS if any(m in w.results for w in ev.walks)]
    base = [m for m in methods if m != MODES[ev.mode]]
    cols = ["walk", "platform", "duration_s", "distance_m", "checkpoints", "scored", "median_error_m",
            "p95_error_m", "max_error_m", "converged", "convergence_distance_m", "localise_time_s"]
    cols += [f"{m.replace('-', '_')}_median_error_m" for m in base]
    rows = []
    for w in ev.walks:
        r = w.main_result
        st = M.error_stats(r.scored_errors_m)
        row = [w.name, w.platform, round(w.duration_s, 3), round(float(w.distance_m[-1]), 3), int(w.checkpoints.n),
               int(r.scored.sum()), _num(st["median"]), _num(st["p95"]), _num(st["max"]), bool(w.converged),
               _num(w.convergence_distance_m), round(r.time_s, 4)]
        for m in base:
            row.append(_num(M.error_stats(w.results[m].scored_errors_m)["median"]) if m in w.results else None)
        rows.append(row)
    return cols, rows


def per_checkpoint_rows(ev):
    """(columns, rows) of the per-checkpoint table."""
    methods = [m for m in METHODS if any(m in w.results for w in ev.walks)]
    main = MODES[ev.mode]
    base = [m for m in methods if m != main]
    cols = ["walk", "index", "label", "t", "x", "y", "scored", "distance_m", "est_x", "est_y", "error_m"]
    cols += [f"{m.replace('-', '_')}_error_m" for m in base]
    rows = []
    for w in ev.walks:
        cps = w.checkpoints
        r = w.main_result
        est = r.track.at(cps.t)
        for i in range(cps.n):
            label = "" if cps.label is None else str(cps.label[i])
            row = [w.name, i, label, float(cps.t[i]), float(cps.xy[i, 0]), float(cps.xy[i, 1]), bool(r.scored[i]),
                   float(w.distance_m[i]), float(est[i, 0]), float(est[i, 1]), float(r.errors_m[i])]
            for m in base:
                row.append(float(w.results[m].errors_m[i]) if m in w.results else None)
            rows.append(row)
    return cols, rows


def run_info(ev):
    """JSON-able provenance of a run (seed, settings, mode, map, software)."""
    import numpy

    return {
        "mode": ev.mode,
        "method": MODES[ev.mode],
        "baselines": list(ev.baselines),
        "seed": ev.seed,
        "settings": {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in ev.settings.items()},
        "map": ev.map_info,
        "walks": [w.name for w in ev.walks],
        "skipped": [{"walk": n, "reason": r} for n, r in ev.skipped],
        "python": _platform.python_version(),
        "numpy": numpy.__version__,
    }


def write_outputs(ev, fmap, out_dir, *, title=None):
    """Write summary.json, run.json, walks.csv, checkpoints.csv, the plots,
    the estimated tracks and report.html into ``out_dir`` (all atomic).

    Returns
    -------
    dict of name -> Path (and ``images``: file name -> base64 PNG, to
    embed the same figures elsewhere)
    """
    from fingerprint._atomic import check_writable
    from fingerprint.logio import write_track

    from . import report as R

    out = Path(out_dir)
    check_writable(out, folder=True)
    paths = {"summary": out / "summary.json", "run": out / "run.json", "walks": out / "walks.csv",
             "checkpoints": out / "checkpoints.csv", "cdf": out / "error_cdf.png", "report": out / "report.html"}
    write_json_atomic(paths["summary"], ev.summary)
    write_json_atomic(paths["run"], run_info(ev))
    wc, wr = per_walk_rows(ev)
    write_text_atomic(paths["walks"], _csv(wc, wr))
    cc, cr = per_checkpoint_rows(ev)
    write_text_atomic(paths["checkpoints"], _csv(cc, cr))
    written = set()
    for w in ev.walks:
        t = w.main_result.track
        write_track(out / "tracks" / f"{w.name}.track.csv", Track(t=t.t, xy=t.xy, heading_rad=t.heading_rad))
        written.add(f"{w.name}.track.csv")
    sections, images = report_sections(ev, fmap)
    cdf_b64 = images.pop("error_cdf.png")
    R.save_png(paths["cdf"], cdf_b64)
    for name, b64 in images.items():
        R.save_png(out / name, b64)
        paths[name] = out / name
    # an earlier evaluation into the same folder: its tracks and track
    # images of walks not in this run would pass for this run's
    stale = [p for p in (out / "tracks").glob("*.track.csv") if p.name not in written]
    stale += [p for p in out.glob("tracks*.png")
              if re.fullmatch(r"tracks(_\d+)?\.png", p.name) and p.name not in images]  # our names only
    for p in stale:
        p.unlink(missing_ok=True)
    paths["images"] = {"error_cdf.png": cdf_b64, **images}
    R.write_report(paths["report"], title or f"lodemap evaluation: {ev.map_info.get('floor', '')} {ev.mode}".strip(),
                   sections, subtitle=f"seed {ev.seed}; {len(ev.walks)} walks; written by lodemap evaluate")
    return paths


# -- report ------------------------------------------------------------------
_SUMMARY_HELP = {
    "walks": "walks scored",
    "checkpoints": "checkpoints scored",
    "median_error_m": "median error at the scored checkpoints",
    "mean_error_m": "mean error",
    "p75_error_m": "75th percentile of the error",
    "p95_error_m": "95th percentile of the error",
    "max_error_m": "largest error",
    "converged_fraction": "share of walks whose error stays under 3 m from some checkpoint on",
    "median_convergence_distance_m": "median distance walked until then (converged walks)",
    "dead_reckoning_median_error_m": "dead reckoning alone, same walks",
    "no_field_median_error_m": "filter without the field, same walks",
    "no_field_p95_error_m": "its 95th percentile",
    "runtime_s": "wall time of the whole run",
    "realtime_factor": "walk time / time spent localising (method under test)",
}


def _bootstrap_median_ci(ev, rng, n_boot=1000):
    """95 % CI of the pooled median, walks resampled with replacement."""
    main = MODES[ev.mode]
    per = [(w.results[main].scored_errors_m,) for w in ev.walks]
    return M.walk_bootstrap_ci([p for p in per if p[0].size], np.median, n_boot=n_boot, rng=rng)


def percentile_cell(d):
    """``(difference, low, high)`` as table text."""
    diff, lo, hi = d
    if not np.isfinite(lo):
        return f"{diff:+.2f}"
    return f"{diff:+.2f} [{lo:+.2f}, {hi:+.2f}]"


def summary_table_html(summary, *, ci=None):
    from .report import html_table

    rows = []
    for k, v in summary.items():
        note = _SUMMARY_HELP.get(k, "")
        if k == "median_error_m" and ci is not None:
            note += f" (95 % CI {ci[0]:.2f}–{ci[1]:.2f} m, bootstrap over walks)"
        rows.append([k, v, note])
    return html_table(["key", "value", "meaning"], rows)


TRACKS_NOTE = ('<p class="note">Blue: estimate; dashed orange: dead reckoning from the first checkpoint; green: '
               "true path where known; red circles: checkpoints, joined to the estimate at their time.</p>")


def tracks_html(ev, fmap, *, prefix="tracks", title=None):
    """HTML (note + embedded figures) of every track of ``ev`` over the plan
    of ``fmap``, and the images as dict of file name -> base64 PNG."""
    from . import report as R

    main = MODES[ev.mode]
    base_for_plot = "dead-reckoning" if main != "dead-reckoning" else None
    items = []
    for w in ev.walks:
        r = w.main_result
        items.append({"name": w.name, "track": r.track, "checkpoints": w.checkpoints, "errors_m": r.scored_errors_m,
                      "truth": w.truth,
                      "baseline": w.results[base_for_plot].track if base_for_plot in w.results else None})
    if not items:
        return "", {}
    images = {}
    body = TRACKS_NOTE
    figs = R.plot_tracks(fmap, items, title=title or f"{method_label(main)}: estimate (blue) vs checkpoints (red)")
    for i, f in enumerate(figs):
        name = f"{prefix}.png" if i == 0 else f"{prefix}_{i + 1}.png"
        images[name] = R.figure_to_base64(f)
        body += R.img_tag(images[name], f"{prefix} {i + 1}")
    return body, images


def report_sections(ev, fmap, *, extra_cautions=(), tracks_body=None, extra_methods_rows=()):
    """Sections of the HTML report and the PNG images (base64) it embeds.

    ``fmap`` None (walks of several floors pooled): no track plots and no
    map-based cautions; pass ``tracks_body`` (HTML) to fill that section.

    Returns
    -------
    sections : list of report.Section
    images : dict of file name -> base64 PNG
    """
    import html as _html

    from . import report as R

    main = MODES[ev.mode]
    images = {}
    ci = _bootstrap_median_ci(ev, np.random.default_rng(ev.seed))
    sections = [R.Section("Summary", summary_table_html(ev.summary, ci=ci))]

    # method and settings
    mi = ev.map_info
    info_rows = [["mode", ev.mode], ["method under test", method_label(main)],
                 ["baselines", ", ".join(method_label(b) for b in ev.baselines if b != main) or "none"],
                 ["seed", ev.seed], ["walks scored / skipped", f"{len(ev.walks)} / {len(ev.skipped)}"]]
    for k in ("path", "floor", "kernel", "resolution_m", "earth_to_plan_deg", "survey_walks"):
        if k in mi:
            info_rows.append([f"map {k}", mi[k]])
    info_rows.extend(list(r) for r in extra_methods_rows)
    body = R.html_table(["item", "value"], info_rows)
    body += ("<p>Error at a checkpoint: distance in the plan between the checkpoint and the estimated position "
             "at its time (track interpolated linearly in time). Tracking, no-field, dead reckoning and DTW start at "
             "the first checkpoint and score the others; global mode starts nowhere and scores all. A walk is "
             "converged when its error stays under 3 m from some checkpoint on. Percentiles: linear "
             "interpolation (numpy default).</p>")
    if ev.settings:
        srows = [[k, v] for k, v in ev.settings.items()]
        body += "<details><summary>filter settings</summary>" + R.html_table(["setting", "value"], srows) + "</details>"
    sections.append(R.Section("Method and settings", body))

    # CDF
    errs = {method_label(m): ev.pooled(m) for m in METHODS if any(m in w.results for w in ev.walks)}
    fig = R.plot_error_cdf(errs, title=f"Error at checkpoints ({ev.mode})")
    images["error_cdf.png"] = R.figure_to_base64(fig)
    series = [(w.name, w.distance_m[w.main_result.scored], w.main_result.scored_errors_m) for w in ev.walks]
    fig = R.plot_error_vs_distance(series, title=f"{method_label(main)}: error along the walks (dashed: 3 m)")
    images["error_distance.png"] = R.figure_to_base64(fig)
    sections.append(R.Section("Error CDF", R.img_tag(images["error_cdf.png"], "error CDF")
                              + R.img_tag(images["error_distance.png"], "error against distance walked")))

    # tracks
    if tracks_body is not None:
        tb = tracks_body
    elif fmap is not None:
        tb, imgs = tracks_html(ev, fmap)
        images.update(imgs)
    else:
        tb = ""
    sections.append(R.Section("Tracks", tb or "<p>No walk scored.</p>"))

    # per-walk table
    wc, wr = per_walk_rows(ev)
    body = R.html_table(wc, wr)
    if ev.skipped:
        body += "<p>Skipped: " + "; ".join(_html.escape(f"{n} ({r})") for n, r in ev.skipped) + "</p>"
    sections.append(R.Section("Per-walk results", body))

    # baselines
    brows = []
    for m in METHODS:
        if not any(m in w.results for w in ev.walks):
            continue
        st = M.error_stats(ev.pooled(m))
        t_m = sum(w.results[m].time_s for w in ev.walks if m in w.results)
        brows.append([method_label(m) + (" (under test)" if m == main else ""), st["n"], st["median"], st["mean"],
                      st["p75"], st["p95"], st["max"], t_m])
    body = R.html_table(["method", "checkpoints", "median (m)", "mean (m)", "p75 (m)", "p95 (m)", "max (m)",
                         "time (s)"], brows)
    body += ("<p>All methods ran on the same walks in this run. Dead reckoning integrates the steps (or odometry) "
             "rotated into the plan by the map's earth-to-plan angle; the no-field filter is the particle filter "
             "with its field updates off, so it keeps only the graph and dead reckoning; DTW matches the field "
             "sequence (vertical and horizontal magnitude, per metre walked) against candidate graph paths that "
             "follow the dead-reckoned turns.</p>")
    drows = []
    for m in METHODS:
        pairs = [(w.results[m].scored_errors_m, w.results[main].scored_errors_m) for w in ev.walks
                 if m != main and m in w.results and main in w.results]
        pairs = [pr for pr in pairs if pr[0].size and pr[1].size]
        if len(pairs) >= 2:
            cells = [percentile_cell(M.percentile_difference(pairs, q, n_boot=1000, rng=np.random.default_rng(ev.seed)))
                     for q in (50, 95)]
            drows.append([method_label(m), len(pairs), *cells])
    if drows:
        body += R.html_table(["against", "walks", "median difference (m)", "p95 difference (m)"], drows)
        body += ("<p>The method under test minus each baseline (negative: the method under test is better), with "
                 "a 95 % interval from resampling whole walks (a walk's checkpoints share its errors). An interval "
                 "that contains 0 means these walks cannot tell the two apart.</p>")
    sections.append(R.Section("Baselines", body))

    # cautions
    cautions = list(extra_cautions)
    n_cp = sum(int(w.main_result.scored.sum()) for w in ev.walks)
    if len(ev.walks) < 10 or n_cp < 50:
        cautions.append(f"Small sample ({len(ev.walks)} walks, {n_cp} scored checkpoints): percentiles, the p95 "
                        "above all, are uncertain; see the bootstrap interval in the summary.")
    if not any(w.truth is not None for w in ev.walks):
        cautions.append("Checkpoints are the reference: where they were tapped by hand on a plan they are off by "
                        "about a metre themselves, so errors below that are not resolved.")
    if ev.walks and fmap is not None:
        cp_xy = np.vstack([w.checkpoints.xy for w in ev.walks])
        _, _, cov = fmap.lookup(cp_xy)
        far = int(np.sum(~(cov <= 3.0)))
        if far:
            cautions.append(f"{far} of {cp_xy.shape[0]} checkpoints lie more than 3 m from any survey sample of the "
                            "map (poor coverage there).")
        gd = fmap.graph.project(cp_xy)[2]
        off = int(np.sum(gd > 2.0))
        if off:
            cautions.append(f"{off} checkpoints are more than 2 m from the floor graph; estimates on the graph "
                            "cannot come closer than that.")
    count, names = _on_other_floor(ev.walks, fmap, 8)
    if count:
        cautions.append(f"{count} walk(s) are marked as recorded on another floor than the map's ({fmap.floor}): "
                        f"{names}; their errors measure the wrong map.")
    lost = [w.name for w in ev.walks if np.any(np.asarray(w.main_result.track.extra.get("lost", [False]), bool))]
    if lost:
        cautions.append(f"The filter flagged itself lost (likelihood collapse, particles re-seeded) on {len(lost)} "
                        f"walk(s): {', '.join(lost[:8])}{' ...' if len(lost) > 8 else ''}; large errors there are "
                        "recoveries gone wrong or not yet complete.")
    st = M.error_stats(ev.pooled(main))
    if st["n"] and st["max"] > 10 * max(st["median"], 0.1):
        cautions.append(f"The largest error ({st['max']:.1f} m) is over ten times the median ({st['median']:.2f} m): "
                        "a few estimates jumped far away; the median hides this, read the p95, the maximum and "
                        "the tracks.")
    if ev.skipped:
        cautions.append(f"{len(ev.skipped)} walk(s) skipped (listed in the per-walk section).")
    if main == "global":
        cautions.append("Global mode: the baselines were started at the first checkpoint, so they know the start "
                        "and the method under test does not.")
    cautions.append("Scores hold for these walks, this map and these settings; another building, device or "
                    "survey can do much worse. Not for safety-critical or emergency navigation; robot safety must "
                    "never depend on these estimates.")
    sections.append(R.Section("Cautions", '<ul class="cautions">' +
                              "".join(f"<li>{_html.escape(c)}</li>" for c in cautions) + "</ul>"))
    return sections, images
