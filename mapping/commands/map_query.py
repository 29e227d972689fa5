"""``lodemap map-query``: the mapped field at given points."""

from __future__ import annotations

import csv
import io

import numpy as np

from fingerprint.errors import FormatError

HELP = "mapped field mean and sd at the points of a CSV with columns x,y"

COLUMNS = ("x", "y", "b_x", "b_y", "b_up", "b_total", "sd_x", "sd_y", "sd_up")


def add_arguments(parser):
    parser.description = (
        "Look up the mapped field at plan points. POINTS.csv has a header with columns x and y "
        "(metres, plan frame; other columns are ignored). FIELD.csv gets columns " + ",".join(COLUMNS)
        + ": mean field along plan x, y and up, its magnitude, and the map's standard deviation "
        "(µT; map uncertainty including the between-walk term, sensor noise excluded). Points "
        "outside the map raster get empty cells."
    )
    parser.add_argument("map_path", metavar="FLOOR.map", help="map file written by 'lodemap build-map'")
    parser.add_argument("points", metavar="POINTS.csv", help="CSV with columns x,y")
    parser.add_argument("--out", required=True, metavar="FIELD.csv", help="output CSV (written atomically)")


def read_points(path):
    """(N, 2) float from a CSV with header columns x and y; ``#`` comment
    lines and blank lines are skipped; FormatError with the file's own line
    and column on a bad cell."""
    from fingerprint.logio import read_text

    text = read_text(path)  # not UTF-8: FormatError with line and column
    rows = []  # (line number in the file, cells)
    for number, line in enumerate(io.StringIO(text, newline=""), start=1):
        if line.startswith("#") or not line.strip():
            continue
        rows.append((number, next(csv.reader([line]))))
    if not rows:
        raise FormatError("empty points file; expected a header with columns x,y", path=path)
    head_line, header = rows[0][0], [h.strip() for h in rows[0][1]]
    for name in ("x", "y"):
        if header.count(name) > 1:
            raise FormatError(f"points file has column {name!r} twice; expected one x and one y", path=path,
                              line=head_line)
    try:
        ix, iy = header.index("x"), header.index("y")
    except ValueError:
        raise FormatError(f"points file needs columns x and y; header has {', '.join(header)}", path=path,
                          line=head_line) from None
    if len(rows) < 2:
        raise FormatError("no points after the header; expected rows of x,y", path=path, line=head_line + 1)
    out = np.empty((len(rows) - 1, 2))
    for n, (number, row) in enumerate(rows[1:]):
        for j, col in enumerate((ix, iy)):
            cell = row[col] if col < len(row) else ""
            try:
                if "_" in cell:  # Python's float() reads 1_3 as 13; a CSV number has no underscore
                    raise ValueError(cell)
                out[n, j] = float(cell)
            except ValueError:
                raise FormatError(f"expected a number in column {header[col]!r}, got {cell!r}", path=path,
                                  line=number, column=col + 1) from None
            if not np.isfinite(out[n, j]):
                raise FormatError(f"expected a finite number in column {header[col]!r}, got {cell!r}", path=path,
                                  line=number, column=col + 1)
    return out


def query(fmap, xy):
    """Rows for :data:`COLUMNS`: (N, 9) float, NaN outside the raster."""
    mean, var, cov = fmap.lookup(xy)
    out = np.column_stack([xy, mean, np.linalg.norm(mean, axis=1), np.sqrt(var)])
    out[~np.isfinite(cov), 2:] = np.nan
    return out


def run(args):
    from fingerprint._atomic import check_writable, write_text_atomic
    from fingerprint.mapfile import load_map

    check_writable(args.out, inputs=[args.map_path, args.points])
    fmap = load_map(args.map_path)
    xy = read_points(args.points)
    rows = query(fmap, xy)
    buf = io.StringIO()
    buf.write(",".join(COLUMNS) + "\n")
    for r in rows:
        buf.write(",".join("" if not np.isfinite(v) else f"{v:.6g}" for v in r) + "\n")
    write_text_atomic(args.out, buf.getvalue())
    outside = int(np.sum(~np.isfinite(rows[:, 2])))
    print(f"wrote {args.out}: {len(rows)} points" + (f", {outside} outside the map raster" if outside else ""))
    return 0
