"""Measurement model: the field observed since the last update against the
map at every particle.

The samples of one update window are averaged (:func:`window_observation`).
A *feature set* turns that observation and the map mean/variance at each
particle into observed features ``y (k,)``, predicted features
``pred (N, k)`` and their map variance ``(N, k)``, plus which component of
the particle's field bias adds to each feature. Feature sets:

- ``"full"``: horizontal field along the device's forward axis and to its
  left, and the vertical field (device frame; the map's plan vector is
  turned by each particle's own heading);
- ``"vertical+horizontal"``: horizontal magnitude and vertical field;
- ``"total"``: magnitude of the field.

The variance of a feature is ``V = map_var_scale * map var + sensor_noise**2 / n_samples +
mismatch**2``. The field bias ``b`` of each particle is Gaussian,
``N(b_hat, P)``, and is marginalised exactly for the Gaussian likelihood.
The likelihood is *tempered* with exponent ``tau`` (``field_temper``)::

    log l = tau * log f(r; V + tau * P),    r = y - pred - b_hat

which is ``tau * log f(r; V)`` without bias and, for a Gaussian ``f``, has
the quadratic form of the exact marginal of ``f(y | b)**tau`` over the bias.
The bias then gets a Kalman update with measurement variance ``V / tau``.
Where the map's coverage at a particle is beyond ``coverage_max_m`` the
particle gets the average likelihood of the covered particles (neither
favoured nor penalised) and its bias is left alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError, ConvergenceError

__all__ = [
    "WindowObservation",
    "window_observation",
    "FEATURE_SETS",
    "LIKELIHOODS",
    "field_log_likelihood",
]


@dataclass(frozen=True)
class WindowObservation:
    """Field samples of one update window, averaged.

    Attributes
    ----------
    n : int, number of samples
    fwd_ut, left_ut, up_ut : float, mean device-frame horizontal components
        (along the device heading and 90° to its left) and vertical, µT
    h_ut : float, mean horizontal magnitude, µT
    total_ut : float, mean magnitude, µT
    heading_rad : float, circular mean device heading, earth frame
    """

    n: int
    fwd_ut: float
    left_ut: float
    up_ut: float
    h_ut: float
    total_ut: float
    heading_rad: float


def window_observation(mag_earth_ut, heading_rad):
    """Average the samples of a window.

    Parameters
    ----------
    mag_earth_ut : (M, 3) float, µT, east, north, up; rows with NaN are dropped
    heading_rad : (M,) float, device heading, earth frame

    Returns
    -------
    WindowObservation, or None when no valid sample is left
    """
    b = np.asarray(mag_earth_ut, dtype=float).reshape(-1, 3)
    h = np.asarray(heading_rad, dtype=float).reshape(-1)
    ok = np.all(np.isfinite(b), axis=1) & np.isfinite(h)
    if not np.all(ok):
        b, h = b[ok], h[ok]
    if b.shape[0] == 0:
        return None
    c, s = np.cos(h), np.sin(h)
    fwd = b[:, 0] * c + b[:, 1] * s
    left = -b[:, 0] * s + b[:, 1] * c
    bh = np.hypot(b[:, 0], b[:, 1])
    return WindowObservation(
        n=int(b.shape[0]),
        fwd_ut=float(fwd.mean()),
        left_ut=float(left.mean()),
        up_ut=float(b[:, 2].mean()),
        h_ut=float(bh.mean()),
        total_ut=float(np.sqrt(bh * bh + b[:, 2] ** 2).mean()),
        heading_rad=float(np.arctan2(s.mean(), c.mean())),
    )


# -- feature sets: (obs, map_mean (N,3), map_var (N,3), psi (N,)) -> y, pred, var, bias_index
# pred and var are (N, k) views of (k, N) arrays (contiguous columns), so
# that the per-feature arithmetic below runs on contiguous rows
def _features_full(obs, mean, var, psi):
    psi = np.asarray(psi, dtype=np.float32)  # float32 cos/sin: vectorised, ~1e-7 rad is plenty
    c, s = np.cos(psi), np.sin(psi)
    bx, by = mean[:, 0], mean[:, 1]
    pred = np.empty((3, c.shape[0]), dtype=np.result_type(bx, c))
    np.multiply(bx, c, out=pred[0])
    pred[0] += by * s
    np.multiply(by, c, out=pred[1])
    pred[1] -= bx * s
    pred[2] = mean[:, 2]
    c2, s2 = c * c, s * s
    v = np.empty_like(pred)
    vx, vy = var[:, 0], var[:, 1]
    np.multiply(vx, c2, out=v[0])
    v[0] += vy * s2
    np.multiply(vx, s2, out=v[1])
    v[1] += vy * c2
    v[2] = var[:, 2]
    return np.array([obs.fwd_ut, obs.left_ut, obs.up_ut]), pred.T, v.T, (0, 1, 2)


def _features_vh(obs, mean, var, psi):
    bx, by = mean[:, 0], mean[:, 1]
    pred = np.empty((2, bx.shape[0]), dtype=np.result_type(bx, var))
    v = np.empty_like(pred)
    bx2 = bx * bx
    by2 = by * by
    np.add(bx2, by2, out=pred[0])  # |h|^2
    bx2 *= var[:, 0]
    by2 *= var[:, 1]
    np.add(bx2, by2, out=v[0])
    v[0] /= np.maximum(pred[0], 1e-12)
    np.sqrt(pred[0], out=pred[0])
    pred[1] = mean[:, 2]
    v[1] = var[:, 2]
    return np.array([obs.h_ut, obs.up_ut]), pred.T, v.T, (0, 2)


def _features_total(obs, mean, var, psi):
    bt2 = np.sum(mean * mean, axis=1)
    vt = np.sum(mean * mean * var, axis=1) / np.maximum(bt2, 1e-12)
    return np.array([obs.total_ut]), np.sqrt(bt2)[:, None], vt[:, None], (2,)


#: name -> feature function
FEATURE_SETS = {
    "full": _features_full,
    "vertical+horizontal": _features_vh,
    "total": _features_total,
}


# -- likelihoods: (r (N,k), s2 (N,k), settings) -> (N, k) log density
def _gaussian(r, s2, settings):
    return -0.5 * (r * r / s2 + np.log(2.0 * np.pi * s2))


def _student_t(r, s2, settings):
    nu = settings.student_nu
    c0 = math.lgamma(0.5 * (nu + 1.0)) - math.lgamma(0.5 * nu) - 0.5 * math.log(nu * math.pi)
    out = r * r
    out /= s2
    out *= 1.0 / nu
    np.log1p(out, out=out)
    out *= -0.5 * (nu + 1.0)
    out -= 0.5 * np.log(s2)
    out += c0
    return out


#: name -> log density of a residual given its variance (scale²)
LIKELIHOODS = {
    "gaussian": _gaussian,
    "student-t": _student_t,
}


def _get(registry, name, what):
    try:
        return registry[name]
    except KeyError:
        raise ConfigError(f"unknown {what} {name!r}; expected one of {sorted(registry)}") from None


def field_log_likelihood(obs, xy, psi_rad, bias_ut, bias_var_ut2, log_w, *, lookup, settings, sensor_noise_ut,
                         return_chi2=False):
    """Tempered field log-likelihood of every particle and its bias update.

    Parameters
    ----------
    obs : WindowObservation
    xy : (N, 2) float, particle positions, plan metres
    psi_rad : (N,) float, device heading of each particle in the plan
    bias_ut, bias_var_ut2 : (N, 3) float, bias mean and variance
    log_w : (N,) float, normalised log-weights (for the neutral level)
    lookup : callable, (N, 2) positions -> map mean (N, 3), var (N, 3),
        coverage (N,) (``FieldMap.lookup`` or the faster
        ``fingerprint.pf._lookup.MapTable.lookup``)
    settings : FilterSettings ; sensor_noise_ut : float

    Returns
    -------
    log_lik : (N,) float
    bias_ut, bias_var_ut2 : (N, 3) float, updated
    chi2 : float, only with ``return_chi2``: weighted mean over the covered
        particles of ``r**2 / (V + tau P)`` per feature (about 1 when the
        field matches the map as the model expects; NaN when none is covered)
    """
    s = settings
    feats = _get(FEATURE_SETS, s.feature_set, "feature set")
    dens = _get(LIKELIHOODS, s.likelihood, "likelihood")
    mean, var, cov = lookup(xy)
    y, pred, mvar, bidx = feats(obs, mean, var, psi_rad)
    bidx = list(bidx)
    tau = s.field_temper
    k = len(bidx)
    # per-feature rows (k, N): contiguous when the feature set made them so
    pred_t, mvar_t = pred.T, mvar.T
    b_t = np.asarray(bias_ut).T[bidx]
    p_t = np.asarray(bias_var_ut2).T[bidx]
    const = sensor_noise_ut**2 / max(obs.n, 1) + s.mismatch_ut**2
    s2 = mvar_t * s.map_var_scale if s.map_var_scale != 1.0 else mvar_t.copy()
    s2 += const
    s2 += tau * p_t  # V + tau P
    r = np.subtract(y.astype(pred_t.dtype)[:, None], pred_t)
    r -= b_t  # y - pred - b_hat
    ll_k = dens(r.T, s2.T, s).T  # (k, N)
    ll = ll_k[0] * tau if k == 1 else np.sum(ll_k, axis=0)
    if k > 1:
        ll *= tau
    if math.isnan(float(np.sum(ll))) and np.any(np.isnan(ll)):
        raise ConvergenceError("field log-likelihood is NaN (map or observation holds NaN)")
    covered = cov <= s.coverage_max_m
    all_covered = bool(covered.all())
    gain = p_t * tau
    gain /= s2
    if not all_covered:
        gain *= covered
    # new arrays of the same layout; the components without a feature are copied
    new_b = np.empty_like(bias_ut, order="K")
    new_p = np.empty_like(bias_var_ut2, order="K")
    nb_t, np_t = new_b.T, new_p.T
    for c in range(nb_t.shape[0]):
        if c not in bidx:
            nb_t[c] = np.asarray(bias_ut).T[c]
            np_t[c] = np.asarray(bias_var_ut2).T[c]
    for j, c in enumerate(bidx):
        g = gain[j]
        upd = g * r[j]
        upd += b_t[j]
        nb_t[c] = upd  # b + K r
        g *= p_t[j]
        np.subtract(p_t[j], g, out=np_t[c])  # (1 - K) P
    if not all_covered:
        if np.any(covered):
            lw = log_w[covered]
            a = lw + ll[covered]
            top_a, top_w = a.max(), lw.max()
            if np.isfinite(top_a):
                neutral = (top_a + np.log(np.sum(np.exp(a - top_a)))) - (top_w + np.log(np.sum(np.exp(lw - top_w))))
            else:
                neutral = 0.0
        else:
            neutral = 0.0
        ll = np.where(covered, ll, neutral)
    if return_chi2:
        chi2 = np.nan
        if np.any(covered):
            wc = np.where(covered, np.exp(log_w - log_w.max()), 0.0)
            d2 = np.sum(r * r / s2, axis=0) * (1.0 / k)
            chi2 = float(wc @ np.where(covered, d2, 0.0) / wc.sum())
        return ll, new_b, new_p, chi2
    return ll, new_b, new_p
