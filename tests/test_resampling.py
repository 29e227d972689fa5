"""Resampling schemes against filterpy's reference implementations and the
statistics they must have.

Sources: filterpy.monte_carlo (R. Labbe, reference library from PyPI);
unbiasedness E[offspring_i] = N * w_i and the floor/ceil property of
systematic resampling: R. Douc, O. Cappé, "Comparison of resampling schemes
for particle filtering", ISPA 2005; Pearson chi-square test via scipy.stats.
"""

import numpy as np
import pytest
from filterpy.monte_carlo import resampling as fp
from scipy import stats

from fingerprint.errors import ConfigError, DataError
from fingerprint.pf.resampling import RESAMPLERS, get_resampler, stratified_resample, systematic_resample
from fingerprint.pf.state import effective_sample_size, normalise_log_weights


def _weights(rng, n):
    w = rng.gamma(0.5, size=n)
    return w / w.sum()


@pytest.mark.parametrize("n", [1, 7, 100, 1000])
def test_systematic_equals_filterpy_for_same_uniform(n, monkeypatch):
    rng = np.random.default_rng(n)
    for _ in range(5):
        w = _weights(rng, n)
        u = float(rng.random())
        # filterpy draws its one uniform with numpy.random.random(): hand it ours
        monkeypatch.setattr(fp, "random", lambda *a: u)
        ref = fp.systematic_resample(w)
        np.testing.assert_array_equal(systematic_resample(w, u=u), ref)


def test_systematic_search_equals_numpy_searchsorted():
    # the O(N) search of systematic_resample against numpy.searchsorted
    # (reference library), on weights with zeros, ties and a huge spread
    from fingerprint.pf.resampling import _cumulative, _sorted_search

    rng = np.random.default_rng(12)
    for n in (1, 2, 3, 10, 999, 20000):
        for kind in range(4):
            w = _weights(rng, n)
            if kind == 1:
                w[rng.random(n) < 0.5] = 0.0
            elif kind == 2:
                w = np.round(w * n) + 1.0  # many ties
            elif kind == 3:
                w = np.exp(rng.normal(0, 20, n))
            if not w.sum() > 0:
                w[0] = 1.0
            c = _cumulative(w / w.sum())
            for u in (0.0, float(rng.random()), 0.999999):
                pos = (u + np.arange(n)) / n
                np.testing.assert_array_equal(_sorted_search(c, u), np.searchsorted(c, pos, side="right"))


def test_stratified_equals_filterpy_for_same_uniforms(monkeypatch):
    rng = np.random.default_rng(5)
    n = 500
    w = _weights(rng, n)
    u = rng.random(n)
    monkeypatch.setattr(fp, "random", lambda *a: u)
    np.testing.assert_array_equal(stratified_resample(w, u=u), fp.stratified_resample(w))


def test_systematic_offspring_is_floor_or_ceil_of_n_w():
    # Douc & Cappé 2005: systematic resampling gives each particle
    # floor(N w_i) or ceil(N w_i) offspring.
    rng = np.random.default_rng(1)
    n = 300
    for _ in range(20):
        w = _weights(rng, n)
        counts = np.bincount(systematic_resample(w, rng), minlength=n)
        assert np.all(counts >= np.floor(n * w) - 1e-9) and np.all(counts <= np.ceil(n * w) + 1e-9)
        assert counts.sum() == n


@pytest.mark.parametrize("name", sorted(RESAMPLERS))
def test_offspring_counts_chi_square_against_n_w(name):
    # Pooled over R repetitions the offspring counts of an unbiased scheme
    # have mean R*N*w; for multinomial they are exactly Multinomial(R*N, w)
    # and Pearson's statistic is chi-square(N-1); lower-variance schemes
    # give smaller statistics, so only the upper tail is tested.
    rng = np.random.default_rng(11)
    n, reps = 50, 400
    w = _weights(rng, n)
    w = 0.5 * w + 0.5 / n  # keep every expected count large
    f = get_resampler(name)
    counts = np.zeros(n)
    for _ in range(reps):
        counts += np.bincount(f(w, rng), minlength=n)
    expected = reps * n * w
    chi2 = np.sum((counts - expected) ** 2 / expected)
    assert stats.chi2.sf(chi2, n - 1) > 1e-3
    if name == "multinomial":
        assert stats.chi2.cdf(chi2, n - 1) > 1e-3  # not suspiciously small either


def test_multinomial_counts_follow_multinomial_distribution():
    # One draw of N offspring: Pearson chi-square against N*w, repeated;
    # the p-values of a correct sampler are uniform (Kolmogorov-Smirnov).
    rng = np.random.default_rng(2)
    n = 40
    w = np.linspace(1, 3, n)
    w /= w.sum()
    f = get_resampler("multinomial")
    pv = []
    for _ in range(300):
        c = np.bincount(f(np.repeat(w, 25) / 25, rng), minlength=n * 25).reshape(n, 25).sum(axis=1)
        e = n * 25 * w
        pv.append(stats.chi2.sf(np.sum((c - e) ** 2 / e), n - 1))
    assert stats.kstest(pv, "uniform").pvalue > 1e-3


@pytest.mark.parametrize("name", sorted(RESAMPLERS))
def test_scaling_weights_changes_nothing(name):
    rng = np.random.default_rng(3)
    w = _weights(rng, 200)
    a = get_resampler(name)(w, np.random.default_rng(9))
    b = get_resampler(name)(w * 1234.5, np.random.default_rng(9))
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("name", sorted(RESAMPLERS))
def test_one_particle_and_degenerate_weights(name):
    f = get_resampler(name)
    rng = np.random.default_rng(0)
    np.testing.assert_array_equal(f(np.array([1.0]), rng), [0])
    w = np.zeros(10)
    w[6] = 1.0
    np.testing.assert_array_equal(f(w, rng), np.full(10, 6))


def test_bad_weights_and_names_raise():
    rng = np.random.default_rng(0)
    with pytest.raises(DataError):
        systematic_resample(np.array([0.5, np.nan]), rng)
    with pytest.raises(DataError):
        systematic_resample(np.zeros(3), rng)
    with pytest.raises(DataError):
        systematic_resample(np.array([-1.0, 2.0]), rng)
    with pytest.raises(ConfigError, match="systematic"):
        get_resampler("bogus")


def test_ess_and_log_weight_normalisation():
    # Kish's ESS: equal weights give N, one non-zero weight gives 1
    # (common practice, no source).
    assert effective_sample_size(np.zeros(64)) == pytest.approx(64)
    lw = np.full(10, -np.inf)
    lw[3] = -1e4  # far below exp's range: log-sum-exp must still work
    assert effective_sample_size(lw) == pytest.approx(1.0)
    out, total = normalise_log_weights(np.log([1.0, 2.0, 5.0]) + 700.0)
    np.testing.assert_allclose(np.exp(out), [0.125, 0.25, 0.625])
    assert total == pytest.approx(700.0 + np.log(8.0))
    _, total = normalise_log_weights(np.full(4, -np.inf))
    assert total == -np.inf


@pytest.mark.parametrize("name", sorted(RESAMPLERS))
def test_no_generator_and_no_uniforms_is_a_clear_error(name):
    with pytest.raises(ConfigError, match="numpy Generator"):
        get_resampler(name)(np.array([0.2, 0.3, 0.5]))
