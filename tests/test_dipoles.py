"""Dipole law: against magpylib, against the textbook on-axis and
equatorial formulas, and fast path against its loop twin."""

import math

import numpy as np
import pytest

from fingerprint.errors import DataError
from fingerprint.simulate.dipoles import dipole_field_loop_ut, dipole_field_ut


def _random_setup(rng, n_points=500, n_dipoles=37):
    positions = rng.uniform(-20, 20, size=(n_dipoles, 3))
    moments = rng.normal(0, 50, size=(n_dipoles, 3))
    points = rng.uniform(-20, 20, size=(n_points, 3))
    # keep every pair at least 0.3 m apart (the law is singular at 0)
    d = np.linalg.norm(points[:, None] - positions[None], axis=-1).min(axis=1)
    return points[d > 0.3], positions, moments


def test_against_magpylib():
    # Reference library: magpylib (>= 5, SI units: moment in A·m², B in T),
    # magpylib.misc.Dipole. https://magpylib.readthedocs.io
    import magpylib as magpy
    rng = np.random.default_rng(11)
    points, positions, moments = _random_setup(rng)
    sources = [magpy.misc.Dipole(moment=m, position=q) for q, m in zip(positions, moments)]
    ref_t = magpy.getB(sources, points, sumup=True)
    ours = dipole_field_ut(points, positions, moments, chunk=97) * 1e-6
    scale = np.linalg.norm(ref_t, axis=1)
    rel = np.linalg.norm(ours - ref_t, axis=1) / scale
    assert rel.max() < 1e-6


def test_worked_example_axis_and_equator():
    # Textbook dipole (e.g. Griffiths, Introduction to Electrodynamics,
    # eq. 5.89): on the axis B = mu0 m / (2 pi r^3) along m; in the
    # equatorial plane B = -mu0 m / (4 pi r^3).
    # Worked example: m = 100 A·m² along z, r = 2 m:
    #   axis: 4e-7*pi*100 / (2*pi*8) = 2.5e-6 T = 2.5 µT
    #   equator: -4e-7*pi*100 / (4*pi*8) = -1.25e-6 T = -1.25 µT
    mu0 = 4e-7 * math.pi
    m = 100.0
    r = 2.0
    axis_ut = mu0 * m / (2 * math.pi * r**3) * 1e6
    equator_ut = -mu0 * m / (4 * math.pi * r**3) * 1e6
    assert axis_ut == pytest.approx(2.5)
    assert equator_ut == pytest.approx(-1.25)
    pts = np.array([[0, 0, r], [0, 0, -r], [r, 0, 0], [0, -r, 0]], dtype=float)
    b = dipole_field_ut(pts, [[0, 0, 0]], [[0, 0, m]])
    np.testing.assert_allclose(b[0], [0, 0, axis_ut], atol=1e-12)
    np.testing.assert_allclose(b[1], [0, 0, axis_ut], atol=1e-12)
    np.testing.assert_allclose(b[2], [0, 0, equator_ut], atol=1e-12)
    np.testing.assert_allclose(b[3], [0, 0, equator_ut], atol=1e-12)


def test_inverse_cube_decay_and_linearity():
    # |B| ~ 1/r^3 at fixed direction; B linear in m (dipole law).
    q = np.array([[1.0, 2.0, 0.5]])
    m = np.array([[3.0, -1.0, 2.0]])
    direction = np.array([0.3, -0.5, 0.81])
    direction /= np.linalg.norm(direction)
    b1 = dipole_field_ut(q + direction * 1.5, q, m)
    b2 = dipole_field_ut(q + direction * 3.0, q, m)
    np.testing.assert_allclose(b1, 8.0 * b2, rtol=1e-10)
    np.testing.assert_allclose(dipole_field_ut(q + direction, q, 2.5 * m), 2.5 * dipole_field_ut(q + direction, q, m))


@pytest.mark.parametrize("chunk", [1, 7, 4096])
def test_fast_path_matches_loop(chunk):
    rng = np.random.default_rng(5)
    points, positions, moments = _random_setup(rng, n_points=200, n_dipoles=60)
    fast = dipole_field_ut(points, positions, moments, chunk=chunk)
    slow = dipole_field_loop_ut(points, positions, moments)
    np.testing.assert_allclose(fast, slow, rtol=1e-8, atol=1e-10)


def test_far_from_origin_keeps_precision():
    # a building a few km from the coordinate origin: centring keeps 1e-8
    rng = np.random.default_rng(9)
    points, positions, moments = _random_setup(rng, n_points=50, n_dipoles=20)
    off = np.array([3000.0, -4000.0, 0.0])
    np.testing.assert_allclose(
        dipole_field_ut(points + off, positions + off, moments),
        dipole_field_loop_ut(points, positions, moments),
        rtol=1e-7,
        atol=1e-9,
    )


def test_shapes_and_errors():
    b = dipole_field_ut(np.zeros((4, 5, 3)) + [0, 0, 2.0], [[0, 0, 0]], [[0, 0, 1.0]])
    assert b.shape == (4, 5, 3)
    assert dipole_field_ut(np.ones((3, 3)), np.zeros((0, 3)), np.zeros((0, 3))).shape == (3, 3)
    with pytest.raises(DataError):
        dipole_field_ut(np.ones((3, 2)), [[0, 0, 0]], [[0, 0, 1.0]])
    with pytest.raises(DataError):
        dipole_field_ut(np.ones((3, 3)), [[0, 0, 0]], [[0, 0, 1.0], [1, 0, 0]])


def test_float32_path_close_to_exact():
    rng = np.random.default_rng(3)
    points, positions, moments = _random_setup(rng, n_points=300, n_dipoles=80)
    exact = dipole_field_loop_ut(points, positions, moments)
    fast = dipole_field_ut(points, positions, moments, dtype=np.float32)
    err = np.linalg.norm(fast - exact, axis=1) / np.linalg.norm(exact, axis=1)
    assert np.median(err) < 1e-4 and err.max() < 1e-2
