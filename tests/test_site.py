"""Site files (README "Input files") and walk-set discovery.

References: the real-data site file and split files described in
shared/real_data/README.md (vendored copy under tests/data/real when
present); Python's json module for the position of a syntax error."""

import json
from pathlib import Path

import numpy as np
import pytest

from fingerprint.errors import ConfigError, DataError, FormatError, LodemapWarning
from mapping.site import load_site
from mapping.walkset import find_walks, load_split, select_walks, walk_name
from _realdata import FULL, needs_full, real_dir

ROOT = Path(__file__).resolve().parent


REAL = real_dir("site.json")
needs_real = pytest.mark.skipif(REAL is None, reason="real-data sample not available")


def _write(path, obj):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(obj if isinstance(obj, str) else json.dumps(obj), encoding="utf-8")
    return path


@needs_real
@pytest.mark.realdata
def test_real_site_file():
    # README: floors B1 and F1, plan +y is geographic north (0°), location unknown
    site = load_site(REAL / "site.json")
    assert set(site.floors) == {"B1", "F1"}
    assert site.plan_rotation_deg == 0.0
    assert site.latitude_deg is None and site.date is None and not site.has_location
    for floor, plan in site.floors.items():
        assert plan.is_absolute() and plan.is_file()
        assert plan == (REAL / floor / "floor.plan.geojson").resolve()


def test_site_fields_and_unknown_floor(tmp_path):
    p = _write(
        tmp_path / "s" / "site.json",
        {"name": "Harbour Hall", "floors": [{"floor": "G", "plan": "G/g.plan.geojson"}],
         "latitude_deg": 48.5, "longitude_deg": -3.25, "date": "2025-06-01", "plan_rotation_deg": 12.5},
    )
    site = load_site(p)
    assert site.name == "Harbour Hall" and site.has_location
    assert site.date.isoformat() == "2025-06-01"
    assert site.plan_path("G") == (tmp_path / "s" / "G" / "g.plan.geojson").resolve()
    with pytest.raises(ConfigError, match="floors are: G"):
        site.plan_path("L9")


def test_site_json_error_has_line_and_column(tmp_path):
    text = '{\n  "name": "x",\n  "floors": [}\n'
    p = _write(tmp_path / "site.json", text)
    with pytest.raises(json.JSONDecodeError) as ref:  # reference: Python's json parser
        json.loads(text)
    with pytest.raises(FormatError) as err:
        load_site(p)
    assert err.value.line == ref.value.lineno == 3
    assert err.value.column == ref.value.colno
    assert str(p) in str(err.value)


@pytest.mark.parametrize(
    "doc, match",
    [
        ({"floors": []}, "non-empty list"),
        ({"floors": [{"floor": "G"}]}, r"floors\[0\]"),
        ({"floors": [{"floor": "G", "plan": "a"}, {"floor": "G", "plan": "b"}]}, "listed twice"),
        ({"floors": [{"floor": "G", "plan": "a"}], "date": "June"}, "ISO date"),
        # ISO 8601 calendar date YYYY-MM-DD only (no basic or week forms, no trailing text)
        ({"floors": [{"floor": "G", "plan": "a"}], "date": "20240501"}, "ISO date"),
        ({"floors": [{"floor": "G", "plan": "a"}], "date": "2024-W18-3"}, "ISO date"),
        ({"floors": [{"floor": "G", "plan": "a"}], "date": "2024-05-01xyz"}, "ISO date"),
        ({"floors": [{"floor": "G", "plan": "a"}], "plan_rotation_deg": 400}, "plan_rotation_deg"),
        ({"floors": [{"floor": "G", "plan": "a"}], "latitude_deg": 123}, "latitude_deg"),
        ({"floors": [{"floor": "G", "plan": "a"}], "plan_rotation_deg": "north"}, "plan_rotation_deg"),
    ],
)
def test_site_rejects_bad_members(tmp_path, doc, match):
    with pytest.raises(FormatError, match=match):
        load_site(_write(tmp_path / "site.json", doc))


# -- walk sets --------------------------------------------------------------
def _touch(path):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("t\n", encoding="utf-8")
    return path


def test_walk_name():
    assert walk_name("a/walk_001.log.csv") == "walk_001"
    assert walk_name("hh_002.log.csv.gz") == "hh_002"
    assert walk_name("walk_001.checkpoints.csv") is None
    assert walk_name(".log.csv") is None


def test_find_walks_files_folders_and_companions(tmp_path):
    d = tmp_path / "F"
    _touch(d / "walk_000.log.csv")
    _touch(d / "walk_000.checkpoints.csv")
    _touch(d / "walk_001.log.csv.gz")
    _touch(d / "walk_001.checkpoints.csv.gz")
    _touch(d / "walk_001.track.csv")
    _touch(d / "notes.txt")
    _touch(d / "sub" / "walk_002.log.csv")
    walks = find_walks([d, d / "walk_000.log.csv"])  # given twice -> once
    assert [w.name for w in walks] == ["walk_000", "walk_001"]
    assert walks[0].checkpoints.name == "walk_000.checkpoints.csv" and walks[0].track is None
    assert walks[1].checkpoints.name == "walk_001.checkpoints.csv.gz"
    assert walks[1].track.name == "walk_001.track.csv"
    assert [w.name for w in find_walks(d, recursive=True)] == ["walk_000", "walk_001", "walk_002"]
    with pytest.raises(DataError, match="not a walk log"):
        find_walks(d / "notes.txt")
    with pytest.raises(DataError, match="no such file"):
        find_walks(d / "missing.log.csv")
    with pytest.raises(DataError, match="no walk logs"):
        find_walks(d / "sub" / ".." / ".." )
    # `gzip -k walk_000.log.csv` leaves the walk twice in the folder: an
    # error naming both, not the walk counted twice
    _touch(d / "walk_000.log.csv.gz")
    with pytest.raises(DataError, match=r"walk 'walk_000' is stored twice in this folder, as walk_000\.log\.csv and "
                                        r"walk_000\.log\.csv\.gz"):
        find_walks(d)
    # the same name in two folders is two walks (two floors)
    _touch(tmp_path / "G" / "walk_000.log.csv")
    assert len(find_walks([d / "walk_000.log.csv", tmp_path / "G"])) == 2


def test_split_selection(tmp_path):
    d = tmp_path / "F"
    for i in range(4):
        _touch(d / f"walk_{i:03d}.log.csv")
    sp = _write(d / "split.json", {"survey": ["walk_000", "walk_002"], "test": ["walk_001"]})
    split = load_split(sp)
    assert [w.name for w in find_walks(d, split=sp, part="survey")] == ["walk_000", "walk_002"]
    assert [w.name for w in select_walks(find_walks(d), split, "test")] == ["walk_001"]
    with pytest.raises(ConfigError):
        select_walks(find_walks(d), split, "train")
    bad = _write(d / "bad.json", {"survey": ["walk_000"], "test": ["walk_000"]})
    with pytest.raises(DataError, match="both survey and test"):
        load_split(bad)
    # a log file name stands for its walk; a name that matches no walk given
    # is a warning naming the split file; a member in the wrong case is an error
    sp2 = _write(d / "names.json", {"survey": ["walk_000.log.csv", "walk_009"], "test": [], "seed": 0})
    with pytest.warns(LodemapWarning, match=r"names\.json: 1 of the 2 survey walks .* not among .*: walk_009$"):
        assert [w.name for w in find_walks(d, split=sp2, part="survey")] == ["walk_000"]
    cased = _write(d / "cased.json", {"Survey": ["walk_000"], "test": []})
    with pytest.raises(FormatError, match=r"cased\.json: a split file needs lists 'survey' and 'test' \(lower case\)"):
        load_split(cased)
    with pytest.raises(DataError, match=r"split\.json: no walk left .* e\.g\. walk_000, walk_002"):
        find_walks(d / "walk_003.log.csv", split=sp, part="survey")


@needs_full
@pytest.mark.realdata
def test_real_split_counts():
    # README: F1 80 survey / 26 test, B1 118 survey / 39 test; the split is
    # numpy.random.RandomState(0).permutation(n) over the sorted names
    # (numpy is the reference for the permutation)
    for floor, (n_survey, n_test) in {"F1": (80, 26), "B1": (118, 39)}.items():
        d = FULL / floor
        split = load_split(d / "split.json")
        survey = find_walks(d, split=split, part="survey")
        test = find_walks(d, split=split, part="test")
        assert (len(survey), len(test)) == (n_survey, n_test)
        assert all(w.checkpoints is not None for w in survey + test)
        names = sorted(w.name for w in find_walks(d))
        perm = np.random.RandomState(0).permutation(len(names))
        expect = sorted(names[i] for i in perm[: round(0.75 * len(names))])
        assert sorted(w.name for w in survey) == expect


@needs_real
@pytest.mark.realdata
def test_vendored_split_is_a_subset_with_companions():
    # tests/data/real/README: the vendored split keeps the first survey and
    # test walks; every listed walk has its log and checkpoints beside it
    for floor in ("F1", "B1"):
        d = REAL / floor
        split = load_split(d / "split.json")
        survey = find_walks(d, split=split, part="survey")
        assert [w.name for w in survey] == sorted(split["survey"])
        assert all(w.checkpoints is not None and w.log.is_file() for w in survey)
