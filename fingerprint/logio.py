"""Read and write walk logs, checkpoints and tracks (formats: README, "Input files").

Reading is strict: every problem raises :class:`~fingerprint.errors.FormatError`
(the file does not follow the format) or :class:`~fingerprint.errors.DataError`
(readable but implausible, e.g. units), naming the file, the 1-based line and
the 1-based column, what was expected and what was received.

Speed: the body of a log is parsed in one call of pandas' C reader
(:func:`pandas.read_csv`, engine "c", empty cells as NaN) after a
vectorised check that every line has the header's number of fields. Only
when that fails, or when the parsed values break a rule, is the body scanned
again line by line in Python to find and report the exact line and column.

Policies
--------
- Empty cell: "no sample from that sensor at this time" -> NaN. The ``t``
  cell may never be empty. A literal ``nan``/``inf`` text is an error.
- Time must strictly increase. A time going back is always an error. Exactly
  repeated time stamps follow ``on_duplicate``: ``"error"`` (default) or
  ``"keep-first"`` (later rows with the same time are dropped).
- Gaps longer than 1 s are not an error; :func:`find_gaps` (and
  :func:`validate_walk_log`) report them.
- Unit sanity (on at most 50 000 evenly spaced rows): median ``|B|`` of
  ``mx,my,mz`` outside 5-500 µT is an error that suggests nT, mG, G or T;
  median ``|a|`` outside 4-20 m/s² is an error (near 1 suggests g units;
  the lower bound is low because real brisk walks reach a median of 6.7,
  e.g. ``real_data/siteA/B1/walk_047``); a 99th-percentile gyro rate above
  40 rad/s suggests deg/s. The raw magnetometer (hard-iron offset still in)
  is allowed 5-3000 µT.
- Time unit: a median sample spacing of 1 s or more is an error that
  suggests ms, µs or ns.
- Metadata: ``# key: value`` lines before the header. A ``#`` line without a
  colon, an empty key, a key given twice with different values, or a bad
  value of a known key (``platform``, ``magnetometer_calibrated``,
  ``rate_hz``) is an error. Unknown keys are kept and otherwise ignored.
- Columns: the required ones must be present once each; optional groups
  (``mx_raw,my_raw,mz_raw`` and ``odom_dx,odom_dy,odom_dyaw``) must be
  complete or absent; unknown columns are ignored.

Writers go through :mod:`fingerprint._atomic`; a path ending in ``.gz`` is
gzip-compressed (with a fixed time stamp, so output is reproducible).
"""

from __future__ import annotations

import csv
import gzip
import io
import zlib
import math
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._atomic import atomic_write
from .errors import DataError, FormatError
from .records import Checkpoints, Track, WalkLog

__all__ = [
    "read_text",
    "read_walk_log",
    "read_checkpoints",
    "read_track",
    "write_walk_log",
    "write_checkpoints",
    "write_track",
    "find_gaps",
    "validate_walk_log",
    "LogReport",
    "REQUIRED_COLUMNS",
    "check_checkpoint_clock",
    "GAP_THRESHOLD_S",
]

#: Columns every walk log must have, in the order they are stored.
REQUIRED_COLUMNS = ("t", "ax", "ay", "az", "gx", "gy", "gz", "mx", "my", "mz")
_RAW = ("mx_raw", "my_raw", "mz_raw")
_ODOM = ("odom_dx", "odom_dy", "odom_dyaw")
#: Gaps in time longer than this are reported by :func:`find_gaps`.
GAP_THRESHOLD_S = 1.0

_MAG_RANGE_UT = (5.0, 500.0)
_MAG_RAW_RANGE_UT = (5.0, 3000.0)
_ACC_RANGE = (4.0, 20.0)  # real walks reach a median of 6.7 m/s² (short, brisk)
_GYRO_MAX_RAD_S = 40.0
_KNOWN_PLATFORMS = ("handheld", "robot")
_BOOL_WORDS = {"yes", "no", "true", "false", "1", "0"}


# --------------------------------------------------------------------------
# low-level text handling
# --------------------------------------------------------------------------
def read_text(path):
    """The text of a UTF-8 file (gzip-compressed when its name ends in
    ``.gz``); a byte that is not UTF-8 or a truncated gzip stream becomes a
    FormatError naming the file, line and column."""
    return _read_text(path)


def _end_of(data):
    """Line and column just after the bytes ``data``."""
    return data.count(b"\n") + 1, len(data) - (data.rfind(b"\n") + 1) + 1


def _gunzip(raw, path):
    """Decompress every member of a gzip file (``cat a.gz b.gz`` is one
    valid file, as ``gzip -d`` reads it); zero bytes after the last member
    (padding) are allowed, anything else after it is an error."""
    data = b""
    rest = raw
    while True:
        d = zlib.decompressobj(wbits=31)
        try:
            data += d.decompress(rest)
            data += d.flush()
        except zlib.error as err:
            line, col = _end_of(data)
            raise FormatError(f"expected a gzip file, the data are corrupt: {err}", path=path, line=line,
                              column=col) from err
        if not d.eof:
            line, col = _end_of(data)
            raise FormatError("the gzip file ends early (truncated); expected its end-of-stream marker",
                              path=path, line=line, column=col)
        rest = d.unused_data
        if not rest.strip(b"\0"):
            return data
        if rest[:2] != b"\x1f\x8b":
            line, col = _end_of(data)
            raise FormatError(f"expected the end of the file or another gzip member after the compressed data, "
                              f"got {len(rest)} other bytes", path=path, line=line, column=col)


def _read_text(path):
    path = Path(path)
    if path.name.endswith(".gz"):
        raw = _gunzip(path.read_bytes(), path)
    else:
        raw = path.read_bytes()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = raw[: err.start].count(b"\n") + 1
        col = err.start - (raw.rfind(b"\n", 0, err.start) + 1) + 1
        raise FormatError(
            f"expected UTF-8 text, got byte 0x{raw[err.start]:02x}", path=path, line=line, column=col
        ) from err
    return text


def _split_head(text, path, *, allow_meta=True, meta_lines=None):
    """Split into (meta dict, header names, header line number, body text,
    first body line number); ``meta_lines``, a dict, receives the line of
    each metadata key."""
    meta = {}
    meta_lines = {} if meta_lines is None else meta_lines
    pos = 0
    lineno = 0
    n = len(text)
    while pos < n:
        end = text.find("\n", pos)
        if end < 0:
            end = n
        line = text[pos:end].rstrip("\r")
        lineno += 1
        nxt = end + 1
        if not line.strip():
            pos = nxt
            continue
        if line.lstrip().startswith("#"):
            if not allow_meta:
                pos = nxt
                continue
            body = line.lstrip()[1:]
            if ":" not in body:
                raise FormatError(
                    f"expected a metadata line '# key: value', got {line!r}",
                    path=path,
                    line=lineno,
                    column=1,
                )
            key, value = body.split(":", 1)
            key, value = key.strip(), value.strip()
            if not key:
                raise FormatError(
                    f"expected a metadata key before ':', got {line!r}", path=path, line=lineno, column=1
                )
            if key in meta and meta[key] != value:
                raise FormatError(
                    f"metadata key {key!r} given twice with different values "
                    f"({meta[key]!r}, then {value!r})",
                    path=path,
                    line=lineno,
                    column=1,
                )
            meta[key] = value
            meta_lines.setdefault(key, lineno)
            pos = nxt
            continue
        names = [c.strip() for c in next(csv.reader([line]))]  # quoted names too
        return meta, names, lineno, text[min(nxt, n):], lineno + 1
    if lineno == 0:
        raise FormatError("the file is empty; expected a header row", path=path, line=1, column=1)
    raise FormatError(
        "no header row; expected a CSV header such as 't,ax,ay,...'", path=path, line=lineno, column=1
    )


def _column_index(names, path, header_line, required, optional_groups=()):
    seen = {}
    for i, name in enumerate(names):
        if name == "":
            raise FormatError(
                "empty column name in the header", path=path, line=header_line, column=i + 1
            )
        if name in seen:
            raise FormatError(
                f"column {name!r} appears twice in the header (columns {seen[name] + 1} and {i + 1})",
                path=path,
                line=header_line,
                column=i + 1,
            )
        seen[name] = i
    missing = [c for c in required if c not in seen]
    if missing:
        raise FormatError(
            f"missing required column(s) {', '.join(missing)}, not among the header's {len(names)} "
            f"(the column given is one past its end); expected at least {','.join(required)}, "
            f"got {','.join(names)}",
            path=path,
            line=header_line,
            column=len(names) + 1,
        )
    for group in optional_groups:
        have = [c for c in group if c in seen]
        if have and len(have) != len(group):
            lack = [c for c in group if c not in seen]
            raise FormatError(
                f"optional columns {','.join(group)} must come together; "
                f"got {','.join(have)} without {','.join(lack)}",
                path=path,
                line=header_line,
                column=seen[have[0]] + 1,
            )
    return seen


def _fast_parse(body, ncol, usecols=None):
    """Parse a numeric body with a C parser; None if it cannot.

    The layout is checked first, vectorised on the bytes: every line must
    have exactly ``ncol`` fields (so two ragged rows can never cancel out).
    The values are then parsed by pandas' C reader (about 4x faster than
    numpy's text parser here), with only an empty cell read as NaN: literal
    ``nan`` text, quotes, blank lines and anything else it does not parse as
    a plain number send the body to the exact scan. Without pandas,
    numpy's parser is used (no empty cells on that path).

    With ``usecols`` (column indices) only those columns are parsed (any
    text, in any script, may stand in the others, but no quoted comma or
    line break: that body goes to the exact scan); the others are NaN.

    Returns (R, ncol) float, NaN exactly where a cell is empty, or None.
    """
    if "\r" in body:
        body = body.replace("\r", "")
    body = body.rstrip("\n")
    if not body or body.isspace():
        return np.empty((0, ncol))
    try:
        # UTF-8 bytes 44 and 10 are always a comma and a line end
        raw = body.encode("ascii" if usecols is None else "utf-8")
    except UnicodeEncodeError:
        return None
    u = np.frombuffer(raw, dtype=np.uint8)
    sep = np.flatnonzero((u == 44) | (u == 10))
    is_nl = u[sep] == 10
    nrows = int(is_nl.sum()) + 1
    if sep.size != nrows * ncol - 1 or not is_nl[ncol - 1 :: ncol].all():
        return None
    try:
        import pandas as pd
    except ImportError:  # pragma: no cover - pandas is a dependency
        return _numpy_parse(body, ncol, nrows) if usecols is None else None
    cols = list(range(ncol)) if usecols is None else sorted(usecols)
    try:
        arr = pd.read_csv(
            io.BytesIO(raw), header=None, names=list(range(ncol)), usecols=cols,
            dtype={c: np.float64 for c in cols}, engine="c", encoding="utf-8",
            na_filter=True, keep_default_na=False, na_values=[""], quoting=csv.QUOTE_NONE,
            skip_blank_lines=False, low_memory=False,
        )[cols].to_numpy()
    except (ValueError, OverflowError, pd.errors.ParserError):
        return None
    if arr.shape != (nrows, len(cols)):
        return None
    if usecols is None:
        return arr
    out = np.full((nrows, ncol), np.nan)
    out[:, cols] = arr
    return out


def _numpy_parse(body, ncol, nrows):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            arr = np.fromstring(body.replace("\n", ","), dtype=float, sep=",")
    except (ValueError, DeprecationWarning):
        return None
    if arr.size != nrows * ncol:
        return None
    return arr.reshape(nrows, ncol)


_NOT_PLAIN = re.compile(r"[^0-9eE+\-.,\n\r ]")


def _fast_parse_with_empty(body, ncol):
    """Fast path for bodies with empty cells (sensors at different rates):
    when the text holds nothing but numbers (so no literal nan/inf), each
    empty cell is filled with ``nan`` by plain string replacement and the
    result parsed by numpy; every NaN then is an empty cell (used only
    without pandas)."""
    if _NOT_PLAIN.search(body):
        return None
    b = body.replace("\r", "").rstrip("\n")
    b = b.replace(",,", ",nan,").replace(",,", ",nan,")  # twice: ",,," overlaps
    b = b.replace("\n,", "\nnan,").replace(",\n", ",nan\n")
    if b.startswith(","):
        b = "nan" + b
    if b.endswith(","):
        b = b + "nan"
    nrows = b.count("\n") + 1
    return _numpy_parse(b, ncol, nrows)


def _number(s):
    """``float(s)`` for a plain decimal number or a non-finite word; other
    text that Python's ``float`` would still read (``2_0``, digits of other
    scripts) raises ValueError. (On ASCII text without ``_``, ``float``
    reads exactly the plain numbers and the non-finite words.)"""
    if "_" in s or not s.isascii():
        raise ValueError(s)
    return float(s)


def _records(body, first_line):
    """(first line number, text, cells) of each CSV record of ``body``:
    one per line, or through the csv module when something is quoted (a
    quoted cell may hold a comma or a line break; RFC 4180)."""
    if '"' not in body:
        for k, line in enumerate(body.split("\n")):
            line = line.rstrip("\r")
            yield first_line + k, line, line.split(",")
        return
    reader = csv.reader(io.StringIO(body))
    done = 0  # physical lines read so far
    for cells in reader:
        start, done = first_line + done, reader.line_num
        yield start, ",".join(cells), cells


def _slow_parse(body, first_line, ncol, path, *, allow_empty_cols, names, skip_cols=None):
    """Exact line-by-line scan: returns (values (R, ncol), line numbers (R,)).

    Empty cells become NaN in the columns of ``allow_empty_cols``; anything
    else that is not a finite number raises FormatError with line/column.
    Cells may be quoted. Columns flagged in ``skip_cols`` (unknown to the
    format) are not read: NaN whatever they hold.
    """
    skip = [False] * ncol if skip_cols is None else list(skip_cols)
    rows = []
    linenos = []
    for lineno, line, cells in _records(body, first_line):
        if not line.strip():
            continue
        if line.lstrip().startswith("#") and len(cells) != ncol:
            raise FormatError(
                "expected a data row; '#' metadata lines must come before the header",
                path=path,
                line=lineno,
                column=1,
            )
        if len(cells) != ncol:
            col = min(len(cells), ncol) + 1 if len(cells) < ncol else ncol + 1
            raise FormatError(
                f"expected {ncol} comma-separated fields as in the header, got {len(cells)}",
                path=path,
                line=lineno,
                column=col,
            )
        vals = []
        for j, cell in enumerate(cells):
            s = cell.strip()
            if skip[j]:
                vals.append(math.nan)
                continue
            if s == "":
                if allow_empty_cols[j]:
                    vals.append(math.nan)
                    continue
                raise FormatError(
                    f"empty cell in column {names[j]!r}; expected a number",
                    path=path,
                    line=lineno,
                    column=j + 1,
                )
            try:
                v = _number(s)
            except ValueError:
                raise FormatError(
                    f"expected a number in column {names[j]!r}, got {s!r}",
                    path=path,
                    line=lineno,
                    column=j + 1,
                ) from None
            if not math.isfinite(v):
                raise FormatError(
                    f"expected a finite number in column {names[j]!r}, got {s!r} "
                    "(leave the cell empty for a missing sample)",
                    path=path,
                    line=lineno,
                    column=j + 1,
                )
            vals.append(v)
        rows.append(vals)
        linenos.append(lineno)
    if not rows:
        return np.empty((0, ncol)), np.empty(0, dtype=np.int64)
    return np.asarray(rows, dtype=float), np.asarray(linenos, dtype=np.int64)


def _parse_numeric(body, first_line, names, path, *, allow_empty_cols, skip_cols=None):
    """Fast path first; on any failure or non-finite value, the exact scan
    (which does not read the columns flagged in ``skip_cols``).

    Returns (values (R, ncol), line numbers (R,) or None when every body
    line is a data line so that line = first_line + row).
    """
    ncol = len(names)
    arr = _fast_parse(body, ncol)
    if arr is None and skip_cols is not None and any(skip_cols):
        # a column the format does not know holds text: parse the others
        arr = _fast_parse(body, ncol, usecols=[j for j in range(ncol) if not skip_cols[j]])
    if arr is not None and not np.isinf(arr).any():
        # the layout check guarantees one data row per body line; NaN is an
        # empty cell (literal nan text does not parse on the fast path)
        miss = np.isnan(arr)
        if not miss.any():
            return arr, None
        bad_cols = ~np.asarray(allow_empty_cols, dtype=bool)
        if not miss[:, bad_cols].any():
            return arr, None
    elif arr is None:
        try:
            import pandas  # noqa: F401
        except ImportError:  # pragma: no cover - numpy fallback for empty cells
            arr = _fast_parse_with_empty(body, ncol)
            if arr is not None:
                miss = np.isnan(arr)
                bad_cols = ~np.asarray(allow_empty_cols, dtype=bool)
                if not miss[:, bad_cols].any() and np.isfinite(arr[~miss]).all():
                    return arr, None
    return _slow_parse(body, first_line, ncol, path, allow_empty_cols=allow_empty_cols, names=names,
                       skip_cols=skip_cols)


def _line_of(row, linenos, first_line):
    return int(linenos[row]) if linenos is not None else first_line + int(row)


def _check_time(t, linenos, first_line, path, col, *, strict=True, on_duplicate="error", hint=True):
    """Return a keep-mask (duplicates dropped under keep-first); ``hint``:
    name the reader's ``on_duplicate`` option in the error."""
    keep = np.ones(t.shape[0], dtype=bool)
    if t.shape[0] < 2:
        return keep
    dt = np.diff(t)
    back = np.flatnonzero(dt < 0)
    if back.size:
        r = back[0] + 1
        raise FormatError(
            f"time goes back: expected t > {t[r - 1]:.6g} (previous row), got {t[r]:.6g}",
            path=path,
            line=_line_of(r, linenos, first_line),
            column=col,
        )
    if strict:
        dup = np.flatnonzero(dt == 0)
        if dup.size:
            if on_duplicate == "keep-first":
                keep[dup + 1] = False
            else:
                r = dup[0] + 1
                raise FormatError(
                    f"duplicate time stamp {t[r]:.6g} (same as line "
                    f"{_line_of(r - 1, linenos, first_line)}); expected strictly increasing t"
                    + (" (read with on_duplicate='keep-first' to drop repeats)" if hint else ""),
                    path=path,
                    line=_line_of(r, linenos, first_line),
                    column=col,
                )
    return keep


def _median_norm(v):
    ok = np.isfinite(v).all(axis=1)
    if not ok.any():
        return None
    return float(np.median(np.linalg.norm(v[ok], axis=1)))


def _mag_unit_hint(med):
    # 1 µT = 1000 nT = 10 mG = 0.01 G = 1e-6 T
    if med > 2000.0:
        return "nT (divide by 1000)"
    if med > 500.0:
        return "mG (divide by 10)"
    if 1e-7 < med < 1e-3:
        return "T (multiply by 1e6)"
    if 0.05 <= med < 5.0:
        return "G (multiply by 100)"
    return "a unit other than µT"


def _check_time_unit(t, seen, path, header_line):
    if t.size < 3:
        return
    dt = float(np.median(np.diff(t)))
    if dt >= 1.0:
        hint = "ns (divide by 1e9)" if dt >= 1e5 else ("µs (divide by 1e6)" if dt >= 100.0 else "ms (divide by 1000)")
        raise DataError(
            f"median sample spacing {dt:.4g} in column 't', expected seconds (a sensor log samples at "
            f"1-1000 Hz, spacing 0.001-1 s); the times look like {hint}",
            path=path,
            line=header_line,
            column=seen["t"] + 1,
        )


#: The unit checks look at this many evenly spaced rows at most (a median
#: judged against ranges a factor of ten wide needs no more).
_UNIT_CHECK_ROWS = 50_000


def _check_units(log_arrays, seen, path, header_line):
    n = log_arrays[0].shape[0]
    if n > _UNIT_CHECK_ROWS:
        idx = np.linspace(0, n - 1, _UNIT_CHECK_ROWS).astype(np.int64)
        log_arrays = [None if a is None else a[idx] for a in log_arrays]
    acc, gyro, mag, mag_raw = log_arrays
    med = _median_norm(mag)
    if med is not None and not (_MAG_RANGE_UT[0] <= med <= _MAG_RANGE_UT[1]):
        raise DataError(
            f"magnetometer median |B| = {med:.4g}, expected {_MAG_RANGE_UT[0]:g}-{_MAG_RANGE_UT[1]:g} µT "
            f"(the Earth's field is 25-65 µT); the values look like {_mag_unit_hint(med)}",
            path=path,
            line=header_line,
            column=seen["mx"] + 1,
        )
    if mag_raw is not None:
        med = _median_norm(mag_raw)
        if med is not None and not (_MAG_RAW_RANGE_UT[0] <= med <= _MAG_RAW_RANGE_UT[1]):
            raise DataError(
                f"raw magnetometer median |B| = {med:.4g}, expected "
                f"{_MAG_RAW_RANGE_UT[0]:g}-{_MAG_RAW_RANGE_UT[1]:g} µT; the values look like "
                f"{_mag_unit_hint(med)}",
                path=path,
                line=header_line,
                column=seen["mx_raw"] + 1,
            )
    med = _median_norm(acc)
    if med is not None and not (_ACC_RANGE[0] <= med <= _ACC_RANGE[1]):
        hint = (
            "g units (multiply by 9.80665)"
            if 0.7 <= med <= 1.3
            else ("gravity removed (expected it included)" if med < 0.7 else "a unit other than m/s²")
        )
        raise DataError(
            f"accelerometer median |a| = {med:.4g}, expected about 9.81 m/s² "
            f"({_ACC_RANGE[0]:g}-{_ACC_RANGE[1]:g}) with gravity included; the values look like {hint}",
            path=path,
            line=header_line,
            column=seen["ax"] + 1,
        )
    ok = np.isfinite(gyro).all(axis=1)
    if ok.sum() >= 1:
        p99 = float(np.percentile(np.linalg.norm(gyro[ok], axis=1), 99))
        if p99 > _GYRO_MAX_RAD_S:
            raise DataError(
                f"gyroscope 99th-percentile rate = {p99:.4g}, expected rad/s (below {_GYRO_MAX_RAD_S:g}); "
                "the values look like deg/s (multiply by pi/180)",
                path=path,
                line=header_line,
                column=seen["gx"] + 1,
            )


def _check_meta(meta, path):
    def bad(key, expected):
        raise FormatError(
            f"metadata {key!r}: expected {expected}, got {meta[key]!r}", path=path, line=_meta_line(path, key), column=1
        )

    if "platform" in meta and meta["platform"].strip().lower() not in _KNOWN_PLATFORMS:
        bad("platform", " or ".join(_KNOWN_PLATFORMS))
    if "magnetometer_calibrated" in meta and meta["magnetometer_calibrated"].strip().lower() not in _BOOL_WORDS:
        bad("magnetometer_calibrated", "yes or no")
    if "rate_hz" in meta:
        try:
            r = float(meta["rate_hz"])
        except ValueError:
            r = math.nan
        if not (math.isfinite(r) and r > 0):
            bad("rate_hz", "a positive number of samples per second")


def _meta_line(path, key):
    """Line number of a metadata key (only computed on error)."""
    try:
        text = _read_text(path)
    except Exception:  # pragma: no cover - the file was readable a moment ago
        return None
    for i, line in enumerate(text.split("\n"), 1):
        s = line.strip()
        if not s:
            continue  # blank lines may stand before or between metadata lines
        if not s.startswith("#"):
            return None
        if s[1:].split(":", 1)[0].strip() == key:
            return i
    return None


# --------------------------------------------------------------------------
# readers
# --------------------------------------------------------------------------
def read_walk_log(path, *, on_duplicate="error", check_units=True):
    """Read and validate a walk log (``*.log.csv`` or ``*.log.csv.gz``).

    Parameters
    ----------
    path : str or Path
    on_duplicate : {"error", "keep-first"}
        Policy for rows whose time equals the previous row's.
    check_units : bool
        Apply the unit sanity checks (see module docstring).

    Returns
    -------
    WalkLog
        ``t`` (N,), ``acc``/``gyro``/``mag`` (N, 3), optional ``mag_raw`` and
        ``odom`` (N, 3), ``meta`` and ``path``.

    Raises
    ------
    FormatError, DataError
        With file, line and column.
    """
    if on_duplicate not in ("error", "keep-first"):
        from .errors import ConfigError

        raise ConfigError(f"on_duplicate must be 'error' or 'keep-first', got {on_duplicate!r}")
    spath = str(path)
    text = _read_text(path)
    meta_lines = {}
    meta, names, header_line, body, first_line = _split_head(text, spath, meta_lines=meta_lines)
    _check_meta(meta, spath)
    seen = _column_index(names, spath, header_line, REQUIRED_COLUMNS, (_RAW, _ODOM))
    allow_empty = [n != "t" for n in names]
    known = set(REQUIRED_COLUMNS) | set(_RAW) | set(_ODOM)
    values, linenos = _parse_numeric(body, first_line, names, spath, allow_empty_cols=allow_empty,
                                     skip_cols=[n not in known for n in names])
    if values.shape[0] == 0:
        raise FormatError(
            "header only: expected at least one data row after the header",
            path=spath,
            line=header_line + 1,
            column=1,
        )
    tcol = seen["t"]
    t = values[:, tcol]
    keep = _check_time(t, linenos, first_line, spath, tcol + 1, on_duplicate=on_duplicate)
    if not keep.all():
        values = values[keep]
        t = values[:, tcol]

    def cols(group):
        return np.ascontiguousarray(values[:, [seen[c] for c in group]])

    acc = cols(("ax", "ay", "az"))
    gyro = cols(("gx", "gy", "gz"))
    mag = cols(("mx", "my", "mz"))
    mag_raw = cols(_RAW) if _RAW[0] in seen else None
    odom = cols(_ODOM) if _ODOM[0] in seen else None
    if check_units:
        _check_units((acc, gyro, mag, mag_raw), seen, spath, header_line)
        _check_time_unit(t, seen, spath, header_line)
    return WalkLog(
        t=np.ascontiguousarray(t),
        acc=acc,
        gyro=gyro,
        mag=mag,
        mag_raw=mag_raw,
        odom=odom,
        meta=meta,
        path=spath,
        meta_lines=meta_lines,
    )


def _read_table(path, required, *, string_cols=(), allow_empty=(), known=None):
    """Small CSV tables (checkpoints, tracks): csv-module parse with exact
    positions. Columns outside ``known`` (when given) are read as text.
    Returns (names, seen, numeric dict, string dict, linenos, header_line, meta)."""
    spath = str(path)
    text = _read_text(path)
    meta, names, header_line, body, first_line = _split_head(text, spath, allow_meta=True)
    seen = _column_index(names, spath, header_line, required)
    if known is not None:
        string_cols = tuple(string_cols) + tuple(n for n in names if n not in known)
    num = {n: [] for n in names if n not in string_cols}
    strs = {n: [] for n in names if n in string_cols}
    linenos = []
    for lineno, _, cells in _records(body, first_line):
        if not cells or all(not c.strip() for c in cells):
            continue
        if len(cells) != len(names):
            raise FormatError(
                f"expected {len(names)} comma-separated fields as in the header, got {len(cells)}",
                path=spath,
                line=lineno,
                column=min(len(cells), len(names)) + 1,
            )
        for j, (name, cell) in enumerate(zip(names, cells)):
            s = cell.strip()
            if name in strs:
                strs[name].append(s)
                continue
            if s == "" and name in allow_empty:
                num[name].append(math.nan)
                continue
            try:
                v = _number(s)
            except ValueError:
                raise FormatError(
                    f"expected a number in column {name!r}, got {s!r}", path=spath, line=lineno, column=j + 1
                ) from None
            if not math.isfinite(v):
                raise FormatError(
                    f"expected a finite number in column {name!r}, got {s!r}",
                    path=spath,
                    line=lineno,
                    column=j + 1,
                )
            num[name].append(v)
        linenos.append(lineno)
    if not linenos:
        raise FormatError(
            "header only: expected at least one data row after the header",
            path=spath,
            line=header_line + 1,
            column=1,
        )
    num = {k: np.asarray(v, dtype=float) for k, v in num.items()}
    strs = {k: np.asarray(v, dtype=str) for k, v in strs.items()}
    return names, seen, num, strs, np.asarray(linenos), header_line, meta


def read_checkpoints(path):
    """Read a checkpoints file (``t,x,y[,floor][,label]``).

    Times must not decrease (two checkpoints may share a time).

    Returns
    -------
    Checkpoints
        ``t`` (K,), ``xy`` (K, 2), ``floor``/``label`` (K,) str or None.
    """
    spath = str(path)
    # other columns (notes, tags) are allowed and not read
    names, seen, num, strs, linenos, _, _ = _read_table(
        path, ("t", "x", "y"), string_cols=("floor", "label"), known=("t", "x", "y", "floor", "label")
    )
    t = num["t"]
    _check_time(t, linenos, 0, spath, seen["t"] + 1, strict=False)
    return Checkpoints(
        t=t,
        xy=np.column_stack([num["x"], num["y"]]),
        floor=strs.get("floor"),
        label=strs.get("label"),
        path=spath,
        lines=np.asarray(linenos, dtype=np.int64),
        t_column=seen["t"] + 1,
    )


def check_checkpoint_clock(cps, t_first, t_last, *, tolerance_s=2.0):
    """Checkpoint times must be on the log's clock (the data contract;
    README, "Input files": checkpoints ``t``, "the log's clock").

    Parameters
    ----------
    cps : Checkpoints ; t_first, t_last : float, the log's time span, s
    tolerance_s : float, a tap this close outside the span still counts

    Returns
    -------
    outside : (K,) bool, checkpoints outside the span (a few: a tap before
        the recording started or after it stopped)

    Raises
    ------
    DataError, naming the checkpoints file, line and column, when none or
    fewer than half of the checkpoints lie within the span: the two files
    use different clocks (another epoch, milliseconds).
    """
    t = np.asarray(cps.t, dtype=float)
    outside = (t < t_first - tolerance_s) | (t > t_last + tolerance_s)
    inside = int(np.sum(~outside))
    if t.size and (inside == 0 or 2 * inside < t.size):
        i = int(np.flatnonzero(outside)[0])
        line = None if cps.lines is None else int(cps.lines[i])
        raise DataError(
            f"checkpoint times {t.min():.6g}..{t.max():.6g} s lie outside the walk log's "
            f"{t_first:.6g}..{t_last:.6g} s; expected times on the log's clock (seconds, the same epoch)",
            path=cps.path, line=line, column=(cps.t_column or 1) if line is not None else None)
    return outside


def read_track(path):
    """Read a track (``t,x,y[,heading_rad][,...]``). Further columns (a
    result track's uncertainty, confidence, flags) go to ``Track.extra``
    when every cell is a plain finite number or empty (NaN), as float
    arrays; others (text flags such as ``ok``/``lost``, ``nan`` written out)
    are not read.

    Returns
    -------
    Track
        ``t`` (K,) strictly increasing, ``xy`` (K, 2), ``heading_rad`` (K,) or None.
    """
    spath = str(path)
    names, seen, num, strs, linenos, _, _ = _read_table(
        path, ("t", "x", "y"), allow_empty=("heading_rad",), known=("t", "x", "y", "heading_rad"))
    t = num["t"]
    _check_time(t, linenos, 0, spath, seen["t"] + 1, hint=False)
    extra = {}
    for k, cells in strs.items():  # numeric when every cell is a plain finite number or empty
        try:
            col = np.array([math.nan if c == "" else _number(c) for c in cells], dtype=float)
        except ValueError:
            continue
        if np.isfinite(col[[c != "" for c in cells]]).all():
            extra[k] = col
    return Track(
        t=t,
        xy=np.column_stack([num["x"], num["y"]]),
        heading_rad=num.get("heading_rad"),
        extra=extra,
        path=spath,
    )


# --------------------------------------------------------------------------
# gaps and validation summary
# --------------------------------------------------------------------------
def find_gaps(t, *, min_gap_s=GAP_THRESHOLD_S):
    """Gaps in a time series.

    Parameters
    ----------
    t : (N,) float, seconds, increasing
    min_gap_s : float
        Report spacings strictly longer than this.

    Returns
    -------
    (G, 3) float array of ``row index before the gap, t_before, t_after``.
    """
    t = np.asarray(t, dtype=float)
    if t.size < 2:
        return np.empty((0, 3))
    i = np.flatnonzero(np.diff(t) > min_gap_s)
    return np.column_stack([i.astype(float), t[i], t[i + 1]])


@dataclass
class LogReport:
    """What :func:`validate_walk_log` found that is not fatal."""

    log: WalkLog
    gaps: np.ndarray
    warnings: list = field(default_factory=list)


def validate_walk_log(path, *, min_gap_s=GAP_THRESHOLD_S, **read_kwargs):
    """Read a log (raising on fatal problems) and list the non-fatal ones:
    gaps longer than ``min_gap_s``, sensors with missing samples.

    Returns
    -------
    LogReport
    """
    log = read_walk_log(path, **read_kwargs)
    gaps = find_gaps(log.t, min_gap_s=min_gap_s)
    warnings = []
    for g in gaps:
        warnings.append(f"gap of {g[2] - g[1]:.3f} s after t = {g[1]:.3f} s")
    for name, arr in (("accelerometer", log.acc), ("gyroscope", log.gyro), ("magnetometer", log.mag)):
        miss = int(np.isnan(arr).any(axis=1).sum())
        if miss:
            warnings.append(f"{name}: {miss} of {log.n} rows without a sample")
    return LogReport(log=log, gaps=gaps, warnings=warnings)


# --------------------------------------------------------------------------
# writers
# --------------------------------------------------------------------------
class _Out:
    """Atomic text output, gzip when the name ends in .gz."""

    def __init__(self, path):
        self.path = Path(path)

    def __enter__(self):
        self._cm = atomic_write(self.path, "wb")
        fh = self._cm.__enter__()
        if self.path.name.endswith(".gz"):
            self._gz = gzip.GzipFile(fileobj=fh, mode="wb", mtime=0, filename="")
            raw = self._gz
        else:
            self._gz = None
            raw = fh
        self._txt = io.TextIOWrapper(raw, encoding="utf-8", newline="\n", write_through=True)
        return self._txt

    def __exit__(self, et, ev, tb):
        try:
            if et is None:
                self._txt.flush()
                self._txt.detach()
                if self._gz is not None:
                    self._gz.close()
        finally:
            return self._cm.__exit__(et, ev, tb)


def _format_block(arr, fmts):
    """(R, C) float -> CSV text; NaN -> empty cell."""
    if arr.shape[0] == 0:
        return ""
    buf = io.StringIO()
    np.savetxt(buf, arr, fmt=fmts, delimiter=",")
    out = buf.getvalue()
    if np.isnan(arr).any():
        out = out.replace("nan", "")
    return out


def write_walk_log(path, log):
    """Write ``log`` (WalkLog) as a walk log CSV, atomically; gzip if the
    name ends in ``.gz``. Missing samples (NaN) become empty cells."""
    names = list(REQUIRED_COLUMNS)
    blocks = [log.t[:, None], log.acc, log.gyro, log.mag]
    if log.mag_raw is not None:
        names += list(_RAW)
        blocks.append(log.mag_raw)
    if log.odom is not None:
        names += list(_ODOM)
        blocks.append(log.odom)
    arr = np.column_stack([np.asarray(b, dtype=float) for b in blocks])
    fmts = ["%.12g"] + ["%.9g"] * (arr.shape[1] - 1)  # t: µs over a day
    with _Out(path) as fh:
        for k, v in log.meta.items():
            k, v = str(k).strip(), str(v).replace("\n", " ").strip()
            fh.write(f"# {k}: {v}\n")
        fh.write(",".join(names) + "\n")
        fh.write(_format_block(arr, fmts))


def _csv_cell(s):
    s = str(s)
    if any(ch in s for ch in ',"\n\r'):
        return '"' + s.replace('"', '""') + '"'
    return s


def write_checkpoints(path, cps):
    """Write ``cps`` (Checkpoints) as ``t,x,y[,floor][,label]``, atomically."""
    names = ["t", "x", "y"]
    if cps.floor is not None:
        names.append("floor")
    if cps.label is not None:
        names.append("label")
    with _Out(path) as fh:
        fh.write(",".join(names) + "\n")
        for i in range(cps.n):
            row = [repr(float(cps.t[i])), repr(float(cps.xy[i, 0])), repr(float(cps.xy[i, 1]))]
            if cps.floor is not None:
                row.append(_csv_cell(cps.floor[i]))
            if cps.label is not None:
                row.append(_csv_cell(cps.label[i]))
            fh.write(",".join(row) + "\n")


def write_track(path, track):
    """Write ``track`` (Track) as ``t,x,y[,heading_rad][,extra...]``,
    atomically; NaN in an extra column becomes an empty cell."""
    names = ["t", "x", "y"]
    blocks = [track.t[:, None], track.xy]
    if track.heading_rad is not None:
        names.append("heading_rad")
        blocks.append(np.asarray(track.heading_rad, float)[:, None])
    for k, v in track.extra.items():
        v = np.asarray(v, dtype=float)
        if v.shape != track.t.shape:
            raise DataError(
                f"track column {k!r} has shape {v.shape}, expected {track.t.shape} (one per time)"
            )
        names.append(str(k))
        blocks.append(v[:, None])
    arr = np.column_stack([np.asarray(b, dtype=float) for b in blocks])
    with _Out(path) as fh:
        fh.write(",".join(names) + "\n")
        fh.write(_format_block(arr, ["%.10g"] * arr.shape[1]))
