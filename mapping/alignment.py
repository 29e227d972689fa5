"""The rotation between the earth frame and the plan frame, from survey
walks.

Along each straight checkpoint segment, the plan bearing of the segment
(from the checkpoints) is compared with the direction of the dead-reckoning
displacement over the same time span (the distance-weighted mean of the
earth-frame motion headings). Their difference is one estimate of
``earth_to_plan_rad`` (plan heading = earth heading + earth_to_plan_rad,
counter-clockwise). The estimates are combined by a circular median (robust
to the wrong turns and mis-tapped checkpoints of a few segments), with a
MAD-based standard error (``1.2533 * 1.4826 * MAD / sqrt(n)``: the
asymptotic standard error of a median of Gaussian data, with the MAD scaled
to a standard deviation).

Frame convention: with ``plan_rotation_deg`` = rho (clockwise from
true north to plan +y) and declination D (east positive),
``earth_to_plan = radians(rho - D)``. When the site gives latitude,
longitude and date, D comes from the IGRF model
(:func:`fingerprint.geomag.background_field`) and the plan rotation implied
by the walks, ``rho = degrees(earth_to_plan) + D``, is reported beside the
one in the site file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from fingerprint.errors import ConvergenceError, DataError

from .survey import segment_fits

__all__ = ["Alignment", "estimate_earth_to_plan", "circular_median", "wrap_angle", "expected_earth_to_plan"]


def wrap_angle(a):
    """Angles wrapped to [-pi, pi)."""
    return (np.asarray(a, dtype=float) + np.pi) % (2 * np.pi) - np.pi


def circular_median(angles_rad, weights=None):
    """The sample angle minimising the (weighted) sum of absolute wrapped
    differences to all angles (a circular median; O(n²), n is a few
    thousand at most).

    Parameters
    ----------
    angles_rad : (n,) float
    weights : (n,) float or None

    Returns
    -------
    float, radians in [-pi, pi)
    """
    a = wrap_angle(angles_rad).reshape(-1)
    if a.size == 0:
        raise DataError("circular median of no angles")
    w = np.ones_like(a) if weights is None else np.asarray(weights, dtype=float).reshape(-1)
    cost = np.zeros(a.size)
    for s in range(0, a.size, 1024):
        d = np.abs(wrap_angle(a[None, :] - a[s : s + 1024, None]))
        cost[s : s + 1024] = d @ w
    return float(a[int(np.argmin(cost))])


@dataclass(frozen=True)
class Alignment:
    """Estimated earth-to-plan rotation.

    Attributes
    ----------
    angle_rad : float, earth_to_plan_rad (plan = earth + angle, CCW)
    sigma_rad : float, standard error of ``angle_rad``
    n_segments : int, straight segments used
    declination_deg : float or None, IGRF declination at the site (east
        positive), when the site gives latitude, longitude and date
    plan_rotation_deg : float or None, the plan rotation implied by the
        walks and the declination (``degrees(angle) + D``)
    site_plan_rotation_deg : float or None, the one in the site file
    expected_rad : float or None, earth_to_plan implied by the site file
        and the declination (``radians(rho - D)``)
    spread_rad : float, robust spread (1.4826 * MAD) of the per-segment
        estimates
    segment_rad : (n,) float, the per-segment estimates
    """

    angle_rad: float
    sigma_rad: float
    n_segments: int
    declination_deg: float | None = None
    plan_rotation_deg: float | None = None
    site_plan_rotation_deg: float | None = None
    expected_rad: float | None = None
    spread_rad: float = float("nan")
    segment_rad: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)

    @property
    def angle_deg(self) -> float:
        return math.degrees(self.angle_rad)

    @property
    def sigma_deg(self) -> float:
        return math.degrees(self.sigma_rad)

    def to_dict(self):
        def r(v, nd=4):
            return None if v is None else round(float(v), nd)

        return {
            "earth_to_plan_deg": r(self.angle_deg),
            "sigma_deg": r(self.sigma_deg),
            "n_segments": self.n_segments,
            "spread_deg": r(math.degrees(self.spread_rad)),
            "declination_deg": r(self.declination_deg),
            "plan_rotation_deg": r(self.plan_rotation_deg),
            "site_plan_rotation_deg": r(self.site_plan_rotation_deg),
            "expected_earth_to_plan_deg": r(None if self.expected_rad is None else math.degrees(self.expected_rad)),
        }


def expected_earth_to_plan(site):
    """(earth_to_plan_rad or None, declination_deg or None) from a Site:
    radians(rho - D) when both the plan rotation and the declination (from
    latitude, longitude, date) are known."""
    decl = None
    if site is not None and site.has_location:
        from fingerprint.geomag import background_field

        decl = float(background_field(site.latitude_deg, site.longitude_deg, site.date).declination_deg)
    rho = None if site is None else site.plan_rotation_deg
    if rho is None or decl is None:
        return None, decl
    return math.radians(rho - decl), decl


def estimate_earth_to_plan(
    walks,
    checkpoints,
    *,
    site=None,
    min_length_m=3.0,
    min_straightness=0.9,
    max_scale_error=0.5,
) -> Alignment:
    """Estimate ``earth_to_plan_rad`` from survey walks and their checkpoints.

    Parameters
    ----------
    walks : list of ProcessedWalk (``motion`` with earth headings)
    checkpoints : list of Checkpoints, one per walk
    site : Site or None; with latitude, longitude and date the declination
        is computed and reported, with the implied plan rotation
    min_length_m : float, shortest checkpoint segment used (plan metres)
    min_straightness : float, smallest |DR displacement| / distance walked
        for a segment to count as straight
    max_scale_error : float, segments whose DR length differs from the
        checkpoint length by more than this fraction are left out (a missed
        or wrong checkpoint)

    Returns
    -------
    Alignment

    Raises
    ------
    DataError
        Mismatched lists.
    ConvergenceError
        No usable straight segment.
    """
    walks = list(walks)
    checkpoints = list(checkpoints)
    if len(walks) != len(checkpoints):
        raise DataError(f"got {len(walks)} walks but {len(checkpoints)} checkpoint sets; expected one per walk")
    est, weight = [], []
    for walk, cps in zip(walks, checkpoints):
        if cps is None or cps.n < 2 or walk.motion is None or walk.motion.n == 0:
            continue
        fit = segment_fits(walk, cps.t, cps.xy, rotation_rad=0.0)
        cp_len = np.abs(fit["cp_disp"])
        dr_len = np.abs(fit["dr_disp"])
        ok = (
            (cp_len >= min_length_m)
            & np.isfinite(fit["ratio"])
            & (fit["straightness"] >= min_straightness)
            & (np.abs(dr_len / np.maximum(cp_len, 1e-9) - 1.0) <= max_scale_error)
        )
        est.append(np.angle(fit["ratio"][ok]))
        weight.append(cp_len[ok])
    a = np.concatenate(est) if est else np.zeros(0)
    if a.size == 0:
        raise ConvergenceError(
            f"no straight checkpoint segment (>= {min_length_m} m, straightness >= {min_straightness}) "
            "to estimate the earth-to-plan rotation from"
        )
    med = circular_median(a)
    dev = np.abs(wrap_angle(a - med))
    mad = float(np.median(dev))
    spread = 1.4826 * mad
    sigma = 1.2533 * spread / math.sqrt(a.size)
    expected, decl = expected_earth_to_plan(site)
    implied = None if decl is None else math.degrees(med) + decl
    return Alignment(
        angle_rad=float(med),
        sigma_rad=float(sigma),
        n_segments=int(a.size),
        declination_deg=decl,
        plan_rotation_deg=implied,
        site_plan_rotation_deg=None if site is None else site.plan_rotation_deg,
        expected_rad=expected,
        spread_rad=float(spread),
        segment_rad=a,
    )
