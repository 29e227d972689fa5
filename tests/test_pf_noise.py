"""The filter's fast Gaussian jitter (fingerprint.pf._noise.normal32).

Sources: the Box-Muller transform (G. E. P. Box, M. E. Muller, "A note on
the generation of random normal deviates", Ann. Math. Stat. 29, 1958);
distribution checks with scipy.stats (Kolmogorov-Smirnov against the
standard normal, Pearson correlation test; reference library).
"""

import numpy as np
from scipy import stats

from fingerprint.pf._noise import normal32


def test_normal32_is_standard_normal():
    z = normal32(np.random.default_rng(0), 200_001)
    assert z.dtype == np.float32 and z.shape == (200_001,)
    assert np.all(np.isfinite(z))
    assert stats.kstest(z.astype(float), "norm").pvalue > 1e-3
    # both halves of the transform (cos and sin branch) separately
    h = z.size // 2
    assert stats.kstest(z[:h].astype(float), "norm").pvalue > 1e-3
    assert stats.kstest(z[h : 2 * h].astype(float), "norm").pvalue > 1e-3
    # tails: P(|z| > 3) = 2.70e-3 (standard normal table, scipy.stats.norm.sf)
    k = int(np.sum(np.abs(z) > 3.0))
    assert stats.binomtest(k, z.size, 2 * stats.norm.sf(3.0)).pvalue > 1e-3


def test_normal32_pairs_are_uncorrelated_and_seeded():
    # cos and sin outputs of the same pair are independent in Box-Muller,
    # so also uncorrelated in |z| (which a shared radius could break)
    z = normal32(np.random.default_rng(1), 100_000)
    a, b = z[:50_000].astype(float), z[50_000:].astype(float)
    assert stats.pearsonr(a, b).pvalue > 1e-3
    assert stats.pearsonr(a * a, b * b).pvalue > 1e-3
    np.testing.assert_array_equal(normal32(np.random.default_rng(5), 7), normal32(np.random.default_rng(5), 7))
    assert normal32(np.random.default_rng(5), 0).shape == (0,)
