"""The walk-level check that the map explains the field
(``FilterSettings.field_valid_prior``, ``fingerprint.pf.loop._mix_with_background``).

Two hypotheses for a whole walk, H1 (the field follows the map) and H0 (it
is drawn from the floor-wide spread); by Bayes' rule for two exclusive
hypotheses the posterior of H1 must rise on a walk whose field comes from
the mapped field and fall on a walk whose field comes from another one, and
the mixture likelihood must reduce to the field filter as P(H1) -> 1 and to
the no-field filter as P(H1) -> 0 when the posterior is frozen (gain 0).
These are properties of the model (no outside reference gives these
numbers); the real-walk effect is measured by ``lodemap bench filter --real``.
"""

import dataclasses

import numpy as np
import pytest

from fingerprint.errors import ConfigError
from fingerprint.localise import FilterSettings, Localiser, localise
from fingerprint.pf.measurement import floor_background

import _pf_synth as S

E2P = 0.3


@pytest.fixture(scope="module")
def floor():
    g = S.grid_graph()
    return g, S.field_map(g, earth_to_plan_rad=E2P)


def _walk(g, seed, *, field_seed=0, n_legs=12):
    rng = np.random.default_rng(seed)
    t, xy, hp = S.graph_walk(g, rng, n_legs=n_legs)
    w = S.processed_walk(lambda q: S.bump_field(q, seed=field_seed), t, xy, hp, rng, earth_to_plan_rad=E2P)
    return w, xy


def _run(fm, w, start, settings, seed=3):
    loc = Localiser(fm, settings=settings, start_xy=start, rng=seed, sensor_noise_ut=w.mag_noise_ut)
    return S.feed(loc, w)


def test_background_is_the_floor_wide_spread_of_the_map(floor):
    g, fm = floor
    bg = floor_background(fm, spacing_m=0.25)
    # reference: the same statistics from points drawn uniformly along the
    # graph with FloorGraph.sample_uniform (an independent sampler)
    e, off = g.sample_uniform(200_000, np.random.default_rng(0))
    m, v, _ = fm.lookup(g.point(e, off))
    np.testing.assert_allclose(bg.mean_ut, m.mean(axis=0), atol=0.1)
    np.testing.assert_allclose(np.sqrt(bg.var_ut2), m.std(axis=0), rtol=0.03)
    np.testing.assert_allclose(bg.h_ut, np.hypot(m[:, 0], m[:, 1]).mean(), atol=0.1)


def test_validity_rises_on_the_mapped_field_and_falls_on_another(floor):
    g, fm = floor
    # the check alone: the innovation alarm (recovery_chi2) would re-seed
    # on the foreign field and restore trust in the map for a while (tested
    # in test_localise.py)
    s = FilterSettings(n_particles=600, field_valid_prior=0.5, recovery_chi2=None)
    good, xy = _walk(g, 1)
    bad, xy_b = _walk(g, 1, field_seed=7)  # same path, the field of another floor
    p_good = _run(fm, good, xy[0], s).field_validity
    p_bad = _run(fm, bad, xy_b[0], s).field_validity
    assert p_good > 0.9
    assert p_bad < 0.1


@pytest.mark.parametrize("limit", ["field", "no-field"])
def test_frozen_extremes_reduce_to_the_plain_filters(floor, limit):
    g, fm = floor
    w, xy = _walk(g, 2, n_legs=6)
    base = FilterSettings(n_particles=400, field_valid_prior=None)
    p = 1.0 - 1e-12 if limit == "field" else 1e-12
    mixed = dataclasses.replace(base, field_valid_prior=p, field_valid_gain=0.0)
    ref = base if limit == "field" else dataclasses.replace(base, use_field=False)
    a = localise(w, fm, settings=mixed, start_xy=xy[0], rng=5)
    b = localise(w, fm, settings=ref, start_xy=xy[0], rng=5)
    np.testing.assert_allclose(a.xy, b.xy, atol=1e-6)


def test_streaming_equals_batch_with_the_check(floor):
    g, fm = floor
    w, xy = _walk(g, 4, n_legs=6)
    s = FilterSettings(n_particles=400, field_valid_prior=0.7)
    a = localise(w, fm, settings=s, start_xy=xy[0], start_sigma_m=1.0, rng=9)
    loc = _run(fm, w, xy[0], dataclasses.replace(s), seed=9)
    b = loc.track()
    np.testing.assert_array_equal(a.xy, b.xy)
    assert 0.0 < loc.field_validity < 1.0


def test_validity_is_none_when_off_and_settings_are_checked(floor):
    g, fm = floor
    off = FilterSettings(n_particles=50, field_valid_prior=None)
    assert Localiser(fm, settings=off, start_xy=(3.0, 3.0), rng=0).field_validity is None
    for bad in ({"field_valid_prior": 1.0}, {"field_valid_prior": 0.0}, {"field_valid_switch": 0.7},
                {"field_valid_gain": -1.0}):
        with pytest.raises(ConfigError):
            FilterSettings(**bad)
