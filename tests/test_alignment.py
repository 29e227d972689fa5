"""Earth-to-plan alignment.

References: numpy.median (a circular median of angles away from the wrap
equals the ordinary median); synthetic walks with a known rotation; a
worked example of the frame convention (plan +y pointing to true east); the
IGRF declination against pygeomag's World Magnetic Model (the two models
agree to a few tenths of a degree; from memory); and the real walks'
"plan bearing minus magnetic azimuth" medians in
shared/real_data/README.md (-2.2° on F1, -1.0° on B1).

Sign of the README check: a bearing is clockwise from north, our headings
are counter-clockwise from plan +x (plan) or east (earth); with
plan heading = 90° - bearing and earth heading = 90° - azimuth,
earth_to_plan = plan heading - earth heading = azimuth - bearing, i.e. the
README's medians correspond to earth_to_plan of about +2.2° (F1) and
+1.0° (B1)."""

import datetime as dt
import math
from pathlib import Path

import numpy as np
import pytest

from _plans_synth import checkpoints_of, make_walk, polyline_walk
from fingerprint.errors import ConvergenceError, DataError
from mapping.alignment import circular_median, estimate_earth_to_plan, expected_earth_to_plan, wrap_angle
from mapping.site import Site
from _realdata import real_dir

ROOT = Path(__file__).resolve().parent


def test_circular_median_matches_numpy_away_from_the_wrap():
    rng = np.random.default_rng(0)
    a = rng.normal(0.3, 0.4, size=101)
    assert circular_median(a) == pytest.approx(np.median(a))  # reference: numpy
    # across the wrap: shift by pi, take numpy's median, shift back
    b = wrap_angle(a + np.pi)
    assert wrap_angle(circular_median(b) - np.pi) == pytest.approx(np.median(a), abs=1e-12)


def _survey(rng, e2p, *, n_walks=6, outliers=0, heading_noise_deg=4.0):
    walks, cps = [], []
    for k in range(n_walks):
        # a random rectilinear route of 5 legs, 4-12 m each
        pts = [np.zeros(2)]
        ang = rng.uniform(0, 2 * np.pi)
        for _ in range(5):
            ang += rng.choice([-1, 1]) * np.pi / 2
            pts.append(pts[-1] + rng.uniform(4, 12) * np.array([np.cos(ang), np.sin(ang)]))
        truth = polyline_walk(np.array(pts), speed=1.0)
        walks.append(make_walk(truth, earth_to_plan_rad=e2p, scale=rng.uniform(0.9, 1.1),
                               heading_noise_rad=np.radians(heading_noise_deg), rng=rng))
        c = checkpoints_of(truth, tap_sigma_m=0.3, rng=rng)
        cps.append(c)
    for i in range(outliers):  # mis-tapped checkpoints: one moved far sideways
        c = cps[i % n_walks]
        xy = c.xy.copy()
        xy[2] += rng.normal(0, 6, size=2)
        cps[i % n_walks] = type(c)(t=c.t, xy=xy)
    return walks, cps


def test_recovers_a_known_rotation_with_outliers():
    rng = np.random.default_rng(11)
    e2p = np.radians(-37.0)
    walks, cps = _survey(rng, e2p, n_walks=8, outliers=3)
    al = estimate_earth_to_plan(walks, cps)
    assert abs(al.angle_rad - e2p) < max(3 * al.sigma_rad, np.radians(0.3))
    assert abs(math.degrees(al.angle_rad - e2p)) < 1.5
    assert 0 < al.sigma_rad < np.radians(2.0)
    assert al.n_segments >= 30 and al.declination_deg is None


def test_uncertainty_is_calibrated_over_seeds():
    # z = (estimate - truth) / sigma over many independent surveys should
    # have a spread near 1 (statistical check on fixed generators)
    z = []
    for seed in range(30):
        rng = np.random.default_rng(100 + seed)
        e2p = rng.uniform(-np.pi, np.pi)
        walks, cps = _survey(rng, e2p, n_walks=3, heading_noise_deg=8.0)
        al = estimate_earth_to_plan(walks, cps)
        z.append(wrap_angle(al.angle_rad - e2p) / al.sigma_rad)
    z = np.array(z)
    assert 0.5 < np.std(z) < 1.8
    assert abs(np.mean(z)) < 3 * np.std(z) / np.sqrt(z.size) + 0.3


def test_frame_convention_worked_example():
    # plan +y points to true east: rho = 90° (clockwise from north to +y);
    # no declination. Walking along plan +x is walking south (x is 90°
    # clockwise of y), earth heading -90° (CCW from east); along plan +y is
    # east, earth heading 0°. Convention: earth_to_plan = radians(rho - D) = +90°.
    rho_deg = 90.0
    compass = {(1, 0): -np.pi / 2, (-1, 0): np.pi / 2, (0, 1): 0.0, (0, -1): np.pi}
    truth = polyline_walk(np.array([[0, 0], [10, 0], [10, 8], [0, 8], [0, 16]], float), speed=1.0)
    walk = make_walk(truth, earth_to_plan_rad=0.0)
    # replace the earth headings by the compass directions of each step
    d = np.diff(truth["at"](np.concatenate([[0.0], truth["step_t"]])), axis=0)
    key = [tuple(np.sign(np.round(v, 9)).astype(int)) for v in d]
    heading = np.array([compass[k] for k in key])
    walk = type(walk)(t=walk.t, quat=walk.quat, mag_earth_ut=walk.mag_earth_ut, heading_rad=walk.heading_rad,
                      mag_noise_ut=0.5, motion=type(walk.motion)(t=walk.motion.t, length_m=walk.motion.length_m,
                                                                  heading_rad=heading))
    al = estimate_earth_to_plan([walk], [checkpoints_of(truth)])
    assert al.angle_rad == pytest.approx(math.radians(rho_deg - 0.0), abs=1e-9)


def test_declination_from_the_site_and_implied_plan_rotation():
    import pygeomag
    site = Site(path=Path("site.json"), name="x", floors={}, latitude_deg=48.5, longitude_deg=-3.25,
                date=dt.date(2025, 7, 1), plan_rotation_deg=12.0)
    ref = pygeomag.GeoMag().calculate(glat=48.5, glon=-3.25, alt=0, time=2025.5).d  # WMM, degrees east
    rng = np.random.default_rng(3)
    expected, decl = expected_earth_to_plan(site)
    assert decl == pytest.approx(ref, abs=0.3)
    assert expected == pytest.approx(math.radians(12.0 - decl))
    walks, cps = _survey(rng, expected, n_walks=4)
    al = estimate_earth_to_plan(walks, cps, site=site)
    assert al.declination_deg == pytest.approx(decl)
    assert al.plan_rotation_deg == pytest.approx(al.angle_deg + decl)
    assert al.plan_rotation_deg == pytest.approx(12.0, abs=3 * al.sigma_deg + 0.2)
    d = al.to_dict()
    assert d["site_plan_rotation_deg"] == 12.0 and d["n_segments"] == al.n_segments


def test_bad_input():
    rng = np.random.default_rng(0)
    walks, cps = _survey(rng, 0.0, n_walks=2)
    with pytest.raises(DataError, match="one per walk"):
        estimate_earth_to_plan(walks, cps[:1])
    with pytest.raises(ConvergenceError, match="straight"):
        estimate_earth_to_plan(walks, cps, min_length_m=1000.0)


def _real_dir():
    return real_dir("F1/split.json")


REAL = _real_dir()


@pytest.mark.skipif(REAL is None, reason="real-data sample not available")
@pytest.mark.realdata
@pytest.mark.parametrize("floor, readme_bearing_minus_azimuth_deg", [("F1", -2.2), ("B1", -1.0)])
def test_real_walks_agree_with_the_readme(floor, readme_bearing_minus_azimuth_deg):
    from fingerprint.logio import read_checkpoints, read_walk_log
    from fingerprint.pipeline import process_walk
    from mapping.site import load_site
    from mapping.walkset import find_walks

    site = load_site(REAL / "site.json")
    found = find_walks(REAL / floor, split=REAL / floor / "split.json", part="survey")
    walks = [process_walk(read_walk_log(w.log)) for w in found]
    cps = [read_checkpoints(w.checkpoints) for w in found]
    al = estimate_earth_to_plan(walks, cps, site=site)
    expected = -readme_bearing_minus_azimuth_deg  # sign: see module docstring
    print(f"{floor}: {al.to_dict()}")
    assert abs(al.angle_deg - expected) < 3 * al.sigma_deg + 0.5
    assert al.sigma_deg < 3.0
    # README: interquartile range about +-10° -> robust spread of order 10-15°
    assert 5.0 < math.degrees(al.spread_rad) < 20.0
    assert al.declination_deg is None and al.site_plan_rotation_deg == 0.0
