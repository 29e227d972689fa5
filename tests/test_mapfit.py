"""Field-map models against exact Gaussian-process regression.

Reference library: scikit-learn's ``GaussianProcessRegressor`` (exact GP,
Cholesky of the full covariance) with the equivalent kernel:

- curl-free: a custom sklearn ``Kernel`` holding the analytic covariance of
  ``B = -grad(phi)``, ``phi ~ GP(0, s^2 exp(-r^2 / 2 l^2))``, which is
  ``cov(b_i, b_j) = (s^2 / l^2) (delta_ij - d_i d_j / l^2) exp(-r^2 / 2 l^2)``
  (second derivatives of the SE kernel; Solin et al. 2018, IEEE T-RO,
  sec. III; Rasmussen & Williams 2006 sec. 9.4 for derivative covariances),
  plus ``cov(b_up, b_up) = (s^2 / l^2) exp(-r^2 / 2 l^2)`` (the vertical
  derivative of the 3-D SE potential on one plane, see mapping.mapfit), a
  constant field and per-walk device-frame offsets;
- per-component: sklearn's own ``ConstantKernel * RBF + ConstantKernel``.
"""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Kernel

from fingerprint.errors import ConfigError, DataError
from mapping.mapfit import MAP_KERNELS, ConstantMap, CurlFreeGP, NearestMap, NotFittedError, PerComponentGP, make_model


class CurlFreeExact(Kernel):
    """Exact covariance of the model of mapping.mapfit.CurlFreeGP for
    stacked scalar observations. Input columns: x, y, component (0, 1, 2),
    walk id (-1 = none), then the three entries of the sample's
    device-to-plan rotation row for that component."""

    def __init__(self, magnitude=1.0, length=1.0, constant=1.0, offset=0.0):
        self.magnitude = magnitude
        self.length = length
        self.constant = constant
        self.offset = offset

    def __call__(self, X, Y=None, eval_gradient=False):
        if eval_gradient:
            raise NotImplementedError
        Y = X if Y is None else Y
        d = X[:, None, :2] - Y[None, :, :2]
        r2 = np.sum(d**2, axis=-1)
        ell2 = self.length**2
        k = self.magnitude**2 * np.exp(-0.5 * r2 / ell2)
        ci = X[:, 2].astype(int)[:, None]
        cj = Y[:, 2].astype(int)[None, :]
        out = np.zeros(r2.shape)
        for a in range(2):
            for b in range(2):
                m = (ci == a) & (cj == b)
                val = ((a == b) - d[..., a] * d[..., b] / ell2) * k
                out[m] = val[m]
        up = (ci == 2) & (cj == 2)
        out[up] = k[up]
        out += self.constant**2 * (ci == cj)
        same = (X[:, 3][:, None] == Y[:, 3][None, :]) & (X[:, 3][:, None] >= 0)
        out += self.offset**2 * same * (X[:, 4:7] @ Y[:, 4:7].T)
        return out

    def diag(self, X):
        return np.diag(self(X))

    def is_stationary(self):
        return False


def _stack(xy, comp_rows, groups=None, rot=None):
    """(N, 2) positions -> (3N, 7) sklearn inputs (component-major)."""
    n = xy.shape[0]
    rows = []
    for c in comp_rows:
        g = np.full(n, -1.0) if groups is None else groups.astype(float)
        r = np.tile(np.eye(3)[c], (n, 1)) if rot is None else rot[:, c, :]
        rows.append(np.column_stack([xy, np.full(n, c), g, r]))
    return np.vstack(rows)


def _potential_field(rng, n_bumps=25, box=(12.0, 10.0)):
    """A curl-free test field: minus the gradient of a sum of Gaussian bumps
    (vertical part: the bumps' own profile), plus a constant (µT)."""
    cent = rng.uniform([0, 0], box, size=(n_bumps, 2))
    amp = rng.normal(size=n_bumps) * 8.0
    wid = rng.uniform(1.2, 2.5, n_bumps)

    def field(xy):
        d = xy[:, None, :] - cent[None]
        g = amp * np.exp(-np.sum(d**2, -1) / (2 * wid**2))
        gx = np.sum(g * (-d[..., 0] / wid**2), 1)
        gy = np.sum(g * (-d[..., 1] / wid**2), 1)
        return np.column_stack([-gx + 18.0, -gy - 6.0, np.sum(g / wid, 1) - 41.0])

    return field


HYPER = dict(magnitude_ut=4.0, length_scale_m=1.5, noise_h_ut=0.4, noise_up_ut=0.3, constant_ut=30.0)


@pytest.fixture(scope="module")
def survey():
    rng = np.random.default_rng(11)
    field = _potential_field(rng)
    xy = rng.uniform([0, 0], [12, 10], size=(600, 2))
    b = field(xy) + rng.normal(size=(600, 3)) * [0.4, 0.4, 0.3]
    test = rng.uniform([0.5, 0.5], [11.5, 9.5], size=(200, 2))
    return xy, b, test, field


def test_curl_free_matches_exact_sklearn_gp(survey):
    xy, b, test, _ = survey
    model = CurlFreeGP(n_basis=700, margin_m=5.0, optimize=False, **HYPER).fit(xy, b)
    kern = CurlFreeExact(HYPER["magnitude_ut"], HYPER["length_scale_m"], HYPER["constant_ut"])
    alpha = np.concatenate([np.full(600, 0.4**2), np.full(600, 0.4**2), np.full(600, 0.3**2)])
    gpr = GaussianProcessRegressor(kern, alpha=alpha, optimizer=None, normalize_y=False)
    gpr.fit(_stack(xy, range(3)), b.T.ravel())
    ref_mean, ref_sd = gpr.predict(_stack(test, range(3)), return_std=True)
    mean, var = model.predict(test)
    rms = np.sqrt(np.mean((mean.T.ravel() - ref_mean) ** 2))
    assert rms < 0.2  # acceptance: within 0.2 µT RMS of the exact GP
    np.testing.assert_allclose(np.sqrt(var.T.ravel()), ref_sd, atol=0.05)
    # the marginal likelihood of the reduced-rank model approximates the exact one
    assert model.log_marginal_likelihood_ == pytest.approx(gpr.log_marginal_likelihood_value_, rel=0.01)


def test_walk_offsets_match_exact_gp_with_offset_kernel():
    """Per-walk device-frame offsets integrated out (Schur complement) give
    the same posterior as an exact GP whose covariance has the term
    ``offset^2 [same walk] R_i[c] . R_j[c']``."""
    rng = np.random.default_rng(5)
    field = _potential_field(rng)
    n = 360
    xy = rng.uniform([0, 0], [12, 10], size=(n, 2))
    groups = np.repeat(np.arange(6), n // 6)
    ang = np.column_stack([rng.uniform(-np.pi, np.pi, n), rng.normal(size=(n, 2)) * 0.2])
    rot = Rotation.from_euler("zyx", ang).as_matrix()  # device -> plan, heading and tilt
    offsets = rng.normal(size=(6, 3)) * 2.5
    b = field(xy) + np.einsum("nij,nj->ni", rot, offsets[groups]) + rng.normal(size=(n, 3)) * 0.3
    hyper = dict(HYPER, noise_h_ut=0.3, noise_up_ut=0.3, offset_ut=2.0)
    model = CurlFreeGP(n_basis=700, optimize=False, between_walk=False, **hyper).fit(
        xy, b, groups=groups, rotations=rot
    )
    kern = CurlFreeExact(hyper["magnitude_ut"], hyper["length_scale_m"], hyper["constant_ut"], hyper["offset_ut"])
    gpr = GaussianProcessRegressor(kern, alpha=0.3**2, optimizer=None).fit(
        _stack(xy, range(3), groups, rot), b.T.ravel()
    )
    test = rng.uniform([0.5, 0.5], [11.5, 9.5], size=(150, 2))
    ref = gpr.predict(_stack(test, range(3)))
    mean = model.predict(test, return_var=False)
    assert np.sqrt(np.mean((mean.T.ravel() - ref) ** 2)) < 0.2
    assert model.log_marginal_likelihood_ == pytest.approx(gpr.log_marginal_likelihood_value_, rel=0.01)
    # the estimated offsets (device frame) track the true ones up to the part
    # shared by all walks, which trades off against the constant field
    est = model.walk_offsets_ut_
    np.testing.assert_allclose(est - est.mean(0), offsets - offsets.mean(0), atol=0.5)


def test_per_component_matches_sklearn_rbf(survey):
    xy, b, test, _ = survey
    h = HYPER
    model = PerComponentGP(n_basis=500, optimize=False, **h).fit(xy, b)
    mean, var = model.predict(test)
    for c, noise in enumerate([h["noise_h_ut"], h["noise_h_ut"], h["noise_up_ut"]]):
        k = ConstantKernel(h["magnitude_ut"] ** 2, "fixed") * RBF(h["length_scale_m"], "fixed") + ConstantKernel(
            h["constant_ut"] ** 2, "fixed"
        )
        gpr = GaussianProcessRegressor(k, alpha=noise**2, optimizer=None).fit(xy, b[:, c])
        ref, sd = gpr.predict(test, return_std=True)
        assert np.sqrt(np.mean((mean[:, c] - ref) ** 2)) < 0.2
        np.testing.assert_allclose(np.sqrt(var[:, c]), sd, atol=0.05)


def _curl(model, pts, h=1e-3):
    """Finite-difference d b_y / dx - d b_x / dy (µT/m) and the size of the
    field's gradient for scale."""
    ex = np.array([h, 0.0])
    ey = np.array([0.0, h])
    by_x = (model.predict(pts + ex, False)[:, 1] - model.predict(pts - ex, False)[:, 1]) / (2 * h)
    bx_y = (model.predict(pts + ey, False)[:, 0] - model.predict(pts - ey, False)[:, 0]) / (2 * h)
    bx_x = (model.predict(pts + ex, False)[:, 0] - model.predict(pts - ex, False)[:, 0]) / (2 * h)
    return by_x - bx_y, np.abs(bx_x)


def test_mapped_field_is_curl_free(survey):
    # curl B = 0 for B = -grad(phi) (vector calculus); the per-component
    # model is not constrained, so the same check on it must fail
    xy, b, test, _ = survey
    cf = CurlFreeGP(n_basis=500, optimize=False, **HYPER).fit(xy, b)
    curl, scale = _curl(cf, test)
    assert np.sqrt(np.mean(curl**2)) < 1e-5 * np.sqrt(np.mean(scale**2))
    pc = PerComponentGP(n_basis=400, optimize=False, **HYPER).fit(xy, b)
    curl_pc, scale_pc = _curl(pc, test)
    assert np.sqrt(np.mean(curl_pc**2)) > 0.05 * np.sqrt(np.mean(scale_pc**2))


def test_marginal_likelihood_fit_recovers_field(survey):
    xy, b, test, field = survey
    model = make_model("curl-free", n_basis=500).fit(xy, b)
    mean, var = model.predict(test)
    err = mean - field(test)
    assert np.sqrt(np.mean(err**2)) < 0.6
    # the fitted noise is close to the simulated 0.4 / 0.3 µT
    assert model.hyper_["noise_h_ut"] == pytest.approx(0.4, rel=0.25)
    assert model.hyper_["noise_up_ut"] == pytest.approx(0.3, rel=0.25)
    # predictive sd tells the truth about the error of the mean (calibrated
    # Gaussian: 68 % within 1 sd; loose band for 600 correlated errors)
    inside = np.mean(np.abs(err) <= np.sqrt(var))
    assert 0.45 < inside < 0.9


def test_predict_grid_equals_pointwise(survey):
    xy, b, _, _ = survey
    for cls in (CurlFreeGP, PerComponentGP):
        m = cls(n_basis=200, optimize=False, **HYPER).fit(xy, b)
        xs = np.linspace(-1, 13, 15)
        ys = np.linspace(-1, 11, 9)
        mg, vg = m.predict_grid(xs, ys)
        gx, gy = np.meshgrid(xs, ys)
        mp, vp = m.predict(np.column_stack([gx.ravel(), gy.ravel()]))
        np.testing.assert_allclose(mg.reshape(-1, 3), mp, atol=1e-9)
        np.testing.assert_allclose(vg.reshape(-1, 3), vp, rtol=1e-8, atol=1e-10)


def test_between_walk_variance_calibrates_heldout_walks():
    """Walks with their own device-frame offsets: the fitted between-walk
    term makes about 68 % of residuals on new walks fall within 1 sd."""
    rng = np.random.default_rng(21)
    field = _potential_field(rng)

    def walks(n_walks, per):
        xy = rng.uniform([0, 0], [12, 10], size=(n_walks * per, 2))
        g = np.repeat(np.arange(n_walks), per)
        rot = Rotation.from_euler("z", rng.uniform(-np.pi, np.pi, (n_walks * per, 1))).as_matrix()
        off = rng.normal(size=(n_walks, 3)) * 2.0
        b = field(xy) + np.einsum("nij,nj->ni", rot, off[g]) + rng.normal(size=xy.shape[0:1] + (3,)) * 0.3
        return xy, b, g, rot

    xy, b, g, rot = walks(16, 60)
    model = CurlFreeGP(n_basis=250).fit(xy, b, groups=g, rotations=rot)
    assert np.all(model.between_walk_var_ > 0.5)  # offsets of sd 2 µT must show
    txy, tb, _, _ = walks(12, 60)
    mean, var = model.predict(txy)
    inside = np.mean(np.abs(tb - mean) <= np.sqrt(var + model.noise_var_), axis=0)
    assert np.all((inside > 0.58) & (inside < 0.80)), inside
    # without the term the sd would be far too small
    m0 = CurlFreeGP(n_basis=250, between_walk=False).fit(xy, b, groups=g, rotations=rot)
    mean0, var0 = m0.predict(txy)
    assert np.mean(np.abs(tb - mean0) <= np.sqrt(var0 + m0.noise_var_)) < 0.5


def test_nearest_and_constant_baselines():
    # nearest neighbour checked against a brute-force search (slow twin)
    rng = np.random.default_rng(2)
    xy = rng.uniform(0, 10, size=(300, 2))
    b = rng.normal(size=(300, 3))
    q = rng.uniform(0, 10, size=(40, 2))
    m = NearestMap(k=1).fit(xy, b)
    d = np.linalg.norm(q[:, None] - xy[None], axis=-1)
    np.testing.assert_allclose(m.predict(q, False), b[np.argmin(d, axis=1)])
    m3 = NearestMap(k=3).fit(xy, b)
    idx = np.argsort(d, axis=1)[:, :3]
    mean, var = m3.predict(q)
    np.testing.assert_allclose(mean, b[idx].mean(axis=1))
    np.testing.assert_allclose(var, np.maximum(b[idx].var(axis=1, ddof=1), m3.floor_var_))
    c = ConstantMap().fit(xy, b)
    mean, var = c.predict(q)
    np.testing.assert_allclose(mean, np.broadcast_to(b.mean(0), mean.shape))
    np.testing.assert_allclose(var[0], np.var(b, axis=0, ddof=1))


def test_registry_and_errors():
    assert set(MAP_KERNELS) == {"curl-free", "per-component", "nearest", "constant"}
    with pytest.raises(ConfigError, match="valid: curl-free, per-component, nearest, constant"):
        make_model("kriging")
    with pytest.raises(ConfigError):
        make_model("nearest", bogus=1)
    with pytest.raises(NotFittedError):
        CurlFreeGP().predict(np.zeros((2, 2)))
    with pytest.raises(DataError, match="shape"):
        ConstantMap().fit(np.zeros((5, 3)), np.zeros((5, 3)))
    with pytest.raises(DataError, match="non-finite"):
        NearestMap().fit(np.array([[0.0, 0.0], [1.0, np.nan]]), np.zeros((2, 3)))
    # __init__ only stores parameters
    m = CurlFreeGP(n_basis=10, length_scale_m=-3)
    assert m.get_params()["length_scale_m"] == -3
    with pytest.raises(ConfigError, match="length_scale_m"):
        m.fit(np.random.default_rng(0).uniform(size=(20, 2)), np.zeros((20, 3)))


def test_marginal_likelihood_gradient_matches_finite_differences():
    # analytic gradient (expectation identities) against central differences
    from _gradcheck import check_marginal_gradient

    from mapping import _linmodel

    rng = np.random.default_rng(8)
    xy = rng.uniform(0, 8, size=(200, 2))
    g = rng.integers(0, 4, 200)
    rot = Rotation.random(200, random_state=3).as_matrix()
    b = rng.normal(size=(200, 3)) * 3 + 10
    model = CurlFreeGP(n_basis=60, optimize=False, between_walk=False, offset_ut=1.0, **HYPER).fit(
        xy, b, groups=g, rotations=rot
    )
    st = _linmodel.accumulate(
        lambda q: model._design(model.basis_, q), model.idx_, xy, b, groups=g, rotations=rot, n_walks=4
    )
    prior = model._prior_var(model.hyper_)
    noise = np.array([0.5, 0.3])
    check_marginal_gradient(st, prior, noise, 1.7, rng)
    h = 1e-5
    # chain rule of the prior's dependence on magnitude and length scale
    for name in ("magnitude_ut", "length_scale_m", "constant_ut"):
        hp = dict(model.hyper_)
        hm = dict(model.hyper_)
        hp[name] *= np.exp(h)
        hm[name] *= np.exp(-h)
        num = (np.log(model._prior_var(hp)) - np.log(model._prior_var(hm))) / (2 * h)
        np.testing.assert_allclose(model._dlog_prior(model.hyper_)[name], num, rtol=1e-5, atol=1e-6)


def test_tiled_map_agrees_with_one_box():
    """Overlapping tiles with blended predictions approximate the same GP as
    one box: the two means agree within the acceptance tolerance (0.2 µT
    RMS) away from the outer edge, and the raster equals the point-wise
    blend."""
    rng = np.random.default_rng(9)
    field = _potential_field(rng, n_bumps=60, box=(24.0, 16.0))
    xy = rng.uniform([0, 0], [24, 16], size=(2500, 2))
    b = field(xy) + rng.normal(size=(2500, 3)) * 0.3
    kw = dict(optimize=False, domain=((0, 0), (24, 16)), **HYPER)
    one = CurlFreeGP(n_basis=600, tiles="never", **kw).fit(xy, b)
    tiled = CurlFreeGP(tiles="always", tile_m=8.0, tile_overlap_m=3.0, tile_basis=300, **kw).fit(xy, b)
    assert len(tiled.parts_) == 6
    q = rng.uniform([1, 1], [23, 15], size=(400, 2))
    m1, v1 = one.predict(q)
    m2, v2 = tiled.predict(q)
    assert np.sqrt(np.mean((m1 - m2) ** 2)) < 0.2
    np.testing.assert_allclose(np.sqrt(v2), np.sqrt(v1), atol=0.1)
    xs, ys = np.linspace(0, 24, 13), np.linspace(0, 16, 9)
    mg, vg = tiled.predict_grid(xs, ys)
    gx, gy = np.meshgrid(xs, ys)
    mp, vp = tiled.predict(np.column_stack([gx.ravel(), gy.ravel()]))
    np.testing.assert_allclose(mg.reshape(-1, 3), mp, atol=1e-8)
    np.testing.assert_allclose(vg.reshape(-1, 3), vp, atol=1e-8)


def _steel_field(rng, box, n=30, depth=0.9):
    """A field with sharp local anomalies: a uniform background plus
    vertical dipoles ``depth`` metres below the survey plane, summed by
    magpylib (https://magpylib.readthedocs.io, SI units: A·m², T)."""
    import magpylib as magpy
    pos = np.column_stack([rng.uniform([0, 0], box, size=(n, 2)), np.full(n, -depth)])
    mom = rng.normal(size=(n, 3)) * 60.0
    sources = [magpy.misc.Dipole(moment=m, position=p) for p, m in zip(pos, mom)]
    background = np.array([18.0, -6.0, -41.0])

    def field(xy):
        pts = np.column_stack([xy, np.zeros(xy.shape[0])])
        return background + 1e6 * magpy.getB(sources, pts, sumup=True)

    return field


def test_refinement_resolves_what_the_coarse_basis_cannot():
    """When the fitted length scale sits on the lower bound one coarse box
    resolves, the fit is redone on finer tiles: the length scale then drops
    below that bound and the map is closer to the true field (magpylib
    dipoles 0.9 m below the plane, anomalies about 1 m wide). One step
    only: here the fine tiles' own bound is reached too."""
    rng = np.random.default_rng(21)
    box = (24.0, 16.0)
    field = _steel_field(rng, box)
    xy = rng.uniform([0, 0], box, size=(4000, 2))
    b = field(xy) + rng.normal(size=(4000, 3)) * 0.3
    q = rng.uniform([1, 1], [23, 15], size=(800, 2))
    kw = dict(n_basis=144, tile_m=8.0, tile_overlap_m=2.0, fine_tile_basis=400, domain=((0, 0), box),
              between_walk=False)
    coarse = CurlFreeGP(refine=False, **kw).fit(xy, b)
    fine = CurlFreeGP(**kw).fit(xy, b)
    lo_coarse = coarse.optim_info_["length_scale_bounds_m"][0]
    assert "length_scale_m" in coarse.optim_info_["at_bound"]  # the premise: coarse basis too coarse
    assert fine.optim_info_["refined_from"]["tiles"] == len(coarse.parts_)
    assert len(fine.parts_) == 6 and fine.parts_[0].basis_.n >= 400
    assert fine.hyper_["length_scale_m"] < 0.9 * lo_coarse
    rmse = [np.sqrt(np.mean((m.predict(q, return_var=False) - field(q)) ** 2)) for m in (coarse, fine)]
    assert rmse[1] < 0.8 * rmse[0], rmse  # measured 0.63-0.68 on seeds 21-23
    assert fine.summary()["basis"]["n_basis_per_tile"] == 400


def test_refinement_skipped_over_its_memory_budget():
    """The refinement of the test above, with a memory budget it exceeds:
    the coarse fit is kept (the same map as refine=False) and the skip is
    recorded. The estimate (fullest fine tile's statistics times tiles,
    times 1.5) bounds what the refined fit really holds in statistics and
    is within a factor 2 of it (tiles of similar fill; common practice, no
    source)."""
    from mapping.mapfit import _stats_nbytes

    rng = np.random.default_rng(21)
    box = (24.0, 16.0)
    field = _steel_field(rng, box)
    xy = rng.uniform([0, 0], box, size=(4000, 2))
    b = field(xy) + rng.normal(size=(4000, 3)) * 0.3
    kw = dict(n_basis=144, tile_m=8.0, tile_overlap_m=2.0, fine_tile_basis=400, domain=((0, 0), box),
              between_walk=False)
    coarse = CurlFreeGP(refine=False, **kw).fit(xy, b)
    capped = CurlFreeGP(refine_max_gb=1e-3, **kw).fit(xy, b)
    fine = CurlFreeGP(**kw).fit(xy, b)
    skip = capped.optim_info_["refine_skipped"]
    assert "refined_from" not in capped.optim_info_ and "refined_from" in fine.optim_info_
    assert skip["reason"] == "memory" and skip["estimated_gb"] > skip["budget_gb"] == 1e-3
    assert skip["tiles"] == len(fine.parts_) == 6
    np.testing.assert_allclose(capped.predict(xy[:100], return_var=False), coarse.predict(xy[:100], return_var=False))
    held = sum(_stats_nbytes(p.stats_) for p in fine.parts_) / 1e9
    assert held <= skip["estimated_gb"] / 1.5 * 1.001 and held >= 0.5 * skip["estimated_gb"] / 1.5


def test_no_refinement_when_the_basis_resolves_the_field(survey):
    """A smooth field whose length scale the box resolves keeps one box;
    n_jobs does not change the result."""
    xy, b = survey[:2]
    one = CurlFreeGP(n_basis=400, between_walk=False, n_jobs=1).fit(xy, b)
    two = CurlFreeGP(n_basis=400, between_walk=False, n_jobs=2).fit(xy, b)
    assert len(one.parts_) == 1 and "refined_from" not in one.optim_info_
    assert one.hyper_["length_scale_m"] > 1.1 * one.optim_info_["length_scale_bounds_m"][0]
    np.testing.assert_allclose(one.predict(xy[:50], return_var=False), two.predict(xy[:50], return_var=False))


def test_walk_offsets_find_the_walk_with_a_bad_calibration():
    """One walk whose device z axis carries a 15 µT offset (a magnet near a
    robot's sensor, say) among walks with ordinary residual offsets of
    sd 1.5 µT: the fitted offsets recover the injected ones (relative to the
    median walk) on one box and on tiles, and only that walk is flagged."""
    from mapping.mapbuild import outlying_walks

    rng = np.random.default_rng(8)
    field = _potential_field(rng, n_bumps=40, box=(24.0, 10.0))
    n_walks, per = 9, 80
    xy = rng.uniform([0, 0], [24, 10], size=(n_walks * per, 2))
    groups = np.repeat(np.arange(n_walks), per)
    rot = Rotation.from_euler("z", rng.uniform(-np.pi, np.pi, (n_walks * per, 1))).as_matrix()
    offsets = rng.normal(size=(n_walks, 3)) * 1.5
    offsets[4, 2] += 15.0
    b = field(xy) + np.einsum("nij,nj->ni", rot, offsets[groups]) + rng.normal(size=(n_walks * per, 3)) * 0.3
    names = [f"walk_{i}" for i in range(n_walks)]
    labels = np.array(names)[groups]
    for tiles in ("never", "always"):
        model = CurlFreeGP(n_basis=400, tiles=tiles, tile_m=12.0, tile_basis=300,
                           between_walk=False, **HYPER).fit(xy, b, groups=labels, rotations=rot)
        assert model.walk_names_ == names
        est = model.walk_offsets()
        assert est.shape == (n_walks, 3)
        # only differences between walks are identified
        np.testing.assert_allclose(est - np.median(est, 0), offsets - np.median(offsets, 0), atol=1.0)
        flagged = outlying_walks(model.walk_names_, est)
        assert [f["walk"] for f in flagged] == ["walk_4"], (tiles, flagged)
        assert flagged[0]["deviation_ut"][2] == pytest.approx(15.0, abs=2.0)
    # the ordinary walks alone: nothing stands out
    assert outlying_walks(names[:4] + names[5:], np.delete(offsets, 4, axis=0)) == []
    assert outlying_walks(names[:3], offsets[:3]) == []  # too few walks to judge
