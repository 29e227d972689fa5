"""``lodemap calibrate LOG --out calibration.json``: hard- and soft-iron
magnetometer calibration from a log."""

from __future__ import annotations

HELP = "fit hard- and soft-iron magnetometer calibration from a log, write calibration.json"


def add_arguments(parser):
    parser.add_argument("log", metavar="LOG", help="walk or calibration log (*.log.csv or *.log.csv.gz)")
    parser.add_argument("--out", required=True, metavar="calibration.json", help="file to write (atomically)")
    parser.add_argument("--source", choices=["auto", "mag", "mag_raw"], default="auto",
                        help="columns to calibrate: mx,my,mz or mx_raw,my_raw,mz_raw "
                             "(default auto: the raw columns when the log has them)")
    parser.add_argument("--field-up-ut", type=float, metavar="BUP",
                        help="expected vertical field in µT (up positive, so negative in the northern "
                             "hemisphere); fixes the vertical offset when the log only turns about the vertical")
    parser.add_argument("--field-total-ut", type=float, metavar="B",
                        help="expected total field in µT; when the log only turns about the vertical and "
                             "--field-up-ut is not given, the vertical offset is set so that the median |B| "
                             "matches it (vertical field taken as downwards unless --field-up-sign +1)")
    parser.add_argument("--field-up-sign", type=float, choices=[-1.0, 1.0], default=-1.0,
                        help="sign of the vertical field with --field-total-ut: -1 north of the magnetic "
                             "equator (default), +1 south")
    parser.add_argument("--field-ut", type=float, metavar="B",
                        help="true field magnitude at the site in µT (sets the matrix scale); "
                             "default keeps det(matrix) = 1")


def run(args):
    import numpy as np

    from fingerprint._atomic import check_writable
    from fingerprint.calibration import fit_calibration
    from fingerprint.errors import ConfigError, DataError
    from fingerprint.logio import read_walk_log
    from fingerprint.pipeline import up_directions

    check_writable(args.out, inputs=[args.log])
    log = read_walk_log(args.log)
    src = args.source
    if src == "auto":
        src = "mag_raw" if log.mag_raw is not None else "mag"
    data = log.mag_raw if src == "mag_raw" else log.mag
    if data is None:
        raise DataError("the log has no mx_raw,my_raw,mz_raw columns", path=args.log)
    if args.field_ut is not None and not (np.isfinite(args.field_ut) and args.field_ut > 0):
        raise ConfigError(f"--field-ut must be a positive number of µT, got {args.field_ut}")
    up = up_directions(log.t, log.acc) if log.n >= 16 else None
    try:
        cal, rep = fit_calibration(data, field_ut=args.field_ut, source=src, up_device=up,
                                   field_up_ut=args.field_up_ut, field_total_ut=args.field_total_ut,
                                   field_up_sign=args.field_up_sign)
    except DataError as err:
        if getattr(err, "path", None):
            raise
        raise DataError(str(err), path=args.log) from None
    cal.meta["log"] = str(args.log)
    cal.save(args.out)
    o = rep["offset_ut"]
    cov = rep["coverage"]
    print(f"{args.log}: {rep['n_samples']} samples of {src}")
    print(f"  method          {rep['method']}: {rep['message']}")
    print(f"  offset          ({o[0]:.2f}, {o[1]:.2f}, {o[2]:.2f}) µT")
    m = cal.matrix
    print("  matrix          " + "; ".join(" ".join(f"{v:.4f}" for v in row) for row in m))
    print(f"  coverage        {cov['sphere_fraction']:.0%} of sphere cells; direction spread "
          + " / ".join(f"{v:.3f}" for v in cov["spread"]))
    cond = rep.get("condition_number")
    print(f"  conditioning    {'n/a' if cond is None else format(cond, '.3g')} "
          "(condition number of the fit's scatter matrix)")
    print(f"  |B| spread      {rep['b_spread_before_ut']:.2f} µT before, {rep['b_spread_after_ut']:.2f} µT after "
          f"(mean {rep['b_mean_before_ut']:.1f} -> {rep['b_mean_after_ut']:.1f} µT)")
    print(f"  wrote           {args.out}")
    return 0
