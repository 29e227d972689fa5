"""Score field-map models on held-out walks (and, for simulated sites,
against the true field).

:func:`heldout_scores` fits every requested kernel on the same survey
samples and predicts the plan-frame field at the stretch-averaged samples
of the test walks (positions from their checkpoints or track, as for
survey walks), reporting per component (``b_x, b_y, b_up``) and per feature
(``b_up``, horizontal magnitude ``b_h``, total ``b_total``) the RMSE, and
per component the share of residuals within ±1 predicted sd (``sqrt(var +
noise_var_)``, a measurement's sd).
"""

from __future__ import annotations

import time

import numpy as np
from scipy.spatial import cKDTree

from .mapbuild import collect_samples, earth_to_plan_for, fit_samples, load_walks

__all__ = ["features_of", "residual_scores", "heldout_scores", "truth_scores"]

COMPONENTS = ("b_x", "b_y", "b_up")
FEATURES = ("b_up", "b_h", "b_total")


def features_of(b):
    """(N, 3) plan-frame field -> dict of (N,) features b_up, b_h, b_total."""
    b = np.asarray(b, float)
    return {"b_up": b[:, 2], "b_h": np.hypot(b[:, 0], b[:, 1]), "b_total": np.linalg.norm(b, axis=1)}


def residual_scores(b_true, mean, var=None, noise_var=None, *, groups=None):
    """RMSE per component and feature, coverage within ±1 sd.

    Parameters
    ----------
    b_true, mean : (N, 3) float, µT
    var : (N, 3) float or None, map variance
    noise_var : (3,) float or None, added to ``var`` for a measurement's sd
    groups : (N,) walk labels or None; with them also the RMSE after
        removing each walk's mean residual (what a per-walk offset costs)

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
    s = collect_samples(survey, plan=plan, earth_to_plan_rad=angle, spacing_m=spacing_m)
    t = collect_samples(test, plan=plan, earth_to_plan_rad=angle, spacing_m=spacing_m)
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
        "kernels": {},
    }
    for name, f in (reference_fields or {}).items():
        mean = f(t.xy)
        sc = residual_scores(t.b_ut, mean, groups=t.walk)
        out.setdefault("references", {})[name] = sc
        if log is not None:
            log(f"  {name:<14s} RMSE x,y,up = " + ", ".join(f"{v:.2f}" for v in sc["rmse_ut"].values())
                + "  features up,h,total = " + ", ".join(f"{v:.2f}" for v in sc["feature_rmse_ut"].values())
                + "  walk mean removed: " + ", ".join(f"{v:.2f}" for v in sc["rmse_walk_mean_removed_ut"].values()))
    for k in kernels:
        t0 = time.perf_counter()
        params = (kernel_params or {}).get(k)
        model = fit_samples(s, kernel=k, seed=seed, domain=((xmin, ymin), (xmax, ymax)), kernel_params=params)
        fit_s = time.perf_counter() - t0
        mean, var = model.predict(t.xy)
        sc = residual_scores(t.b_ut, mean, var, getattr(model, "noise_var_", None), groups=t.walk)
        near = d <= 2.0
        if near.any():
            sc["covered_within_2m"] = residual_scores(t.b_ut[near], mean[near], var[near], getattr(model, "noise_var_", None))
        sc["fit_s"] = round(fit_s, 3)
        sc["model"] = model.summary()
        out["kernels"][k] = sc
        if log is not None:
            log(f"  {k:<14s} RMSE x,y,up = " + ", ".join(f"{v:.2f}" for v in sc["rmse_ut"].values())
                + "  features up,h,total = " + ", ".join(f"{v:.2f}" for v in sc["feature_rmse_ut"].values())
                + "  within 1 sd = " + ", ".join(f"{100 * v:.0f}%" for v in sc.get("within_1sd", {}).values())
                + f"  ({fit_s:.1f} s)")
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
    the field)
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
    return sc
