"""Sensor synthesis: what a phone or a robot's sensors report along a true
trajectory.

- accelerometer: specific force in the device frame (gravity included),
  bias, white noise, quantisation;
- gyroscope: body rates plus a constant bias, a slow bias drift and noise;
- magnetometer: the true field turned into the device frame, distorted by
  the device's soft iron (a matrix near identity) and hard iron (an offset),
  plus noise and quantisation. A phone reports a field from which it has
  already removed most of the hard iron (``magnetometer_calibrated: yes``,
  a residual offset of a few µT stays, new in every session:
  :meth:`Device.for_session`) and also the raw field; a robot's
  bare sensor reports the raw field (``no``);
- timestamps at a nominal rate with jitter;
- robot wheel odometry: body-frame increments with a scale error, random
  slip on every increment and short wheel-spin events.

Default magnitudes (common practice, no source, unless said): phone
accelerometer noise 0.02 m/s², gyro noise 0.0015 rad/s, bias up to a few
mrad/s; magnetometer noise 0.4 µT; resolutions 0.0024 m/s², 0.0011 rad/s,
0.15 µT (close to those of the phone in the vendored real walks, see
``/shared/real_data/README.md``); phone hard iron tens of µT; robot hard
iron from motors and frame up to ~100 µT; odometry scale errors of 1-2 %;
a phone's hard iron wanders by about 0.03 µT/sqrt(s) within a walk (from
memory, see :class:`Device`).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np
from scipy.spatial.transform import Rotation, Slerp

from ..errors import ConfigError
from ..records import WalkLog
from .walkers import G, Trajectory

__all__ = ["Device", "SensorTruth", "synthesize_log"]


@dataclass(frozen=True)
class Device:
    """One device's sensors (all vectors in its own frame).

    Attributes
    ----------
    name, platform : str
    rate_hz : float, nominal sample rate
    jitter_s : float, 1-sigma timestamp jitter
    acc_bias, gyro_bias : (3,) m/s², rad/s
    acc_noise, gyro_noise : float, 1-sigma per sample
    gyro_drift : float, rad/s per sqrt(s), bias random walk
    acc_quant, gyro_quant, mag_quant : float, resolution
    mag_soft : (3, 3), soft-iron matrix (near identity)
    mag_hard : (3,) µT, hard-iron offset of the raw field
    mag_residual : (3,) µT, offset left after the device's own calibration
    mag_noise : float, µT
    calibrated : bool, whether ``mx,my,mz`` has the hard iron removed
    odom_scale, odom_yaw_scale : float, odometry scale factors (robot)
    odom_slip : float, relative 1-sigma noise per odometry increment
    mag_drift : float, µT per sqrt(s), random walk of the hard-iron offset
        within a walk (a phone's own offset moves with temperature and with
        the currents of its screen, radio and processor; from memory: up to
        about 1 µT over some minutes), raw and calibrated field alike
    """

    name: str
    platform: str
    rate_hz: float
    jitter_s: float
    acc_bias: tuple
    acc_noise: float
    acc_quant: float
    gyro_bias: tuple
    gyro_noise: float
    gyro_drift: float
    gyro_quant: float
    mag_soft: tuple
    mag_hard: tuple
    mag_residual: tuple
    mag_noise: float
    mag_quant: float
    calibrated: bool
    odom_scale: float = 1.0
    odom_yaw_scale: float = 1.0
    odom_slip: float = 0.0
    mag_drift: float = 0.0

    @classmethod
    def random_phone(cls, rng, name="phone", *, rate_hz=50.0):
        soft = np.eye(3) + _sym(rng, 0.015)
        return cls(
            name=name, platform="handheld", rate_hz=float(rate_hz), jitter_s=0.0015,
            acc_bias=tuple(rng.normal(0, 0.04, 3)), acc_noise=0.02, acc_quant=0.0024,
            gyro_bias=tuple(rng.normal(0, 0.003, 3)), gyro_noise=0.0015, gyro_drift=2e-5, gyro_quant=0.0011,
            mag_soft=tuple(map(tuple, soft)), mag_hard=tuple(rng.normal(0, 30, 3)),
            mag_residual=tuple(rng.normal(0, 1.5, 3)), mag_noise=0.4, mag_quant=0.15, calibrated=True,
            mag_drift=0.03,
        )

    @classmethod
    def random_robot(cls, rng, name="robot", *, rate_hz=50.0):
        soft = np.eye(3) + _sym(rng, 0.04)
        return cls(
            name=name, platform="robot", rate_hz=float(rate_hz), jitter_s=0.001,
            acc_bias=tuple(rng.normal(0, 0.03, 3)), acc_noise=0.03, acc_quant=0.001,
            gyro_bias=tuple(rng.normal(0, 0.002, 3)), gyro_noise=0.001, gyro_drift=1e-5, gyro_quant=0.0005,
            mag_soft=tuple(map(tuple, soft)), mag_hard=tuple(rng.normal(0, 50, 3)),
            mag_residual=(0.0, 0.0, 0.0), mag_noise=0.3, mag_quant=0.1, calibrated=False,
            odom_scale=float(1 + rng.normal(0, 0.015)), odom_yaw_scale=float(1 + rng.normal(0, 0.02)),
            odom_slip=0.03,
        )

    def for_session(self, rng, *, residual_sd_ut=1.5):
        """The device as it is in one session (one walk).

        A phone keeps re-running its own magnetometer calibration, so the
        offset it leaves in a calibrated field is new every session
        (calibrated devices keep residual errors that differ between devices and sessions);
        its soft iron and raw hard iron belong to the hardware and stay. A
        bare sensor (``calibrated`` False) is returned as it is.

        Parameters
        ----------
        rng : numpy.random.Generator
        residual_sd_ut : float, µT, 1-sigma per axis of the session's
            residual offset (common practice, no source: a few µT)
        """
        if not self.calibrated:
            return self
        return replace(self, mag_residual=tuple(rng.normal(0.0, residual_sd_ut, 3)))

    def to_json(self):
        d = asdict(self)
        return {k: (np.asarray(v).tolist() if isinstance(v, tuple) else v) for k, v in d.items()}


def _sym(rng, sd):
    a = rng.normal(0, sd, (3, 3))
    return 0.5 * (a + a.T)


@dataclass(frozen=True, eq=False)
class SensorTruth:
    """The noise-free quantities at the log's sample times.

    Attributes
    ----------
    t : (N,) s
    xy : (N, 2) m, plan
    z : (N,) m
    heading_rad : (N,) plan heading of the device forward axis
    quat : (N, 4) device -> plan, scalar-last
    mag_plan_ut : (N, 3) true field, plan frame
    mag_device_ut : (N, 3) true field, device frame (before distortion)
    """

    t: np.ndarray
    xy: np.ndarray
    z: np.ndarray
    heading_rad: np.ndarray
    quat: np.ndarray
    mag_plan_ut: np.ndarray
    mag_device_ut: np.ndarray


def _quantise(x, q):
    return np.round(x / q) * q if q > 0 else x


def sample_times(duration_s, rate_hz, jitter_s, *, rng, t0=0.0):
    """Jittered, strictly increasing sample times within ``[0, duration_s]``
    plus ``t0`` (rounded to 0.1 ms). (N,) float."""
    if not rate_hz > 0:
        raise ConfigError(f"sample rate must be > 0, got {rate_hz}")
    n = int(np.floor(duration_s * rate_hz))
    dt = 1.0 / rate_hz
    tn = dt * (np.arange(n) + 0.5)
    jit = np.clip(rng.normal(0, jitter_s, n), -0.3 * dt, 0.3 * dt)
    return np.round(t0 + tn + jit, 4)


def synthesize_log(traj: Trajectory, field_model, device: Device, *, rng, t0=0.0, meta=None):
    """Sample a trajectory with a device's sensors.

    Parameters
    ----------
    traj : Trajectory (fine grid)
    field_model : FieldModel (plan frame)
    device : Device
    rng : numpy.random.Generator
    t0 : float, s, clock value of the trajectory's start
    meta : dict, extra ``# key: value`` metadata

    Returns
    -------
    log : WalkLog (device frame, ``t`` on the log clock)
    truth : SensorTruth (``t`` on the same clock)
    """
    t_rel = sample_times(traj.t[-1], device.rate_hz, device.jitter_s, rng=rng)
    n = t_rel.size
    t_rel = np.clip(t_rel, traj.t[0], traj.t[-1])

    def lin(a):
        a = np.asarray(a)
        if a.ndim == 1:
            return np.interp(t_rel, traj.t, a)
        return np.column_stack([np.interp(t_rel, traj.t, a[:, j]) for j in range(a.shape[1])])

    xy = lin(traj.xy)
    z = lin(traj.z)
    acc_plan = lin(traj.acc_plan)
    omega = lin(traj.omega_body)
    rot = Slerp(traj.t, Rotation.from_quat(traj.quat))(t_rel)
    heading = np.angle(np.exp(1j * lin(np.unwrap(traj.heading_rad))))

    # accelerometer: specific force f = a - g, g = (0, 0, -G)
    f_plan = acc_plan + np.array([0.0, 0.0, G])
    acc = rot.inv().apply(f_plan) + np.asarray(device.acc_bias) + rng.normal(0, device.acc_noise, (n, 3))
    # gyroscope with a constant bias and a slow random-walk drift
    dt = np.diff(t_rel, prepend=t_rel[0])
    drift = np.cumsum(rng.normal(0, 1, (n, 3)) * np.sqrt(dt)[:, None], axis=0) * device.gyro_drift
    gyro = omega + np.asarray(device.gyro_bias) + drift + rng.normal(0, device.gyro_noise, (n, 3))
    # magnetometer
    b_plan = field_model.field(np.column_stack([xy, z]))
    b_dev = rot.inv().apply(b_plan)
    soft = np.asarray(device.mag_soft)
    distorted = b_dev @ soft.T + rng.normal(0, device.mag_noise, (n, 3))
    if device.mag_drift > 0:
        distorted += np.cumsum(rng.normal(0, 1, (n, 3)) * np.sqrt(dt)[:, None], axis=0) * device.mag_drift
    raw = distorted + np.asarray(device.mag_hard)
    raw = _quantise(raw, device.mag_quant)
    if device.calibrated:
        mag = _quantise(distorted + np.asarray(device.mag_residual), device.mag_quant)
    else:
        mag = raw
    odom = None
    if device.platform == "robot":
        yaw = np.unwrap(heading)
        d = np.diff(xy, axis=0, prepend=xy[:1])
        yaw_prev = np.concatenate([yaw[:1], yaw[:-1]])
        c, s = np.cos(yaw_prev), np.sin(yaw_prev)
        dx = c * d[:, 0] + s * d[:, 1]
        dy = -s * d[:, 0] + c * d[:, 1]
        dyaw = np.diff(yaw, prepend=yaw[:1])
        slip = 1.0 + rng.normal(0, device.odom_slip, n)
        # now and then a wheel spins or skids for a moment (about once a
        # minute, 0.3-1 s, 10-30 % too much distance)
        n_events = rng.poisson(t_rel[-1] / 60.0) if device.odom_slip > 0 else 0
        for t_ev, dur, extra in zip(rng.uniform(t_rel[0], t_rel[-1], n_events), rng.uniform(0.3, 1.0, n_events),
                                    rng.uniform(0.1, 0.3, n_events)):
            slip[(t_rel >= t_ev) & (t_rel < t_ev + dur)] += extra
        odom = np.column_stack(
            [
                dx * device.odom_scale * slip,
                dy * device.odom_scale + rng.normal(0, 0.2 * device.odom_slip, n) * np.abs(dx),
                dyaw * device.odom_yaw_scale + rng.normal(0, device.odom_slip, n) * np.abs(dyaw),
            ]
        )
        odom = np.round(odom, 6)
    info = {
        "platform": device.platform,
        "magnetometer_calibrated": "yes" if device.calibrated else "no",
        "rate_hz": f"{device.rate_hz:g}",
        "device": device.name,
        "simulated": "yes",
    }
    info.update({k: str(v) for k, v in (meta or {}).items()})
    log = WalkLog(
        t=np.round(t_rel + t0, 4),
        acc=_quantise(acc, device.acc_quant),
        gyro=_quantise(gyro, device.gyro_quant),
        mag=mag,
        mag_raw=raw,
        odom=odom,
        meta=info,
    )
    truth = SensorTruth(log.t.copy(), xy, z, heading, rot.as_quat(), b_plan, b_dev)
    return log, truth
