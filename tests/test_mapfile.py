"""Map file: exact round trip, corruption and mismatch detection.

External checks: the container is read back with Python's standard
``zipfile`` and each member with ``numpy.load(allow_pickle=False)``; the
recorded digests are recomputed with ``hashlib.sha256`` (FIPS 180-4)."""

import hashlib
import io
import json
import zipfile

import numpy as np
import pytest

from fingerprint import FieldMap, FloorGraph
from fingerprint.errors import MapFileError
from fingerprint.mapfile import FORMAT_VERSION, _npy_bytes, _pack, load_map, read_map_meta, save_map


def _fmap(rng, ny=12, nx=17):
    g = FloorGraph.from_arrays(rng.uniform(0, 5, size=(6, 2)), [[0, 1], [1, 2], [2, 3], [3, 4], [4, 5]])
    return FieldMap(
        floor="G",
        origin_xy=np.array([-1.25, 0.5]),
        resolution_m=0.25,
        mean_ut=rng.normal(size=(ny, nx, 3)) * 20,
        var_ut2=rng.uniform(0.01, 4, size=(ny, nx, 3)),
        coverage_m=rng.uniform(0, 9, size=(ny, nx)),
        free=rng.uniform(size=(ny, nx)) > 0.3,
        graph=g,
        earth_to_plan_rad=0.1234567890123,
        meta={"plan_hash": "abc123", "kernel": "curl-free", "hyperparameters": {"length_scale_m": 1.7}, "walks": ["a", "b"], "seed": 4},
    )


@pytest.fixture()
def saved(tmp_path):
    fm = _fmap(np.random.default_rng(1))
    path = tmp_path / "G.map"
    save_map(path, fm)
    return fm, path


def test_round_trip_is_exact(saved):
    fm, path = saved
    back = load_map(path, expected_plan_hash="abc123")
    for name in ("origin_xy", "mean_ut", "var_ut2", "coverage_m", "free"):
        a, b = getattr(fm, name), getattr(back, name)
        assert a.dtype == b.dtype and a.shape == b.shape
        assert a.tobytes() == b.tobytes()  # bit-identical
    assert back.graph.nodes_xy.tobytes() == fm.graph.nodes_xy.tobytes()
    assert np.array_equal(back.graph.edges, fm.graph.edges)
    assert back.earth_to_plan_rad == fm.earth_to_plan_rad
    assert back.resolution_m == fm.resolution_m and back.floor == fm.floor
    assert back.meta == fm.meta


def test_container_is_plain_zip_with_checked_digests(saved):
    _, path = saved
    with zipfile.ZipFile(path) as zf:
        doc = json.loads(zf.read("meta.json"))
        assert doc["format"] == "lodemap-fieldmap" and doc["version"] == FORMAT_VERSION
        for name, entry in doc["arrays"].items():
            data = zf.read(entry["member"])
            assert hashlib.sha256(data).hexdigest() == entry["sha256"]
            arr = np.load(io.BytesIO(data), allow_pickle=False)
            assert list(arr.shape) == entry["shape"]
    # the trailer is the SHA-256 of every byte before it
    raw = path.read_bytes()
    assert hashlib.sha256(raw[:-64]).hexdigest().encode() == raw[-64:]
    assert read_map_meta(path)["plan_hash"] == "abc123"


def test_same_map_gives_same_bytes(tmp_path, saved):
    fm, path = saved
    other = tmp_path / "again.map"
    save_map(other, fm)
    assert other.read_bytes() == path.read_bytes()


def test_flipped_bytes_are_detected(saved, tmp_path):
    _, path = saved
    raw = bytearray(path.read_bytes())
    rng = np.random.default_rng(7)
    positions = np.unique(np.concatenate([[0, 1, len(raw) - 1, len(raw) - 70], rng.integers(0, len(raw), 150)]))
    bad = tmp_path / "bad.map"
    for pos in positions:
        flipped = bytearray(raw)
        flipped[pos] ^= 0x10
        bad.write_bytes(bytes(flipped))
        with pytest.raises(MapFileError):
            load_map(bad)


def test_truncated_files_are_detected(saved, tmp_path):
    _, path = saved
    raw = path.read_bytes()
    bad = tmp_path / "short.map"
    for n in (0, 10, 100, len(raw) // 2, len(raw) - 65, len(raw) - 1):
        bad.write_bytes(raw[:n])
        with pytest.raises(MapFileError, match="truncated|corrupted"):
            load_map(bad)


def test_wrong_version_format_and_plan(saved, tmp_path):
    fm, path = saved
    with pytest.raises(MapFileError, match="expected plan 'zzz'"):
        load_map(path, expected_plan_hash="zzz")
    with zipfile.ZipFile(path) as zf:
        doc = json.loads(zf.read("meta.json"))
        members = {e["member"]: zf.read(e["member"]) for e in doc["arrays"].values()}
    other = tmp_path / "v.map"
    doc2 = dict(doc, version=FORMAT_VERSION + 1)
    other.write_bytes(_pack(doc2, members))
    with pytest.raises(MapFileError, match="version"):
        load_map(other)
    other.write_bytes(_pack(dict(doc, format="something-else"), members))
    with pytest.raises(MapFileError, match="format"):
        load_map(other)
    # a member swapped for an object-dtype array (whose body would be a
    # pickle), with a matching digest: refused by numpy.load(allow_pickle=False)
    # from its header alone, reported as ours. The header is written by hand
    # so that no pickle is ever made, even here.
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, {"descr": "|O", "fortran_order": False, "shape": (1,)})
    buf.write(b"not a pickle")
    pick = buf.getvalue()
    m2 = dict(members)
    m2["arrays/free.npy"] = pick
    d3 = json.loads(json.dumps(doc))
    d3["arrays"]["free"]["sha256"] = hashlib.sha256(pick).hexdigest()
    other.write_bytes(_pack(d3, m2))
    with pytest.raises(MapFileError, match="Object arrays cannot be loaded when allow_pickle=False"):
        load_map(other)
    # wrong shape recorded consistently but inconsistent with the raster
    m4 = dict(members)
    m4["arrays/coverage_m.npy"] = _npy_bytes(np.zeros((3, 3)))
    d4 = json.loads(json.dumps(doc))
    d4["arrays"]["coverage_m"].update(sha256=hashlib.sha256(m4["arrays/coverage_m.npy"]).hexdigest(), shape=[3, 3])
    other.write_bytes(_pack(d4, m4))
    with pytest.raises(MapFileError, match="inconsistent"):
        load_map(other)


def test_not_a_map(tmp_path):
    p = tmp_path / "x.map"
    p.write_text("hello, this is not a map file at all" * 5)
    with pytest.raises(MapFileError, match="not a lodemap map file"):
        load_map(p)
