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
    "FloorBackground",
    "floor_background",
    "background_log_likelihood",
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
        if all_covered or np.any(covered):
            d2 = r * r  # (k, N)
            d2 /= s2
            if k > 1:
                d2 = np.sum(d2, axis=0)
            else:
                d2 = d2[0]
            wc = np.exp(log_w - log_w.max())
            if not all_covered:
                wc *= covered
                d2 = np.where(covered, d2, 0.0)
            chi2 = float(wc @ d2) / (k * float(np.sum(wc)))
        return ll, new_b, new_p, chi2
    return ll, new_b, new_p


# -- the field when the map does not explain it (walk-level check) --------------
@dataclass(frozen=True)
class FloorBackground:
    """Floor-wide spread of the mapped field along the graph (points every
    ``spacing_m`` of edge, so every metre of graph counts the same).

    Attributes
    ----------
    mean_ut : (3,) mean map vector (plan x, y, up)
    cov_xy_ut2 : (2, 2) covariance of its horizontal part
    var_ut2 : (3,) variance of each component
    map_var_ut2 : (3,) mean map variance
    h_ut, h_var_ut2 : mean and variance of the horizontal magnitude
    total_ut, total_var_ut2 : the same for the magnitude
    """

    mean_ut: np.ndarray
    cov_xy_ut2: np.ndarray
    var_ut2: np.ndarray
    map_var_ut2: np.ndarray
    h_ut: float
    h_var_ut2: float
    total_ut: float
    total_var_ut2: float


def floor_background(fmap, spacing_m=0.5):
    """:class:`FloorBackground` of a FieldMap (its graph and raster)."""
    g = fmap.graph
    k = np.maximum(np.ceil(g.length_m / spacing_m).astype(np.int64), 1)
    e = np.repeat(np.arange(g.n_edges), k)
    frac = (np.arange(e.size) - np.repeat(np.cumsum(k) - k, k) + 0.5) / np.repeat(k, k)
    mean, var, _ = fmap.lookup(g.point(e, frac * g.length_m[e]))
    ok = np.all(np.isfinite(mean), axis=1) & np.all(np.isfinite(var), axis=1)
    if not np.any(ok):
        raise ConvergenceError("the map's field is NaN along its whole graph")
    mean, var = mean[ok], var[ok]
    h = np.hypot(mean[:, 0], mean[:, 1])
    tot = np.sqrt(h * h + mean[:, 2] ** 2)
    return FloorBackground(
        mean_ut=mean.mean(axis=0), cov_xy_ut2=np.cov(mean[:, :2].T), var_ut2=mean.var(axis=0),
        map_var_ut2=var.mean(axis=0), h_ut=float(h.mean()), h_var_ut2=float(h.var()),
        total_ut=float(tot.mean()), total_var_ut2=float(tot.var()),
    )


def _background_features(bg, obs, psi, feature_set):
    """Observed features, their floor-wide mean and variance (spread of the
    map plus its mean variance) and bias components, for device heading ``psi``."""
    mv = bg.map_var_ut2
    if feature_set == "full":
        c, s = math.cos(psi), math.sin(psi)
        mx, my, mu = bg.mean_ut
        (vxx, vxy), (_, vyy) = bg.cov_xy_ut2
        pred = np.array([mx * c + my * s, -mx * s + my * c, mu])
        var = np.array([
            c * c * (vxx + mv[0]) + s * s * (vyy + mv[1]) + 2 * c * s * vxy,
            s * s * (vxx + mv[0]) + c * c * (vyy + mv[1]) - 2 * c * s * vxy,
            bg.var_ut2[2] + mv[2],
        ])
        return np.array([obs.fwd_ut, obs.left_ut, obs.up_ut]), pred, var, (0, 1, 2)
    if feature_set == "vertical+horizontal":
        return (np.array([obs.h_ut, obs.up_ut]), np.array([bg.h_ut, bg.mean_ut[2]]),
                np.array([bg.h_var_ut2 + 0.5 * (mv[0] + mv[1]), bg.var_ut2[2] + mv[2]]), (0, 2))
    return np.array([obs.total_ut]), np.array([bg.total_ut]), np.array([bg.total_var_ut2 + mv.mean()]), (2,)


def background_log_likelihood(obs, psi_rad, w, bias_ut, bias_var_ut2, bg, *, settings, sensor_noise_ut):
    """Tempered log-likelihood of the observation if the field does not
    follow the map (drawn from the floor-wide spread, :class:`FloorBackground`),
    with the cloud's weighted mean bias and device heading; one number for
    every particle.

    Parameters
    ----------
    obs : WindowObservation ; psi_rad : (N,) device heading of each particle in the plan
    w : (N,) linear weights summing to 1 ; bias_ut, bias_var_ut2 : (N, 3)
    bg : FloorBackground ; settings : FilterSettings ; sensor_noise_ut : float
    """
    s = settings
    psi = 0.0
    if s.feature_set == "full":  # the only feature set that turns with the device
        psi = math.atan2(float(w @ np.sin(psi_rad)), float(w @ np.cos(psi_rad)))
    y, pred, mvar, bidx = _background_features(bg, obs, psi, s.feature_set)
    bidx = list(bidx)
    # weighted means over the particles, one component row at a time (the
    # bias states are column-major float32; a float32 product is plenty for a mean)
    w32 = np.asarray(w, dtype=np.float32)
    b = np.array([float(np.dot(np.asarray(bias_ut).T[c], w32)) for c in bidx])
    p = np.array([float(np.dot(np.asarray(bias_var_ut2).T[c], w32)) for c in bidx])
    tau = s.field_temper
    v = s.map_var_scale * mvar + (sensor_noise_ut**2 / max(obs.n, 1) + s.mismatch_ut**2)
    r = (y - pred - b)[None, :]
    dens = _get(LIKELIHOODS, s.likelihood, "likelihood")
    return float(tau * np.sum(dens(r, (v + tau * p)[None, :], s)))
