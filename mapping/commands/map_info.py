"""``lodemap map-info``: what a map file holds."""

from __future__ import annotations

import json

HELP = "print what a map file holds: floor, size, kernel, survey walks, quality"


def add_arguments(parser):
    parser.add_argument("map_path", metavar="FLOOR.map", help="map file written by 'lodemap build-map'")
    parser.add_argument("--json", action="store_true", help="print the map's metadata and quality summary as JSON")
    parser.add_argument("--walks", action="store_true", help="list the survey walks")


#: what each map hyperparameter is, for people reading the printout
HYPER_MEANING = {
    "magnitude_ut": "prior sd of each field component about the mean field",
    "length_scale_m": "distance over which the field changes",
    "noise_h_ut": "noise sd of the horizontal samples",
    "noise_up_ut": "noise sd of the vertical samples",
    "constant_ut": "prior sd of the mean field",
    "offset_ut": "prior sd of each walk's device-frame offset, per axis",
}


def hyperparameter_lines(model):
    """One line per hyperparameter of a map's model summary: name, value,
    meaning, and whether it was fixed rather than fitted."""
    known = "fixed_hyperparameters" in model  # maps of older versions do not say
    fixed = set(model.get("fixed_hyperparameters") or ())
    lines = []
    for k, v in (model.get("hyperparameters") or {}).items():
        how = ("fixed" if k in fixed else "fitted") if known else ""
        if k == "constant_ut" and v >= 1e3 and (k in fixed or not known):
            how = "fixed large: a flat prior, the survey data set the mean field"
        lines.append(f"{k:<16s}{v:10.4g}   {HYPER_MEANING.get(k, '')}" + (f" ({how})" if how else ""))
    return lines


def run(args):
    from fingerprint.mapfile import load_map

    from ..quality import map_quality

    fmap = load_map(args.map_path)
    q = map_quality(fmap)
    meta = fmap.meta
    if args.json:
        out = {"meta": meta, "quality": {k: v for k, v in q.items() if k != "stretches"},
               "stretches": [{k: v for k, v in s.items() if k != "edges"} for s in q["stretches"]]}
        print(json.dumps(out, indent=1, ensure_ascii=False))
        return 0
    ny, nx = fmap.shape
    x0, x1, y0, y1 = fmap.extent
    model = meta.get("model", {})
    print(f"floor:            {fmap.floor}  (site {meta.get('site')!r})")
    print(f"plan hash:        {meta.get('plan_hash')}")
    print(f"raster:           {nx} x {ny} cells at {fmap.resolution_m} m, x {x0:.2f}..{x1:.2f}, y {y0:.2f}..{y1:.2f}; "
          f"{int(fmap.free.sum())} free cells")
    print(f"graph:            {fmap.graph.n_nodes} nodes, {fmap.graph.n_edges} edges, {fmap.graph.total_length_m:.1f} m")
    al = meta.get("frames", {}).get("alignment", {})
    print(f"earth_to_plan:    {fmap.earth_to_plan_rad:.5f} rad ({al.get('source', '?')})")
    print(f"kernel:           {meta.get('kernel')}")
    for line in hyperparameter_lines(model):
        print(f"  {line}")
    basis, opt = model.get("basis") or {}, model.get("optimisation") or {}
    if "tiles" in basis:
        line = f"{basis['tiles']} tiles of {basis['tile_m']:g} m, {basis['n_basis_per_tile']} basis functions each"
    elif "n_basis" in basis:
        line = f"one box of {basis['n_basis']} basis functions"
    else:
        line = ""
    if line and opt.get("length_scale_bounds_m"):
        line += f"; shortest length scale it resolves {opt['length_scale_bounds_m'][0]:.2f} m"
    if line and opt.get("refined_from"):
        rf = opt["refined_from"]
        line += (f" (refined: the fit on {rf['tiles']} part(s) ended on its bound, "
                 f"{rf['length_scale_bounds_m'][0]:.2f} m)")
    if line and opt.get("refine_skipped"):
        rs = opt["refine_skipped"]
        line += (f" (the fit ended on this bound; not refined: {rs['tiles']} finer tiles would need about "
                 f"{rs['estimated_gb']:g} GB, over the {rs['budget_gb']:g} GB budget)")
    if line:
        print(f"  basis                 {line}")
    if model.get("between_walk_sd_ut"):
        print("  between-walk sd       " + ", ".join(f"{v:.3f}" for v in model["between_walk_sd_ut"]) + " µT (b_x, b_y, b_up)")
    if meta.get("noise_sd_ut"):
        print("  noise sd              " + ", ".join(f"{v:.3f}" for v in meta["noise_sd_ut"]) + " µT")
    cal = model.get("calibration") or {}
    if cal:
        print("  held-out walk RMSE    " + ", ".join(f"{v:.3f}" for v in cal["heldout_rmse_ut"]) + f" µT ({cal['n_folds']}-fold by walk)")
    walks = meta.get("survey_walks", [])
    print(f"survey:           {len(walks)} walks, {meta.get('n_samples')} samples; seed {meta.get('seed')}")
    if args.walks:
        for w in walks:
            off = w.get("offset_ut")
            extra = "" if not off else "; offset " + ", ".join(f"{v:+.1f}" for v in off) + " µT (forward, left, up)"
            print(f"  {w['name']}: {w['samples']} samples{extra}")
    outliers = meta.get("offset_outliers") or []
    if outliers:
        print(f"  {len(outliers)} walks with an outlying device-frame offset (check their calibration): "
              + ", ".join(o["walk"] for o in outliers))
    r, g = q["raster"], q["graph"]
    print(f"coverage:         {100 * (r['covered_within_1m'] or 0):.1f} % of free space within 1 m of a survey sample, "
          f"{100 * (r['covered_within_2m'] or 0):.1f} % within 2 m; graph {100 * (g['fraction_covered'] or 0):.1f} % covered")
    if r.get("latent_sd_median_ut"):
        print("latent sd median: " + ", ".join(f"{v:.3f}" for v in r["latent_sd_median_ut"]) + " µT")
    print(f"localisability:   median {g['localisability_median_per_m']} per m (field change per metre over sd)")
    print(f"re-survey:        {len(q['stretches'])} graph stretches, {100 * (g['fraction_needing_walk'] or 0):.1f} % of the graph")
    for s in q["stretches"][:10]:
        print(f"  {s['length_m']:7.1f} m  ({s['from_xy'][0]:.1f}, {s['from_xy'][1]:.1f}) -> ({s['to_xy'][0]:.1f}, {s['to_xy'][1]:.1f})  "
              f"{'+'.join(s['reasons'])}")
    return 0
