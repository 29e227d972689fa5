"""The malformed-log corpus (tests/data/malformed, made by make_corpus.py):
every file raises the project's error naming the file, the line and the
column, and the CLI turns it into exit status 2 and one line on stderr.

Expected positions are worked out by hand from the edits in make_corpus.py
(1-based lines: two metadata lines, the header on line 3, data from line 4).
"""

from pathlib import Path

import pytest

from fingerprint.errors import DataError, FormatError
from fingerprint.logio import read_walk_log, validate_walk_log
from mapping.cli import main

HERE = Path(__file__).parent / "data" / "malformed"

# file, error class, line, column, fragment of the message
CASES = [
    ("missing_column.log.csv", FormatError, 3, 10, "missing required column(s) mz"),
    ("non_numeric.log.csv", FormatError, 10, 5, "got 'abc'"),
    ("nan_cell.log.csv", FormatError, 12, 8, "finite number"),
    ("inf_cell.log.csv", FormatError, 15, 2, "finite number"),
    ("time_backwards.log.csv", FormatError, 20, 1, "time goes back"),
    ("duplicate_time.log.csv", FormatError, 25, 1, "duplicate time stamp"),
    ("empty_file.log.csv", FormatError, 1, 1, "empty"),
    ("header_only.log.csv", FormatError, 4, 1, "header only"),
    ("mag_nanotesla.log.csv", DataError, 3, 8, "nT"),
    ("mag_milligauss.log.csv", DataError, 3, 8, "mG"),
    ("mag_tesla.log.csv", DataError, 3, 8, "T (multiply by 1e6)"),
    ("acc_in_g.log.csv", DataError, 3, 2, "g units"),
    ("gyro_in_deg.log.csv", DataError, 3, 5, "deg/s"),
    ("ragged_short.log.csv", FormatError, 30, 10, "got 9"),
    ("ragged_long.log.csv", FormatError, 31, 11, "got 11"),
    ("meta_no_colon.log.csv", FormatError, 2, 1, "'# key: value'"),
    ("meta_bad_platform.log.csv", FormatError, 1, 1, "handheld or robot"),
    ("meta_bad_rate.log.csv", FormatError, 3, 1, "positive number"),
    ("meta_conflict.log.csv", FormatError, 3, 1, "given twice"),
    ("duplicate_column.log.csv", FormatError, 3, 11, "appears twice"),
    ("empty_time_cell.log.csv", FormatError, 40, 1, "empty cell in column 't'"),
    ("partial_raw_columns.log.csv", FormatError, 3, 11, "must come together"),
    ("no_header.log.csv", FormatError, 2, 1, "no header"),
    ("not_utf8.log.csv", FormatError, 5, 15, "UTF-8"),
    ("truncated.log.csv.gz", FormatError, 30, 4, "truncated"),
    ("comment_in_body.log.csv", FormatError, 33, 1, "before the header"),
    ("time_in_ms.log.csv", DataError, 3, 1, "ms (divide by 1000)"),
]


def test_corpus_is_large_enough():
    assert len(CASES) >= 15
    assert all((HERE / c[0]).exists() for c in CASES)


@pytest.mark.parametrize("name,cls,line,column,fragment", CASES, ids=[c[0] for c in CASES])
def test_reader_names_line_and_column(name, cls, line, column, fragment):
    with pytest.raises(cls) as exc:
        read_walk_log(HERE / name)
    err = exc.value
    assert err.path == str(HERE / name)
    assert (err.line, err.column) == (line, column)
    assert fragment in err.message
    assert f"line {line}" in str(err) and f"column {column}" in str(err)


@pytest.mark.parametrize("name", [c[0] for c in CASES])
def test_cli_exit_2_one_line(name, capsys):
    code = main(["inspect", str(HERE / name)])
    out = capsys.readouterr()
    assert code == 2
    lines = out.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("lodemap inspect: error:")
    assert "Traceback" not in out.err


def test_valid_twin_reads():
    log = read_walk_log(HERE / "valid.log.csv")
    assert log.n == 60 and log.platform == "handheld" and log.magnetometer_calibrated


def test_gap_is_reported_not_fatal():
    rep = validate_walk_log(HERE / "gap_valid.log.csv")
    assert rep.gaps.shape == (1, 3)
    # rows 0..36 at 0.02 s spacing, then +2.5 s (make_corpus.py)
    assert rep.gaps[0, 0] == 36
    assert rep.gaps[0, 2] - rep.gaps[0, 1] == pytest.approx(2.52, abs=1e-9)
    assert any("gap" in w for w in rep.warnings)
    assert main(["inspect", str(HERE / "gap_valid.log.csv")]) == 0


def test_empty_cells_are_missing_samples():
    log = read_walk_log(HERE / "empty_cells_valid.log.csv")
    import numpy as np

    row = 20 - 4  # line 20 is data row 16
    assert np.isnan(log.mag[row]).all()
    assert np.isfinite(np.delete(log.mag, row, axis=0)).all()
    assert np.isfinite(log.acc).all()


def test_duplicate_policy_keep_first():
    log = read_walk_log(HERE / "duplicate_time.log.csv", on_duplicate="keep-first")
    assert log.n == 59
    import numpy as np

    assert np.all(np.diff(log.t) > 0)
    assert main(["inspect", "--on-duplicate", "keep-first", str(HERE / "duplicate_time.log.csv")]) == 0


@pytest.mark.parametrize("name", ["non_numeric.log.csv", "mag_nanotesla.log.csv", "truncated.log.csv.gz"])
def test_cli_calibrate_exit_2(name, tmp_path, capsys):
    code = main(["calibrate", str(HERE / name), "--out", str(tmp_path / "c.json")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and err[0].startswith("lodemap calibrate: error:")
    assert not (tmp_path / "c.json").exists()
