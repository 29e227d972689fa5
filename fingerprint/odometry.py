"""Wheeled platforms: motion increments from the ``odom_dx, odom_dy,
odom_dyaw`` columns (body-frame increments since the previous row).

Each row's body-frame displacement is turned into the earth frame with the
platform's heading at that row (from the attitude filter, so that odometry
and field share one frame; the odometry yaw increments are integrated only
to give the heading change *within* a group). Rows are grouped so that the
localiser gets a few updates per second: a group closes when it has moved
``group_m`` metres or lasted ``group_s`` seconds, whichever comes first.
Each group becomes one increment of length ``|Σ d|`` and heading
``atan2(Σ d)``, ending at the time of its last row.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import DataError
from .records import Motion

__all__ = ["OdometrySettings", "odometry_motion"]


@dataclass(frozen=True)
class OdometrySettings:
    group_m: float = 0.5
    group_s: float = 0.5


def odometry_motion(t, odom, heading_rad, *, settings=None):
    """Group odometry increments into earth-frame motion.

    Parameters
    ----------
    t : (N,) s
    odom : (N, 3) body-frame ``dx_m, dy_m, dyaw_rad`` since the previous
        row; NaN rows (no odometry sample) count as no motion
    heading_rad : (N,) earth heading of the body x axis, CCW from east

    Returns
    -------
    Motion (kind "odometry")
    """
    s = settings or OdometrySettings()
    t = np.asarray(t, float)
    odom = np.nan_to_num(np.asarray(odom, float), nan=0.0)
    if odom.shape != (t.size, 3):
        raise DataError(f"odometry must have shape (N, 3) = ({t.size}, 3), got {odom.shape}")
    h = np.asarray(heading_rad, float)
    # heading in the middle of each row's increment: previous heading plus
    # half the row's yaw increment is the exact midpoint for a constant turn
    h_mid = h - 0.5 * odom[:, 2]
    c, sn = np.cos(h_mid), np.sin(h_mid)
    de = c * odom[:, 0] - sn * odom[:, 1]
    dn = sn * odom[:, 0] + c * odom[:, 1]
    step = np.hypot(odom[:, 0], odom[:, 1])
    # group ids from cumulative distance and time (vectorised): a new group
    # starts whenever either counter crosses a multiple of its threshold
    cum_d = np.cumsum(step)
    gid_d = np.floor(cum_d / s.group_m).astype(np.int64) if s.group_m > 0 else np.zeros(t.size, np.int64)
    gid_t = np.floor((t - t[0]) / s.group_s).astype(np.int64) if s.group_s > 0 else np.zeros(t.size, np.int64)
    change = np.concatenate([[True], (np.diff(gid_d) != 0) | (np.diff(gid_t) != 0)])
    gid = np.cumsum(change) - 1
    ng = int(gid[-1]) + 1
    se = np.bincount(gid, weights=de, minlength=ng)
    sn_ = np.bincount(gid, weights=dn, minlength=ng)
    last = np.flatnonzero(np.concatenate([change[1:], [True]]))
    length = np.hypot(se, sn_)
    head = np.where(length > 0, np.arctan2(sn_, se), h[last])
    moving = length > 0
    return Motion(t=t[last][moving], length_m=length[moving], heading_rad=head[moving], kind="odometry")
