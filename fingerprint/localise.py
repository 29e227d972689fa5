"""Localisation on a field map: batch (:func:`localise`) and streaming
(:class:`Localiser`) use of the particle filter in ``fingerprint.pf``.

Both feed the same :class:`Localiser`: field samples are buffered, dead-
reckoning increments are merged until they add up to
``FilterSettings.update_min_m`` metres, and each merged increment is one
filter update (move, then weigh by the field samples buffered since the
last update). Pushing the same samples and increments in the same order with
the same seed therefore gives the same track, whether they come one by one
or from a whole log.

Example
-------
>>> import numpy as np
>>> from fingerprint import FieldMap, FloorGraph
>>> g = FloorGraph.from_arrays([[0, 0], [20, 0]], [[0, 1]])
>>> ny, nx = 3, 45
>>> fm = FieldMap("G", np.array([-1.0, -0.5]), 0.5, np.zeros((ny, nx, 3)),
...               np.ones((ny, nx, 3)), np.zeros((ny, nx)), np.ones((ny, nx), bool), g)
>>> loc = Localiser(fm, start_xy=(2.0, 0.0), start_sigma_m=0.5, rng=1)
>>> for k in range(5):
...     _ = loc.push_motion(float(k + 1), 1.0, 0.0)
>>> bool(abs(loc.estimate().xy[0] - 7.0) < 1.0)
True
"""

from __future__ import annotations

import math

import numpy as np

from .errors import DataError
from .pf.estimate import Estimate, cluster_estimate
from .pf.loop import RecoveryTracker, filter_step, initial_state, make_context
from .pf.measurement import window_observation
from .pf.motion import edge_xy
from .pf.settings import PRESETS, FilterSettings, preset
from .records import Track

__all__ = ["FilterSettings", "PRESETS", "preset", "Localiser", "localise", "Estimate"]


def _as_rng(rng):
    if isinstance(rng, np.random.Generator):
        return rng
    return np.random.default_rng(rng)


class Localiser:
    """Streaming particle-filter localisation on one floor's map.

    Parameters
    ----------
    fmap : FieldMap (its graph carries the particles)
    settings : FilterSettings, optional
    start_xy : (2,) float or None; None = global mode (particles over the
        whole graph)
    start_sigma_m : float, spread of the start in tracking mode
    rng : numpy.random.Generator or int seed or None; None draws fresh
        entropy from the operating system (numpy's convention), so two runs
        differ: give a seed to repeat a run
    sensor_noise_ut : float, 1-sigma noise of one magnetometer sample (µT);
        ``settings.sensor_noise_ut`` wins when set; default (or NaN) 1.0
    """

    def __init__(self, fmap, *, settings=None, start_xy=None, start_sigma_m=1.0, rng=None, sensor_noise_ut=None):
        self.settings = FilterSettings() if settings is None else settings
        if not isinstance(self.settings, FilterSettings):
            raise DataError(f"settings must be a FilterSettings, got {type(self.settings).__name__}")
        if fmap.graph.n_edges == 0:
            raise DataError(f"the map of floor {fmap.floor!r} has an empty graph: nowhere to put particles")
        noise = self.settings.sensor_noise_ut
        if noise is None:
            noise = 1.0 if sensor_noise_ut is None or not math.isfinite(sensor_noise_ut) else float(sensor_noise_ut)
        if start_xy is not None:
            start_xy = np.asarray(start_xy, dtype=float).reshape(-1)
            if start_xy.shape != (2,) or not np.all(np.isfinite(start_xy)):
                raise DataError(f"start_xy must be two finite numbers (x, y), got {start_xy.tolist()}")
            if not (start_sigma_m > 0 and math.isfinite(start_sigma_m)):
                raise DataError(f"start_sigma_m must be a finite number > 0, got {start_sigma_m}")
        self.fmap = fmap
        self.mode = "global" if start_xy is None else "tracking"
        self.rng = _as_rng(rng)
        self._ctx = make_context(fmap, self.settings, sensor_noise_ut=noise)
        self.state = initial_state(self._ctx, self.rng, start_xy=start_xy, start_sigma_m=start_sigma_m)
        self._tracker = RecoveryTracker()
        self._mag = []
        self._head = []
        self._acc_len = 0.0
        self._acc_e = 0.0
        self._acc_n = 0.0
        self._last_t = -math.inf
        self._last_heading = 0.0
        self._history = []
        self.n_updates = 0

    @property
    def field_validity(self):
        """Current probability that the map explains this walk's field
        (``FilterSettings.field_valid_prior``; None when that check is off)."""
        if self._ctx.background is None:
            return None
        p = self._tracker.p_field
        return float(self.settings.field_valid_prior if not math.isfinite(p) else p)

    # -- input -----------------------------------------------------------
    def push(self, t, mag_earth_ut, heading_rad):
        """Add field samples (one or many).

        Parameters
        ----------
        t : float or (M,) float, seconds (kept for the caller's bookkeeping)
        mag_earth_ut : (3,) or (M, 3) float, µT, east, north, up
        heading_rad : float or (M,) float, device heading, earth frame
        """
        mag = np.asarray(mag_earth_ut, dtype=float).reshape(-1, 3)
        head = np.asarray(heading_rad, dtype=float).reshape(-1)
        if head.shape[0] != mag.shape[0]:
            raise DataError(f"push: {mag.shape[0]} field samples but {head.shape[0]} headings")
        self._mag.append(mag)
        self._head.append(head)

    def push_motion(self, t, length_m, heading_rad):
        """Add one dead-reckoning increment (a step or an odometry move)
        ending at time ``t`` (s), ``length_m`` metres towards
        ``heading_rad`` (earth, CCW from east). Runs a filter update when the
        merged increments reach ``update_min_m``.

        Returns
        -------
        Estimate or None (no update yet)
        """
        t = float(t)
        length_m = float(length_m)
        if not (math.isfinite(length_m) and length_m >= 0):
            raise DataError(f"motion increment at t={t}: length must be finite and >= 0, got {length_m}")
        if not math.isfinite(float(heading_rad)):
            raise DataError(f"motion increment at t={t}: heading is not finite")
        if t < self._last_t:
            raise DataError(f"motion increments must come in time order: t={t} after t={self._last_t}")
        self._last_t = t
        self._acc_len += length_m
        self._acc_e += length_m * math.cos(heading_rad)
        self._acc_n += length_m * math.sin(heading_rad)
        if self._acc_len >= self.settings.update_min_m and self._acc_len > 0:
            return self._update(t)
        return None

    def flush(self):
        """Apply merged increments still waiting (end of a walk).

        Returns
        -------
        Estimate or None
        """
        if self._acc_len > 0:
            return self._update(self._last_t)
        return None

    # -- filter ----------------------------------------------------------
    def _update(self, t):
        heading = math.atan2(self._acc_n, self._acc_e)
        length = self._acc_len
        self._acc_len = self._acc_e = self._acc_n = 0.0
        obs = None
        if self._mag:
            obs = window_observation(np.concatenate(self._mag), np.concatenate(self._head))
        self._mag, self._head = [], []
        self.state, self._tracker, info = filter_step(
            self.state, length, heading, obs, self._ctx, self.rng, self._tracker
        )
        self._last_heading = obs.heading_rad if obs is not None else heading
        self.n_updates += 1
        est = self._estimate(t, lost=info["lost"])
        self._history.append(est)
        return est

    def _estimate(self, t, *, lost=False):
        s = self.settings
        st = self.state
        graph = self._ctx.graph
        # the filter keeps offsets within their edges: positions without the clip
        xy = np.empty((2, st.n))
        edge_xy(self._ctx.tables, st.edge, st.offset_m, out=xy)
        w = st.weights()
        mean, cov, conf = cluster_estimate(xy.T, w, radius_m=s.cluster_radius_m)
        if s.project_estimate:
            e, o, _ = graph.project(mean[None, :])
            mean = graph.point(e, o)[0]
        sigma = float(np.sqrt(max(np.trace(cov), 0.0)))
        h32 = np.asarray(st.heading_offset_rad, dtype=np.float32)  # float32 sin/cos: vectorised, ~1e-7 rad
        hoff = float(np.arctan2(w @ np.sin(h32).astype(float), w @ np.cos(h32).astype(float)))
        heading = (self._last_heading + self._ctx.earth_to_plan_rad + hoff + np.pi) % (2 * np.pi) - np.pi
        return Estimate(
            t=float(t),
            xy=np.asarray(mean, dtype=float),
            cov=cov,
            sigma_m=sigma,
            confidence=float(conf),
            converged=bool(sigma < s.converge_sigma_m and conf >= s.converge_confidence),
            lost=bool(lost),
            heading_rad=float(heading),
        )

    # -- output ----------------------------------------------------------
    def estimate(self):
        """The current estimate (:class:`Estimate`) of the particle cloud."""
        last = self._history[-1] if self._history else None
        t = last.t if last is not None else (self._last_t if math.isfinite(self._last_t) else 0.0)
        return self._estimate(t, lost=False)

    def particles_xy(self):
        """(N, 2) plan positions of the particles and (N,) weights."""
        return self._ctx.graph.point(self.state.edge, self.state.offset_m), self.state.weights()

    def track(self):
        """Every update so far as a :class:`~fingerprint.records.Track` with
        ``extra`` columns ``sigma_m``, ``confidence``, ``converged``, ``lost``."""
        h = self._history
        k = len(h)
        return Track(
            t=np.array([e.t for e in h], dtype=float),
            xy=np.array([e.xy for e in h], dtype=float).reshape(k, 2),
            heading_rad=np.array([e.heading_rad for e in h], dtype=float),
            extra={
                "sigma_m": np.array([e.sigma_m for e in h], dtype=float),
                "confidence": np.array([e.confidence for e in h], dtype=float),
                "converged": np.array([e.converged for e in h], dtype=bool),
                "lost": np.array([e.lost for e in h], dtype=bool),
            },
        )


def localise(walk, fmap, *, settings=None, start_xy=None, start_sigma_m=1.0, start_time_s=None, rng=None):
    """Localise a processed walk on a map (batch replay).

    Parameters
    ----------
    walk : ProcessedWalk (``t``, ``mag_earth_ut``, ``heading_rad``,
        ``mag_noise_ut``, ``motion``)
    fmap : FieldMap
    settings : FilterSettings, optional
    start_xy : (2,) float or None (global mode)
    start_sigma_m : float, metres
    start_time_s : float, optional; samples and increments up to this time
        are skipped (the walker is at ``start_xy`` then)
    rng : numpy.random.Generator or int seed or None (None: fresh entropy,
        not repeatable; see :class:`Localiser`)

    Returns
    -------
    Track, one row per update (``extra``: sigma_m, confidence, converged, lost)
    """
    loc = Localiser(
        fmap, settings=settings, start_xy=start_xy, start_sigma_m=start_sigma_m, rng=rng,
        sensor_noise_ut=getattr(walk, "mag_noise_ut", None),
    )
    replay(loc, walk, start_time_s=start_time_s)
    return loc.track()


def replay(loc, walk, *, start_time_s=None):
    """Feed a whole walk to a :class:`Localiser` in time order: the field
    samples up to each increment's end, then the increment; finally
    :meth:`Localiser.flush`."""
    t0 = -math.inf if start_time_s is None else float(start_time_s)
    ts = np.asarray(walk.t, dtype=float)
    mag = np.asarray(walk.mag_earth_ut, dtype=float)
    head = np.asarray(walk.heading_rad, dtype=float)
    m = walk.motion
    keep = m.t > t0
    mt, ml, mh = m.t[keep], m.length_m[keep], m.heading_rad[keep]
    lo = int(np.searchsorted(ts, t0, side="right"))
    ends = np.searchsorted(ts, mt, side="right")
    for k in range(mt.shape[0]):
        hi = max(int(ends[k]), lo)
        if hi > lo:
            loc.push(ts[lo:hi], mag[lo:hi], head[lo:hi])
            lo = hi
        loc.push_motion(mt[k], ml[k], mh[k])
    loc.flush()
    return loc
