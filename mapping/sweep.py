"""Settings sweeps: settings x walks x seeds, on one machine (joblib) or on
a Dask distributed cluster, resumable.

A sweep is described by a TOML file (read with :mod:`tomllib`)::

    [sweep]
    mode = "tracking"          # tracking | global | no-field | dead-reckoning
    preset = "default"         # filter settings preset the settings below change
    search = "grid"            # grid | random
    samples = 8                # random search: number of settings drawn
    seeds = 2                  # seeds per (settings, walk)
    seed = 0                   # root seed; run seeds are SeedSequence(seed).spawn(seeds)
    metric = "median_error_m"  # what the ranking sorts by (lower is better)
    folds = 0                  # K >= 2: K-fold cross-validation over the survey walks

    [data]                     # paths relative to this file
    walks = ["sim/G/test"]     # walks to score (files or folders)
    # split = "split.json"; use = "test"   # optional: score one part of a split
    #                                      # (survey walks for maps: its "survey" part)
    map = "G.map"              # a fixed map ...
    # ... or maps built once per distinct map setting and cached in OUT/maps:
    # site = "demo_building/site.json"; floor = "G"; survey = ["sim/G/survey"]

    [grid]                     # every key a list of values (grid search);
    n_particles = [300, 1000]  # the text "none" stands for None
    map_resolution_m = [0.25, 0.5]

    [random]                   # random search: {choices = [...]} or
    n_particles = {low = 200, high = 3000, log = true, integer = true}

Setting names: ``map_resolution_m``, ``map_kernel`` and ``map_n_basis``
choose how the map is built; ``noise_mag_ut`` (extra white noise on the measured field, µT, 1 sd),
``noise_heading_deg`` (a constant heading error added to every step) and
``noise_step_scale`` (step lengths multiplied by it) perturb the input;
every other name is a field of ``fingerprint.localise.FilterSettings``.

Cross-validation (``folds = K``, K >= 2) chooses settings on the survey
walks alone, leaving the test walks untouched for the final score: the
survey walks are dealt into K folds (a permutation seeded by ``seed``,
:func:`fold_assignment`), one map per fold and map setting is built from
the survey walks of the other folds, and every scored walk (each must be a
survey walk) is localised on the map that did not see it.

Every finished run is written at once as ``OUT/runs/<key>.json``
(atomically), ``key`` a hash of its settings (every filter setting,
defaults included), walk, seed, mode and data (paths, the contents of the
map, site, plan, split, survey and scored walk files, and the lodemap
version); a rerun skips the keys already there, so killing a sweep loses
nothing finished, and a run whose inputs or defaults changed is run again.
``OUT/results.csv`` is the tidy table (one row per run) and
``OUT/ranking.csv`` ranks the settings with seeded bootstrap confidence
intervals.
"""

from __future__ import annotations

import csv
import hashlib
import io
import itertools
import json
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fingerprint._atomic import check_writable, write_json_atomic, write_text_atomic
from fingerprint.errors import ConfigError, FormatError

__all__ = [
    "SweepConfig",
    "load_sweep_config",
    "parse_sweep_config",
    "expand_settings",
    "make_tasks",
    "run_key",
    "RunStore",
    "execute",
    "tidy_rows",
    "write_tidy_csv",
    "rank_settings",
    "settings_label",
    "split_settings",
    "filter_settings",
    "perturb_walk",
    "evaluation_run",
    "prepare_maps",
    "fold_assignment",
    "run_sweep",
    "MAP_SETTINGS",
    "NOISE_SETTINGS",
    "MODES",
]

MODES = ("tracking", "global", "no-field", "dead-reckoning")
#: settings that choose how the map is built (one map per distinct combination)
MAP_SETTINGS = ("map_resolution_m", "map_kernel", "map_n_basis")
#: settings that perturb the input walk
NOISE_SETTINGS = ("noise_mag_ut", "noise_heading_deg", "noise_step_scale")
_SEARCHES = ("grid", "random")
_SWEEP_KEYS = {"mode", "search", "samples", "seeds", "seed", "metric", "preset", "folds"}
_DATA_KEYS = {"walks", "map", "site", "floor", "survey", "split", "use"}


@dataclass
class SweepConfig:
    """A parsed sweep description (see the module docstring)."""

    mode: str = "tracking"
    search: str = "grid"
    samples: int = 8
    seeds: int = 1
    seed: int = 0
    metric: str = "median_error_m"
    preset: str = "default"
    folds: int = 0
    walks: list = field(default_factory=list)
    map: Path | None = None
    site: Path | None = None
    floor: str | None = None
    survey: list = field(default_factory=list)
    split: Path | None = None
    use: str = "test"
    grid: dict = field(default_factory=dict)
    random: dict = field(default_factory=dict)
    path: str | None = None

    def data_identity(self):
        """JSON-able description of the data (part of every run key)."""
        ident = {
            "map": None if self.map is None else str(self.map),
            "site": None if self.site is None else str(self.site),
            "floor": self.floor,
            "survey": [str(p) for p in self.survey],
            "split": None if self.split is None else str(self.split),
            "use": self.use if self.split is not None else None,
        }
        if self.folds:
            ident["folds"] = self.folds
        ident["content_sha256"] = self.content_digest()
        ident["lodemap"] = _package_version()
        return ident

    def content_digest(self):
        """SHA-256 (hex) of the bytes of every input the maps depend on:
        the map file, the site file and this floor's plan, the split file
        and the survey walks' files. Part of every map and run key, so that
        a map rebuilt into the same path or a re-recorded survey walk is not
        taken for the old one on a rerun."""
        paths = [p for p in (self.map, self.site, self.split) if p is not None]
        if self.site is not None and self.floor is not None:
            from .site import load_site

            paths.append(load_site(self.site).plan_path(self.floor))
        if self.survey:
            for w in _survey_walks(self):
                paths.extend(p for p in (w.log, w.checkpoints, w.track) if p is not None)
        return files_digest(paths)


def load_sweep_config(path):
    """Read a sweep TOML file (paths in it are relative to its folder)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError as err:
        raise FormatError(f"sweep config is not UTF-8 text ({err.reason})", path=path) from err
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        # the parser puts the place at the end of its message: "... (at line L, column C)"
        at = re.search(r"\s*\(at line (\d+), column (\d+)\)$", str(err))
        what = str(err)[: at.start()] if at else str(err)
        line, column = (int(at.group(1)), int(at.group(2))) if at else (None, None)
        raise FormatError(f"not valid TOML: {what}", path=path, line=line, column=column) from None
    return parse_sweep_config(raw, base=path.parent, path=str(path))


def _check_keys(table, allowed, where, path):
    unknown = sorted(set(table) - set(allowed))
    if unknown:
        raise ConfigError(f"{path}: unknown key(s) {unknown} in [{where}]; allowed: {sorted(allowed)}")


def parse_sweep_config(raw, *, base=".", path="<sweep>"):
    """A :class:`SweepConfig` from the parsed TOML dict ``raw``."""
    base = Path(base)
    unknown = sorted(set(raw) - {"sweep", "data", "grid", "random"})
    if unknown:
        raise ConfigError(f"{path}: unknown table(s) {unknown}; expected [sweep], [data], [grid] or [random]")
    sw = raw.get("sweep", {})
    data = raw.get("data", {})
    _check_keys(sw, _SWEEP_KEYS, "sweep", path)
    _check_keys(data, _DATA_KEYS, "data", path)
    cfg = SweepConfig(path=path)
    cfg.mode = str(sw.get("mode", cfg.mode))
    if cfg.mode not in MODES:
        raise ConfigError(f"{path}: [sweep] mode must be one of {list(MODES)}, got {cfg.mode!r}")
    cfg.search = str(sw.get("search", "random" if "random" in raw and "grid" not in raw else "grid"))
    if cfg.search not in _SEARCHES:
        raise ConfigError(f"{path}: [sweep] search must be one of {list(_SEARCHES)}, got {cfg.search!r}")
    for name in ("samples", "seeds", "seed"):
        v = sw.get(name, getattr(cfg, name))
        if not isinstance(v, int) or isinstance(v, bool) or v < (0 if name == "seed" else 1):
            raise ConfigError(f"{path}: [sweep] {name} must be an integer >= {0 if name == 'seed' else 1}, got {v!r}")
        setattr(cfg, name, v)
    folds = sw.get("folds", 0)
    if not isinstance(folds, int) or isinstance(folds, bool) or folds < 0 or folds == 1:
        raise ConfigError(f"{path}: [sweep] folds must be 0 (no cross-validation) or an integer >= 2, got {folds!r}")
    cfg.folds = folds
    cfg.metric = str(sw.get("metric", cfg.metric))
    cfg.preset = str(sw.get("preset", cfg.preset))

    def _paths(v, key):
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, list) or not all(isinstance(p, str) for p in v):
            raise ConfigError(f"{path}: [data] {key} must be a path or a list of paths, got {v!r}")
        return [(base / p).resolve() for p in v]

    cfg.walks = _paths(data.get("walks", []), "walks")
    if not cfg.walks:
        raise ConfigError(f"{path}: [data] walks is required (files or folders of walks to score)")
    if "map" in data:
        cfg.map = _paths(data["map"], "map")[0]
    if "site" in data:
        cfg.site = _paths(data["site"], "site")[0]
    cfg.floor = None if data.get("floor") is None else str(data["floor"])
    cfg.survey = _paths(data.get("survey", []), "survey")
    if "split" in data:
        cfg.split = _paths(data["split"], "split")[0]
    cfg.use = str(data.get("use", "test"))
    if cfg.use not in ("survey", "test"):
        raise ConfigError(f"{path}: [data] use must be 'survey' or 'test', got {cfg.use!r}")

    grid = raw.get("grid", {})
    for k, v in grid.items():
        if not isinstance(v, list) or not v:
            raise ConfigError(f"{path}: [grid] {k} must be a non-empty list of values, got {v!r}")
        grid[k] = [_none_word(x) for x in v]
    rnd = raw.get("random", {})
    for k, v in rnd.items():
        if isinstance(v, list):
            rnd[k] = v = {"choices": v}
        if isinstance(v, dict) and isinstance(v.get("choices"), list):
            v["choices"] = [_none_word(x) for x in v["choices"]]
        if not isinstance(v, dict) or not ({"choices"} <= set(v) or {"low", "high"} <= set(v)):
            raise ConfigError(
                f"{path}: [random] {k} must be {{choices = [...]}} or {{low = .., high = .., log = bool, "
                f"integer = bool}}, got {v!r}"
            )
        if "low" in v and not v["low"] <= v["high"]:
            raise ConfigError(f"{path}: [random] {k}: low must be <= high, got {v['low']} > {v['high']}")
        if v.get("log") and "low" in v and v["low"] <= 0:
            raise ConfigError(f"{path}: [random] {k}: a log-uniform range needs low > 0, got {v['low']}")
    if cfg.search == "random" and not rnd:
        raise ConfigError(f"{path}: search = 'random' needs a [random] table")
    cfg.grid, cfg.random = grid, rnd
    names = set(grid) | set(rnd)
    if names & set(MAP_SETTINGS):
        if cfg.site is None or cfg.floor is None or not cfg.survey:
            raise ConfigError(
                f"{path}: map settings {sorted(names & set(MAP_SETTINGS))} need [data] site, floor and survey "
                "(the maps are built from them)"
            )
    elif cfg.folds and (cfg.site is None or cfg.floor is None or not cfg.survey):
        raise ConfigError(f"{path}: folds = {cfg.folds} needs [data] site, floor and survey (one map is built per fold)")
    elif cfg.map is None and (cfg.site is None or cfg.floor is None or not cfg.survey):
        raise ConfigError(f"{path}: [data] needs either map = FILE or site, floor and survey to build one")
    if cfg.folds and cfg.map is not None:
        raise ConfigError(f"{path}: folds = {cfg.folds} builds one map per fold from the survey walks; remove [data] map")
    return cfg


def _none_word(value):
    """TOML has no null: the text "none" stands for None (settings such as
    ``bias_corr_updates`` or ``field_gate`` where None switches a part off)."""
    return None if isinstance(value, str) and value.strip().lower() == "none" else value


def expand_settings(cfg, *, rng=None):
    """The list of settings dicts the sweep runs.

    Grid: the Cartesian product of ``cfg.grid`` (keys sorted, values in file
    order) times, if ``cfg.random`` is also given, nothing else. Random:
    ``cfg.samples`` draws from ``cfg.random`` (each value independently;
    ``rng`` default ``default_rng(cfg.seed)``), with ``cfg.grid`` values
    crossed in; duplicates dropped.
    """
    keys = sorted(cfg.grid)
    grid = [dict(zip(keys, combo)) for combo in itertools.product(*(cfg.grid[k] for k in keys))] or [{}]
    if cfg.search == "grid":
        return grid
    rng = np.random.default_rng(cfg.seed) if rng is None else rng
    draws = []
    for _ in range(cfg.samples):
        d = {}
        for k in sorted(cfg.random):
            spec = cfg.random[k]
            if "choices" in spec:
                d[k] = spec["choices"][int(rng.integers(len(spec["choices"])))]
            else:
                lo, hi = float(spec["low"]), float(spec["high"])
                x = math.exp(rng.uniform(math.log(lo), math.log(hi))) if spec.get("log") else rng.uniform(lo, hi)
                d[k] = int(round(x)) if spec.get("integer") else float(x)
        draws.append(d)
    out, seen = [], set()
    for g in grid:
        for d in draws:
            s = {**g, **d}
            k = json.dumps(s, sort_keys=True)
            if k not in seen:
                seen.add(k)
                out.append(s)
    return out


_DIGESTS = {}


def file_sha256(path):
    """SHA-256 (hex) of a file's bytes, cached per path, size and
    modification time (a sweep asks for the same files many times)."""
    path = Path(path)
    try:
        st = path.stat()
    except OSError as err:
        raise ConfigError(f"{path}: cannot read ({err.strerror})") from err
    key = (str(path.resolve()), st.st_size, st.st_mtime_ns)
    if key not in _DIGESTS:
        h = hashlib.sha256()
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
        _DIGESTS[key] = h.hexdigest()
    return _DIGESTS[key]


def files_digest(paths):
    """One SHA-256 (hex) over the contents of ``paths``, in the given order."""
    h = hashlib.sha256()
    for p in paths:
        h.update(file_sha256(p).encode("ascii"))
    return h.hexdigest()


def _package_version():
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("lodemap")
    except PackageNotFoundError:  # run from a source tree without installing
        return "unknown"


def run_key(task):
    """Hash (16 hex digits) of a task's settings, walk (and the digest of
    its files, when the task has one), seed, mode and data."""
    ident = {k: task.get(k) for k in ("settings", "walk", "seed", "mode", "data")}
    if task.get("walk_sha256") is not None:
        ident["walk_sha256"] = task["walk_sha256"]
    if task.get("filter") is not None:  # every filter setting, defaults included
        ident["filter"] = task["filter"]
    text = json.dumps(ident, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def make_tasks(settings_list, walks, *, seeds, root_seed, mode="tracking", data=None, extra=None, resolve=None,
               walk_digests=None):
    """settings x walks x seeds as a list of task dicts.

    The run seeds are ``numpy.random.SeedSequence(root_seed).spawn(seeds)``;
    seed ``i`` is the same for every settings and walk (common random
    numbers make the comparison of settings fairer). Each task carries
    ``seed = {"entropy": root_seed, "spawn_key": [i]}`` (rebuild it with
    ``SeedSequence(entropy, spawn_key=spawn_key)``) and its ``key``.

    Parameters
    ----------
    settings_list : list of dict
    walks : list of str (walk names or paths; JSON-able)
    extra : dict, optional, merged into every task (not part of the key)
    resolve : callable, optional, settings dict -> the JSON-able dict of
        every filter setting it stands for (defaults included); stored as
        the task's ``filter`` and part of its key, so that a run stored
        under other defaults (an older version) is not taken for this one
    walk_digests : dict, optional, walk -> digest of its files (stored as
        the task's ``walk_sha256`` and part of its key: a re-recorded walk
        is run again)
    """
    children = np.random.SeedSequence(int(root_seed)).spawn(int(seeds))
    tasks = []
    # resolved once per settings (not per walk and seed)
    resolved = [None if resolve is None else resolve(s) for s in settings_list]
    for (j, s), w, i in itertools.product(enumerate(settings_list), walks, range(int(seeds))):
        ss = children[i]
        task = {
            "settings": dict(s),
            "walk": w,
            "seed": {"entropy": int(ss.entropy), "spawn_key": [int(k) for k in ss.spawn_key]},
            "seed_index": i,
            "mode": mode,
            "data": data,
        }
        if resolved[j] is not None:
            task["filter"] = resolved[j]
        if walk_digests is not None:
            task["walk_sha256"] = walk_digests[w]
        task["key"] = run_key(task)
        if extra:
            task.update(extra)
        tasks.append(task)
    return tasks


class RunStore:
    """Finished runs, one JSON file per run under ``folder``."""

    def __init__(self, folder):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)

    def path(self, key):
        return self.folder / f"{key}.json"

    def done(self, key):
        return self.path(key).exists()

    def save(self, key, record):
        write_json_atomic(self.path(key), record)

    def load(self, key):
        return json.loads(self.path(key).read_text(encoding="utf-8"))

    def keys(self):
        return sorted(p.stem for p in self.folder.glob("*.json"))


def _call(fn, task):
    return task["key"], fn(task)


def _record(task, result):
    return {
        "key": task["key"],
        "settings": task["settings"],
        "walk": task["walk"],
        "seed": task["seed"],
        "seed_index": task["seed_index"],
        "mode": task.get("mode"),
        **({"fold": task["fold"]} if "fold" in task else {}),
        "result": result,
    }


def execute(tasks, fn, *, store, jobs=1, scheduler=None, progress=True):
    """Run the tasks not yet in ``store``; store each result as it ends.

    Parameters
    ----------
    tasks : list of dict with ``key`` (see :func:`make_tasks`)
    fn : callable(task) -> JSON-able dict; module-level (it is shipped to
        worker processes or to the cluster)
    store : RunStore
    jobs : int, joblib processes on this machine (ignored with ``scheduler``)
    scheduler : str, optional, address of a running Dask scheduler
        (``tcp://host:8786``); the results come back to this process, which
        writes them, so workers need no shared disk for the results
    progress : bool, tqdm bar

    Returns
    -------
    dict: ``done`` (ran now), ``skipped`` (already stored), ``total``
    """
    from tqdm.auto import tqdm

    by_key = {}
    for t in tasks:
        by_key.setdefault(t["key"], t)
    pending = [t for k, t in by_key.items() if not store.done(k)]
    skipped = len(by_key) - len(pending)
    bar = tqdm(total=len(by_key), initial=skipped, desc="sweep runs", unit="run", disable=not progress)
    done = 0
    try:
        if not pending:
            pass
        elif scheduler:
            from dask.distributed import Client, as_completed

            with Client(scheduler) as client:
                futures = client.map(_call, [fn] * len(pending), pending, pure=False)
                try:
                    for fut in as_completed(futures):
                        key, result = fut.result()
                        store.save(key, _record(by_key[key], result))
                        done += 1
                        bar.update(1)
                except BaseException:
                    client.cancel(futures)
                    raise
        else:
            from joblib import Parallel, delayed

            par = Parallel(n_jobs=int(jobs), return_as="generator_unordered")
            for key, result in par(delayed(_call)(fn, t) for t in pending):
                store.save(key, _record(by_key[key], result))
                done += 1
                bar.update(1)
    finally:
        bar.close()
    return {"done": done, "skipped": skipped, "total": len(by_key)}


def _flat(value):
    if isinstance(value, (list, tuple, dict)):
        return json.dumps(value, sort_keys=True)
    return value


def tidy_rows(records):
    """One row per run: key, walk, seed_index, mode, every setting, every
    scalar result. Returns (columns, rows)."""
    set_cols = sorted({k for r in records for k in r["settings"]})
    res_cols = sorted({k for r in records for k, v in r["result"].items() if not isinstance(v, (list, dict))})
    folds = any("fold" in r for r in records)
    cols = ["key", "walk", "seed_index", "mode"] + (["fold"] if folds else []) + set_cols + res_cols
    rows = []
    for r in sorted(records, key=lambda r: (json.dumps(r["settings"], sort_keys=True), str(r["walk"]), r["seed_index"])):
        row = [r["key"], r["walk"], r["seed_index"], r.get("mode")] + ([r.get("fold")] if folds else [])
        row += [_flat(r["settings"].get(k)) for k in set_cols]
        row += [r["result"].get(k) for k in res_cols]
        rows.append(row)
    return cols, rows


def _csv_text(cols, rows):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(cols)
    for r in rows:
        w.writerow(["" if v is None else v for v in r])
    return buf.getvalue()


def write_tidy_csv(path, records):
    """Write the tidy results table atomically; returns (columns, rows)."""
    cols, rows = tidy_rows(records)
    write_text_atomic(path, _csv_text(cols, rows))
    return cols, rows


def settings_label(settings):
    """Short readable label of a settings dict (``k=v, ...``; ``default``)."""
    if not settings:
        return "default"
    return ", ".join(f"{k}={settings[k]}" for k in sorted(settings))


def rank_settings(records, *, metric="median_error_m", n_boot=2000, level=0.95, rng=None):
    """Rank settings by the mean over their runs of ``metric`` (lower is
    better), with percentile-bootstrap confidence intervals of that mean
    (runs resampled with replacement; Efron & Tibshirani 1993, ch. 13).

    Parameters
    ----------
    records : list of stored run records
    rng : numpy.random.Generator (default ``default_rng(0)``: the ranking of
        the same results is reproducible)

    Returns
    -------
    list of dict, best first: ``rank``, ``settings`` (label), ``runs``,
    ``mean``, ``ci_low``, ``ci_high``, ``best_overlap`` (whether the CI
    overlaps that of the best), and over every scored checkpoint of every
    run (the ``errors_m`` lists; None where runs have none)
    ``checkpoints``, ``pooled_median_m``, ``pooled_p95_m``: the figures
    ``lodemap evaluate`` reports for one run
    """
    rng = np.random.default_rng(0) if rng is None else rng
    groups = {}
    errors = {}
    for r in records:
        v = r["result"].get(metric)
        if v is None or not np.isfinite(v):
            continue
        skey = json.dumps(r["settings"], sort_keys=True)
        groups.setdefault(skey, []).append(float(v))
        errors.setdefault(skey, []).extend(r["result"].get("errors_m") or [])
    if records and not groups:
        raise ConfigError(f"no run has a finite value of {metric!r} to rank by")
    out = []
    a = (1 - level) / 2
    for skey in sorted(groups):
        vals = np.asarray(groups[skey])
        idx = rng.integers(0, vals.size, size=(int(n_boot), vals.size))
        boots = vals[idx].mean(axis=1)
        lo, hi = np.quantile(boots, [a, 1 - a])
        e = np.asarray(errors[skey], float)
        e = e[np.isfinite(e)]
        pooled = (float(np.median(e)), float(np.percentile(e, 95))) if e.size else (None, None)
        out.append({"settings": settings_label(json.loads(skey)), "runs": int(vals.size), "mean": float(vals.mean()),
                    "ci_low": float(lo), "ci_high": float(hi), "checkpoints": int(e.size),
                    "pooled_median_m": pooled[0], "pooled_p95_m": pooled[1]})
    out.sort(key=lambda d: d["mean"])
    for i, d in enumerate(out):
        d["rank"] = i + 1
        d["best_overlap"] = bool(d["ci_low"] <= out[0]["ci_high"])
    keys = ("rank", "settings", "runs", "mean", "ci_low", "ci_high", "best_overlap", "checkpoints",
            "pooled_median_m", "pooled_p95_m")
    return [{k: d[k] for k in keys} for d in out]


# -- the real runs: localisation of one walk with one settings -------------------
def split_settings(settings):
    """(map settings, noise settings, filter settings) of a settings dict."""
    m = {k: v for k, v in settings.items() if k in MAP_SETTINGS}
    n = {k: v for k, v in settings.items() if k in NOISE_SETTINGS}
    f = {k: v for k, v in settings.items() if k not in MAP_SETTINGS and k not in NOISE_SETTINGS}
    return m, n, f


def check_noise_settings(noise):
    """ConfigError ("sweep setting NAME: ...", placed at its line by
    :func:`_setting_error`) unless ``noise_mag_ut`` is a finite number >= 0,
    ``noise_heading_deg`` finite and ``noise_step_scale`` finite and > 0."""
    rules = {"noise_mag_ut": (lambda v: v >= 0, "a finite number >= 0"),
             "noise_heading_deg": (lambda v: True, "a finite number"),
             "noise_step_scale": (lambda v: v > 0, "a finite number > 0")}
    for name, value in noise.items():
        ok, what = rules[name]
        if not (isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and ok(value)):
            raise ConfigError(f"sweep setting {name}: expected {what}, got {value!r}")


def filter_settings(overrides, *, preset_name="default"):
    """``FilterSettings`` of the preset with ``overrides`` applied; unknown
    names raise a ConfigError listing the valid ones."""
    import dataclasses

    from fingerprint.localise import FilterSettings, preset

    import difflib

    valid = {f.name for f in dataclasses.fields(FilterSettings)}
    bad = sorted(set(overrides) - valid)
    if bad:
        names = sorted(valid | set(MAP_SETTINGS) | set(NOISE_SETTINGS))
        close = difflib.get_close_matches(bad[0], names, n=1)
        if close:  # one likely typo: the fix, not the whole list
            raise ConfigError(f"unknown setting(s) {bad}; did you mean {close[0]!r}?")
        raise ConfigError(f"unknown setting(s) {bad}; valid: {names}")
    return dataclasses.replace(preset(preset_name), **overrides)


def _setting_error(cfg, err):
    """``err`` (a ConfigError about one setting) as a ConfigError naming
    the config file, the line and column of that setting in the table of
    the search in use (``[grid]`` or ``[random]``), when they can be found."""
    text = str(err)
    m = re.match(r"unknown setting\(s\) \['([^']+)'", text) or re.match(r"(?:filter|sweep) setting (\w+): ", text)
    if not m or not cfg.path:
        return ConfigError(f"{cfg.path}: {text}" if cfg.path else text)
    name = m.group(1)
    if text.startswith(("filter setting ", "sweep setting ")):
        text = f"{name}: {text[m.end():]}"
    table = None
    try:
        lines = Path(cfg.path).read_text(encoding="utf-8").splitlines()
    except OSError:
        lines = []
    for i, line in enumerate(lines, 1):
        head = re.match(r"\s*\[\s*([\w.-]+)\s*\]", line)
        if head:
            table = head.group(1)
            continue
        key = re.match(rf"(\s*){re.escape(name)}\s*=", line)
        if key and table == cfg.search:  # the table the settings came from
            return ConfigError(f"{cfg.path}, line {i}, column {len(key.group(1)) + 1}: [{table}] {text}")
    return ConfigError(f"{cfg.path}: {text}")


def perturb_walk(walk, noise, rng):
    """The walk with the ``noise_*`` settings applied.

    noise_mag_ut : white noise (µT, 1 sd) added to every field component
    noise_heading_deg : constant error added to every step heading
    noise_step_scale : factor on every step length
    """
    import dataclasses

    if not noise:
        return walk
    motion = walk.motion
    mag = walk.mag_earth_ut
    noise_ut = walk.mag_noise_ut
    if noise.get("noise_mag_ut"):
        sd = float(noise["noise_mag_ut"])
        mag = mag + rng.normal(0.0, sd, size=mag.shape)
        noise_ut = float(np.hypot(noise_ut, sd))
    dh = math.radians(float(noise.get("noise_heading_deg", 0.0)))
    sc = float(noise.get("noise_step_scale", 1.0))
    if dh or sc != 1.0:
        motion = dataclasses.replace(motion, heading_rad=motion.heading_rad + dh, length_m=motion.length_m * sc)
    return dataclasses.replace(walk, mag_earth_ut=mag, mag_noise_ut=noise_ut, motion=motion,
                               heading_rad=walk.heading_rad + dh)


_MAP_CACHE = {}


def _map_entry(path):
    """[FieldMap, its mean vertical field or None] of ``path``, cached per process."""
    from fingerprint.mapfile import load_map

    key = str(path)
    if key not in _MAP_CACHE:
        if len(_MAP_CACHE) > 4:
            _MAP_CACHE.clear()
        _MAP_CACHE[key] = [load_map(path), None]
    return _MAP_CACHE[key]


def _load_map_cached(path):
    return _map_entry(path)[0]


def _map_vertical_cached(path):
    from .evaluate import map_vertical_ut

    entry = _map_entry(path)
    if entry[1] is None:
        entry[1] = map_vertical_ut(entry[0])
    return entry[1]


def evaluation_run(task):
    """One sweep run: localise ``task["walk_files"]`` on ``task["map_path"]``
    with ``task["settings"]`` and the task's seed; returns its scores.

    Returns
    -------
    dict: checkpoints, median/mean/p75/p95/max_error_m, converged,
    convergence_distance_m, localise_time_s, duration_s, distance_m,
    errors_m (list, the scored checkpoints)
    """
    from . import metrics as M
    from .evaluate import evaluate_walk, load_walk
    from .walkset import WalkFiles

    wf = WalkFiles(**{k: (None if v is None else Path(v)) if k != "name" else v for k, v in task["walk_files"].items()})
    _, noise, filt = split_settings(task["settings"])
    s = filter_settings(filt, preset_name=task.get("preset", "default"))
    ss = np.random.SeedSequence(task["seed"]["entropy"], spawn_key=tuple(task["seed"]["spawn_key"]))
    noise_ss, run_ss = ss.spawn(2)
    fmap = _load_map_cached(task["map_path"])
    walk, cps, truth = load_walk(wf, expected_up_ut=_map_vertical_cached(task["map_path"]))
    if cps is None:
        raise ConfigError(f"walk {wf.name} has no checkpoints file beside {wf.log}")
    walk = perturb_walk(walk, noise, np.random.default_rng(noise_ss))
    we = evaluate_walk(wf.name, walk, cps, fmap, mode=task["mode"], settings=s, seed=run_ss, baselines=())
    r = we.main_result
    st = M.error_stats(r.scored_errors_m)
    return {
        "checkpoints": st["n"],
        "median_error_m": M.json_number(st["median"]),
        "mean_error_m": M.json_number(st["mean"]),
        "p75_error_m": M.json_number(st["p75"]),
        "p95_error_m": M.json_number(st["p95"]),
        "max_error_m": M.json_number(st["max"]),
        "converged": bool(we.converged),
        "convergence_distance_m": M.json_number(we.convergence_distance_m),
        "localise_time_s": round(r.time_s, 4),
        "duration_s": round(we.duration_s, 3),
        "distance_m": round(float(we.distance_m[-1]), 3),
        "errors_m": [round(float(e), 4) for e in r.scored_errors_m],
    }


def _map_key(cfg, map_settings, fold=None):
    ident = {"data": cfg.data_identity(), "map": map_settings, "seed": cfg.seed}
    if fold is not None:
        ident["fold"] = int(fold)
    return hashlib.sha256(json.dumps(ident, sort_keys=True, default=str).encode()).hexdigest()[:16]


def fold_assignment(names, folds, seed):
    """Deal walk names into ``folds`` folds of sizes differing by at most
    one: fold ``i`` of the ``i``-th name in a permutation of the sorted
    names drawn with ``default_rng(seed)``. Returns dict name -> fold."""
    names = sorted(set(names))
    order = np.random.default_rng(int(seed)).permutation(len(names))
    return {names[j]: int(i % folds) for i, j in enumerate(order)}


def _survey_walks(cfg):
    from .walkset import find_walks

    return find_walks(cfg.survey, split=cfg.split, part="survey" if cfg.split else None)


def prepare_maps(cfg, settings_list, out_dir, *, progress=True, fold_of=None):
    """Build (or reuse from ``out_dir/maps``) one map per distinct map
    setting, and with ``fold_of`` (dict survey walk name -> fold) one per
    setting and fold, from the survey walks outside that fold.

    Returns
    -------
    dict: (json of map settings, fold or None) -> map path
    """
    distinct = {}
    for s in settings_list:
        m, _, _ = split_settings(s)
        distinct.setdefault(json.dumps(m, sort_keys=True), m)
    folds = sorted(set(fold_of.values())) if fold_of else [None]
    out = {}
    survey = None
    for k, m in distinct.items():
        for fold in folds:
            if not m and cfg.map is not None and fold is None:
                out[(k, None)] = cfg.map
                continue
            path = Path(out_dir) / "maps" / f"{_map_key(cfg, m, fold)}.map"
            if not path.exists():
                from fingerprint.mapfile import save_map

                from .mapbuild import build_floor_map
                from .site import load_site

                if survey is None:
                    survey = _survey_walks(cfg)
                train = survey if fold is None else [w for w in survey if fold_of[w.name] != fold]
                kw = {}
                if "map_resolution_m" in m:
                    kw["resolution_m"] = float(m["map_resolution_m"])
                if "map_kernel" in m:
                    kw["kernel"] = str(m["map_kernel"])
                if "map_n_basis" in m:
                    kw["kernel_params"] = {"n_basis": int(m["map_n_basis"])}
                fmap = build_floor_map(load_site(cfg.site), cfg.floor, train, seed=cfg.seed, progress=progress, **kw)
                save_map(path, fmap)
            out[(k, fold)] = path
    return out


def run_sweep(cfg, out_dir, *, jobs=1, scheduler=None, progress=True, run_fn=None):
    """Run a whole sweep: maps, runs (resumable), tidy CSV and ranking.

    Returns
    -------
    dict: counts (done/skipped/total), ranking (list of dict), paths
    """
    from .walkset import find_walks

    out = Path(out_dir)
    check_writable(out, folder=True)
    settings_list = expand_settings(cfg)
    # validate names and values before anything runs
    for s in settings_list:
        _, n, f = split_settings(s)
        try:
            check_noise_settings(n)
            filter_settings(f, preset_name=cfg.preset)
        except ConfigError as err:
            raise _setting_error(cfg, err) from None
    walks = [w for w in find_walks(cfg.walks, split=cfg.split, part=cfg.use if cfg.split else None)
             if w.checkpoints is not None]
    if not walks:
        raise ConfigError(f"{cfg.path}: none of the walks has a checkpoints file")
    names = [w.name for w in walks]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ConfigError(f"{cfg.path}: walks with the same name in different folders: {dup}")
    fold_of = None
    if cfg.folds:
        fold_of = fold_assignment([w.name for w in _survey_walks(cfg)], cfg.folds, cfg.seed)
        outside = sorted(set(names) - set(fold_of))
        if outside:
            raise ConfigError(f"{cfg.path}: folds = {cfg.folds} scores survey walks only (each on the map built "
                              f"without it); not survey walks: {outside[:5]}{' ...' if len(outside) > 5 else ''}")
        if len(fold_of) < cfg.folds:
            raise ConfigError(f"{cfg.path}: folds = {cfg.folds} but only {len(fold_of)} survey walks")
    maps = prepare_maps(cfg, settings_list, out, progress=progress, fold_of=fold_of)
    by_name = {w.name: w for w in walks}
    data = cfg.data_identity()
    if cfg.preset != "default":
        data["preset"] = cfg.preset  # part of every run key
    digests = {w.name: files_digest([p for p in (w.log, w.checkpoints, w.track) if p is not None]) for w in walks}
    tasks = make_tasks(settings_list, names, seeds=cfg.seeds, root_seed=cfg.seed, mode=cfg.mode, data=data,
                       extra={"preset": cfg.preset},
                       resolve=lambda st: filter_settings(split_settings(st)[2], preset_name=cfg.preset).to_dict(),
                       walk_digests=digests)
    for t in tasks:
        m, _, _ = split_settings(t["settings"])
        w = by_name[t["walk"]]
        fold = None if fold_of is None else fold_of[t["walk"]]
        if fold is not None:
            t["fold"] = fold
        t["map_path"] = str(maps[(json.dumps(m, sort_keys=True), fold)])
        t["walk_files"] = {"name": w.name, "log": str(w.log),
                           "checkpoints": None if w.checkpoints is None else str(w.checkpoints),
                           "track": None if w.track is None else str(w.track)}
    store = RunStore(out / "runs")
    counts = execute(tasks, run_fn or evaluation_run, store=store, jobs=jobs, scheduler=scheduler, progress=progress)
    wanted = {t["key"] for t in tasks}
    records = [store.load(k) for k in store.keys() if k in wanted]
    write_tidy_csv(out / "results.csv", records)
    ranking = rank_settings(records, metric=cfg.metric, rng=np.random.default_rng(cfg.seed))
    cols = ["rank", "settings", "runs", "mean", "ci_low", "ci_high", "best_overlap", "checkpoints", "pooled_median_m",
            "pooled_p95_m"]
    # the header says what was averaged; metres to 0.1 mm
    head = [f"mean_{cfg.metric}" if c == "mean" else c for c in cols]
    rows = [[round(v, 4) if isinstance(v, float) else v for v in (r[c] for c in cols)] for r in ranking]
    write_text_atomic(out / "ranking.csv", _csv_text(head, rows))
    write_json_atomic(out / "sweep.json", {
        "config": cfg.path, "mode": cfg.mode, "search": cfg.search, "seed": cfg.seed, "seeds": cfg.seeds,
        "metric": cfg.metric, "settings": settings_list, "walks": names, "counts": counts,
        "folds": cfg.folds, "fold_of": fold_of,
        "maps": [{"map_settings": json.loads(k), "fold": f, "path": str(v)} for (k, f), v in maps.items()],
        "ranking": ranking,
    })
    _sweep_report(out / "report.html", cfg, ranking, records, counts)
    return {"counts": counts, "ranking": ranking,
            "paths": {"results": out / "results.csv", "ranking": out / "ranking.csv", "report": out / "report.html"}}


def _sweep_report(path, cfg, ranking, records, counts):
    from . import report as R

    secs = [R.Section("Ranking", R.html_table(
        ["rank", "settings", "runs", f"mean {cfg.metric}", "95 % CI low", "95 % CI high", "CI overlaps best",
         "checkpoints", "median of all (m)", "p95 of all (m)"],
        [[r["rank"], r["settings"], r["runs"], r["mean"], r["ci_low"], r["ci_high"], r["best_overlap"],
          r["checkpoints"], r["pooled_median_m"], r["pooled_p95_m"]]
         for r in ranking]))]
    if ranking:
        fig = R._new_figure((8.0, 1.2 + 0.35 * len(ranking)))
        ax = fig.add_subplot(1, 1, 1)
        y = np.arange(len(ranking))[::-1]
        mean = np.array([r["mean"] for r in ranking])
        lo = mean - np.array([r["ci_low"] for r in ranking])
        hi = np.array([r["ci_high"] for r in ranking]) - mean
        ax.errorbar(mean, y, xerr=[lo, hi], fmt="o", capsize=3)
        ax.set_yticks(y)
        ax.set_yticklabels([r["settings"][:60] for r in ranking], fontsize=7)
        ax.set_xlabel(f"mean over runs of {cfg.metric} (95 % bootstrap CI)")
        ax.grid(alpha=0.3)
        fig.tight_layout()
        secs.append(R.Section("Settings compared", R.img_tag(R.figure_to_base64(fig), "ranking")))
    secs.append(R.Section("Sweep", R.html_table(["item", "value"], [
        ["config", cfg.path], ["mode", cfg.mode], ["search", cfg.search], ["root seed", cfg.seed],
        ["seeds per settings and walk", cfg.seeds],
        ["cross-validation", f"{cfg.folds} folds of the survey walks (each scored on the map built without it)"
         if cfg.folds else "no (one map for every walk)"],
        ["runs done now / already stored / total",
                                                      f"{counts['done']} / {counts['skipped']} / {counts['total']}"],
        ["runs in this table", len(records)]])))
    secs.append(R.Section("Cautions", "<ul><li>The intervals resample runs (walks x seeds) with replacement; runs of "
                          "the same walk are correlated, so the intervals are optimistic when walks are few.</li>"
                          "<li>A setting that wins on these walks may not win elsewhere.</li></ul>"))
    R.write_report(path, "lodemap sweep", secs, subtitle=f"seed {cfg.seed}")
