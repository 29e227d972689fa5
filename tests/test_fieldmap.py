"""FieldMap lookup against scipy's RegularGridInterpolator (reference
library, method="linear" is bilinear on a 2-D grid)."""

import numpy as np
from scipy.interpolate import RegularGridInterpolator

from fingerprint import FieldMap, FloorGraph


def _map(rng):
    ny, nx = 7, 9
    mean = rng.normal(size=(ny, nx, 3)) * 10
    var = rng.uniform(0.1, 2, size=(ny, nx, 3))
    cov = rng.uniform(0, 5, size=(ny, nx))
    g = FloorGraph.from_arrays([[0, 0], [1, 0]], [[0, 1]])
    return FieldMap("G", np.array([2.0, -1.0]), 0.5, mean, var, cov, np.ones((ny, nx), bool), g)


def test_bilinear_lookup_matches_scipy():
    rng = np.random.default_rng(3)
    fm = _map(rng)
    x0, x1, y0, y1 = fm.extent
    xs = np.linspace(x0, x1, fm.shape[1])
    ys = np.linspace(y0, y1, fm.shape[0])
    q = rng.uniform([x0, y0], [x1, y1], size=(300, 2))
    mean, var, cov = fm.lookup(q)
    for c in range(3):
        ref = RegularGridInterpolator((ys, xs), fm.mean_ut[..., c])(q[:, ::-1])
        np.testing.assert_allclose(mean[:, c], ref, rtol=1e-12, atol=1e-12)
    ref_cov = RegularGridInterpolator((ys, xs), fm.coverage_m)(q[:, ::-1])
    np.testing.assert_allclose(cov, ref_cov, atol=1e-12)


def test_outside_raster_has_infinite_coverage():
    fm = _map(np.random.default_rng(0))
    _, _, cov = fm.lookup(np.array([[-100.0, 0.0], [2.0, -1.0]]))
    assert np.isinf(cov[0]) and np.isfinite(cov[1])
