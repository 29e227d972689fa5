"""``lodemap locate`` end to end on a vendored real walk log (tests/data/real,
open MIT-licensed smartphone walks): output columns, the seed comment,
determinism, GeoJSON, --no-field, --help and one-line errors.

The track is read back with fingerprint.logio.read_track (the sensor-chain
reader, independent of the writer here) and the GeoJSON with shapely's
from_geojson (reference library). The map is a plain constant field on a
corridor grid around the walk's checkpoints: this file tests the command,
accuracy is tested in test_localise.py and test_pf_realdata.py.
"""

import json
from pathlib import Path

import numpy as np
import pytest

from fingerprint import FieldMap, FloorGraph, mapfile
from fingerprint.logio import read_checkpoints, read_track
from mapping.cli import main

DATA = Path(__file__).parent / "data" / "real" / "siteA" / "F1"
WALK = "walk_020"


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("locate")
    cps = read_checkpoints(DATA / f"{WALK}.checkpoints.csv")
    lo = np.floor(cps.xy.min(axis=0)) - 10
    hi = np.ceil(cps.xy.max(axis=0)) + 10
    xs = np.arange(lo[0], hi[0] + 1e-9, 2.0)
    ys = np.arange(lo[1], hi[1] + 1e-9, 2.0)
    gx, gy = np.meshgrid(xs, ys)
    nodes = np.column_stack([gx.ravel(), gy.ravel()])
    idx = np.arange(nodes.shape[0]).reshape(gx.shape)
    edges = np.vstack([np.column_stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()]),
                       np.column_stack([idx[:-1].ravel(), idx[1:].ravel()])])
    g = FloorGraph.from_arrays(nodes, edges)
    shape = gx.shape
    mean = np.broadcast_to(np.array([5.0, 20.0, -35.0]), shape + (3,)).copy()
    fm = FieldMap("F1", np.array([xs[0], ys[0]]), 2.0, mean, np.full(shape + (3,), 4.0), np.zeros(shape),
                  np.ones(shape, bool), g)
    mp = tmp / "F1.map"
    mapfile.save_map(mp, fm)
    return tmp, mp, cps


def _run(args, capsys):
    code = main(["locate", *map(str, args)])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_writes_track_with_seed_and_columns(files, capsys):
    tmp, mp, cps = files
    out = tmp / "a.csv"
    geo = tmp / "a.geojson"
    start = f"{cps.xy[0, 0]},{cps.xy[0, 1]},1.5"
    code, stdout, _ = _run(["--map", mp, DATA / f"{WALK}.log.csv.gz", "--start", start, "--start-time", cps.t[0],
                            "--out", out, "--geojson", geo, "--seed", 7, "--particles", 300], capsys)
    assert code == 0 and "updates" in stdout
    text = out.read_text().splitlines()
    comments = [ln for ln in text if ln.startswith("#")]
    assert "# seed: 7" in comments
    header = next(ln for ln in text if not ln.startswith("#"))
    assert header == "t,x,y,sigma_m,confidence,converged,lost"
    tr = read_track(out)
    assert tr.t.size > 20
    assert set(tr.extra) == {"sigma_m", "confidence", "converged", "lost"}
    assert set(np.unique(tr.extra["converged"])) <= {0.0, 1.0}
    # first estimate near the given start (a couple of steps from it)
    assert np.hypot(*(tr.xy[0] - cps.xy[0])) < 5.0
    import shapely
    doc = json.loads(geo.read_text())
    line = shapely.from_geojson(json.dumps(doc["features"][0]["geometry"]))
    assert line.geom_type == "LineString"
    np.testing.assert_allclose(np.asarray(line.coords), tr.xy, atol=1e-3)
    assert len(doc["features"]) == 1 + tr.t.size


def test_same_seed_same_output_other_seed_differs(files, capsys):
    tmp, mp, cps = files
    start = f"{cps.xy[0, 0]},{cps.xy[0, 1]}"
    outs = []
    for name, seed in (("b1.csv", 3), ("b2.csv", 3), ("b3.csv", 4)):
        code, _, _ = _run(["--map", mp, DATA / f"{WALK}.log.csv.gz", "--start", start, "--out", tmp / name,
                           "--seed", seed, "--particles", 200, "--quiet"], capsys)
        assert code == 0
        outs.append([ln for ln in (tmp / name).read_text().splitlines() if not ln.startswith("#")])
    assert outs[0] == outs[1]
    assert outs[0] != outs[2]


def test_no_field_and_settings_are_recorded(files, capsys):
    tmp, mp, cps = files
    out = tmp / "c.csv"
    code, _, _ = _run(["--map", mp, DATA / f"{WALK}.log.csv.gz", "--start", f"{cps.xy[0, 0]},{cps.xy[0, 1]}",
                       "--out", out, "--no-field", "--set", "heading_kappa=3", "--particles", 100, "--quiet"],
                      capsys)
    assert code == 0
    line = next(ln for ln in out.read_text().splitlines() if ln.startswith("# settings:"))
    settings = json.loads(line.split(":", 1)[1])
    assert settings["use_field"] is False and settings["heading_kappa"] == 3.0 and settings["n_particles"] == 100


@pytest.mark.parametrize(
    "extra, needle",
    [
        (["--start", "1,2,3,4"], "--start"),
        (["--start", "a,b"], "--start"),
        (["--start", "1,2,-1"], "SIGMA"),
        (["--set", "bogus=1"], "unknown filter setting"),
        (["--features", "nope"], "--features: expected one of"),
        (["--preset", "nope"], "preset"),
        (["--start", "50000,50000"], "from the floor graph"),  # a start far off the floor
        (["--start-time", "99999"], "after the last step"),  # nothing left to localise
    ],
)
def test_bad_options_give_one_line_and_exit_2(files, capsys, extra, needle):
    tmp, mp, _ = files
    code, _, err = _run(["--map", mp, DATA / f"{WALK}.log.csv.gz", "--out", tmp / "x.csv", *extra], capsys)
    assert code == 2
    assert needle in err and len(err.strip().splitlines()) == 1
    assert not (tmp / "x.csv").exists()


def test_missing_map_file_is_a_clean_error(files, capsys):
    tmp, _, _ = files
    code, _, err = _run(["--map", tmp / "none.map", DATA / f"{WALK}.log.csv.gz", "--out", tmp / "y.csv"], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1 and "none.map" in err


def test_help_explains_every_option(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["locate", "--help"])
    assert exc.value.code == 0
    text = capsys.readouterr().out
    for opt in ("--map", "--start", "--start-time", "--out", "--geojson", "--seed", "--particles", "--no-field",
                "--preset", "--features", "--likelihood", "--temper", "--set", "--calibration", "--step-constant", "LOG"):
        assert opt in text


def test_log_of_another_floor_gives_a_warning(files, capsys):
    """The log says floor F1 (metadata key ``floor``); on a map of floor G the
    command still runs but says so on stderr."""
    tmp, mp, cps = files
    other = mapfile.load_map(mp)
    other = FieldMap("G", other.origin_xy, other.resolution_m, other.mean_ut, other.var_ut2, other.coverage_m,
                     other.free, other.graph)
    gp = tmp / "G.map"
    mapfile.save_map(gp, other)
    start = f"{cps.xy[0, 0]},{cps.xy[0, 1]},1.5"
    code, _, err = _run(["--map", gp, DATA / f"{WALK}.log.csv.gz", "--start", start, "--out", tmp / "g.csv",
                         "--no-field"], capsys)
    assert code == 0
    assert "marked as recorded on floor F1, the map is of floor G" in err
