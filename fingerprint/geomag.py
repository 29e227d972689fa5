"""The geomagnetic background at a site, from the International Geomagnetic
Reference Field (IGRF, evaluated with the ``ppigrf`` package).

Indoors the Earth's field is the smooth background that the building's steel
distorts. It sets the magnitude of what a magnetometer sees far from steel,
the direction that induced magnetisation follows, and the declination that
turns magnetic north into true north.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass

import numpy as np

from .errors import ConfigError

__all__ = ["GeoField", "background_field"]


@dataclass(frozen=True)
class GeoField:
    """The main field at one place and date, geodetic east/north/up frame.

    Attributes
    ----------
    east_ut, north_ut, up_ut : float, µT (north = true/geographic north)
    declination_deg : float, angle of the horizontal field east of true north
    inclination_deg : float, dip below the horizontal (positive downwards,
        as in the northern hemisphere)
    total_ut : float, field magnitude
    """

    east_ut: float
    north_ut: float
    up_ut: float
    declination_deg: float
    inclination_deg: float
    total_ut: float

    @property
    def enu_ut(self):
        """(3,) float, µT, (east, north, up) with north = true north."""
        return np.array([self.east_ut, self.north_ut, self.up_ut])

    @property
    def horizontal_ut(self) -> float:
        return math.hypot(self.east_ut, self.north_ut)


def _as_datetime(date):
    if isinstance(date, _dt.datetime):
        return date
    if isinstance(date, _dt.date):
        return _dt.datetime(date.year, date.month, date.day)
    if isinstance(date, str):
        try:
            return _as_datetime(_dt.date.fromisoformat(date))
        except ValueError as err:
            raise ConfigError(f"date must be ISO 8601 (YYYY-MM-DD), got {date!r}") from err
    raise ConfigError(f"date must be a datetime.date or an ISO string, got {type(date).__name__}")


def background_field(lat_deg, lon_deg, date, *, alt_m=0.0):
    """IGRF main field at a geodetic position and date.

    Parameters
    ----------
    lat_deg : float, geodetic latitude, -90..90
    lon_deg : float, longitude east, -180..360
    date : datetime.date, datetime.datetime or ISO string; the IGRF model
        in ``ppigrf`` (IGRF-14) covers 1900-2030
    alt_m : float, height above the WGS84 ellipsoid, metres

    Returns
    -------
    GeoField
    """
    import ppigrf

    lat = float(lat_deg)
    lon = float(lon_deg)
    if not -90.0 <= lat <= 90.0 or not math.isfinite(lat):
        raise ConfigError(f"latitude must be within -90..90 degrees, got {lat_deg!r}")
    if not -180.0 <= lon <= 360.0 or not math.isfinite(lon):
        raise ConfigError(f"longitude must be within -180..360 degrees, got {lon_deg!r}")
    when = _as_datetime(date)
    if not 1900 <= when.year <= 2030:
        raise ConfigError(f"the IGRF model covers 1900-2030, got date {when.date().isoformat()}")
    be, bn, bu = ppigrf.igrf(lon, lat, float(alt_m) / 1000.0, when)  # nT, geodetic E/N/U
    e, n, u = (float(np.ravel(v)[0]) * 1e-3 for v in (be, bn, bu))
    h = math.hypot(e, n)
    return GeoField(
        east_ut=e,
        north_ut=n,
        up_ut=u,
        declination_deg=math.degrees(math.atan2(e, n)),
        inclination_deg=math.degrees(math.atan2(-u, h)),
        total_ut=math.sqrt(e * e + n * n + u * u),
    )
