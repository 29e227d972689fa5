"""Score field-map models on held-out walks (and, for simulated sites,
against the true field).

:func:`heldout_scores` fits every requested kernel on the same survey
samples and predicts the plan-frame field at the stretch-averaged samples
of the test walks (positions from their checkpoints or track, as for
survey walks), reporting per component (``b_x, b_y, b_up``) and per feature
(``b_up``, horizontal magnitude ``b_h``, total ``b_total``) the RMSE, and
per component the share of residuals within ±1 predicted sd (``sqrt(var +
noise_var_)``, a measurement's sd), and how much the misfit grows when the
test walks' positions are moved along their own paths
(:func:`displaced_misfit`): how well the field tells places apart, given
how well the map predicts a new walk.
"""

from __future__ import annotations

import time

import numpy as np
from scipy.spatial import cKDTree

from .mapbuild import collect_samples, earth_to_plan_for, fit_samples, load_walks

__all__ = ["features_of", "walk_offsets", "residual_scores", "displaced_misfit", "heldout_scores", "truth_scores"]

COMPONENTS = ("b_x", "b_y", "b_up")
#: distance bands (m) from visible steel for :func:`truth_scores`
STEEL_BANDS_M = ((0.0, 0.8), (0.8, 1.5), (1.5, 2.5), (2.5, float("inf")))
#: distances (m) along the walk for :func:`displaced_misfit`
DISPLACEMENTS_M = (1.0, 2.0, 5.0, 10.0)
FEATURES = ("b_up", "b_h", "b_total")


def features_of(b):
    """(N, 3) plan-frame field -> dict of (N,) features b_up, b_h, b_total."""
    b = np.asarray(b, float)
    return {"b_up": b[:, 2], "b_h": np.hypot(b[:, 0], b[:, 1]), "b_total": np.linalg.norm(b, axis=1)}


def walk_offsets(residual, rotations, groups):
    """Least-squares constant device-frame offset of each walk's residuals.

    ``residual ≈ R_i o_w`` for the samples ``i`` of walk ``w`` with
    ``R_i`` (device-to-plan rotations, orthogonal): the normal equations
    reduce to ``o_w = mean_i(R_i^T r_i)``.

    Parameters
    ----------
    residual : (N, 3) µT, measured minus mapped, plan frame
    rotations : (N, 3, 3) device-to-plan (or heading-frame) rotations
    groups : (N,) walk labels

    Returns
    -------
    offsets : (W, 3) µT, device frame, one per walk in ``np.unique`` order
    fitted : (N, 3) µT, ``R_i o_w`` of every sample (plan frame)
    """
    r = np.asarray(residual, float)
    rot = np.asarray(rotations, float)
    g = np.unique(np.asarray(groups), return_inverse=True)[1]
    cnt = np.bincount(g)
    local = np.einsum("nji,nj->ni", rot, r)  # R^T r
    off = np.stack([np.bincount(g, weights=local[:, i]) / cnt for i in range(3)], axis=1)
    return off, np.einsum("nij,nj->ni", rot, off[g])


def residual_scores(b_true, mean, var=None, noise_var=None, *, groups=None, rotations=None, offset_var=None):
    """RMSE per component and feature, coverage within ±1 sd.

    Parameters
    ----------
    b_true, mean : (N, 3) float, µT
    var : (N, 3) float or None, map variance
    noise_var : (3,) float or None, added to ``var`` for a measurement's sd
    groups : (N,) walk labels or None; with them also the RMSE after
        removing each walk's mean residual (what a per-walk offset costs)
    rotations : (N, 3, 3) or None; with ``groups``, also the scores after
        removing each walk's constant device-frame offset fitted to its
        residuals (:func:`walk_offsets`): a phone's residual calibration
        error differs per walk and turns with the device, the map cannot
        know it for a new walk, and a localiser estimates it as a bias
    offset_var : (3,) µT² or None, the part of ``var`` that stands for
        such between-walk offsets (``between_walk_var_`` of a GP model);
        taken out of the sd for the offset-removed ±1 sd share

    Returns
    -------
    dict (JSON-able)
    """
    r = np.asarray(b_true, float) - np.asarray(mean, float)
    out = {"n": int(r.shape[0])}
    out["rmse_ut"] = {c: float(np.sqrt(np.mean(r[:, i] ** 2))) for i, c in enumerate(COMPONENTS)}
    ft, fm = features_of(b_true), features_of(mean)
    out["feature_rmse_ut"] = {k: float(np.sqrt(np.mean((ft[k] - fm[k]) ** 2))) for k in FEATURES}
    if var is not None:
        sd = np.sqrt(np.asarray(var, float) + (0.0 if noise_var is None else np.asarray(noise_var, float)[None, :]))
        out["within_1sd"] = {c: float(np.mean(np.abs(r[:, i]) <= sd[:, i])) for i, c in enumerate(COMPONENTS)}
        out["mean_sd_ut"] = {c: float(np.sqrt(np.mean(sd[:, i] ** 2))) for i, c in enumerate(COMPONENTS)}
    if groups is not None:
        g = np.unique(np.asarray(groups), return_inverse=True)[1]
        cnt = np.bincount(g)
        mu = np.stack([np.bincount(g, weights=r[:, i]) / cnt for i in range(3)], axis=1)
        rr = r - mu[g]
        out["rmse_walk_mean_removed_ut"] = {c: float(np.sqrt(np.mean(rr[:, i] ** 2))) for i, c in enumerate(COMPONENTS)}
        if rotations is not None:
            off, fitted = walk_offsets(r, rotations, groups)
            ro = r - fitted
            out["rmse_offset_removed_ut"] = {c: float(np.sqrt(np.mean(ro[:, i] ** 2))) for i, c in enumerate(COMPONENTS)}
            fo = features_of(np.asarray(b_true, float) - fitted)
            out["feature_rmse_offset_removed_ut"] = {k: float(np.sqrt(np.mean((fo[k] - fm[k]) ** 2))) for k in FEATURES}
            out["walk_offsets_ut"] = off.tolist()
            if var is not None:
                v = np.asarray(var, float)
                if offset_var is not None:
                    v = np.clip(v - np.asarray(offset_var, float)[None, :], 0.0, None)
                sdo = np.sqrt(v + (0.0 if noise_var is None else np.asarray(noise_var, float)[None, :]))
                out["within_1sd_offset_removed"] = {c: float(np.mean(np.abs(ro[:, i]) <= sdo[:, i]))
                                                    for i, c in enumerate(COMPONENTS)}
    return out


def _along_path(xy, groups):
    """Distance travelled (N,) from each walk's first sample (samples in
    travel order within a walk)."""
    n = xy.shape[0]
    step = np.zeros(n)
    step[1:] = np.hypot(*np.diff(xy, axis=0).T)
    first = np.ones(n, bool)
    first[1:] = groups[1:] != groups[:-1]
    step[first] = 0.0
    total = np.cumsum(step)
    start = np.maximum.accumulate(np.where(first, np.arange(n), 0))
    return total - total[start]


def displaced_misfit(b_true, xy, groups, predict, *, shifts_m=DISPLACEMENTS_M):
    """How much the misfit of held-out walks grows when their positions are
    moved along their own paths.

    Every sample's position is moved ``d`` metres ahead along its walk's path
    (and, separately, ``d`` behind; samples whose moved position falls off
    either end of the walk are left out), the map is read there, and each
    walk's mean residual is removed per direction (a walker consistently
    ``d`` metres off, whose constant part a localiser's field bias absorbs).
    The RMSE of the features ``b_up`` and ``b_h`` (horizontal magnitude)
    at the moved positions is set beside the RMSE at the true positions of
    the same samples (mean removed alike). When the two are close, the field
    does not tell places ``d`` metres apart along the walks, whatever the
    map; a uniform gradient gives nothing either (its change is constant
    along a straight stretch, and goes with the mean).

    Parameters
    ----------
    b_true : (N, 3) plan-frame field of the samples, µT
    xy : (N, 2) their positions; samples of a walk consecutive, in travel order
    groups : (N,) walk labels
    predict : callable, (M, 2) positions -> (M, 3) mapped field
    shifts_m : distances, metres

    Returns
    -------
    list of dict (JSON-able): ``shift_m``, ``n`` (samples scored, both
    directions), ``rmse_true_ut`` and ``rmse_displaced_ut`` ({b_up, b_h};
    None when no sample is left at that distance)
    """
    b_true = np.asarray(b_true, float)
    xy = np.asarray(xy, float)
    groups = np.asarray(groups)
    s = _along_path(xy, groups)
    g = np.unique(groups, return_inverse=True)[1]
    n_w = int(g.max()) + 1 if g.size else 0
    f_true = features_of(b_true)
    f_here = features_of(predict(xy)) if xy.shape[0] else {k: np.zeros(0) for k in FEATURES}
    keys = ("b_up", "b_h")
    out = []
    for d in shifts_m:
        sq_true = {k: 0.0 for k in keys}
        sq_moved = {k: 0.0 for k in keys}
        n = 0
        for sign in (1.0, -1.0):
            moved = np.empty_like(xy)
            keep = np.zeros(xy.shape[0], bool)
            for w in range(n_w):  # per walk: one interpolation along its path
                rows = np.flatnonzero(g == w)
                sw = s[rows]
                target = sw + sign * d
                ok = (target >= sw[0]) & (target <= sw[-1])
                # positions along the path (np.interp needs increasing s;
                # repeated positions have equal s and interpolate alike)
                moved[rows[ok], 0] = np.interp(target[ok], sw, xy[rows, 0])
                moved[rows[ok], 1] = np.interp(target[ok], sw, xy[rows, 1])
                keep[rows[ok]] = True
            idx = np.flatnonzero(keep)
            if idx.size == 0:
                continue
            f_moved = features_of(predict(moved[idx]))
            gi = g[idx]
            cnt = np.bincount(gi, minlength=n_w)
            for k in keys:
                for store, pred in ((sq_true, f_here[k][idx]), (sq_moved, f_moved[k])):
                    r = f_true[k][idx] - pred
                    mu = np.bincount(gi, weights=r, minlength=n_w) / np.maximum(cnt, 1)
                    store[k] += float(np.sum((r - mu[gi]) ** 2))
            n += idx.size
        out.append({
            "shift_m": float(d),
            "n": int(n),
            "rmse_true_ut": {k: float(np.sqrt(sq_true[k] / n)) if n else None for k in keys},
            "rmse_displaced_ut": {k: float(np.sqrt(sq_moved[k] / n)) if n else None for k in keys},
        })
    return out


def heldout_scores(
    site,
    floor,
    survey_files,
    test_files,
    *,
    kernels=("curl-free", "per-component", "nearest", "constant"),
    seed=0,
    spacing_m=0.25,
    kernel_params=None,
    use_track=True,
    progress=False,
    log=None,
    reference_fields=None,
    heading_from_track=True,
):
    """Fit each kernel on the survey walks and score it on the test walks.

    Parameters
    ----------
    site : Site
    floor : str
    survey_files, test_files : lists of WalkFiles
    kernels : names from :data:`mapping.mapfit.MAP_KERNELS`
    kernel_params : dict kernel -> params, optional
    reference_fields : dict name -> callable ``f(xy (N, 2)) -> (N, 3)``,
        optional; scored like a kernel (e.g. a simulator's true field: the
        error no map can go below, given the processed test walks)
    heading_from_track : bool, survey and test walks with a heading track
        have their constant heading error removed (as a map build does, see
        :func:`mapping.mapbuild.collect_samples`)

    Returns
    -------
    dict (JSON-able): earth_to_plan, survey/test sample counts, test coverage
    (distance of test samples to the nearest survey sample) and, per
    kernel, :func:`residual_scores` plus the fit time and the model summary
    """
    from .floorplan import load_floor_plan

    plan = load_floor_plan(site.plan_path(floor))
    survey = load_walks(survey_files, use_track=use_track, progress=progress, desc="survey walks")
    test = load_walks(test_files, use_track=use_track, progress=progress, desc="test walks")
    angle, align = earth_to_plan_for(site, survey)
    s = collect_samples(survey, plan=plan, earth_to_plan_rad=angle, spacing_m=spacing_m,
                        heading_from_track=heading_from_track)
    t = collect_samples(test, plan=plan, earth_to_plan_rad=angle, spacing_m=spacing_m,
                        heading_from_track=heading_from_track)
    d, _ = cKDTree(s.xy).query(t.xy)
    xmin, ymin, xmax, ymax = plan.bounds
    out = {
        "floor": floor,
        "earth_to_plan_deg": float(np.degrees(angle)),
        "alignment": align,
        "survey": {"walks": len(s.names), "samples": s.n},
        "test": {
            "walks": len(t.names),
            "samples": t.n,
            "coverage_median_m": float(np.median(d)),
            "coverage_p90_m": float(np.quantile(d, 0.9)),
            "within_2m": float(np.mean(d <= 2.0)),
        },
        "heading_from_track": bool(heading_from_track),
        "heading_corrections_deg": {"survey": s.info.get("heading_corrections_deg", {}),
                                    "test": t.info.get("heading_corrections_deg", {})},
        "kernels": {},
    }
    for name, f in (reference_fields or {}).items():
        mean = f(t.xy)
        sc = residual_scores(t.b_ut, mean, groups=t.walk, rotations=t.rotations)
        out.setdefault("references", {})[name] = sc
        if log is not None:
            log(f"  {name:<14s} RMSE x,y,up = " + ", ".join(f"{v:.2f}" for v in sc["rmse_ut"].values())
                + "  features up,h,total = " + ", ".join(f"{v:.2f}" for v in sc["feature_rmse_ut"].values())
                + "  walk mean removed: " + ", ".join(f"{v:.2f}" for v in sc["rmse_walk_mean_removed_ut"].values())
                + "  walk device offset removed: " + ", ".join(f"{v:.2f}" for v in sc["rmse_offset_removed_ut"].values()))
    for k in kernels:
        t0 = time.perf_counter()
        params = (kernel_params or {}).get(k)
        model = fit_samples(s, kernel=k, seed=seed, domain=((xmin, ymin), (xmax, ymax)), kernel_params=params)
        fit_s = time.perf_counter() - t0
        mean, var = model.predict(t.xy)
        sc = residual_scores(t.b_ut, mean, var, getattr(model, "noise_var_", None), groups=t.walk,
                             rotations=t.rotations, offset_var=getattr(model, "between_walk_var_", None))
        near = d <= 2.0
        if near.any():
            sc["covered_within_2m"] = residual_scores(t.b_ut[near], mean[near], var[near], getattr(model, "noise_var_", None))
        sc["fit_s"] = round(fit_s, 3)
        sc["displaced"] = displaced_misfit(t.b_ut, t.xy, t.walk, lambda q: model.predict(q)[0])
        sc["model"] = model.summary()
        out["kernels"][k] = sc
        if log is not None:
            log(f"  {k:<14s} RMSE x,y,up = " + ", ".join(f"{v:.2f}" for v in sc["rmse_ut"].values())
                + "  features up,h,total = " + ", ".join(f"{v:.2f}" for v in sc["feature_rmse_ut"].values())
                + "  within 1 sd = " + ", ".join(f"{100 * v:.1f}%" for v in sc.get("within_1sd", {}).values())
                + f"  ({fit_s:.1f} s)")
            log(f"  {'':<14s} walk device offset removed: RMSE x,y,up = "
                + ", ".join(f"{v:.2f}" for v in sc["rmse_offset_removed_ut"].values())
                + "  features up,h,total = " + ", ".join(f"{v:.2f}" for v in sc["feature_rmse_offset_removed_ut"].values())
                + "  within 1 sd = " + ", ".join(f"{100 * v:.1f}%" for v in sc.get("within_1sd_offset_removed", {}).values()))
    return out


def truth_scores(fmap, field_model, *, height_m=1.0, coverage_limit_m=None):
    """Map against a known field along the floor graph (edge mid-points).

    Parameters
    ----------
    fmap : FieldMap
    field_model : object with ``field(xyz (N, 3)) -> (N, 3)`` plan-frame µT
        (``fingerprint.simulate.FieldModel``)
    height_m : float, sensor height the map stands for
    coverage_limit_m : float or None, only points this close to the survey

    Returns
    -------
    dict: residual scores, plus the RMSE after removing the mean residual
    (the survey devices' average offset, which no survey can separate from
    the field); with a field model that knows its dipoles (``positions_m``,
    ``kinds``), also ``by_steel_clearance``: the RMSE per component in bands
    of distance from the edge mid-point to the nearest dipole of visible
    steel (slab meshes left out), where the field is roughest
    """
    g = fmap.graph
    mid = 0.5 * (g.nodes_xy[g.edges[:, 0]] + g.nodes_xy[g.edges[:, 1]])
    mean, var, cov = fmap.lookup(mid)
    keep = np.isfinite(cov)
    if coverage_limit_m is not None:
        keep &= cov <= coverage_limit_m
    mid, mean, var = mid[keep], mean[keep], var[keep]
    truth = field_model.field(np.column_stack([mid, np.full(mid.shape[0], float(height_m))]))
    sc = residual_scores(truth, mean, var)
    bias = np.mean(truth - mean, axis=0)
    sc["mean_residual_ut"] = {c: float(v) for c, v in zip(COMPONENTS, bias)}
    rr = truth - mean - bias
    sc["rmse_bias_removed_ut"] = {c: float(np.sqrt(np.mean(rr[:, i] ** 2))) for i, c in enumerate(COMPONENTS)}
    pos, kinds = getattr(field_model, "positions_m", None), getattr(field_model, "kinds", None)
    if pos is not None and kinds is not None and len(pos):
        steel = np.char.find(np.asarray(kinds).astype(str), "mesh") < 0
        if steel.any():
            d, _ = cKDTree(np.asarray(pos, float)[steel]).query(
                np.column_stack([mid, np.full(mid.shape[0], float(height_m))]))
            r = truth - mean
            bands = {}
            for lo, hi in STEEL_BANDS_M:
                m = (d >= lo) & (d < hi)
                if m.any():
                    bands[f"{lo:g}-{hi:g} m"] = {
                        "n": int(m.sum()),
                        "rmse_ut": {c: float(np.sqrt(np.mean(r[m, i] ** 2))) for i, c in enumerate(COMPONENTS)}}
            sc["by_steel_clearance"] = bands
    return sc
