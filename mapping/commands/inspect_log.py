"""``lodemap inspect LOG``: what a walk log holds and what the sensor chain
makes of it."""

from __future__ import annotations

import json

import numpy as np

HELP = "summarise a walk log: duration, rates, gaps, |B|, steps, distance, calibration verdict"


def add_arguments(parser):
    parser.add_argument("log", metavar="LOG", help="walk log (*.log.csv or *.log.csv.gz)")
    parser.add_argument("--calibration", metavar="CALIBRATION.json",
                        help="apply this calibration (lodemap calibrate) instead of the log's own")
    parser.add_argument("--step-constant", type=float, metavar="K",
                        help="Weinberg step constant (default: the built-in value)")
    parser.add_argument("--on-duplicate", choices=["error", "keep-first"], default="error",
                        help="policy for repeated time stamps (default: error)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def _stats(x):
    return {"mean": float(np.mean(x)), "sd": float(np.std(x)), "min": float(np.min(x)), "max": float(np.max(x))}


def summarise(path, *, calibration=None, step_constant=None, on_duplicate="error"):
    """Summary dict of a log (see the command's output)."""
    from fingerprint.calibration import fit_calibration
    from fingerprint.logio import validate_walk_log
    from fingerprint.pipeline import process_walk, up_directions

    rep = validate_walk_log(path, on_duplicate=on_duplicate)
    log = rep.log
    dt = np.diff(log.t)
    out = {
        "path": str(path),
        "platform": log.platform,
        "samples": log.n,
        "duration_s": log.duration_s,
        "rate_hz": float(1.0 / np.median(dt)) if dt.size else None,
        "max_spacing_s": float(dt.max()) if dt.size else None,
        "gaps_over_1s": [{"after_t_s": float(g[1]), "length_s": float(g[2] - g[1])} for g in rep.gaps],
        "warnings": rep.warnings,
        "magnetometer_calibrated": log.magnetometer_calibrated,
    }
    ok = np.isfinite(log.mag).all(axis=1)
    out["b_ut"] = _stats(np.linalg.norm(log.mag[ok], axis=1)) if ok.any() else None
    if log.mag_raw is not None:
        ok = np.isfinite(log.mag_raw).all(axis=1)
        out["b_raw_ut"] = _stats(np.linalg.norm(log.mag_raw[ok], axis=1)) if ok.any() else None
    walk = process_walk(log, calibration=calibration, step_constant=step_constant)
    m = walk.motion
    out["motion"] = m.kind
    out["increments"] = m.n
    out["distance_m"] = float(m.length_m.sum())
    if m.kind == "steps":
        out["steps"] = m.n
        out["cadence_hz"] = float(m.n / log.duration_s) if log.duration_s > 0 else None
        out["step_constant"] = walk.meta.get("step_constant")
    out["mag_noise_ut"] = walk.mag_noise_ut
    out["calibration"] = walk.meta.get("calibration")
    verdict = walk.meta.get("calibration_verdict")
    if verdict is not None:
        src = log.mag
        if calibration is not None:
            src = calibration.apply(log.mag_raw if calibration.source == "mag_raw" else log.mag)
        ok = np.isfinite(src).all(axis=1)
        mag = src[ok]
        up = up_directions(log.t, log.acc)
        try:
            _, fit = fit_calibration(mag, source="mag", up_device=None if up is None else up[ok])
            verdict = dict(verdict, residual_fit=fit["method"], residual_offset_ut=fit["offset_ut"],
                           spread_before_ut=fit["b_spread_before_ut"], spread_after_ut=fit["b_spread_after_ut"])
        except Exception as err:  # a residual check only; the verdict stands without it
            verdict = dict(verdict, residual_fit=f"not possible: {err}")
    out["calibration_verdict"] = verdict
    out["heading_reference"] = walk.meta.get("attitude", {}).get("heading_reference")
    return out


def run(args):
    from fingerprint.calibration import Calibration

    cal = Calibration.from_json(args.calibration) if args.calibration else None
    s = summarise(args.log, calibration=cal, step_constant=args.step_constant, on_duplicate=args.on_duplicate)
    if args.json:
        print(json.dumps(s, indent=2, default=float))
        return 0
    print(f"{s['path']}")
    print(f"  platform        {s['platform']}  (magnetometer_calibrated: {'yes' if s['magnetometer_calibrated'] else 'no'})")
    print(f"  samples         {s['samples']} over {s['duration_s']:.1f} s, {s['rate_hz']:.1f} Hz median, "
          f"largest spacing {s['max_spacing_s']:.3f} s")
    if s["gaps_over_1s"]:
        gaps = s["gaps_over_1s"]
        print(f"  gaps over 1 s   {len(gaps)}, {sum(g['length_s'] for g in gaps):.1f} s in all")
        for g in gaps[:10]:
            print(f"  gap             {g['length_s']:.2f} s after t = {g['after_t_s']:.2f} s")
        if len(gaps) > 10:
            print(f"  ...             {len(gaps) - 10} more (see --json)")
    else:
        print("  gaps over 1 s   none")
    for w in s["warnings"]:
        if not w.startswith("gap"):
            print(f"  warning         {w}")
    if s["b_ut"]:
        b = s["b_ut"]
        print(f"  |B|             mean {b['mean']:.1f} µT, sd {b['sd']:.1f}, range {b['min']:.1f}-{b['max']:.1f}")
    if s.get("b_raw_ut"):
        b = s["b_raw_ut"]
        print(f"  |B| raw         mean {b['mean']:.1f} µT, sd {b['sd']:.1f}, range {b['min']:.1f}-{b['max']:.1f}")
    print(f"  mag noise       {s['mag_noise_ut']:.2f} µT per sample (1 sd)")
    if s["motion"] == "steps":
        cad = s["cadence_hz"] or 0.0
        print(f"  steps           {s['steps']} ({cad:.2f} per s), distance {s['distance_m']:.1f} m "
              f"(Weinberg K = {s['step_constant']:.3f})")
    else:
        print(f"  odometry        {s['increments']} increments, distance {s['distance_m']:.1f} m")
    cal = s["calibration"] or {}
    print(f"  calibration     {cal.get('method', '?')} ({cal.get('source', '?')})" +
          (f": {cal['message']}" if cal.get("message") else ""))
    v = s["calibration_verdict"]
    if v:
        print(f"  verdict         {v['verdict']}")
        if "residual_offset_ut" in v:
            o = v["residual_offset_ut"]
            print(f"  residual fit    {v['residual_fit']}: offset ({o[0]:.1f}, {o[1]:.1f}, {o[2]:.1f}) µT, "
                  f"|B| sd {v['spread_before_ut']:.2f} -> {v['spread_after_ut']:.2f} µT")
    print(f"  heading         {s['heading_reference']}")
    return 0
