"""The field of point magnetic dipoles, vectorised over many observation
points and many dipoles.

For a dipole of moment ``m`` (A·m²) at ``q`` seen from ``p``, with
``r = p - q``::

    B = mu0 / (4 pi) * (3 r (m . r) / |r|^5 - m / |r|^3)        (tesla)

The sum over dipoles is computed with matrix products so that the work per
(point, dipole) pair is a handful of element-wise operations: writing
``s_ij = m_j . r_ij`` and ``w_ij = s_ij / |r_ij|^5``::

    B_i = k * (3 p_i sum_j w_ij - 3 sum_j w_ij q_j - sum_j m_j / |r_ij|^3)

Points are processed in chunks so that memory stays bounded.
"""

from __future__ import annotations

import numpy as np

from ..errors import DataError

__all__ = ["MU0_4PI", "dipole_field_ut", "dipole_field_loop_ut"]

#: mu0 / (4 pi) in T·m/A (exact before the 2019 SI redefinition; the new
#: value differs by 1e-10 relative).
MU0_4PI = 1e-7


def _check(points, positions, moments):
    points = np.asarray(points, dtype=float)
    positions = np.asarray(positions, dtype=float).reshape(-1, 3)
    moments = np.asarray(moments, dtype=float).reshape(-1, 3)
    if points.shape[-1] != 3:
        raise DataError(f"observation points must have 3 coordinates (x, y, z), got shape {points.shape}")
    if positions.shape != moments.shape:
        raise DataError(f"dipole positions {positions.shape} and moments {moments.shape} must have the same shape")
    return points, positions, moments


def dipole_field_ut(points_m, positions_m, moments_am2, *, chunk=256, min_distance_m=1e-3, dtype=np.float64):
    """Summed field of dipoles at observation points, in µT.

    Parameters
    ----------
    points_m : (..., 3) float, metres, observation points
    positions_m : (M, 3) float, metres, dipole positions
    moments_am2 : (M, 3) float, A·m², dipole moments
    chunk : int, observation points per block (memory ~ chunk x M x 24
        bytes; small blocks stay in cache, which is faster)
    min_distance_m : float
        Pairs closer than this are treated as this far apart (the point
        dipole law is singular at the dipole; a sensor is never that close).

    Returns
    -------
    (..., 3) float, µT, same leading shape as ``points_m``
    """
    points, positions, moments = _check(points_m, positions_m, moments_am2)
    shape = points.shape
    p_all = points.reshape(-1, 3)
    out = np.zeros_like(p_all)
    if positions.shape[0] == 0 or p_all.shape[0] == 0:
        return out.reshape(shape)
    # Work relative to the dipoles' centroid so the expanded |p - q|^2 keeps
    # its precision.
    centre = positions.mean(axis=0)
    q = (positions - centre).astype(dtype)
    m = moments.astype(dtype)
    qq = np.einsum("ij,ij->i", q, q)  # (M,)
    mq = np.einsum("ij,ij->i", m, q)  # (M,)
    d2min = float(min_distance_m) ** 2
    k = MU0_4PI * 1e6  # T -> µT
    # The blocks are small: one BLAS thread is faster, and much faster when
    # other processes share the cores (threaded BLAS then spins).
    with _one_blas_thread():
        _accumulate(p_all, centre, q, m, qq, mq, d2min, k, int(chunk), dtype, out)
    return out.reshape(shape)


def _one_blas_thread():
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        import contextlib

        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


def _accumulate(p_all, centre, q, m, qq, mq, d2min, k, chunk, dtype, out):
    for s in range(0, p_all.shape[0], chunk):
        p = (p_all[s : s + chunk] - centre).astype(dtype)
        pp = np.einsum("ij,ij->i", p, p)
        r2 = p @ q.T  # (n, M), becomes |p - q|^2 in place
        r2 *= -2.0
        r2 += pp[:, None]
        r2 += qq[None, :]
        np.maximum(r2, d2min, out=r2)
        inv_r2 = np.reciprocal(r2, out=r2)
        inv_r3 = np.sqrt(inv_r2)
        inv_r3 *= inv_r2  # 1/|r|^3
        w = p @ m.T
        w -= mq[None, :]  # m . r
        w *= inv_r3
        w *= inv_r2  # (m . r) / |r|^5
        b = 3.0 * p * w.sum(axis=1)[:, None] - 3.0 * (w @ q) - inv_r3 @ m
        out[s : s + chunk] = k * b.astype(float)


def dipole_field_loop_ut(points_m, positions_m, moments_am2):
    """Slow, obviously correct twin of :func:`dipole_field_ut` (a Python
    loop over dipoles with the textbook formula); for tests."""
    points, positions, moments = _check(points_m, positions_m, moments_am2)
    out = np.zeros(points.shape)
    for q, m in zip(positions, moments):
        r = points - q
        d = np.linalg.norm(r, axis=-1, keepdims=True)
        rhat = r / d
        out += MU0_4PI * (3.0 * rhat * np.sum(m * rhat, axis=-1, keepdims=True) - m) / d**3
    return out * 1e6
