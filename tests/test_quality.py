"""Map quality on a hand-made map whose answers are worked out by hand:
a linear field (known gradient), known coverage from survey points on one
part of a corridor graph, and a known variance."""

import numpy as np
import pytest
from matplotlib.image import imread
from scipy.spatial import cKDTree

from fingerprint import FieldMap, FloorGraph
from mapping.quality import edge_quality, field_image, map_quality, quality_image


def _map(var_value=0.25, noise_sd=0.3, between_sd=0.0):
    res = 0.25
    xs = np.arange(0, 12.0001, res)
    ys = np.arange(0, 4.0001, res)
    gx, gy = np.meshgrid(xs, ys)
    mean = np.stack([3.0 * gx, -4.0 * gy, np.full(gx.shape, -40.0)], axis=-1)  # |grad| = 5 µT/m
    var = np.full(mean.shape, var_value + between_sd**2)
    survey = np.column_stack([np.linspace(0, 4, 41), np.full(41, 2.0)])
    d, _ = cKDTree(survey).query(np.column_stack([gx.ravel(), gy.ravel()]))
    # corridor along y = 2 from x = 0 to 11 (1 m edges) and a spur up at x = 2
    nodes = np.vstack([np.column_stack([np.arange(12.0), np.full(12, 2.0)]), [[2.0, 3.0]]])
    edges = [[i, i + 1] for i in range(11)] + [[2, 12]]
    g = FloorGraph.from_arrays(nodes, edges)
    meta = {"noise_sd_ut": [noise_sd] * 3, "model": {"between_walk_sd_ut": [between_sd] * 3,
                                                     "hyperparameters": {"magnitude_ut": 5.0}}}
    return FieldMap("T", np.array([0.0, 0.0]), res, mean, var, d.reshape(gx.shape), np.ones(gx.shape, bool), g, 0.0, meta)


def test_localisability_is_gradient_over_sd():
    fm = _map()
    eq = edge_quality(fm)
    inner = slice(1, 10)  # away from the raster edge where np.gradient is one-sided (still exact for a linear field)
    np.testing.assert_allclose(eq["gradient_ut_per_m"][inner], 5.0, rtol=1e-9)
    np.testing.assert_allclose(eq["localisability_per_m"][inner], 5.0 / np.sqrt(0.25 + 0.09), rtol=1e-9)


def test_stretch_beyond_coverage_is_listed_with_end_points():
    fm = _map()
    q = map_quality(fm, coverage_limit_m=2.0)
    # survey reaches x = 4; an edge is flagged when any of its ends/middle
    # is more than 2 m away: edges [6,7] .. [10,11] -> one stretch 6..11
    assert len(q["stretches"]) == 1
    s = q["stretches"][0]
    assert sorted([s["from_xy"][0], s["to_xy"][0]]) == [6.0, 11.0]
    assert s["length_m"] == pytest.approx(5.0)
    assert s["reasons"] == ["coverage"]
    assert s["max_coverage_m"] == pytest.approx(7.0, abs=1e-9)
    assert q["graph"]["fraction_needing_walk"] == pytest.approx(5.0 / 12.0, abs=1e-4)
    # the default sd limit is half the prior field sd; latent sd 0.5 < 2.5
    assert q["limits"]["latent_sd_ut"] == pytest.approx(2.5)


def test_uncertainty_flag_uses_latent_sd_only():
    # a large between-walk term alone must not ask for more survey walks
    fm = _map(var_value=0.25, between_sd=4.0)
    q = map_quality(fm, coverage_limit_m=100.0, sd_limit_ut=1.0)
    assert q["stretches"] == []
    fm2 = _map(var_value=4.0)
    q2 = map_quality(fm2, coverage_limit_m=100.0, sd_limit_ut=1.0)
    assert len(q2["stretches"]) == 1 and q2["stretches"][0]["reasons"] == ["uncertainty"]
    assert q2["stretches"][0]["length_m"] == pytest.approx(12.0)


def test_images_are_written(tmp_path):
    fm = _map()
    for fn, name in ((quality_image, "q.png"), (field_image, "f.png")):
        p = tmp_path / name
        fn(fm, p)
        img = imread(p)  # matplotlib's PNG reader
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
        assert float(img[..., :3].std()) > 0.01  # not blank
