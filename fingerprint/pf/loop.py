"""The filter loop: initialisation, one update (move, weigh, recover,
resample), re-seeding. Knows nothing of magnetics or floor plans beyond
calling the motion and measurement models."""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..errors import ConvergenceError
from ._lookup import MapTable
from ._noise import normal32
from .measurement import background_log_likelihood, field_log_likelihood, floor_background
from .motion import edge_xy, graph_tables, move_arrays
from .resampling import get_resampler
from .state import ParticleState, normalise_log_weights, take_rows

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
    background: object = None  # FloorBackground, when field_valid_prior is set


def make_context(fmap, settings, *, sensor_noise_ut):
    """A :class:`FilterContext` for ``fmap`` (its graph and rotation). What
    depends on the map alone is built once per map object
    (``FieldMap.derived``), not for every walk localised on it."""
    parts = fmap.derived("filter", lambda m: {})

    def part(name, build):
        if name not in parts:
            parts[name] = build()
        return parts[name]

    want_background = settings.use_field and settings.field_valid_prior is not None
    return FilterContext(
        fmap=fmap,
        table=part("table", lambda: MapTable(fmap)),
        graph=fmap.graph,
        tables=part("graph_tables", lambda: graph_tables(fmap.graph)),
        settings=settings,
        earth_to_plan_rad=float(fmap.earth_to_plan_rad),
        sensor_noise_ut=float(sensor_noise_ut),
        background=part("background", lambda: floor_background(fmap)) if want_background else None,
    )


@dataclass(frozen=True)
class RecoveryTracker:
    """Running level of the update log-likelihood, for collapse detection."""

    level: float = 0.0
    count: int = 0
    outliers: int = 0  # consecutive updates with an outlying field innovation
    #: running level of the cloud's normalised squared field innovation and
    #: the updates it has seen since the start or the last collapse
    #: (``FilterSettings.recovery_chi2``)
    chi2_level: float = float("nan")
    chi2_count: int = 0
    #: collapses that level flagged since it was last below the threshold
    chi2_alarms: int = 0
    #: probability that the map explains this walk's field (NaN = not yet
    #: updated; see ``FilterSettings.field_valid_prior``)
    p_field: float = float("nan")


def _nuisance_prior(n, settings, rng):
    s = settings
    hoff = s.heading_sigma0_rad * rng.standard_normal(n)
    scale = np.clip(1.0 + s.scale_sigma0 * rng.standard_normal(n), 0.5, 1.5)
    # bias states: float32, column-major (each component contiguous)
    bias = np.zeros((n, 3), dtype=np.float32, order="F")
    up = s.bias_sigma0_ut if s.bias_up_sigma0_ut is None else s.bias_up_sigma0_ut
    bias_var = np.empty((n, 3), dtype=np.float32, order="F")
    bias_var[...] = np.array([s.bias_sigma0_ut**2, s.bias_sigma0_ut**2, up**2])
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
    arrays = {  # copies keep the memory layout (column-major bias states)
        "edge": state.edge.copy(),
        "offset_m": state.offset_m.copy(),
        "direction": state.direction.copy(),
        "heading_offset_rad": state.heading_offset_rad.copy(),
        "scale": state.scale.copy(),
        "bias_ut": state.bias_ut.copy(order="K"),
        "bias_var_ut2": state.bias_var_ut2.copy(order="K"),
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


def _resample(arrays, ctx, rng, weights):
    """Resample the particle ``arrays`` (dict of ParticleState fields but
    ``log_w``) by ``weights`` (N,) (any positive scale), roughen; returns a
    ParticleState with uniform weights."""
    s = ctx.settings
    idx = get_resampler(s.resampler)(weights, rng)
    new = {name: take_rows(a, idx) for name, a in arrays.items()}
    n = idx.shape[0]
    rough = [s.rough_heading_rad > 0, s.rough_scale > 0]
    if any(rough):
        z = normal32(rng, sum(rough) * n)  # one draw for the jitters switched on
        if rough[0]:
            new["heading_offset_rad"] += np.float32(s.rough_heading_rad) * z[:n]
        if rough[1]:
            sc = new["scale"]
            sc += np.float32(s.rough_scale) * z[z.size - n :]
            np.clip(sc, 0.5, 1.5, out=sc)
    return ParticleState(**new, log_w=np.full(n, -math.log(n)))


def _predict_bias(state, s):
    """Bias prediction over one update: a random walk (constant per-walk
    bias) or, with ``bias_corr_updates``, a first-order autoregression towards
    0 whose stationary variance is the bias prior."""
    var = state.bias_var_ut2
    if s.bias_corr_updates is None:
        q = np.asarray(s.bias_rw_ut**2, dtype=var.dtype)
        if var.size and var.min() > 0:  # every component has a bias state
            return state.bias_ut, var + q
        return state.bias_ut, (var > 0) * q + var
    has = var > 0
    phi = float(np.exp(-1.0 / s.bias_corr_updates))
    up = s.bias_sigma0_ut if s.bias_up_sigma0_ut is None else s.bias_up_sigma0_ut
    prior = np.array([s.bias_sigma0_ut**2, s.bias_sigma0_ut**2, up**2])
    return phi * state.bias_ut, phi * phi * state.bias_var_ut2 + ((1.0 - phi * phi) * prior) * has


#: P(map explains the field) right after a collapse (see ``filter_step``)
_P_FIELD_AFTER_LOSS = 0.999


def _mix_with_background(llf, obs, psi, state, ctx, tracker):
    """Walk-level check that the map explains the field at all.

    Two hypotheses for the whole walk: H1, the field follows the map (the
    particles' field likelihoods ``llf``), and H0, it does not (the
    observation is drawn from the floor-wide spread of the mapped field, the
    same for every particle). Each particle's likelihood becomes the mixture
    ``p l_i + (1 - p) l_0``, and ``p = P(H1 | field so far)`` is updated by
    Bayes' rule with the cloud's marginal likelihood (its evidence raised to
    ``field_valid_gain``), then mixed with its complement by
    ``field_valid_switch`` (a two-state Markov chain: the map may stop or
    start explaining the field along the walk). A walk whose field the map
    does not explain thus falls back towards the filter without the field.
    """
    s = ctx.settings
    p = tracker.p_field if math.isfinite(tracker.p_field) else s.field_valid_prior
    p = min(max(p, 1e-12), 1.0 - 1e-12)
    llf = np.asarray(llf, dtype=np.float64)
    w = np.exp(state.log_w)  # the log-weights are normalised
    w *= 1.0 / np.sum(w)
    ll0 = background_log_likelihood(obs, psi, w, state.bias_ut, state.bias_var_ut2, ctx.background,
                                    settings=s, sensor_noise_ut=ctx.sensor_noise_ut)
    # one exp and one log pass: with c >= every term, l_i / e^c = m_i
    c = max(float(np.max(llf)), ll0)
    m = np.exp(llf - c)
    log_l1 = c + math.log(float(w @ m)) if np.any(m > 0) else -math.inf
    lp1, lp0 = math.log(p), math.log1p(-p)
    m *= p
    m += (1.0 - p) * math.exp(ll0 - c)
    mixed = np.log(m)
    mixed += c
    k = s.field_valid_gain
    post = math.exp(lp1 + k * log_l1 - np.logaddexp(lp1 + k * log_l1, lp0 + k * ll0))
    q = s.field_valid_switch
    post = (1.0 - q) * post + q * (1.0 - post)
    return mixed, dataclasses.replace(tracker, p_field=float(post))


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
    tab = ctx.tables
    n = state.n
    want_field = s.use_field and obs is not None
    # the observation averages the field over the whole increment, so it
    # belongs to the middle of each particle's move, not to its end
    before = edge_xy(tab, state.edge, state.offset_m) if want_field and s.field_at_midpoint else None
    arrays, ll = move_arrays(
        state, length_m, heading_rad, tables=tab, settings=s, rng=rng, earth_to_plan_rad=ctx.earth_to_plan_rad,
    )
    arrays["bias_ut"], arrays["bias_var_ut2"] = state.bias_ut, state.bias_var_ut2
    field_used = False
    ll_map = None
    if want_field:
        xy_t = np.empty((2, n))  # rows x, y: xy_t.T is (N, 2) with contiguous columns
        x, y = edge_xy(tab, arrays["edge"], arrays["offset_m"], out=xy_t)
        if before is not None:
            x += before[0]
            y += before[1]
            xy_t *= 0.5
        psi = np.add(arrays["heading_offset_rad"], obs.heading_rad + ctx.earth_to_plan_rad, dtype=np.float32)
        bias, bias_var = _predict_bias(state, s)
        gate = s.field_gate is not None
        watch_chi2 = s.recovery and s.recovery_chi2 is not None
        out = field_log_likelihood(
            obs, xy_t.T, psi, bias, bias_var, state.log_w,
            lookup=ctx.table.lookup, settings=s, sensor_noise_ut=ctx.sensor_noise_ut,
            return_chi2=gate or watch_chi2,
        )
        llf, bias, bias_var = out[:3]
        chi2 = out[3] if len(out) > 3 else math.nan
        if watch_chi2 and math.isfinite(chi2):
            level = chi2 if tracker.chi2_count == 0 else (
                (1 - s.recovery_rate) * tracker.chi2_level + s.recovery_rate * chi2)
            tracker = dataclasses.replace(tracker, chi2_level=float(level), chi2_count=tracker.chi2_count + 1)
        gated = False
        if gate:
            outliers = tracker.outliers + 1 if chi2 > s.field_gate else 0
            tracker = dataclasses.replace(tracker, outliers=outliers)
            gated = outliers >= s.field_gate_after
        if not gated:
            if s.field_floor_nats is not None:
                llf = np.maximum(llf.astype(np.float64), float(np.max(llf)) - s.field_floor_nats)
            if ctx.background is not None:
                if s.recovery:
                    # collapse detection keeps watching the map hypothesis alone
                    # (the mixture would cushion a lost cloud by the floor-wide term)
                    ll_map = np.add(ll, llf, dtype=np.float64)
                llf, tracker = _mix_with_background(llf, obs, psi, state, ctx, tracker)
            ll = np.add(ll, llf, dtype=np.float64)  # float32 terms, summed exactly
            arrays["bias_ut"], arrays["bias_var_ut2"] = bias, bias_var
            field_used = True
    if math.isnan(float(np.sum(ll))) and np.any(np.isnan(ll)):
        raise ConvergenceError("log-likelihood is NaN")
    # normalise; the linear weights of the same pass give the ESS and the
    # resampling weights
    log_w = state.log_w + ll
    top = float(np.max(log_w))
    lost = False
    if math.isfinite(top):
        e = log_w - top
        np.exp(e, out=e)
        total = float(np.sum(e))
        log_total = top + math.log(total)
        log_w -= log_total
        ess = total * total / float(e @ e)
    else:
        # every particle impossible: keep the prior weights and re-seed
        log_total = -math.inf
        log_w, _ = normalise_log_weights(state.log_w)
        lost = True
        e = np.exp(log_w)
        ess = 1.0 / float(e @ e)
    watched = log_total
    if ll_map is not None and math.isfinite(log_total):
        a = state.log_w + ll_map
        top_m = float(np.max(a))
        watched = top_m + math.log(float(np.sum(np.exp(a - top_m)))) if math.isfinite(top_m) else -math.inf
    if field_used and math.isfinite(watched):
        if s.recovery and tracker.count >= s.recovery_warmup and watched < tracker.level - s.recovery_drop:
            lost = True
        value = max(watched, tracker.level - s.recovery_drop) if tracker.count else watched
        level = value if tracker.count == 0 else (1 - s.recovery_rate) * tracker.level + s.recovery_rate * value
        tracker = dataclasses.replace(tracker, level=float(level), count=tracker.count + 1)
    # the innovation level: a second collapse detector, which a drifting
    # bias cannot hide (FilterSettings.recovery_chi2)
    chi2_lost = False
    if s.recovery and s.recovery_chi2 is not None and tracker.chi2_count >= max(s.recovery_warmup, 1):
        if tracker.chi2_level > s.recovery_chi2:
            chi2_lost = not lost
            lost = True
        elif tracker.chi2_alarms and tracker.chi2_level < 0.25 * s.recovery_chi2:
            tracker = dataclasses.replace(tracker, chi2_alarms=0)  # the field follows the map again
    resampled = ess < s.ess_threshold * n
    if resampled:
        state = _resample(arrays, ctx, rng, e)
    else:
        state = ParticleState(**arrays, log_w=log_w)
    if lost and s.recovery:
        # the evidence against the map came from a lost cloud: trust the map
        # again while the re-seeded particles look for the walker. A large
        # innovation alone may also mean that the map does not explain this
        # walk's field anywhere (a wrong map, a broken calibration), which
        # re-seeding cannot mend: then the walk-level check restarts from
        # no less than its prior rather than from near certainty
        p_new = _P_FIELD_AFTER_LOSS
        if chi2_lost and tracker.chi2_alarms and s.field_valid_prior is not None:
            p_new = max(tracker.p_field, s.field_valid_prior) if math.isfinite(tracker.p_field) else s.field_valid_prior
        tracker = dataclasses.replace(tracker, p_field=p_new, chi2_level=math.nan, chi2_count=0,
                                      chi2_alarms=tracker.chi2_alarms + chi2_lost)
        m = int(round(s.recovery_fraction * state.n))
        if m:
            state = reseed(state, rng.choice(state.n, size=m, replace=False), ctx, rng)
    return state, tracker, {"lost": lost, "resampled": resampled, "log_lik": log_total}
