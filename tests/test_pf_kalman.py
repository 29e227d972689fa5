"""The particle filter against an exact Kalman filter on a linear-Gaussian
corridor.

A straight corridor (a chain of graph edges along x), a field whose vertical
component is linear in x, steps of known length with Gaussian noise, and
Gaussian sensor noise: with the nuisance states, roughening and recovery off
and temper 1 the filter's model is exactly linear-Gaussian, so its posterior
mean and spread must match filterpy.kalman.KalmanFilter (reference library
from PyPI) within 5 % of the spread. Also checked exactly: the tempered
likelihood equals a Gaussian with variance R / temper, and the marginalised
field-bias state equals a two-state Kalman filter [x, bias].
"""

import dataclasses

import numpy as np
from filterpy.kalman import KalmanFilter

from fingerprint import FieldMap, FloorGraph
from fingerprint.localise import FilterSettings, Localiser

SLOPE = 0.8  # µT per metre
B0 = -40.0  # µT at x = 0
BX = 20.0  # µT, constant horizontal field (carries no position information)


def corridor_map(length_m=300.0, node_every_m=10.0):
    xs = np.arange(0.0, length_m + 1e-9, node_every_m)
    nodes = np.column_stack([xs, np.zeros_like(xs)])
    g = FloorGraph.from_arrays(nodes, np.column_stack([np.arange(len(xs) - 1), np.arange(1, len(xs))]))
    res = 0.5
    gx = np.arange(-2.0, length_m + 2.0 + 1e-9, res)
    gy = np.array([-1.0, -0.5, 0.0, 0.5, 1.0])
    mx, _ = np.meshgrid(gx, gy)
    mean = np.stack([np.full(mx.shape, BX), np.zeros(mx.shape), B0 + SLOPE * mx], axis=-1)
    shape = mx.shape
    return FieldMap("C", np.array([gx[0], gy[0]]), res, mean, np.zeros(shape + (3,)), np.zeros(shape),
                    np.ones(shape, bool), g)


def linear_settings(**kw):
    base = FilterSettings(
        n_particles=25000,
        update_min_m=0.0,
        length_sigma_frac=0.0,
        length_sigma_m=0.2,
        scale_sigma0=0.0,
        scale_rw=0.0,
        heading_sigma0_rad=0.0,
        heading_rw_rad=0.0,
        reverse_prior=0.0,
        feature_set="vertical+horizontal",
        likelihood="gaussian",
        field_temper=1.0,
        sensor_noise_ut=1.0,
        mismatch_ut=0.0,
        coverage_max_m=3.0,
        bias_sigma0_ut=0.0,
        bias_up_sigma0_ut=None,
        bias_rw_ut=0.0,
        rough_heading_rad=0.0,
        rough_scale=0.0,
        recovery=False,
        cluster_radius_m=np.inf,
        project_estimate=False,
        # the Kalman model measures the state after the move
        field_at_midpoint=False,
        # the Kalman model knows the field follows the map
        field_valid_prior=None,
    )
    return dataclasses.replace(base, **kw)


def run_both(settings, *, steps=30, x0=60.0, p0=4.0, bias_ut=0.0, seed=0):
    # with settings.bias_corr_updates = T the bias is simulated and modelled
    # as b_k = phi b_{k-1} + w_k, phi = exp(-1/T), var(w) = (1 - phi^2) sb^2
    """Simulate the linear model once; run the particle filter and a
    filterpy Kalman filter on the same data; return per-step (pf_mean,
    pf_sd, kf_mean, kf_sd)."""
    rng = np.random.default_rng(seed)
    q = settings.length_sigma_m
    r = settings.sensor_noise_ut**2 / settings.field_temper
    sb = settings.bias_sigma0_ut
    dim = 2 if sb > 0 else 1
    kf = KalmanFilter(dim_x=dim, dim_z=1)
    kf.x = np.zeros((dim, 1))
    kf.x[0, 0] = x0
    kf.P = np.diag([p0, sb**2][:dim])
    T = settings.bias_corr_updates
    phi = 1.0 if T is None else float(np.exp(-1.0 / T))
    qb = (1.0 - phi**2) * sb**2
    kf.F = np.diag([1.0, phi][:dim])
    kf.B = np.eye(dim)[:, :1]
    kf.Q = np.diag([q**2, qb][:dim])
    kf.H = np.array([[SLOPE, 1.0][:dim]])
    kf.R = np.array([[r]])
    loc = Localiser(corridor_map(), settings=settings, start_xy=(x0, 0.0), start_sigma_m=np.sqrt(p0), rng=seed)
    x = x0 + np.sqrt(p0) * rng.standard_normal()
    out = []
    for k in range(steps):
        x = x + 1.0 + q * rng.standard_normal()
        if T is not None:
            bias_ut = phi * bias_ut + np.sqrt(qb) * rng.standard_normal()
        y = B0 + SLOPE * x + bias_ut + settings.sensor_noise_ut * rng.standard_normal()
        loc.push(float(k + 1), np.array([BX, 0.0, y]), 0.0)
        est = loc.push_motion(float(k + 1), 1.0, 0.0)
        kf.predict(u=np.array([[1.0]]))
        kf.update(np.array([[y - B0]]))
        out.append((est.xy[0], est.sigma_m, kf.x[0, 0], np.sqrt(kf.P[0, 0])))
    return np.array(out)


def test_matches_kalman_filter_linear_gaussian():
    res = run_both(linear_settings())
    pf_m, pf_s, kf_m, kf_s = res.T
    assert np.all(np.abs(pf_m - kf_m) <= 0.05 * kf_s)
    assert np.all(np.abs(pf_s - kf_s) <= 0.05 * kf_s)
    # the field did something: the spread shrank well below the prior's
    assert kf_s[-1] < 0.8 * 2.0


def test_tempered_likelihood_is_gaussian_with_inflated_variance():
    # tau * log N(r; 0, R) has the quadratic form of N(r; 0, R / tau)
    # (a power of a Gaussian density, common practice, no source).
    res = run_both(linear_settings(field_temper=0.25), seed=1)
    pf_m, pf_s, kf_m, kf_s = res.T
    assert np.all(np.abs(pf_m - kf_m) <= 0.05 * kf_s)
    assert np.all(np.abs(pf_s - kf_s) <= 0.05 * kf_s)


def test_field_bias_state_matches_two_state_kalman_filter():
    # y = H x + b + v with a constant unknown bias b ~ N(0, sb^2): the
    # per-particle Kalman update of the bias (Rao-Blackwellised) must give
    # the posterior of the Kalman filter on [x, b].
    res = run_both(linear_settings(bias_sigma0_ut=3.0), bias_ut=2.5, seed=2, steps=40)
    pf_m, pf_s, kf_m, kf_s = res.T
    assert np.all(np.abs(pf_m - kf_m) <= 0.05 * kf_s)
    assert np.all(np.abs(pf_s - kf_s) <= 0.05 * kf_s)


def test_autoregressive_bias_matches_kalman_filter_with_ar1_state():
    # y = H x + b_k + v with b_k a first-order autoregression (correlation
    # time T updates): the per-particle Kalman prediction b <- phi b,
    # P <- phi^2 P + (1 - phi^2) sb^2 and update must give the posterior of
    # the Kalman filter on [x, b] with F = diag(1, phi) (filterpy, reference
    # library; AR(1) state model, common practice, no source).
    res = run_both(linear_settings(bias_sigma0_ut=3.0, bias_corr_updates=8.0), bias_ut=2.0, seed=4, steps=40)
    pf_m, pf_s, kf_m, kf_s = res.T
    assert np.all(np.abs(pf_m - kf_m) <= 0.05 * kf_s)
    assert np.all(np.abs(pf_s - kf_s) <= 0.05 * kf_s)
    # the field did something: the spread shrank below the prior's 2 m
    assert kf_s[-1] < 0.9 * 2.0


def test_without_field_spread_grows_like_random_walk():
    # no-field filter: x_k = x_0 + k + noise, so var = p0 + k q^2 exactly
    # (sum of independent Gaussians, common practice, no source).
    s = linear_settings(use_field=False)
    res = run_both(s, steps=20, seed=3)
    pf_m, pf_s, kf_m, kf_s = res.T
    k = np.arange(1, 21)
    expect = np.sqrt(4.0 + k * s.length_sigma_m**2)
    np.testing.assert_allclose(pf_s, expect, rtol=0.05)
    np.testing.assert_allclose(pf_m, 60.0 + k, atol=0.05 * expect.max())
