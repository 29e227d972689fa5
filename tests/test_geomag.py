"""The IGRF background (ppigrf) against an independent model package
(pygeomag, the World Magnetic Model WMM2025 coefficients it ships)."""

import datetime as dt
import math

import pytest

from fingerprint.errors import ConfigError
from fingerprint.geomag import background_field

# Places spread over the globe (mid latitudes both hemispheres, tropics);
# the demo site's own coordinates are read from demo_building/site.json.
PLACES = [(46.8, -71.95), (-33.9, 151.2), (60.4, 5.3), (1.3, 103.8), (35.0, -106.0), (-23.5, -46.6)]


def _wmm(lat, lon, when, alt_m=0.0):
    # Independent reference: pygeomag (pure-Python WMM), WMM2025 coefficients,
    # valid 2025.0-2030.0. Source: https://github.com/boxpet/pygeomag
    from pygeomag import GeoMag, decimal_year_from_date

    gm = GeoMag(coefficients_file="wmm/WMM_2025.COF")
    return gm.calculate(glat=lat, glon=lon, alt=alt_m / 1000.0, time=decimal_year_from_date(when))


@pytest.mark.parametrize("lat,lon", PLACES)
def test_igrf_matches_wmm(lat, lon):
    when = dt.date(2026, 3, 15)
    ours = background_field(lat, lon, when)
    ref = _wmm(lat, lon, when)
    # Project acceptance: total within 0.5 µT, declination within 0.5°.
    # IGRF-14 and WMM2025 are both fits to the same satellite era; their
    # published differences are tens of nT (from memory).
    assert abs(ours.total_ut - ref.f / 1000.0) < 0.5
    assert abs(ours.declination_deg - ref.d) < 0.5
    assert abs(ours.inclination_deg - ref.i) < 0.5
    # WMM x = north, y = east, z = down (nT)
    assert abs(ours.north_ut - ref.x / 1000.0) < 0.5
    assert abs(ours.east_ut - ref.y / 1000.0) < 0.5
    assert abs(ours.up_ut + ref.z / 1000.0) < 0.5


def test_demo_site_background():
    import json
    from pathlib import Path

    site = json.loads((Path(__file__).resolve().parents[1] / "demo_building" / "site.json").read_text())
    when = dt.date.fromisoformat(site["date"])
    ours = background_field(site["latitude_deg"], site["longitude_deg"], when)
    ref = _wmm(site["latitude_deg"], site["longitude_deg"], when)
    assert abs(ours.total_ut - ref.f / 1000.0) < 0.5
    assert abs(ours.declination_deg - ref.d) < 0.5


def test_altitude_weakens_field():
    # The main field falls off roughly as (a/r)^3: 10 km up at 46.8° N loses
    # about 3 * 10/6371 = 0.47 % of its strength (dipole approximation,
    # common practice, no source). Checked against WMM at the same height.
    low = background_field(46.8, -71.95, "2026-03-15")
    high = background_field(46.8, -71.95, "2026-03-15", alt_m=10_000.0)
    ratio = high.total_ut / low.total_ut
    assert 0.994 < ratio < 0.9965
    ref = _wmm(46.8, -71.95, dt.date(2026, 3, 15), alt_m=10_000.0)
    assert abs(high.total_ut - ref.f / 1000.0) < 0.5


def test_declination_consistent_with_components():
    # the definitions of the geomagnetic elements: tan D = Y / X, F^2 = X^2 +
    # Y^2 + Z^2, and I < 0 south of the magnetic equator, where the field
    # points up (common practice, no source); a point at 33.9° S, 151.2° E
    g = background_field(-33.9, 151.2, dt.datetime(2026, 6, 1, 12))
    assert math.isclose(math.tan(math.radians(g.declination_deg)), g.east_ut / g.north_ut, rel_tol=1e-9)
    assert math.isclose(g.total_ut, math.sqrt(g.east_ut**2 + g.north_ut**2 + g.up_ut**2))
    # southern hemisphere: field points up, inclination negative
    assert g.up_ut > 0 and g.inclination_deg < 0


@pytest.mark.parametrize(
    "args",
    [(91.0, 0.0, "2026-01-01"), (10.0, 500.0, "2026-01-01"), (10.0, 0.0, "2031-01-01"), (10.0, 0.0, "yesterday")],
)
def test_bad_arguments(args):
    with pytest.raises(ConfigError):
        background_field(*args)
