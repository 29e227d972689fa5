"""The filter loop: initialisation, one update (move, weigh, recover,
resample), re-seeding. Knows nothing of magnetics or floor plans beyond
calling the motion and measurement models."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..errors import ConvergenceError
from ._lookup import MapTable
from .measurement import field_log_likelihood
from .motion import edge_point, graph_tables, move
from .resampling import get_resampler
from .state import ParticleState, effective_sample_size, normalise_log_weights

__all__ = ["FilterContext", "RecoveryTracker", "make_context", "initial_state", "reseed", "filter_step"]


@dataclass(frozen=True, eq=False)
class FilterContext:
    """What every update needs besides the state: map, graph tables, settings."""

    fmap: object
    table: object
    graph: object
    tables: object
    settings: object
    earth_to_plan_rad: float
    sensor_noise_ut: float


def make_context(fmap, settings, *, sensor_noise_ut):
    """A :class:`FilterContext` for ``fmap`` (its graph and rotation)."""
    return FilterContext(
        fmap=fmap,
        table=MapTable(fmap),
        graph=fmap.graph,
        tables=graph_tables(fmap.graph),
        settings=settings,
        earth_to_plan_rad=float(fmap.earth_to_plan_rad),
        sensor_noise_ut=float(sensor_noise_ut),
    )


@dataclass(frozen=True)
class RecoveryTracker:
    """Running level of the update log-likelihood, for collapse detection."""

    level: float = 0.0
    count: int = 0
    outliers: int = 0  # consecutive updates with an outlying field innovation


def _nuisance_prior(n, settings, rng):
    s = settings
    hoff = s.heading_sigma0_rad * rng.standard_normal(n)
    scale = np.clip(1.0 + s.scale_sigma0 * rng.standard_normal(n), 0.5, 1.5)
    bias = np.zeros((n, 3))
    up = s.bias_sigma0_ut if s.bias_up_sigma0_ut is None else s.bias_up_sigma0_ut
    bias_var = np.tile(np.array([s.bias_sigma0_ut**2, s.bias_sigma0_ut**2, up**2]), (n, 1))
    return hoff, scale, bias, bias_var


def initial_state(ctx, rng, *, start_xy=None, start_sigma_m=1.0):
    """Particles for tracking (around ``start_xy`` (2,), projected onto the
    graph) or global mode (``start_xy`` None: uniform over the graph)."""
    s = ctx.settings
    graph = ctx.graph
    if start_xy is None:
        n = s.n_particles_global
        edge, off = graph.sample_uniform(n, rng)
    else:
        n = s.n_particles
        xy = np.asarray(start_xy, dtype=float).reshape(1, 2) + start_sigma_m * rng.standard_normal((n, 2))
        edge, off, _ = graph.project(xy)
    direc = np.where(rng.random(n) < 0.5, 1, -1).astype(np.int8)
    hoff, scale, bias, bias_var = _nuisance_prior(n, s, rng)
    return ParticleState(
        edge=edge.astype(np.int64),
        offset_m=off.astype(float),
        direction=direc,
        heading_offset_rad=hoff,
        scale=scale,
        bias_ut=bias,
        bias_var_ut2=bias_var,
        log_w=np.full(n, -np.log(n)),
    )


def reseed(state, index, ctx, rng):
    """Replace the particles at ``index`` ((M,) int) by fresh ones spread
    uniformly over the graph, with the mean weight."""
    m = int(np.size(index))
    if m == 0:
        return state
    edge, off = ctx.graph.sample_uniform(m, rng)
    direc = np.where(rng.random(m) < 0.5, 1, -1).astype(np.int8)
    hoff, scale, bias, bias_var = _nuisance_prior(m, ctx.settings, rng)
    arrays = {
        "edge": state.edge.copy(),
        "offset_m": state.offset_m.copy(),
        "direction": state.direction.copy(),
        "heading_offset_rad": state.heading_offset_rad.copy(),
        "scale": state.scale.copy(),
        "bias_ut": state.bias_ut.copy(),
        "bias_var_ut2": state.bias_var_ut2.copy(),
        "log_w": state.log_w.copy(),
    }
    for name, value in (
        ("edge", edge), ("offset_m", off), ("direction", direc), ("heading_offset_rad", hoff),
        ("scale", scale), ("bias_ut", bias), ("bias_var_ut2", bias_var),
    ):
        arrays[name][index] = value
    arrays["log_w"][index] = -np.log(state.n)
    arrays["log_w"], _ = normalise_log_weights(arrays["log_w"])
    return ParticleState(**arrays)


def _resample(state, ctx, rng):
    s = ctx.settings
    idx = get_resampler(s.resampler)(np.exp(state.log_w), rng)
    new = state.take(idx)
    n = new.n
    changes = {}
    if s.rough_heading_rad > 0 or s.rough_scale > 0:
        z = rng.standard_normal((2, n), dtype=np.float32)  # one draw for both jitters
        if s.rough_heading_rad > 0:
            changes["heading_offset_rad"] = new.heading_offset_rad + s.rough_heading_rad * z[0]
        if s.rough_scale > 0:
            changes["scale"] = np.clip(new.scale + s.rough_scale * z[1], 0.5, 1.5)
    return new.replace(**changes) if changes else new


def _predict_bias(state, s):
    """Bias prediction over one update: a random walk (constant per-walk
    bias) or, with ``bias_corr_updates``, a first-order autoregression towards
    0 whose stationary variance is the bias prior."""
    has = state.bias_var_ut2 > 0
    if s.bias_corr_updates is None:
        return state.bias_ut, state.bias_var_ut2 + s.bias_rw_ut**2 * has
    phi = float(np.exp(-1.0 / s.bias_corr_updates))
    up = s.bias_sigma0_ut if s.bias_up_sigma0_ut is None else s.bias_up_sigma0_ut
    prior = np.array([s.bias_sigma0_ut**2, s.bias_sigma0_ut**2, up**2])
    return phi * state.bias_ut, phi * phi * state.bias_var_ut2 + ((1.0 - phi * phi) * prior) * has


def filter_step(state, length_m, heading_rad, obs, ctx, rng, tracker):
    """One update: move by an increment, weigh by heading and field, detect
    a collapse (re-seed), resample when the ESS is low.

    Parameters
    ----------
    state : ParticleState, normalised log-weights
    length_m, heading_rad : float, merged dead-reckoning increment (earth heading)
    obs : WindowObservation or None (no field samples in the window)
    ctx : FilterContext ; rng : numpy.random.Generator ; tracker : RecoveryTracker

    Returns
    -------
    state : ParticleState ; tracker : RecoveryTracker
    info : dict with ``lost`` (bool), ``resampled`` (bool), ``log_lik`` (float,
        log marginal likelihood of the update), ``psi_mean_rad`` (device heading
        used for the field, earth frame, or None)
    """
    s = ctx.settings
    want_field = s.use_field and obs is not None
    # the observation averages the field over the whole increment, so it
    # belongs to the middle of each particle's move, not to its end
    xy_before = edge_point(ctx.tables, state.edge, state.offset_m) if want_field and s.field_at_midpoint else None
    state, ll = move(
        state, length_m, heading_rad, graph=ctx.graph, tables=ctx.tables, settings=s, rng=rng,
        earth_to_plan_rad=ctx.earth_to_plan_rad,
    )
    field_used = False
    if want_field:
        xy = edge_point(ctx.tables, state.edge, state.offset_m)
        if xy_before is not None:
            xy = 0.5 * (xy + xy_before)
        psi = obs.heading_rad + ctx.earth_to_plan_rad + state.heading_offset_rad
        bias, bias_var = _predict_bias(state, s)
        gate = s.field_gate is not None
        out = field_log_likelihood(
            obs, xy, psi, bias, bias_var, state.log_w,
            lookup=ctx.table.lookup, settings=s, sensor_noise_ut=ctx.sensor_noise_ut, return_chi2=gate,
        )
        llf, bias, bias_var = out[:3]
        gated = False
        if gate:
            chi2 = out[3]
            outliers = tracker.outliers + 1 if chi2 > s.field_gate else 0
            tracker = dataclasses.replace(tracker, outliers=outliers)
            gated = outliers >= s.field_gate_after
        if not gated:
            if s.field_floor_nats is not None:
                llf = np.maximum(llf, np.max(llf) - s.field_floor_nats)
            ll = ll + llf
            state = state.replace(bias_ut=bias, bias_var_ut2=bias_var)
            field_used = True
    if np.any(np.isnan(ll)):
        raise ConvergenceError("log-likelihood is NaN")
    log_w, log_total = normalise_log_weights(state.log_w + ll)
    lost = False
    if not np.isfinite(log_total):
        # every particle impossible: keep the prior weights and re-seed
        log_w, _ = normalise_log_weights(state.log_w)
        lost = True
    state = state.replace(log_w=log_w)
    if field_used and np.isfinite(log_total):
        if s.recovery and tracker.count >= s.recovery_warmup and log_total < tracker.level - s.recovery_drop:
            lost = True
        value = max(log_total, tracker.level - s.recovery_drop) if tracker.count else log_total
        level = value if tracker.count == 0 else (1 - s.recovery_rate) * tracker.level + s.recovery_rate * value
        tracker = RecoveryTracker(level=float(level), count=tracker.count + 1, outliers=tracker.outliers)
    resampled = False
    if effective_sample_size(state.log_w) < s.ess_threshold * state.n:
        state = _resample(state, ctx, rng)
        resampled = True
    if lost and s.recovery:
        m = int(round(s.recovery_fraction * state.n))
        if m:
            state = reseed(state, rng.choice(state.n, size=m, replace=False), ctx, rng)
    return state, tracker, {"lost": lost, "resampled": resampled, "log_lik": log_total}
