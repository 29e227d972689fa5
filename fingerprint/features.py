"""Field features per sample, from the earth-frame (ENU) field.

- ``b_up``: vertical component (µT, up positive)
- ``b_h``: horizontal magnitude ``hypot(east, north)``
- ``b_total``: magnitude of the vector
- ``b_fwd``, ``b_left``: the horizontal field along the device's heading and
  90° to its left (heading CCW from east): ``b_fwd = E cos h + N sin h``,
  ``b_left = -E sin h + N cos h``

Each comes with a 1-sigma noise estimate ``<name>_sd`` (µT, (N,)): the
magnetometer noise ``mag_noise_ut`` of the walk for the first three (one
linear combination of three independent components of equal noise, or a
magnitude of them, to first order), and for the heading-relative pair also
the heading uncertainty times the horizontal field,
``sqrt(σ² + (b_h σ_h)²)`` (σ_h = ``heading_sd_rad``, attitude error, not
estimated per sample: a setting).
"""

from __future__ import annotations

import numpy as np

__all__ = ["field_features", "FEATURE_NAMES", "HEADING_SD_RAD"]

FEATURE_NAMES = ("b_up", "b_h", "b_total", "b_fwd", "b_left")
#: Default heading uncertainty used in the b_fwd/b_left noise (5°; common
#: practice for a gyro-led heading over a walk, no source).
HEADING_SD_RAD = np.radians(5.0)


def field_features(walk, *, heading_sd_rad=HEADING_SD_RAD):
    """Features of a :class:`~fingerprint.records.ProcessedWalk`.

    Returns
    -------
    dict of str -> (N,) float: ``b_up, b_h, b_total, b_fwd, b_left`` and
    ``b_up_sd, b_h_sd, b_total_sd, b_fwd_sd, b_left_sd`` (µT).
    """
    b = np.asarray(walk.mag_earth_ut, float)
    h = np.asarray(walk.heading_rad, float)
    e, n, u = b[:, 0], b[:, 1], b[:, 2]
    c, s = np.cos(h), np.sin(h)
    bh = np.hypot(e, n)
    out = {
        "b_up": u.copy(),
        "b_h": bh,
        "b_total": np.sqrt(e * e + n * n + u * u),
        "b_fwd": e * c + n * s,
        "b_left": -e * s + n * c,
    }
    sig = float(walk.mag_noise_ut)
    base = np.full(b.shape[0], sig)
    rel = np.sqrt(sig**2 + (bh * heading_sd_rad) ** 2)
    out.update(b_up_sd=base, b_h_sd=base.copy(), b_total_sd=base.copy(), b_fwd_sd=rel, b_left_sd=rel.copy())
    return out
