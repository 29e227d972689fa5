"""Typed containers for what the readers return and the writers take.

These are the data contract between stages (see DEVELOPERS.md). Every array
is a numpy array; shapes are given in each docstring.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["WalkLog", "Checkpoints", "Track", "Motion", "ProcessedWalk"]


@dataclass(frozen=True, eq=False)
class WalkLog:
    """One walk log (``*.log.csv``, README "Input files").

    Attributes
    ----------
    t : (N,) float, seconds, strictly increasing
    acc : (N, 3) float, m/s², device frame, gravity included; NaN where the
        row has no accelerometer sample
    gyro : (N, 3) float, rad/s, device frame; NaN where missing
    mag : (N, 3) float, µT, device frame, as reported; NaN where missing
    mag_raw : (N, 3) float or None, µT, uncalibrated field when given
    odom : (N, 3) float or None, body-frame increments ``dx_m, dy_m, dyaw_rad``
        since the previous row; NaN where missing
    meta : dict of str -> str
        The ``# key: value`` lines before the header.
    path : str or None
        Where the log was read from.
    meta_lines : dict of str -> int
        The file line of each metadata key (for messages; empty when the
        log was not read from a file).
    """

    t: np.ndarray
    acc: np.ndarray
    gyro: np.ndarray
    mag: np.ndarray
    mag_raw: np.ndarray | None = None
    odom: np.ndarray | None = None
    meta: dict = field(default_factory=dict)
    path: str | None = None
    meta_lines: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.t.shape[0])

    @property
    def platform(self) -> str:
        """``"handheld"`` or ``"robot"`` (metadata ``platform``; default handheld)."""
        return self.meta.get("platform", "handheld").strip().lower()

    @property
    def floor(self) -> str | None:
        """Floor label of the metadata key ``floor``, or None when absent."""
        value = self.meta.get("floor", "").strip()
        return value or None

    @property
    def magnetometer_calibrated(self) -> bool:
        """Whether the device already removed its hard-iron offset."""
        return self.meta.get("magnetometer_calibrated", "no").strip().lower() in {"yes", "true", "1"}

    @property
    def duration_s(self) -> float:
        return float(self.t[-1] - self.t[0]) if self.n > 1 else 0.0


@dataclass(frozen=True, eq=False)
class Checkpoints:
    """Ground-truth or survey-anchor positions (``*.checkpoints.csv``, README "Input files").

    Attributes
    ----------
    t : (K,) float, seconds, same clock as the log
    xy : (K, 2) float, metres, plan frame
    floor : (K,) str or None
    label : (K,) str or None
    lines : (K,) int or None, line of each row in its file (for messages)
    t_column : int or None, column of ``t`` in its file (for messages)
    """

    t: np.ndarray
    xy: np.ndarray
    floor: np.ndarray | None = None
    label: np.ndarray | None = None
    path: str | None = None
    lines: np.ndarray | None = None
    t_column: int | None = None

    @property
    def n(self) -> int:
        return int(self.t.shape[0])


@dataclass(frozen=True, eq=False)
class Track:
    """Positions along a walk (``*.track.csv``, README "Input files"), true or estimated.

    Attributes
    ----------
    t : (K,) float, seconds
    xy : (K, 2) float, metres, plan frame
    heading_rad : (K,) float or None, counter-clockwise from plan +x
    extra : dict of str -> (K,) array
        Further columns (``sigma_m``, ``confidence``, ...).
    """

    t: np.ndarray
    xy: np.ndarray
    heading_rad: np.ndarray | None = None
    extra: dict = field(default_factory=dict)
    path: str | None = None

    def at(self, t_query):
        """Linearly interpolated position at times ``t_query`` ((Q,) s) -> (Q, 2)."""
        t_query = np.asarray(t_query, dtype=float)
        return np.column_stack(
            [np.interp(t_query, self.t, self.xy[:, 0]), np.interp(t_query, self.t, self.xy[:, 1])]
        )


@dataclass(frozen=True, eq=False)
class Motion:
    """Dead-reckoning increments: steps of a walker or odometry of a robot.

    Each increment ``i`` moves ``length_m[i]`` metres in direction
    ``heading_rad[i]`` (earth frame, counter-clockwise from east), ending at
    time ``t[i]``.

    Attributes
    ----------
    t : (M,) float, seconds
    length_m : (M,) float, metres, >= 0
    heading_rad : (M,) float, radians, earth frame, CCW from east
    kind : {"steps", "odometry"}
    """

    t: np.ndarray
    length_m: np.ndarray
    heading_rad: np.ndarray
    kind: str = "steps"

    @property
    def n(self) -> int:
        return int(self.t.shape[0])

    def path(self, start_xy=(0.0, 0.0), rotation_rad=0.0):
        """Integrated positions (M+1, 2) starting at ``start_xy``, with all
        headings rotated by ``rotation_rad`` (earth frame -> plan frame)."""
        h = self.heading_rad + rotation_rad
        d = np.column_stack([self.length_m * np.cos(h), self.length_m * np.sin(h)])
        return np.vstack([np.zeros((1, 2)), np.cumsum(d, axis=0)]) + np.asarray(start_xy, float)


@dataclass(frozen=True, eq=False)
class ProcessedWalk:
    """What the sensor chain makes of one walk log; what mapping and
    localisation consume.

    Attributes
    ----------
    t : (N,) float, seconds
    quat : (N, 4) float, device-to-earth rotation, scalar-last (x, y, z, w) as
        in ``scipy.spatial.transform.Rotation``
    mag_earth_ut : (N, 3) float, µT, calibrated field in the earth frame
        (east, north, up; "north" is the attitude filter's reference, see
        ``fingerprint.attitude``)
    heading_rad : (N,) float, earth-frame heading of the device's forward
        axis (phone: top edge; robot: x), CCW from east
    mag_noise_ut : float, 1-sigma noise of one magnetometer sample, µT
    motion : Motion
    platform : str
    meta : dict, provenance (calibration verdict, parameters used)
    """

    t: np.ndarray
    quat: np.ndarray
    mag_earth_ut: np.ndarray
    heading_rad: np.ndarray
    mag_noise_ut: float
    motion: Motion
    platform: str = "handheld"
    meta: dict = field(default_factory=dict)
    source: str | None = None

    @property
    def n(self) -> int:
        return int(self.t.shape[0])
