"""Settings of the particle filter: one frozen dataclass (vary it with
``dataclasses.replace``)."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields

from ..errors import ConfigError

__all__ = ["FilterSettings", "PRESETS", "preset"]


@dataclass(frozen=True)
class FilterSettings:
    """Every tunable of the localisation filter.

    The defaults were chosen on the survey/test split of the real floors
    (shared real_data siteA F1 and B1; maps from ``build_floor_map``): see
    ``tests/test_pf_realdata.py`` and the engine notes in the report.

    Particles and modes
    -------------------
    n_particles : particles in tracking mode
    n_particles_global : particles in global mode (unknown start)

    Motion (``fingerprint.pf.motion``)
    ----------------------------------
    update_min_m : dead-reckoning increments are merged until they add up to
        at least this many metres; each merged increment is one filter update
    length_sigma_frac, length_sigma_m : 1-sigma noise on each increment's
        length, relative and absolute
    scale_sigma0, scale_rw : initial spread of the step-length scale (around 1)
        and its random walk per update (0 and 0 by default: on the real phone
        walks the step model's own length was better than a per-particle
        scale, for the filter with and without the field; give a walker of
        unknown stride, e.g. 0.08 and 0.005)
    heading_sigma0_rad, heading_rw_rad : initial spread of the per-particle
        heading offset and its random walk per update
    heading_kappa : von Mises concentration of the agreement between the
        step heading (in the plan) and the direction of a graph edge
    reverse_prior : prior weight of turning back on an edge (vs 1 for going on)
    use_heading_likelihood : penalise particles whose edges cannot follow the
        step heading

    Field (``fingerprint.pf.measurement``)
    --------------------------------------
    use_field : False gives the "no-field" filter (field updates off)
    feature_set : "full", "vertical+horizontal" or "total"
    likelihood : "gaussian" or "student-t"
    student_nu : degrees of freedom of the Student-t likelihood
    field_temper : exponent on the field likelihood (the mismatch against the
        map is correlated over about ten steps, so one update carries roughly
        a tenth of the information an independent one would)
    sensor_noise_ut : 1-sigma noise of one magnetometer sample; None = the
        walk's own ``mag_noise_ut``
    mismatch_ut : 1-sigma model-mismatch term added to every feature
    coverage_max_m : no field update for particles farther than this from
        any survey sample (map ``coverage_m``)
    field_at_midpoint : look the map up halfway between each particle's
        position before and after the move, where the window-averaged field
        belongs (False: at the end of the move, which pulls the estimate
        back by half an increment)
    bias_sigma0_ut : prior 1-sigma of the per-walk field bias, horizontal
        components (0 = no bias states)
    bias_up_sigma0_ut : the same for the vertical component (None = as
        ``bias_sigma0_ut``)
    map_var_scale : factor on the map's variance in the likelihood (below 1
        when the map's variance already holds a between-walk part that the
        bias state models)
    bias_rw_ut : random walk of the bias per update
    bias_corr_updates : None = the bias is a per-walk constant (plus the
        random walk ``bias_rw_ut``); a number T = the bias is a first-order
        autoregressive process towards 0 with correlation time T updates and
        stationary 1-sigma ``bias_sigma0_ut`` / ``bias_up_sigma0_ut``
        (``b <- phi b + w``, ``phi = exp(-1/T)``), integrated out by the same
        per-particle Kalman update: the map mismatch is correlated over a
        few metres, not constant over a walk. The default 5 (about 2.5 m at
        ``update_min_m`` 0.5) was picked by 3-fold cross-validation on the
        survey walks of both real floors, among None, 5, 10 and 20 (README,
        "Choosing the field's settings"). A bias that can follow the
        mismatch also follows the mismatch of a wrong place, so a kidnapped
        walker's likelihood no longer collapses; ``recovery_chi2`` can watch
        the innovation instead
    field_gate : None = no gate; a number G = skip the field update (walls
        only) while the weighted mean normalised squared innovation
        ``r**2 / (V + tau P)`` per feature has exceeded G for
        ``field_gate_after`` consecutive updates (a walk whose field does not
        match the map at all)
    field_gate_after : consecutive outlying updates before the gate closes
    field_valid_prior : None = off; a probability p0 = weigh, for the whole
        walk, the hypothesis that the map explains its field against the
        hypothesis that it does not (the field drawn from the floor-wide
        spread); the field's weight follows the posterior of the first,
        starting from p0 (``fingerprint.pf.loop._mix_with_background``)
    field_valid_switch : per-update probability that the answer changes
    field_valid_gain : exponent on the evidence that updates that probability
        (0 freezes it at ``field_valid_prior``)
    field_floor_nats : None = off; a number c = no particle's field
        log-likelihood is more than c below the best particle's in one update
        (bounds how hard one update of the field can pull the cloud)

    Resampling and recovery (``fingerprint.pf.loop``)
    -------------------------------------------------
    resampler : "systematic", "stratified", "multinomial" or "residual"
    ess_threshold : resample when ESS < ess_threshold * N
    rough_heading_rad, rough_scale : roughening jitter after resampling
    recovery : re-seed particles when the likelihood collapses
    recovery_drop : collapse = update log-likelihood this many nats below its
        running level
    recovery_fraction : share of particles re-seeded over the whole graph
    recovery_warmup : updates before collapse detection starts
    recovery_rate : smoothing factor of the running level (0..1)
    recovery_chi2 : None = off; a number c = also a collapse when the running
        level (smoothed by ``recovery_rate``) of the cloud's normalised
        squared field innovation ``r**2 / (V + tau P)`` per feature (about 1
        when the field follows the map as modelled) exceeds c after
        ``recovery_warmup`` updates. Unlike the likelihood drop it is not
        hidden by a drifting bias (``bias_corr_updates``): that bias follows
        the mismatch of a wrong place only within its tempered gain, so the
        innovation stays large. The first alarm trusts the map again
        (``field_valid_prior``); a repeated one, before the level has come
        back under c / 4, leaves that check at no less than its prior (the
        map may explain the walk's field nowhere). Off by default: on the
        demo building it flags none of ten kidnapped walks, and an offset
        beyond the bias prior (a robot's uncorrected vertical hard-iron)
        sets it off all along a walk tracked well (README). When on, 16 is
        the smallest of 8, 12, 16, 24 that raised no false alarm in
        cross-validation on the real survey walks

    Estimate (``fingerprint.pf.estimate``)
    --------------------------------------
    cluster_radius_m : radius of the dominant cluster
    converge_sigma_m, converge_confidence : converged = sigma below and
        confidence above these
    project_estimate : place the estimate on the graph
    """

    n_particles: int = 2000
    n_particles_global: int = 20000
    # motion
    update_min_m: float = 0.5
    length_sigma_frac: float = 0.08
    length_sigma_m: float = 0.05
    scale_sigma0: float = 0.0
    scale_rw: float = 0.0
    heading_sigma0_rad: float = math.radians(8.0)
    heading_rw_rad: float = math.radians(0.5)
    heading_kappa: float = 2.0
    reverse_prior: float = 0.05
    use_heading_likelihood: bool = True
    # field
    use_field: bool = True
    feature_set: str = "vertical+horizontal"
    likelihood: str = "student-t"
    student_nu: float = 4.0
    field_temper: float = 0.05
    sensor_noise_ut: float | None = None
    mismatch_ut: float = 3.0
    coverage_max_m: float = 1.5
    field_at_midpoint: bool = True
    bias_sigma0_ut: float = 5.0
    bias_up_sigma0_ut: float | None = 10.0
    map_var_scale: float = 1.0
    bias_rw_ut: float = 0.05
    bias_corr_updates: float | None = 5.0
    field_gate: float | None = None
    field_gate_after: int = 3
    field_floor_nats: float | None = None
    field_valid_prior: float | None = 0.7
    field_valid_switch: float = 0.0
    field_valid_gain: float = 1.0
    # resampling and recovery
    resampler: str = "systematic"
    ess_threshold: float = 0.5
    rough_heading_rad: float = math.radians(0.5)
    rough_scale: float = 0.0
    recovery: bool = True
    recovery_drop: float = 6.0
    recovery_fraction: float = 0.1
    recovery_warmup: int = 10
    recovery_rate: float = 0.1
    recovery_chi2: float | None = None
    # estimate
    cluster_radius_m: float = 3.0
    converge_sigma_m: float = 2.0
    converge_confidence: float = 0.7
    project_estimate: bool = True

    def __post_init__(self):
        from .measurement import FEATURE_SETS, LIKELIHOODS
        from .resampling import RESAMPLERS

        def bad(name, why):
            raise ConfigError(f"filter setting {name}: expected {why}, got {getattr(self, name)!r}")

        def num(v):  # a real number (True and False are ints to Python, not here)
            return isinstance(v, (int, float)) and not isinstance(v, bool)

        def count(v):
            return isinstance(v, int) and not isinstance(v, bool)

        for name in ("use_heading_likelihood", "use_field", "field_at_midpoint", "recovery", "project_estimate"):
            if not isinstance(getattr(self, name), bool):
                bad(name, "true or false")
        for name in ("n_particles", "n_particles_global"):
            if not (count(getattr(self, name)) and getattr(self, name) >= 1):
                bad(name, "an integer >= 1")
        for name in (
            "length_sigma_frac", "length_sigma_m", "scale_sigma0", "scale_rw", "heading_sigma0_rad",
            "heading_rw_rad", "heading_kappa", "mismatch_ut", "bias_sigma0_ut", "bias_rw_ut",
            "rough_heading_rad", "rough_scale", "update_min_m", "recovery_drop", "map_var_scale",
        ):
            v = getattr(self, name)
            if not (num(v) and math.isfinite(v) and v >= 0):
                bad(name, "a finite number >= 0")
        for name in ("field_temper", "student_nu", "converge_sigma_m"):
            v = getattr(self, name)
            if not (num(v) and math.isfinite(v) and v > 0):
                bad(name, "a finite number > 0")
        # inf has a meaning here: the field wherever the map reaches, however
        # far from the survey; the whole cloud as one cluster
        for name in ("coverage_max_m", "cluster_radius_m"):
            v = getattr(self, name)
            if not (num(v) and v > 0):
                bad(name, "a number > 0 (inf: no limit)")
        for name in ("reverse_prior", "ess_threshold", "recovery_fraction", "recovery_rate", "converge_confidence"):
            v = getattr(self, name)
            if not (num(v) and 0 <= v <= 1):
                bad(name, "a number in [0, 1]")
        for name in ("bias_up_sigma0_ut", "sensor_noise_ut"):
            v = getattr(self, name)
            if v is not None and not (num(v) and math.isfinite(v) and v >= 0):
                bad(name, "None or a finite number >= 0")
        if self.feature_set not in FEATURE_SETS:
            bad("feature_set", f"one of {sorted(FEATURE_SETS)}")
        if self.likelihood not in LIKELIHOODS:
            bad("likelihood", f"one of {sorted(LIKELIHOODS)}")
        if self.resampler not in RESAMPLERS:
            bad("resampler", f"one of {sorted(RESAMPLERS)}")
        for name in ("bias_corr_updates", "field_gate", "field_floor_nats", "recovery_chi2"):
            v = getattr(self, name)
            if v is not None and not (num(v) and math.isfinite(v) and v > 0):
                bad(name, "None or a finite number > 0")
        if self.field_valid_prior is not None and not (num(self.field_valid_prior) and 0 < self.field_valid_prior < 1):
            bad("field_valid_prior", "None or a probability strictly between 0 and 1")
        if not (num(self.field_valid_gain) and math.isfinite(self.field_valid_gain) and self.field_valid_gain >= 0):
            bad("field_valid_gain", "a finite number >= 0")
        if not (num(self.field_valid_switch) and 0 <= self.field_valid_switch <= 0.5):
            bad("field_valid_switch", "a number in [0, 0.5]")
        if not (count(self.field_gate_after) and self.field_gate_after >= 1):
            bad("field_gate_after", "an integer >= 1")
        if not (count(self.recovery_warmup) and self.recovery_warmup >= 0):
            bad("recovery_warmup", "an integer >= 0")

    def to_dict(self):
        """JSON-able dict of every setting."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d):
        """From a dict; unknown keys are an error that lists the valid ones."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise ConfigError(f"unknown filter settings {unknown}; valid: {sorted(names)}")
        return cls(**d)


#: Named starting points: setting name -> value changes from the defaults.
#: "default" was chosen on the real phone walks (a weak, walk-dependent
#: field: heavy-tailed, strongly tempered, no heading-dependent features);
#: "simulated" suits the simulator's walks (an exactly known field model and
#: small residual offsets: the full vector, Gaussian, less tempering).
PRESETS = {
    "default": {},
    "simulated": {"feature_set": "full", "likelihood": "gaussian", "field_temper": 0.2, "mismatch_ut": 1.5,
                  # the simulated walkers' stride drifts along a walk: keep a scale state
                  "scale_sigma0": 0.08, "scale_rw": 0.005, "rough_scale": 0.003,
                  # the simulated map explains every walk's field, and a
                  # simulated walk's offset is one constant
                  "field_valid_prior": None, "bias_corr_updates": None},
}


def preset(name, **changes):
    """FilterSettings of the preset ``name`` (see :data:`PRESETS`), with
    further ``changes``; an unknown name lists the valid ones."""
    if name not in PRESETS:
        raise ConfigError(f"unknown filter preset {name!r}; expected one of {sorted(PRESETS)}")
    return FilterSettings(**{**PRESETS[name], **changes})
