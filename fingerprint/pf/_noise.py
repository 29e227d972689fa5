"""Gaussian noise for the filter's jitter, faster than
``Generator.standard_normal``: the Box-Muller transform of float32
uniforms drawn from the caller's Generator.

``Generator.standard_normal`` costs about 11 ns a number here, the uniforms
about 2.5 ns and the transform (float32 log, sqrt, cos, sin, vectorised)
little more. The uniforms have 24 bits, so ``|z| <= sqrt(2 ln 2**24)``
(5.8 sigma): plenty for random walks and roughening.
"""

from __future__ import annotations

import numpy as np

__all__ = ["normal32"]

_TWO_PI = np.float32(2.0 * np.pi)


def normal32(rng, n):
    """(n,) float32 standard normal numbers from ``rng`` (a numpy Generator).

    Box-Muller: for independent uniforms ``u1, u2``, ``sqrt(-2 ln(1 - u1))``
    times ``cos(2 pi u2)`` and ``sin(2 pi u2)`` are two independent standard
    normals (``1 - u1`` is in (0, 1], so the log is finite).
    """
    h = (int(n) + 1) // 2
    u = rng.random(2 * h, dtype=np.float32)
    r = np.log1p(np.negative(u[:h]))
    r *= np.float32(-2.0)
    np.sqrt(r, out=r)
    a = u[h:]
    a *= _TWO_PI
    out = np.empty(2 * h, dtype=np.float32)
    np.cos(a, out=out[:h])
    np.sin(a, out=out[h:])
    out[:h] *= r
    out[h:] *= r
    return out[:n]
