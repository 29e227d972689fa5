"""Resampling schemes: free functions ``f(weights, rng) -> indices``,
registered by name in :data:`RESAMPLERS`.

Every function takes normalised weights ``(N,)`` and returns ``(N,)`` int64
indices of the particles to copy. Where a scheme needs uniforms they can be
passed in (``u=``) instead of being drawn from ``rng``, so that the tests can
compare against a reference implementation with the same draws.
"""

from __future__ import annotations

import numpy as np

from ..errors import ConfigError, DataError

__all__ = [
    "RESAMPLERS",
    "get_resampler",
    "systematic_resample",
    "stratified_resample",
    "multinomial_resample",
    "residual_resample",
]


def _check(weights):
    w = np.asarray(weights, dtype=float)
    if w.ndim != 1 or w.size == 0:
        raise DataError(f"weights must be a non-empty 1-D array, got shape {w.shape}")
    total = w.sum()
    # a finite sum means every weight is finite (NaN and inf propagate); the
    # minimum is NaN-aware through the comparison
    if not (np.isfinite(total) and w.min() >= 0):
        raise DataError("weights must be finite and >= 0")
    if not total > 0:
        raise DataError("weights sum to 0: nothing to resample")
    return w / total


def _need_rng(rng):
    if not isinstance(rng, np.random.Generator):
        raise ConfigError(f"resampling needs a numpy Generator (rng) or its uniforms (u), got rng={rng!r}")


def _cumulative(w):
    c = np.cumsum(w)
    c[-1] = 1.0  # guard against round-off: every position < 1 finds a bin
    return c


def systematic_resample(weights, rng=None, *, u=None):
    """Systematic resampling: one uniform ``u`` in [0, 1), positions
    ``(u + arange(N)) / N`` through the cumulative weights.

    Parameters
    ----------
    weights : (N,) float
    rng : numpy.random.Generator, used when ``u`` is None
    u : float, optional, the single uniform

    Returns
    -------
    (N,) int64 indices, sorted
    """
    w = _check(weights)
    if u is None:
        _need_rng(rng)
        u = rng.random()
    return _sorted_search(_cumulative(w), u)


def _sorted_search(c, u):
    """``np.searchsorted(c, positions, side="right")`` for the systematic
    positions ``(u + i) / N`` (``N = c.size``), in O(N) without a binary search per position.

    Index ``j`` receives the positions in ``[c[j-1], c[j])``: with
    ``K(x) = #{i : positions[i] < x}`` it gets ``K(c[j]) - K(c[j-1])`` of them.
    ``K`` is about ``ceil(N x - u)``; it is corrected with the positions
    ``(u + K) / N`` and ``(u + K - 1) / N`` computed as the positions array
    computes them (the same comparisons a binary search makes), so the result
    is exactly searchsorted's.
    """
    n = c.size
    # entries above 1 (round-off before the last) act as 1: every position is < 1
    c = np.minimum(c, 1.0)
    k = c * n
    k -= u
    # 0 <= c <= 1 and 0 <= u < 1: ceil(c n - u) is already within [0, n]
    # (-0.0 at worst), a float array of integers
    np.ceil(k, out=k)
    for _ in range(4):  # rounding can put k off by one, rarely
        p = k + u
        p /= n
        low = p < c  # positions[k] < c: k too small (never for k = n: p >= 1 >= c)
        p = k - 1.0
        p += u
        p /= n
        high = p >= c  # positions[k - 1] >= c: k too large (never for k = 0: p < 0 <= c)
        if not (low.any() or high.any()):
            # position i goes to #{j : c[j] <= position i} = #{j : k[j] <= i}
            idx = np.bincount(k.astype(np.intp), minlength=n + 1)[:n]
            return np.cumsum(idx, out=idx).astype(np.int64, copy=False)
        k += low
        k -= high
    return np.searchsorted(c, (u + np.arange(n)) / n, side="right").astype(np.int64)


def stratified_resample(weights, rng=None, *, u=None):
    """Stratified resampling: one uniform per stratum ``[i/N, (i+1)/N)``.

    ``u`` : (N,) uniforms in [0, 1), optional.
    """
    w = _check(weights)
    n = w.size
    if u is None:
        _need_rng(rng)
        u = rng.random(n)
    positions = (np.asarray(u, dtype=float) + np.arange(n)) / n
    return np.searchsorted(_cumulative(w), positions, side="right").astype(np.int64)


def multinomial_resample(weights, rng=None, *, u=None):
    """Multinomial resampling: N independent draws from the weights.

    ``u`` : (N,) uniforms in [0, 1), optional.
    """
    w = _check(weights)
    n = w.size
    if u is None:
        _need_rng(rng)
        u = rng.random(n)
    return np.searchsorted(_cumulative(w), np.asarray(u, dtype=float), side="right").astype(np.int64)


def residual_resample(weights, rng=None, *, u=None):
    """Residual resampling: ``floor(N w_i)`` copies of each particle, the
    remainder drawn multinomially from the residual weights.

    ``u`` : (R,) uniforms for the R residual draws, optional.
    """
    w = _check(weights)
    n = w.size
    copies = np.floor(n * w).astype(np.int64)
    fixed = np.repeat(np.arange(n), copies)
    r = n - int(copies.sum())
    if r == 0:
        return fixed
    resid = n * w - copies
    if u is None:
        _need_rng(rng)
        u = rng.random(r)
    extra = np.searchsorted(_cumulative(resid / resid.sum()), np.asarray(u, dtype=float), side="right")
    return np.sort(np.concatenate([fixed, extra])).astype(np.int64)


#: name -> resampling function
RESAMPLERS = {
    "systematic": systematic_resample,
    "stratified": stratified_resample,
    "multinomial": multinomial_resample,
    "residual": residual_resample,
}


def get_resampler(name):
    """The resampling function registered as ``name``."""
    try:
        return RESAMPLERS[name]
    except KeyError:
        raise ConfigError(f"unknown resampler {name!r}; expected one of {sorted(RESAMPLERS)}") from None
