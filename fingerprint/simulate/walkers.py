"""Walkers: how a handheld phone or a robot moves along a route.

A walker turns a route polyline into a :class:`Trajectory`: the true sensor
position, height, attitude and kinematic acceleration on a fine uniform time
grid, plus the true steps (handheld) or the true body motion (robot). The
sensor models in :mod:`fingerprint.simulate.sensors` sample it.

Numbers (common practice, no source unless said): walking cadence
1.8-2.0 steps/s; step length 0.6-0.8 m; a phone held in front bounces with
the steps (vertical acceleration swing a_max - a_min of a few m/s²) and is
tilted by 5-20° towards the user with a few degrees of sway; indoor
service robots cruise at 0.6-1.0 m/s with accelerations below 0.5 m/s².

Step length follows the Weinberg relation ``L = K (a_max - a_min)^(1/4)``
(H. Weinberg, "Using the ADXL202 in pedometer and personal navigation
applications", Analog Devices AN-602, 2002): the bounce amplitude of each
step is set from its length and the walker's own constant ``K``, here on
the unfiltered vertical acceleration. People get K in 0.37-0.45: the sensor
chain low-passes |a| at 2 Hz before taking a_max - a_min, which shrinks the
swing of a 1.9 Hz bounce to about 0.55 of itself, and its default constant
fitted on the vendored real walks (0.475 on the filtered signal) then
corresponds to 0.475 * 0.55^(1/4) = 0.41 on the unfiltered one.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.ndimage import gaussian_filter1d, uniform_filter1d
from scipy.spatial.transform import Rotation

from ..errors import ConfigError

__all__ = ["Trajectory", "HandheldWalker", "RobotWalker", "turn_in_hand", "with_calibration_motion", "smooth_path",
           "lateral_offset"]

G = 9.80665


@dataclass(frozen=True, eq=False)
class Trajectory:
    """Truth of one walk on a fine uniform grid.

    Attributes
    ----------
    t : (N,) float, s, uniform with step ``dt``
    xy : (N, 2) float, m, plan position of the sensor
    z : (N,) float, m, sensor height above the floor
    quat : (N, 4) float, device -> plan rotation, scalar-last
    heading_rad : (N,) float, plan heading of the device forward axis
    acc_plan : (N, 3) float, m/s², kinematic acceleration (no gravity)
    omega_body : (N, 3) float, rad/s, angular velocity in the device frame
    step_t : (S,) float, s, step end times (handheld; empty for a robot)
    step_xy : (S + 1, 2) float, body positions at the step events
    platform : str
    params : dict, the walker's parameters (JSON-able)
    """

    t: np.ndarray
    xy: np.ndarray
    z: np.ndarray
    quat: np.ndarray
    heading_rad: np.ndarray
    acc_plan: np.ndarray
    omega_body: np.ndarray
    step_t: np.ndarray
    step_xy: np.ndarray
    platform: str
    params: dict = field(default_factory=dict)

    @property
    def dt(self) -> float:
        return float(self.t[1] - self.t[0])

    @property
    def path_length_m(self) -> float:
        """Length of the body path (steps for a walker, sensor path for a robot)."""
        d = np.diff(self.step_xy, axis=0)
        return float(np.hypot(d[:, 0], d[:, 1]).sum())


# ---------------------------------------------------------------- geometry
def _resample(poly, ds):
    poly = np.asarray(poly, dtype=float)
    seg = np.hypot(*np.diff(poly, axis=0).T)
    keep = np.concatenate([[True], seg > 1e-9])
    poly = poly[keep]
    d = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(poly, axis=0).T))])
    s = np.linspace(0.0, d[-1], max(2, int(np.ceil(d[-1] / ds)) + 1))
    return np.column_stack([np.interp(s, d, poly[:, 0]), np.interp(s, d, poly[:, 1])])


def smooth_path(poly, *, corner_m=0.8, ds=0.05):
    """Resample a polyline every ``ds`` and round its corners: two passes of a
    moving average ``corner_m`` long (end points stay put). Returns (K, 2)."""
    xy = _resample(poly, ds)
    w = max(1, int(round(corner_m / ds))) | 1  # odd: a centred window
    if w > 1 and len(xy) > 2:
        pad = min(2 * w, len(xy) - 1)
        # odd extension about both end points: a symmetric filter then keeps
        # the end points where they are
        head = 2 * xy[0] - xy[pad:0:-1]
        tail = 2 * xy[-1] - xy[-2 : -pad - 2 : -1]
        ext = np.vstack([head, xy, tail])
        for _ in range(2):
            ext = uniform_filter1d(ext, w, axis=0, mode="nearest")
        xy = ext[pad:-pad]
        xy = _resample(xy, ds)
    return xy


def _arc(xy):
    return np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(xy, axis=0).T))])


def _tangent(xy):
    d = np.gradient(xy, axis=0)
    return np.arctan2(d[:, 1], d[:, 0])


def lateral_offset(s_m, *, rng, sd_m, wavelength_m=(6.0, 25.0), n_terms=4):
    """A smooth random sideways offset along arc length: a few sinusoids
    with random wavelengths and phases, scaled to standard deviation
    ``sd_m``. (K,) float, metres."""
    s_m = np.asarray(s_m, dtype=float)
    if sd_m <= 0:
        return np.zeros_like(s_m)
    lam = rng.uniform(*wavelength_m, size=n_terms)
    ph = rng.uniform(0, 2 * np.pi, size=n_terms)
    amp = rng.normal(0, 1, size=n_terms)
    off = (amp[None, :] * np.sin(2 * np.pi * s_m[:, None] / lam[None, :] + ph[None, :])).sum(1)
    return off * sd_m / np.sqrt(0.5 * np.sum(amp**2) + 1e-12)


def _offset_inside(xy, off, free):
    """Apply a sideways offset, shrinking it where the result would leave
    the free space (prepared shapely geometry or None)."""
    th = _tangent(xy)
    nrm = np.column_stack([-np.sin(th), np.cos(th)])
    if free is None:
        return xy + off[:, None] * nrm
    import shapely

    out = xy + off[:, None] * nrm
    for _ in range(6):
        bad = ~shapely.contains_xy(free, out[:, 0], out[:, 1])
        if not bad.any():
            break
        # shrink the offset around the bad stretch (a 2 m window)
        w = np.convolve(bad.astype(float), np.ones(41), mode="same") > 0
        off = np.where(w, off * 0.5, off)
        out = xy + off[:, None] * nrm
    bad = ~shapely.contains_xy(free, out[:, 0], out[:, 1])
    out[bad] = xy[bad]
    return out


def _taper(s_m, ramp_m=1.5):
    """(K,) weights rising from 0 to 1 over ``ramp_m`` at both ends of a leg,
    so that sideways offsets vanish where legs meet."""
    s_m = np.asarray(s_m, dtype=float)
    return np.clip(np.minimum(s_m, s_m[-1] - s_m) / ramp_m, 0.0, 1.0)


def _split_legs(poly):
    """Split a polyline where it turns back on itself (> 150°): the walker
    turns on the spot there. Returns a list of polylines."""
    poly = np.asarray(poly, dtype=float)
    legs, start = [], 0
    for i in range(1, len(poly) - 1):
        a = poly[i] - poly[i - 1]
        b = poly[i + 1] - poly[i]
        c = np.dot(a, b) / (np.linalg.norm(a) * np.linalg.norm(b) + 1e-12)
        if c < np.cos(np.radians(150)):
            legs.append(poly[start : i + 1])
            start = i
    legs.append(poly[start:])
    return [leg for leg in legs if len(leg) >= 2]


def _wrap(a):
    return (a + np.pi) % (2 * np.pi) - np.pi


# ---------------------------------------------------------------- walkers
@dataclass(frozen=True)
class HandheldWalker:
    """A person walking with a phone held in front (screen up, top edge
    forward).

    Parameters
    ----------
    weinberg_k : float, the walker's step constant K (m / (m/s²)^(1/4))
    step_length_m : float, natural step length
    cadence_hz : float, steps per second
    hand_height_m : float, phone height above the floor
    pitch_deg : float, tilt of the top edge up towards the user
    yaw_offset_deg : float, phone heading minus walking direction
    sway_deg : float, amplitude of hand sway (roll/yaw, per stride)
    lateral_sd_m : float, sideways wander about the route centre line
    pauses : int, number of stops along the walk (1.5-4 s each)
    yaw_wander_deg : float, sd of a slow change of the phone's yaw against
        the walking direction (the hand turns the phone by a few degrees
        and back over tens of seconds; from memory)
    bounce_wander : float, relative sd of a slow change of the walker's
        step constant K along the walk (the bounce of the phone for a given
        step length changes with grip, pace and floor; Weinberg-type step
        length estimates are good to a few per cent of the distance walked,
        from memory)
    """

    weinberg_k: float = 0.41
    step_length_m: float = 0.70
    cadence_hz: float = 1.9
    hand_height_m: float = 1.1
    pitch_deg: float = 12.0
    yaw_offset_deg: float = 0.0
    sway_deg: float = 2.0
    lateral_sd_m: float = 0.1
    pauses: int = 1
    yaw_wander_deg: float = 0.0
    bounce_wander: float = 0.0

    @classmethod
    def random(cls, rng, *, lateral_sd_m=0.1, pauses=1):
        """A random person (parameters from the ranges in the module doc)."""
        return cls(
            weinberg_k=float(rng.uniform(0.37, 0.45)),
            step_length_m=float(rng.uniform(0.62, 0.78)),
            cadence_hz=float(rng.uniform(1.8, 2.0)),
            hand_height_m=float(rng.uniform(1.0, 1.2)),
            pitch_deg=float(rng.uniform(5.0, 20.0)),
            yaw_offset_deg=float(rng.normal(0.0, 1.5)),
            sway_deg=float(rng.uniform(1.0, 3.0)),
            lateral_sd_m=float(lateral_sd_m),
            pauses=int(pauses),
            yaw_wander_deg=float(rng.uniform(2.0, 4.0)),
            bounce_wander=float(rng.uniform(0.02, 0.04)),
        )

    def walk(self, poly, *, rng, free=None, dt=0.005, stand_s=(2.5, 2.0)):
        """Trajectory along a route polyline (L, 2) from standstill to
        standstill; ``free`` (shapely geometry) keeps it inside free space."""
        if not 0.3 <= self.step_length_m <= 1.2 or not 0.5 <= self.cadence_hz <= 3.0:
            raise ConfigError("step length must be 0.3-1.2 m and cadence 0.5-3 steps/s")
        legs = _split_legs(poly)
        # body path: legs joined by turns on the spot
        pieces = []  # (xy (K, 2), kind) with kind "walk" or "turn"
        for i, leg in enumerate(legs):
            xy = smooth_path(leg, corner_m=1.6)
            s = _arc(xy)
            off = lateral_offset(s, rng=rng, sd_m=self.lateral_sd_m) * _taper(s)
            xy = _offset_inside(xy, off, free)
            pieces.append(xy)
        # -- time line: stand, walk legs (with turns), pauses, stand
        f0 = self.cadence_hz
        step_times, step_lens = [], []
        t = stand_s[0]
        leg_steps = []
        turns = []  # (t0, t1) of the turns on the spot between legs
        for i, xy in enumerate(pieces):
            total = _arc(xy)[-1]
            if total < 1e-6:
                leg_steps.append((np.zeros(0), np.zeros(0), np.zeros(0)))
                continue
            n_steps = max(1, int(round(total / self.step_length_m)))
            lens = total / n_steps * (1 + 0.03 * rng.standard_normal(n_steps))
            lens *= total / lens.sum()
            cad = f0 * (1 + 0.02 * rng.standard_normal(n_steps))
            dur = 1.0 / cad
            # stops inside this leg at random step indices
            n_p = rng.binomial(self.pauses, 1.0 / max(1, len(pieces))) if self.pauses else 0
            stops = set(rng.choice(np.arange(2, n_steps - 1), size=min(n_p, max(0, n_steps - 3)), replace=False).tolist()) if n_steps > 4 else set()
            starts = []
            for k in range(n_steps):
                if k in stops:
                    t += float(rng.uniform(1.5, 4.0))
                starts.append(t)
                t += dur[k]
                step_times.append(t)
                step_lens.append(lens[k])
            leg_steps.append((np.array(starts), dur, lens))
            if i < len(pieces) - 1:
                turn = float(rng.uniform(1.2, 2.0))  # turn on the spot
                turns.append((t, t + turn))
                t += turn
        t_end = t + stand_s[1]
        tt = np.arange(0.0, t_end, dt)
        n = tt.size
        # step phase and per-sample step length / speed (constant within a step)
        starts = np.concatenate([ls[0] for ls in leg_steps])
        durs = np.concatenate([ls[1] for ls in leg_steps])
        lens_all = np.concatenate([ls[2] for ls in leg_steps])
        offset_s = float(lens_all.sum())
        k = np.searchsorted(starts, tt, side="right") - 1
        kk = np.clip(k, 0, len(starts) - 1)
        in_step = (k >= 0) & (tt < starts[kk] + durs[kk])
        phase = np.where(in_step, (tt - starts[kk]) / durs[kk], np.nan)
        speed = np.where(in_step, lens_all[kk] / durs[kk], 0.0)
        # Weinberg: a_max - a_min = (L / K)^4 within a step; bounce = half;
        # K itself wanders slowly along the walk (periods of 20-90 s)
        k_eff = self.weinberg_k * (1.0 + lateral_offset(starts, rng=rng, sd_m=self.bounce_wander,
                                                        wavelength_m=(20.0, 90.0)))
        amp = np.where(in_step, 0.5 * (lens_all[kk] / k_eff[kk]) ** 4, 0.0)
        # smooth the speed so that starting and stopping take about a step
        # (the total length is kept; single steps change by a few mm)
        v = gaussian_filter1d(speed, sigma=0.22 / dt, mode="nearest")
        s_body = np.cumsum(v) * dt
        s_body *= offset_s / max(s_body[-1], 1e-9)
        # position along the concatenated legs
        cum = np.concatenate([[0.0], np.cumsum([_arc(p)[-1] for p in pieces])])
        xy = np.empty((n, 2))
        tang = np.empty(n)
        for i, p in enumerate(pieces):
            lo, hi = cum[i], cum[i + 1]
            m = (s_body >= lo - 1e-9) & (s_body <= hi + 1e-9) if i == len(pieces) - 1 else (s_body >= lo - 1e-9) & (s_body < hi)
            a = _arc(p)
            loc = np.clip(s_body[m] - lo, 0, a[-1])
            xy[m, 0] = np.interp(loc, a, p[:, 0])
            xy[m, 1] = np.interp(loc, a, p[:, 1])
            tang[m] = np.interp(loc, a, np.unwrap(_tangent(p)))
        # the path is a fine polyline: smooth its kinks in time (~7 cm)
        xy = gaussian_filter1d(xy, sigma=0.05 / dt, axis=0, mode="nearest")
        # heading: follows the walking direction; during a turn on the spot it
        # sweeps smoothly from one leg's end heading to the next one's start
        tang = np.unwrap(tang)
        standing = v < 0.05
        head = tang.copy()
        # fill standing stretches by interpolation of the unwrapped heading
        idx = np.flatnonzero(~standing)
        if idx.size:
            head = np.interp(np.arange(n), idx, tang[idx])
            # standing still (start, end, pauses) holds the heading; only the
            # turns on the spot between legs rotate
            in_turn = np.zeros(n, dtype=bool)
            for t0_, t1_ in turns:
                in_turn |= (tt >= t0_ - 0.3) & (tt <= t1_ + 0.3)
            hold = standing & ~in_turn
            run_start = np.flatnonzero(hold & ~np.concatenate([[False], hold[:-1]]))
            run_end = np.flatnonzero(hold & ~np.concatenate([hold[1:], [False]]))
            for a, b in zip(run_start, run_end):
                ref = a - 1 if a > 0 else min(b + 1, n - 1)
                head[a : b + 1] = head[ref]
        head = gaussian_filter1d(head, sigma=0.15 / dt, mode="nearest")
        # step events (body positions) for the truth
        st = np.array(step_times)
        step_xy = np.vstack([xy[:1], np.column_stack([np.interp(st, tt, xy[:, 0]), np.interp(st, tt, xy[:, 1])])])
        # sway and bounce of the hand, only while walking
        walking = ~np.isnan(phase)
        ph = np.where(walking, phase, 0.0)
        stride = np.cumsum(np.where(walking, v / max(self.step_length_m, 1e-6) * dt, 0.0))  # steps taken
        gate = gaussian_filter1d(walking.astype(float), sigma=0.1 / dt, mode="nearest")
        az = gate * gaussian_filter1d(amp, sigma=0.05 / dt, mode="nearest") * np.cos(2 * np.pi * ph)
        az = np.where(walking, az, 0.0)
        az = gaussian_filter1d(az, sigma=0.01 / dt, mode="nearest")
        omega = 2 * np.pi * self.cadence_hz
        z = self.hand_height_m - az / omega**2
        sway = np.radians(self.sway_deg) * gate * np.sin(np.pi * stride)
        lat_sway = 0.02 * gate * np.sin(np.pi * stride)  # body sways 2 cm per stride
        nrm = np.column_stack([-np.sin(head), np.cos(head)])
        xy_dev = xy + lat_sway[:, None] * nrm
        # the phone's yaw against the walking direction wanders slowly, while
        # walking only (every 13-80 m walked, about 10-60 s; held still when
        # the walker stands, where the chain takes the gyro's bias)
        wander = lateral_offset(s_body, rng=rng, sd_m=np.radians(self.yaw_wander_deg), wavelength_m=(13.0, 80.0))
        yaw = head + np.radians(self.yaw_offset_deg) + 0.5 * sway + wander
        pitch = np.radians(self.pitch_deg) + 0.3 * np.radians(self.sway_deg) * gate * np.sin(2 * np.pi * stride)
        roll = sway
        rot = Rotation.from_euler("ZXY", np.column_stack([yaw - np.pi / 2, pitch, roll]))
        acc = np.column_stack(
            [np.gradient(np.gradient(xy_dev[:, 0], dt), dt), np.gradient(np.gradient(xy_dev[:, 1], dt), dt), az]
        )
        omega_b = _body_rates(rot, dt)
        if free is not None:
            import shapely

            inside = shapely.contains_xy(free, xy_dev[:, 0], xy_dev[:, 1])
            if not inside.all():  # the 2 cm sway stepped out: drop it there
                xy_dev[~inside] = xy[~inside]
        params = {
            "platform": "handheld",
            "weinberg_k": self.weinberg_k,
            "step_length_m": self.step_length_m,
            "cadence_hz": self.cadence_hz,
            "hand_height_m": self.hand_height_m,
            "pitch_deg": self.pitch_deg,
            "yaw_offset_deg": self.yaw_offset_deg,
            "sway_deg": self.sway_deg,
            "yaw_wander_deg": self.yaw_wander_deg,
            "bounce_wander": self.bounce_wander,
            "lateral_sd_m": self.lateral_sd_m,
            "n_steps": int(len(step_times)),
        }
        return Trajectory(tt, xy_dev, z, rot.as_quat(), _wrap(yaw), acc, omega_b, st, step_xy, "handheld", params)


def _body_rates(rot, dt):
    """(N, 3) angular velocity in the body frame from a rotation sequence."""
    rel = rot[:-1].inv() * rot[1:]
    w = rel.as_rotvec() / dt  # body rates between samples
    mid = np.vstack([w[:1], 0.5 * (w[1:] + w[:-1]), w[-1:]])
    return mid


@dataclass(frozen=True)
class RobotWalker:
    """A wheeled robot with a magnetometer on a mast.

    Parameters
    ----------
    cruise_mps : float, top speed
    accel_mps2 : float, acceleration and braking limit
    lateral_accel_mps2 : float, limit in bends (sets the speed in corners)
    yaw_rate_rps : float, spin rate for turning on the spot
    mount_height_m : float, sensor height
    lateral_sd_m : float, sideways deviation from the route centre line
    calibration_spin_turns : float, turns on the spot at the start (lets
        the magnetometer's hard iron be fitted)
    """

    cruise_mps: float = 0.8
    accel_mps2: float = 0.4
    lateral_accel_mps2: float = 0.25
    yaw_rate_rps: float = 0.7
    mount_height_m: float = 0.4
    lateral_sd_m: float = 0.05
    calibration_spin_turns: float = 1.0

    @classmethod
    def random(cls, rng, *, lateral_sd_m=0.05):
        return cls(
            cruise_mps=float(rng.uniform(0.7, 0.9)),
            mount_height_m=float(rng.uniform(0.35, 0.45)),
            lateral_sd_m=float(lateral_sd_m),
        )

    def walk(self, poly, *, rng, free=None, dt=0.005, stand_s=(1.5, 1.5)):
        """Trajectory along a route polyline (L, 2)."""
        if not self.cruise_mps > 0 or not self.accel_mps2 > 0:
            raise ConfigError("robot speed and acceleration must be > 0")
        legs = _split_legs(poly)
        pieces = []
        for leg in legs:
            xy = smooth_path(leg, corner_m=0.6)
            a = _arc(xy)
            xy = _offset_inside(xy, lateral_offset(a, rng=rng, sd_m=self.lateral_sd_m) * _taper(a), free)
            pieces.append(xy)
        ts, xs, ys, hs = [], [], [], []
        t = 0.0
        first_head = _tangent(pieces[0])[0]
        # stand, calibration spin, then the legs with spins in between
        def hold(dur, p, h):
            nonlocal t
            k = max(1, int(round(dur / dt)))
            ts.append(t + dt * np.arange(k))
            xs.append(np.full(k, p[0]))
            ys.append(np.full(k, p[1]))
            hs.append(np.full(k, h))
            t += k * dt

        def spin(p, h0, h1):
            nonlocal t
            dur = abs(h1 - h0) / self.yaw_rate_rps + 0.6
            k = max(2, int(round(dur / dt)))
            u = np.linspace(0, 1, k, endpoint=False)
            prof = u - np.sin(2 * np.pi * u) / (2 * np.pi)  # smooth start/stop
            ts.append(t + dt * np.arange(k))
            xs.append(np.full(k, p[0]))
            ys.append(np.full(k, p[1]))
            hs.append(h0 + (h1 - h0) * prof)
            t += k * dt

        hold(stand_s[0], pieces[0][0], first_head)
        head_now = first_head
        if self.calibration_spin_turns > 0:
            head_now = first_head + 2 * np.pi * self.calibration_spin_turns
            spin(pieces[0][0], first_head, head_now)
            hold(0.5, pieces[0][0], head_now)
        for i, p in enumerate(pieces):
            tang = np.unwrap(_tangent(p))
            tang += np.round((head_now - tang[0]) / (2 * np.pi)) * 2 * np.pi
            if abs(tang[0] - head_now) > 0.05:
                spin(p[0], head_now, tang[0])
            a = _arc(p)
            # curvature-limited speed, then forward/backward acceleration passes
            kappa = np.abs(np.gradient(tang, a, edge_order=1))
            kappa = gaussian_filter1d(kappa, 5)
            vmax = np.minimum(self.cruise_mps, np.sqrt(self.lateral_accel_mps2 / np.maximum(kappa, 1e-6)))
            vmax[0] = vmax[-1] = 0.0
            ds = np.diff(a)
            v = vmax.copy()
            for j in range(1, len(v)):
                v[j] = min(v[j], np.sqrt(v[j - 1] ** 2 + 2 * self.accel_mps2 * ds[j - 1]))
            for j in range(len(v) - 2, -1, -1):
                v[j] = min(v[j], np.sqrt(v[j + 1] ** 2 + 2 * self.accel_mps2 * ds[j]))
            vm = np.maximum(0.5 * (v[1:] + v[:-1]), 0.02)
            tk = np.concatenate([[0.0], np.cumsum(ds / vm)])
            k = max(2, int(np.ceil(tk[-1] / dt)))
            tq = dt * np.arange(k)
            ts.append(t + tq)
            xs.append(np.interp(tq, tk, p[:, 0]))
            ys.append(np.interp(tq, tk, p[:, 1]))
            hs.append(np.interp(tq, tk, tang))
            t += k * dt
            head_now = tang[-1]
        hold(stand_s[1], pieces[-1][-1], head_now)
        tt = np.concatenate(ts)
        tt = dt * np.arange(tt.size)
        xy = np.column_stack([np.concatenate(xs), np.concatenate(ys)])
        head = gaussian_filter1d(np.concatenate(hs), sigma=0.05 / dt, mode="nearest")
        xy = gaussian_filter1d(xy, sigma=0.05 / dt, axis=0, mode="nearest")
        n = tt.size
        # floor unevenness: small pitch and roll (0.3°), smooth
        tilt = gaussian_filter1d(rng.normal(0, 1, (n, 2)), sigma=0.2 / dt, axis=0)
        tilt *= np.radians(0.3) / max(tilt.std(), 1e-12)
        rot = Rotation.from_euler("ZYX", np.column_stack([head, tilt[:, 0], tilt[:, 1]]))
        acc = np.column_stack(
            [np.gradient(np.gradient(xy[:, 0], dt), dt), np.gradient(np.gradient(xy[:, 1], dt), dt), np.zeros(n)]
        )
        params = {
            "platform": "robot",
            "cruise_mps": self.cruise_mps,
            "mount_height_m": self.mount_height_m,
            "lateral_sd_m": self.lateral_sd_m,
            "calibration_spin_turns": self.calibration_spin_turns,
        }
        return Trajectory(tt, xy, np.full(n, self.mount_height_m), rot.as_quat(), _wrap(head), acc,
                          _body_rates(rot, dt), np.zeros(0), xy[:: max(1, int(0.1 / dt))], "robot", params)


def turn_in_hand(xy, *, rng, duration_s=30.0, height_m=1.1, dt=0.005):
    """A phone turned slowly through many orientations at one spot (the
    figure-of-eight motion a magnetometer calibration asks for).

    Parameters
    ----------
    xy : (2,) plan position
    rng : numpy.random.Generator
    duration_s : float
    height_m : float

    Returns
    -------
    Trajectory (no steps; the phone stays at ``xy``)
    """
    n = int(round(duration_s / dt))
    t = dt * np.arange(n)
    u = t / duration_s
    # yaw two full turns, pitch and roll sweep +-70 degrees at other rates
    ph = rng.uniform(0, 2 * np.pi, 2)
    yaw = 4 * np.pi * u + rng.uniform(-np.pi, np.pi)
    pitch = np.radians(70) * np.sin(2 * np.pi * 3.0 * u + ph[0])
    roll = np.radians(70) * np.sin(2 * np.pi * 5.0 * u + ph[1])
    rot = Rotation.from_euler("ZXY", np.column_stack([yaw - np.pi / 2, pitch, roll]))
    fwd = rot.apply([0.0, 1.0, 0.0])
    head = np.arctan2(fwd[:, 1], fwd[:, 0])
    xy_arr = np.tile(np.asarray(xy, float), (n, 1))
    return Trajectory(t, xy_arr, np.full(n, height_m), rot.as_quat(), head, np.zeros((n, 3)), _body_rates(rot, dt),
                      np.zeros(0), xy_arr[:1].repeat(2, 0), "handheld", {"platform": "handheld", "motion": "turn_in_hand"})


def _smoothstep(u):
    """0 -> 1 with zero slope at both ends (u in [0, 1])."""
    u = np.clip(u, 0.0, 1.0)
    return u * u * (3 - 2 * u)


def with_calibration_motion(traj, *, rng, duration_s=30.0, hand_m=0.1, sweeps=(1, 2, 3)):
    """The same walk begun with a magnetometer calibration motion: the
    surveyor stands at the start and turns the phone through many
    orientations (a figure-of-eight in the hand, common practice, no
    source) before walking off.

    From the walk's first attitude the phone spins about its screen normal
    (``sweeps[0]`` turns) while it pitches by up to 70° and rolls by up to
    160°, screen down and back (``sweeps[1]`` and ``sweeps[2]`` sweeps, at
    random phases): by default a slow, deliberate turn through all
    orientations over 30 s. (A quick figure-of-eight, 20 s with sweeps
    (2, 3, 5), calibrates as well, but the sensor chain's attitude keeps the
    accelerometer's plain tilt where the phone is turned that fast, and the
    earth-frame field of those samples is then off by 7-11 µT RMS; slowly,
    by about 0.5 µT.) The hand traces a small figure-of-eight
    (``hand_m``, metres); the motion starts and ends at rest in the walk's
    first attitude, so the gyro sees one smooth rotation. The rest of the
    walk is the given one, ``duration_s`` later.

    Parameters
    ----------
    traj : Trajectory of a handheld walk (starting at rest)
    rng : numpy.random.Generator
    duration_s : float, length of the calibration motion
    hand_m : float, amplitude of the hand's movement
    sweeps : (3,) int, turns about the screen normal, pitch and roll sweeps

    Returns
    -------
    Trajectory (``params["calibration_motion_s"]`` records the duration)
    """
    if not duration_s > 0:
        raise ConfigError(f"calibration motion duration must be > 0, got {duration_s}")
    dt = traj.dt
    n = int(round(duration_s / dt))
    t = dt * np.arange(n)
    u = t / (n * dt)
    env = _smoothstep(u / 0.12) * _smoothstep((1 - u) / 0.12)
    ph = rng.uniform(0, 2 * np.pi, 4)
    n_spin, n_pitch, n_roll = sweeps
    spin = 2 * np.pi * n_spin * (u - np.sin(2 * np.pi * u) / (2 * np.pi)) * rng.choice([-1.0, 1.0])
    pitch = np.radians(70) * env * np.sin(2 * np.pi * n_pitch * u + ph[0])
    roll = np.radians(160) * env * np.sin(2 * np.pi * n_roll * u + ph[1])
    q0 = Rotation.from_quat(traj.quat[0])
    rel = Rotation.from_euler("ZXY", np.column_stack([spin, pitch, roll]))
    rot = Rotation.from_quat(np.vstack([(q0 * rel).as_quat(), traj.quat]))
    # the hand: a small figure-of-eight about the start
    hx = hand_m * env * np.sin(2 * np.pi * 2.0 * u + ph[2])
    hy = 0.5 * hand_m * env * np.sin(2 * np.pi * 4.0 * u + 2 * ph[2])
    hz = 0.5 * hand_m * env * np.sin(2 * np.pi * 3.0 * u + ph[3])
    xy_c = traj.xy[0] + np.column_stack([hx, hy])
    z_c = traj.z[0] + hz
    acc_c = np.column_stack([np.gradient(np.gradient(v, dt), dt) for v in (xy_c[:, 0], xy_c[:, 1], z_c)])
    fwd = (q0 * rel).apply([0.0, 1.0, 0.0])
    head_c = np.arctan2(fwd[:, 1], fwd[:, 0])
    shift = n * dt
    params = {**traj.params, "calibration_motion_s": float(shift)}
    return Trajectory(
        np.concatenate([t, traj.t + shift]),
        np.vstack([xy_c, traj.xy]),
        np.concatenate([z_c, traj.z]),
        rot.as_quat(),
        np.concatenate([head_c, traj.heading_rad]),
        np.vstack([acc_c, traj.acc_plan]),
        _body_rates(rot, dt),
        traj.step_t + shift,
        traj.step_xy,
        traj.platform,
        params,
    )
