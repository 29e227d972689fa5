"""``lodemap bench filter --real DIR``: the filter with and without the field
on real floors (a site folder such as shared ``real_data/siteA``).

For every floor: a map from the floor's survey split
(``mapping.mapbuild.build_floor_map``, cached as ``<cache>/<floor>.map``),
each test walk started at its first checkpoint (sigma 1.5 m), errors at the
later checkpoints, several seeds. Prints median and 95th percentile error
per floor and pooled for every filter variant and, for every variant beside
"no-field", the difference from it with a 95 % bootstrap interval over the
test walks (paired: a resample keeps a walk's errors under both variants),
and then, seed by seed, in how many seeds it beats no-field (a filter's
result moves from seed to seed; see :func:`seed_wins`).
Minutes per floor, so not a unit test.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

__all__ = ["VARIANTS", "run_real", "seed_wins"]

#: variant name -> FilterSettings changes from the default preset
VARIANTS = {
    "no-field": {"use_field": False},
    "field": {},
}


def _floor_data(site_dir, floor, cache_dir, *, seed=0):
    from fingerprint.logio import read_checkpoints, read_walk_log
    from fingerprint.mapfile import load_map, save_map
    from fingerprint.pipeline import process_walk
    from mapping.mapbuild import build_floor_map
    from mapping.walkset import find_walks, load_split

    d = Path(site_dir) / floor
    split = load_split(d / "split.json")
    cache = Path(cache_dir) / f"{floor}.map"
    if cache.exists():
        fmap = load_map(cache)
    else:
        survey = find_walks([d], split=split, part="survey")
        fmap = build_floor_map(Path(site_dir) / "site.json", floor, survey, seed=seed, progress=False)
        cache.parent.mkdir(parents=True, exist_ok=True)
        save_map(cache, fmap)
    tests = []
    for name in split["test"]:
        log = d / f"{name}.log.csv"
        if not log.exists():
            log = d / f"{name}.log.csv.gz"
        tests.append((name, process_walk(read_walk_log(log)), read_checkpoints(d / f"{name}.checkpoints.csv")))
    return fmap, tests


def walk_errors(fmap, tests, settings, *, seeds=(0, 1, 2)):
    """Errors (m) at the later checkpoints of every test walk, every seed.

    Returns
    -------
    dict walk name -> (S, K) float array (S seeds, K checkpoints after the first)
    """
    from fingerprint.localise import localise

    out = {}
    for name, w, cp in tests:
        rows = []
        for sd in seeds:
            tr = localise(w, fmap, settings=settings, start_xy=cp.xy[0], start_sigma_m=1.5,
                          start_time_s=cp.t[0], rng=sd)
            est = tr.at(cp.t[1:]) if tr.t.size else np.repeat(cp.xy[:1], cp.n - 1, axis=0)
            rows.append(np.hypot(*(est - cp.xy[1:]).T))
        out[name] = np.array(rows)
    return out


def paired_difference_ci(errs, ref, *, n_boot=2000, rng=None):
    """Differences ``errs - ref`` of the pooled median and 95th percentile,
    with 95 % intervals from resampling whole walks (paired).

    Parameters
    ----------
    errs, ref : dict walk name -> errors of that walk (any shape), the same walks

    Returns
    -------
    dict ``median``/``p95`` -> (difference, low, high), metres
    """
    from mapping.metrics import percentile_difference

    names = sorted(set(errs) & set(ref))
    pairs = [(ref[k], errs[k]) for k in names]
    return {key: percentile_difference(pairs, q, n_boot=n_boot, rng=rng) for key, q in (("median", 50), ("p95", 95))}


def seed_wins(errs, ref):
    """Seed by seed, the difference ``errs - ref`` of the median and 95th
    percentile of all the test walks' errors of that seed.

    A particle filter's result moves from seed to seed; when a pooled
    difference is small, this says whether it holds seed by seed or is the
    sum of wins and losses.

    Parameters
    ----------
    errs, ref : dict walk name -> (S, K) errors (S seeds in the same order),
        the same walks

    Returns
    -------
    dict ``median``/``p95`` -> (S,) float, the per-seed differences, metres
        (negative: ``errs`` is better)
    """
    names = sorted(set(errs) & set(ref))
    if not names:
        return {"median": np.zeros(0), "p95": np.zeros(0)}
    a = np.concatenate([np.asarray(errs[k], dtype=float) for k in names], axis=1)  # (S, all checkpoints)
    b = np.concatenate([np.asarray(ref[k], dtype=float) for k in names], axis=1)
    return {key: np.percentile(a, q, axis=1) - np.percentile(b, q, axis=1) for key, q in (("median", 50), ("p95", 95))}


def _stats(errs):
    e = np.concatenate([v.ravel() for v in errs.values()]) if errs else np.zeros(0)
    return float(np.median(e)), float(np.percentile(e, 95))


def run_real(site_dir, *, floors=None, variants=None, seeds=(0, 1, 2), cache_dir=None, json_out=None,
             base="default"):
    """Run the variants on the floors and print the table; returns a dict
    ``{variant: {floor: (median, p95), "pooled": (median, p95)}}``."""
    from fingerprint.localise import preset

    site_dir = Path(site_dir)
    if floors is None:
        floors = sorted(f["floor"] for f in json.loads((site_dir / "site.json").read_text())["floors"])
    cache_dir = Path(cache_dir) if cache_dir else site_dir / ".lodemap_cache"
    variants = variants or VARIANTS
    data = {f: _floor_data(site_dir, f, cache_dir) for f in floors}
    table = {}
    all_errs = {}
    print(f"{'variant':<28}" + "".join(f"{f:>14}" for f in floors) + f"{'pooled':>14}   (median/p95 m, seeds {list(seeds)})")
    for name, changes in variants.items():
        s = preset(base, **changes)
        per = {}
        pooled = {}
        for f in floors:
            fmap, tests = data[f]
            errs = walk_errors(fmap, tests, s, seeds=seeds)
            per[f] = _stats(errs)
            all_errs[name, f] = errs
            pooled.update({f"{f}/{k}": v for k, v in errs.items()})
        per["pooled"] = _stats(pooled)
        all_errs[name, "pooled"] = pooled
        table[name] = per
        print(f"{name:<28}" + "".join(f"{per[f][0]:>7.2f}/{per[f][1]:<6.2f}" for f in floors)
              + f"{per['pooled'][0]:>7.2f}/{per['pooled'][1]:<6.2f}", flush=True)
    if "no-field" in variants and len(variants) > 1:
        print("difference from no-field, metres, with a 95 % interval from resampling test walks "
              "(negative = better than no-field)")
        for name in variants:
            if name == "no-field":
                continue
            cells = []
            for f in [*floors, "pooled"]:
                d = paired_difference_ci(all_errs[name, f], all_errs["no-field", f])
                # JSON has no NaN: an interval from fewer than two walks is null
                table[name][f"{f}_vs_no_field"] = {k: [None if not np.isfinite(v) else v for v in t]
                                                   for k, t in d.items()}
                cells.append(f"{f} median {d['median'][0]:+.3f} [{d['median'][1]:+.2f}, {d['median'][2]:+.2f}]"
                             f" p95 {d['p95'][0]:+.3f} [{d['p95'][1]:+.2f}, {d['p95'][2]:+.2f}]")
            print(f"  {name}: " + "; ".join(cells), flush=True)
        print("seed by seed: how many seeds the variant beats no-field in (per-seed difference: mean, sd)")
        for name in variants:
            if name == "no-field":
                continue
            cells = []
            for f in floors:
                w = seed_wins(all_errs[name, f], all_errs["no-field", f])
                table[name][f"{f}_seed_differences"] = {k: v.tolist() for k, v in w.items()}
                cells.append(f"{f} " + ", ".join(
                    f"{k} {int(np.sum(v < 0))}/{v.size} ({np.mean(v):+.3f}, {np.std(v, ddof=1) if v.size > 1 else 0.0:.3f})"
                    for k, v in w.items()))
            print(f"  {name}: " + "; ".join(cells), flush=True)
    if json_out:
        from fingerprint._atomic import write_json_atomic

        write_json_atomic(json_out, table)
    return table
