"""Writes the malformed-log corpus beside this file (run once; the files are
committed). Each case is a small hand-made edit of one valid log; the
expected error, line and column of each are listed in
tests/test_malformed_logs.py, worked out by hand from the edit below."""

import gzip
from pathlib import Path

HERE = Path(__file__).parent
META = ["# platform: handheld", "# magnetometer_calibrated: yes"]
HEADER = "t,ax,ay,az,gx,gy,gz,mx,my,mz"


def rows(n=60, *, mag_scale=1.0, acc_scale=1.0, gyro_scale=1.0, field=(20.0, 5.0, -40.0)):
    out = []
    for i in range(n):
        t = 0.02 * i
        ax, ay, az = 0.1 * acc_scale, 0.2 * acc_scale, 9.8 * acc_scale
        gx, gy, gz = 0.01 * gyro_scale, -0.01 * gyro_scale, 1.0 * gyro_scale
        mx, my, mz = (field[0] + 0.1 * (i % 5)) * mag_scale, field[1] * mag_scale, field[2] * mag_scale
        out.append(",".join(f"{v:.6g}" for v in (t, ax, ay, az, gx, gy, gz, mx, my, mz)))
    return out


def write(name, lines, *, raw=None):
    p = HERE / name
    if raw is not None:
        p.write_bytes(raw)
    else:
        p.write_text("\n".join(lines) + "\n", encoding="utf-8")


def edit(line_no, fn, base=None):
    """Copy of the valid file with 1-based line ``line_no`` replaced by fn(old)."""
    lines = list(base or (META + [HEADER] + rows()))
    lines[line_no - 1] = fn(lines[line_no - 1])
    return lines


def cell(line, col, value):
    c = line.split(",")
    c[col - 1] = value
    return ",".join(c)


def main():
    base = META + [HEADER] + rows()
    write("valid.log.csv", base)
    write("missing_column.log.csv", META + ["t,ax,ay,az,gx,gy,gz,mx,my"] + [",".join(r.split(",")[:9]) for r in rows()])
    write("non_numeric.log.csv", edit(10, lambda s: cell(s, 5, "abc")))
    write("nan_cell.log.csv", edit(12, lambda s: cell(s, 8, "nan")))
    write("inf_cell.log.csv", edit(15, lambda s: cell(s, 2, "inf")))
    write("time_backwards.log.csv", edit(20, lambda s: cell(s, 1, "0.01")))
    write("duplicate_time.log.csv", edit(25, lambda s: cell(s, 1, base[23].split(",")[0])))
    write("empty_file.log.csv", None, raw=b"")
    write("header_only.log.csv", META + [HEADER])
    write("mag_nanotesla.log.csv", META + [HEADER] + rows(mag_scale=1000.0))
    write("mag_milligauss.log.csv", META + [HEADER] + rows(mag_scale=10.0, field=(18.0, 3.0, -52.0)))
    write("mag_tesla.log.csv", META + [HEADER] + rows(mag_scale=1e-6))
    write("acc_in_g.log.csv", META + [HEADER] + rows(acc_scale=1 / 9.80665))
    write("gyro_in_deg.log.csv", META + [HEADER] + rows(gyro_scale=57.29578))
    write("ragged_short.log.csv", edit(30, lambda s: ",".join(s.split(",")[:9])))
    write("ragged_long.log.csv", edit(31, lambda s: s + ",1.0"))
    write("meta_no_colon.log.csv", ["# platform: handheld", "# just a note"] + [HEADER] + rows())
    write("meta_bad_platform.log.csv", ["# platform: drone", "# magnetometer_calibrated: yes"] + [HEADER] + rows())
    write("meta_bad_rate.log.csv", META + ["# rate_hz: fast"] + [HEADER] + rows())
    write("meta_conflict.log.csv", META + ["# platform: robot"] + [HEADER] + rows())
    write("duplicate_column.log.csv", META + ["t,ax,ay,az,gx,gy,gz,mx,my,mz,ax"] + [r + ",0" for r in rows()])
    write("empty_time_cell.log.csv", edit(40, lambda s: cell(s, 1, "")))
    write("partial_raw_columns.log.csv", META + [HEADER + ",mx_raw"] + [r + ",1" for r in rows()])
    write("no_header.log.csv", META)
    text = ("\n".join(base) + "\n").encode()
    lines = text.split(b"\n")
    lines[4] = lines[4].replace(b"9.8", b"9\xff8")
    write("not_utf8.log.csv", None, raw=b"\n".join(lines))
    write("truncated.log.csv.gz", None, raw=gzip.compress(text, mtime=0)[:200])
    write("comment_in_body.log.csv", edit(33, lambda s: "# note"))
    write("time_in_ms.log.csv", META + [HEADER] + [cell(r, 1, f"{float(r.split(',')[0]) * 1000:.6g}") for r in rows()])
    # valid but awkward: a 2.5 s gap (reported, not fatal) and empty cells
    g = META + [HEADER] + rows()
    g[40:] = [cell(r, 1, f"{float(r.split(',')[0]) + 2.5:.6g}") for r in g[40:]]
    write("gap_valid.log.csv", g)
    write("empty_cells_valid.log.csv", edit(20, lambda s: cell(cell(cell(s, 8, ""), 9, ""), 10, "")))


if __name__ == "__main__":
    main()
