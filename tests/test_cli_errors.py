"""Bad input files on the command line: exit 2 and one line naming the file,
line and column, never a traceback (the project's error rule). Inputs: a
byte that is not UTF-8 (0xff never occurs in UTF-8, RFC 3629 section 3),
a JSON file cut short, an impossible option value."""

from pathlib import Path

import numpy as np
import pytest

from fingerprint.errors import ConfigError, FormatError
from fingerprint.mapfile import save_map
from mapping.benchmarks.filter import synthetic_floor
from mapping.cli import main

REAL_LOG = Path(__file__).parent / "data" / "real" / "siteA" / "F1" / "walk_001.log.csv.gz"


@pytest.fixture(scope="module")
def small_map(tmp_path_factory):
    p = tmp_path_factory.mktemp("cli") / "small.map"
    save_map(p, synthetic_floor(nx=6, ny=5))
    return p


def _one_line_error(capsys, path, line, column):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in err[0], err
    assert f"{path}, line {line}, column {column}" in err[0], err[0]
    return err[0]


def test_site_file_not_utf8(tmp_path, capsys):
    site = tmp_path / "site.json"
    site.write_bytes(b'{"name": "x\xff"}')
    assert main(["build-map", "--site", str(site), "--floor", "G", "--out", str(tmp_path / "a.map"),
                 str(tmp_path)]) == 2
    assert "UTF-8" in _one_line_error(capsys, site, 1, 12)
    assert not (tmp_path / "a.map").exists()


def test_points_file_not_utf8(small_map, tmp_path, capsys):
    pts = tmp_path / "p.csv"
    pts.write_bytes(b"x,y\n1,2\n3,\xff\n")
    out = tmp_path / "o.csv"
    assert main(["map-query", str(small_map), str(pts), "--out", str(out)]) == 2
    _one_line_error(capsys, pts, 3, 3)
    assert not out.exists()


def test_calibration_file_cut_short(small_map, tmp_path, capsys):
    cal = tmp_path / "cal.json"
    cal.write_text('{"format": \n')
    out = tmp_path / "t.csv"
    assert main(["locate", "--map", str(small_map), str(REAL_LOG), "--calibration", str(cal), "--out", str(out)]) == 2
    assert "not valid JSON" in _one_line_error(capsys, cal, 2, 1)
    assert not out.exists()


def test_image_resolution_must_be_positive(small_map, tmp_path, capsys):
    out = tmp_path / "x.png"
    assert main(["map-image", str(small_map), "--out", str(out), "--dpi", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--dpi" in err[0]
    assert not out.exists()


@pytest.mark.parametrize("item, words", [
    ("feld=1", "--real-set: unknown filter setting 'feld'"),
    ("field_temper=abc", "field_temper: expected a finite number > 0"),
    ("field_temper", "expected NAME=VALUE"),
])
def test_bench_real_set_checked_before_any_work(tmp_path, capsys, item, words):
    # checked before the site folder is even looked at (it does not exist)
    assert main(["bench", "filter", "--real", str(tmp_path / "nowhere"), "--real-set", item]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and words in err[0], err


def test_settings_changes_are_read_alike_by_every_option():
    # --set (locate, evaluate) and --real-set (bench filter) share one reader
    from mapping.commands.locate import parse_set_options

    items = ["field_temper=0.1", "use_field=false", "feature_set=full", "field_gate=null",
             "bias_corr_updates=none", "n_particles=500"]
    got = parse_set_options(items, option="--x")
    assert got == {"field_temper": 0.1, "use_field": False, "feature_set": "full", "field_gate": None,
                   "bias_corr_updates": None, "n_particles": 500}
    with pytest.raises(ConfigError, match="^--x: expected NAME=VALUE"):
        parse_set_options(["=1"], option="--x")


def _single_error_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in err[0], err
    return err[0]


@pytest.mark.parametrize("command", ["locate", "map-query", "map-image", "evaluate", "sweep"])
def test_output_under_a_file_is_one_line_naming_it(small_map, tmp_path, capsys, command):
    """An --out whose folder is an existing file: exit 2, one line naming the
    output and the file in the way (common practice, no source)."""
    blocker = tmp_path / "points.csv"
    blocker.write_text("x,y\n1,2\n")
    before = blocker.read_bytes()
    out = blocker / "result"
    argv = {
        "locate": ["locate", "--map", str(small_map), str(REAL_LOG), "--out", str(out)],
        "map-query": ["map-query", str(small_map), str(blocker), "--out", str(out)],
        "map-image": ["map-image", str(small_map), "--out", str(out)],
        "evaluate": ["evaluate", "--map", str(small_map), str(REAL_LOG), "--out", str(out), "--no-progress"],
        "sweep": ["sweep", str(tmp_path / "s.toml"), "--out", str(out), "--no-progress"],
    }[command]
    if command == "sweep":
        (tmp_path / "s.toml").write_text(f'[data]\nwalks = ["{REAL_LOG}"]\nmap = "{small_map}"\n')
    assert main(argv) == 2
    line = _single_error_line(capsys)
    assert f"{out}: cannot write" in line and str(blocker) in line, line
    assert blocker.read_bytes() == before  # nothing lost


def test_output_that_is_a_folder_is_one_line(small_map, tmp_path, capsys):
    pts = tmp_path / "p.csv"
    pts.write_text("x,y\n1,2\n")
    assert main(["map-query", str(small_map), str(pts), "--out", str(tmp_path)]) == 2
    line = _single_error_line(capsys)
    assert f"{tmp_path}: cannot write: it is a folder" in line, line


def test_read_only_output_names_the_target_not_a_temporary(tmp_path, monkeypatch):
    """A write the system refuses (here a read-only file system, errno 30
    EROFS of POSIX, simulated: the tests may run as root, whom permissions do
    not stop) raises the project's OutputError naming the file asked for,
    and the existing file is kept."""
    import errno
    import tempfile

    from fingerprint._atomic import check_writable, write_text_atomic
    from fingerprint.errors import OutputError

    target = tmp_path / "track.csv"
    target.write_text("old\n")

    def refuse(*args, **kwargs):
        raise OSError(errno.EROFS, "Read-only file system", str(tmp_path / ".track.csv.x.tmp"))

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(OutputError, match=r"track\.csv: cannot write: Read-only file system$"):
        write_text_atomic(target, "new\n")
    with pytest.raises(OutputError, match="Read-only file system"):
        check_writable(tmp_path / "eval", folder=True)
    assert target.read_text() == "old\n"


def test_build_map_checks_its_output_before_fitting(tmp_path, capsys, monkeypatch):
    """The output is checked before the walks are read (the fit would take
    minutes): no walk folder is needed to see the error."""
    import mapping.mapbuild as mb

    def no_fit(*a, **k):
        raise AssertionError("the map was fitted before the output was checked")

    monkeypatch.setattr(mb, "build_floor_map", no_fit)
    blocker = tmp_path / "file"
    blocker.write_text("x")
    site = Path(__file__).parent / "data" / "tiny_site" / "site.json"
    assert main(["build-map", "--site", str(site), "--floor", "T", "--out", str(blocker / "T.map"),
                 str(tmp_path / "no-walks")]) == 2
    assert "cannot write" in _single_error_line(capsys)


@pytest.mark.parametrize("options, words", [
    (["--temper", "-1"], "--temper: expected a finite number > 0, got -1.0"),
    (["--features", "fulll"], "--features: expected one of"),
    (["--set", "field_temper=abc"], "--set field_temper: expected a finite number > 0, got 'abc'"),
    (["--temper", "inf"], "--temper: expected a finite number > 0, got inf"),
    (["--set", "use_field=maybe"], "--set use_field: expected true or false, got 'maybe'"),
    (["--set", "sensor_noise_ut=abc"], "--set sensor_noise_ut: expected None or a finite number >= 0, got 'abc'"),
    (["--set", "n_particles=true"], "--set n_particles: expected an integer >= 1, got True"),
    (["--start-time", "nan"], "--start-time: expected a finite time in seconds, got nan"),
])
def test_a_bad_filter_option_is_named_as_typed(small_map, tmp_path, capsys, options, words):
    out = tmp_path / "t.csv"
    assert main(["locate", "--map", str(small_map), str(REAL_LOG), "--out", str(out)] + options) == 2
    line = _single_error_line(capsys)
    assert f"lodemap locate: error: {words}" in line, line
    assert not out.exists()


def test_points_file_without_points_keeps_the_old_output(small_map, tmp_path, capsys):
    pts = tmp_path / "p.csv"
    pts.write_text("x,y\n")
    out = tmp_path / "o.csv"
    out.write_text("earlier result\n")
    assert main(["map-query", str(small_map), str(pts), "--out", str(out)]) == 2
    assert f"{pts}, line 2: no points after the header" in _single_error_line(capsys)
    assert out.read_text() == "earlier result\n"


def test_our_warnings_are_one_line_on_stderr(capsys):
    import warnings

    from fingerprint.errors import LodemapWarning
    from mapping.cli import _show_warnings_as_lines

    saved = warnings.showwarning
    try:
        _show_warnings_as_lines("build-map")
        with warnings.catch_warnings():
            warnings.simplefilter("always")
            warnings.warn("split.json: 1 of the 3 survey walks of the split are not among the walks given: x",
                          LodemapWarning)
    finally:
        warnings.showwarning = saved
    err = capsys.readouterr().err
    assert err == ("lodemap build-map: warning: split.json: 1 of the 3 survey walks of the split are not among "
                   "the walks given: x\n")


def test_a_full_disk_while_writing_names_the_output(tmp_path):
    """The caller's own write refused by the system (ENOSPC, errno 28 of
    POSIX, simulated; no file name of its own) is reported for the output
    being written, and the previous file is kept."""
    import errno

    from fingerprint._atomic import atomic_write
    from fingerprint.errors import OutputError

    target = tmp_path / "big.csv"
    target.write_text("old\n")
    with pytest.raises(OutputError, match=r"big\.csv: cannot write: No space left on device"):
        with atomic_write(target) as fh:
            fh.write("part")
            raise OSError(errno.ENOSPC, "No space left on device")
    assert target.read_text() == "old\n" and not list(tmp_path.glob(".*.tmp"))


def test_a_failed_command_leaves_no_empty_output_folder(small_map, tmp_path, capsys):
    """The output folders a command made for itself go again when it fails
    before writing anything; folders that were there before stay."""
    kept = tmp_path / "kept"
    kept.mkdir()
    out = kept / "a" / "b"
    assert main(["evaluate", "--map", str(tmp_path / "none.map"), str(REAL_LOG), "--out", str(out)]) == 2
    assert "none.map" in _single_error_line(capsys)
    assert not (kept / "a").exists() and kept.is_dir()


@pytest.mark.parametrize("argv, words", [
    (["locate", "--map", "m.map", "--out", "t.csv", "w.log.csv", "--seed", "-1"],
     "lodemap locate: error: argument --seed: expected an integer >= 0, got -1"),
    (["evaluate", "--map", "m.map", "--out", "e", "w", "--seed", "x"],
     "lodemap evaluate: error: argument --seed: expected an integer >= 0, got 'x'"),
    (["locate", "--map", "m.map"], "lodemap locate: error: the following arguments are required"),
    (["locate", "--map", "m.map", "--out", "t.csv", "w.log.csv", "--particles", "1e3"],
     "lodemap locate: error: argument --particles: invalid int value"),
])
def test_a_bad_argument_is_one_line(capsys, argv, words):
    """Options the argument parser refuses: exit 2 and one line, like any
    other bad input (no usage block; --help shows it)."""
    with pytest.raises(SystemExit) as exc:
        main(argv)
    assert exc.value.code == 2
    assert _single_error_line(capsys).startswith(words)


def test_points_file_lines_are_the_file_own(tmp_path):
    """Lines and columns as an editor shows them: comment and blank lines
    count; a trailing blank line is no point; 1_3 (Python's float() reads
    13) and a second x column are errors."""
    from mapping.commands.map_query import read_points

    pts = tmp_path / "p.csv"
    pts.write_text("# a comment\n# another\nx,y\n1,2\n\n3,4\n")
    np.testing.assert_array_equal(read_points(pts), [[1.0, 2.0], [3.0, 4.0]])
    pts.write_text("# a comment\n# another\nx,y\n1,2\n5,oops\n\n")
    with pytest.raises(FormatError, match=r"p\.csv, line 5, column 2: expected a number in column 'y', got 'oops'"):
        read_points(pts)
    pts.write_text("x,y\n1_3,2\n")
    with pytest.raises(FormatError, match=r"line 2, column 1: expected a number in column 'x', got '1_3'"):
        read_points(pts)
    pts.write_text("x,y,x\n1,2,3\n")
    with pytest.raises(FormatError, match=r"line 1: points file has column 'x' twice"):
        read_points(pts)


def test_out_of_memory_and_multiline_messages_are_one_line(small_map, tmp_path, capsys, monkeypatch):
    """A setting that asks for more memory than the machine has, and a
    library message with newlines in it, still end in one line, exit 2."""
    import mapping.commands.map_info as map_info
    from fingerprint.errors import DataError

    def no_memory(args):
        raise MemoryError()

    monkeypatch.setattr(map_info, "run", no_memory)
    assert main(["map-info", str(small_map)]) == 2
    assert "error: out of memory" in _single_error_line(capsys)

    def two_lines(args):
        raise DataError("IllegalArgumentException: point array must contain 0 or >1 elements\n")

    monkeypatch.setattr(map_info, "run", two_lines)
    assert main(["map-info", str(small_map)]) == 2
    assert _single_error_line(capsys).endswith("must contain 0 or >1 elements")
    assert main(["map-image", str(small_map), "--out", str(tmp_path / "m.png"), "--dpi", "100000"]) == 2
    assert "--dpi must be an integer from 1 to 1200, got 100000" in _single_error_line(capsys)
