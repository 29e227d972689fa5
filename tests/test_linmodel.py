"""Linear model behind the maps: the block-by-block posterior against the
dense weight-space solution.

Reference: Rasmussen & Williams (2006), "Gaussian Processes for Machine
Learning", sec. 2.1 (weight-space view): with design A, noise precision
W and prior precision P, the posterior mean of all weights (field and walk
offsets together) solves ``(A^T W A + P) mu = A^T W y`` and the log
marginal likelihood is that of ``y ~ N(0, A P^-1 A^T + W^-1)``; computed
here densely with numpy/scipy, without the Schur complement or the blocks.
"""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from scipy.stats import multivariate_normal

from _gradcheck import check_marginal_gradient

from mapping import _linmodel
from mapping.mapfit import CurlFreeGP, PerComponentGP


def _dense(model, xy, b, groups, rot, prior, noise, offset_var):
    """Stacked design of all components and walk offsets, dense posterior."""
    n = xy.shape[0]
    w = int(groups.max()) + 1 if groups is not None else 0
    feats = model._design(model.basis_, xy)
    rows, ys, nv = [], [], []
    for c in range(3):
        a = np.zeros((n, model.n_field_ + 3 * w))
        a[:, model.idx_[c]] = feats[c]
        if w:
            r = np.broadcast_to(np.eye(3)[c], (n, 3)) if rot is None else rot[:, c, :]
            for k in range(3):
                a[np.arange(n), model.n_field_ + 3 * groups + k] = r[:, k]
        rows.append(a)
        ys.append(b[:, c])
        nv.append(np.full(n, noise[0 if c < 2 else 1]))
    a, y, nv = np.vstack(rows), np.concatenate(ys), np.concatenate(nv)
    pv = np.concatenate([prior, np.full(3 * w, offset_var)])
    precision = a.T @ (a / nv[:, None]) + np.diag(1 / pv)
    mu = np.linalg.solve(precision, a.T @ (y / nv))
    cov_y = (a * pv) @ a.T + np.diag(nv)
    lml = multivariate_normal(mean=np.zeros(y.size), cov=cov_y).logpdf(y)
    m = model.n_field_
    cov_f = np.linalg.inv(precision)[:m, :m]
    return mu[:m], mu[m:].reshape(w, 3), lml, cov_f


@pytest.mark.parametrize(
    "cls, walks, n_parts",
    [
        (PerComponentGP, "none", 3),  # x, y, up apart
        (PerComponentGP, "heading", 2),  # heading-frame offsets couple x and y
        (CurlFreeGP, "none", 2),  # x and y share the potential's parameters (one Gram region, two kinds)
        (CurlFreeGP, "heading", 2),  # horizontal (potential) and vertical
        (CurlFreeGP, "tilted", 1),  # tilted devices couple everything
    ],
)
def test_block_posterior_equals_dense_solution(cls, walks, n_parts):
    rng = np.random.default_rng(3)
    n = 250
    xy = rng.uniform([0, 0], [12, 8], size=(n, 2))
    b = rng.normal(size=(n, 3)) + [5, -3, 20]
    model = cls(n_basis=30, optimize=False, between_walk=False, tiles="never", magnitude_ut=2.0,
                length_scale_m=2.0, noise_h_ut=0.5, noise_up_ut=0.7, constant_ut=30.0, offset_ut=1.5).fit(xy, b)
    groups = rot = None
    if walks != "none":
        groups = np.sort(rng.integers(0, 4, n))
        if walks == "heading":
            rot = Rotation.from_euler("z", rng.uniform(-np.pi, np.pi, (n, 1))).as_matrix()
        else:
            rot = Rotation.random(n, random_state=6).as_matrix()
    st = _linmodel.accumulate_separable(model.basis_, model._kinds, model.idx_, xy, b, groups=groups, rotations=rot,
                                        n_walks=0 if groups is None else 4, blocks=model._blocks(model.basis_.n))
    assert len(_linmodel._structure(st)[0]) == n_parts
    prior = model._prior_var(model.hyper_)
    noise = np.array([0.25, 0.49])
    post = _linmodel.posterior(st, prior, noise, 1.5**2)
    mu_f, mu_o, lml, cov_f = _dense(model, xy, b, groups, rot, prior, noise, 1.5**2)
    if walks == "none" and cls is PerComponentGP:
        # x and y have the same kernel, noise and samples: one factor serves both
        assert post.factor.chols[0] is post.factor.chols[1] and post.factor.chols[2] is not post.factor.chols[0]
    np.testing.assert_allclose(post.mean_f, mu_f, rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(post.cov_f, cov_f, rtol=1e-6, atol=1e-10)
    if groups is not None:
        np.testing.assert_allclose(post.mean_o, mu_o, rtol=1e-7, atol=1e-8)
    assert post.log_ml == pytest.approx(lml, rel=1e-9)
    assert _linmodel.log_marginal(st, prior, noise, 1.5**2) == pytest.approx(lml, rel=1e-9)


def test_gradient_with_a_shared_factor_matches_finite_differences():
    # x and y blocks identical (one Cholesky factor serves both): the analytic
    # gradient (expectation identities, Bishop 2006 sec. 3.5) against central
    # differences of the log marginal likelihood
    rng = np.random.default_rng(5)
    n = 200
    xy = rng.uniform([0, 0], [10, 6], size=(n, 2))
    b = rng.normal(size=(n, 3)) + [4, -2, 15]
    model = PerComponentGP(n_basis=25, optimize=False, between_walk=False, tiles="never", magnitude_ut=2.0,
                           length_scale_m=2.0, noise_h_ut=0.5, noise_up_ut=0.7, constant_ut=30.0).fit(xy, b)
    st = _linmodel.accumulate_separable(model.basis_, model._kinds, model.idx_, xy, b,
                                        blocks=model._blocks(model.basis_.n))
    prior = model._prior_var(model.hyper_)
    noise = np.array([0.25, 0.49])
    check_marginal_gradient(st, prior, noise, 1.0, rng)


def test_gradient_with_walk_offsets_on_single_group_blocks_matches_finite_differences():
    # curl-free model, walk offsets in a device frame turned about the
    # vertical only: the horizontal and vertical blocks stay apart, each with
    # one noise group, so the gradient takes the diagonal-of-the-inverse path
    # (the trace identity in log_marginal_and_grad); against central
    # differences of the log marginal likelihood (Bishop 2006 sec. 3.5)
    rng = np.random.default_rng(11)
    n = 240
    xy = rng.uniform([0, 0], [9, 7], size=(n, 2))
    g = rng.integers(0, 4, n)
    rot = Rotation.from_euler("z", rng.uniform(-np.pi, np.pi, (n, 1))).as_matrix()
    b = rng.normal(size=(n, 3)) * 2 + [10, -5, 30]
    model = CurlFreeGP(n_basis=36, optimize=False, between_walk=False, tiles="never", magnitude_ut=3.0,
                       length_scale_m=1.5, noise_h_ut=0.6, noise_up_ut=0.8, constant_ut=40.0, offset_ut=1.0).fit(
        xy, b, groups=g, rotations=rot)
    st = _linmodel.accumulate_separable(model.basis_, model._kinds, model.idx_, xy, b, groups=g, rotations=rot,
                                        n_walks=4, blocks=model._blocks(model.basis_.n))
    parts, gffb = _linmodel._structure(st)
    assert len(parts) == 2 and all(len(gb) == 1 for gb in gffb)  # the premise: two single-group blocks
    prior = model._prior_var(model.hyper_)
    noise = np.array([0.36, 0.64])
    check_marginal_gradient(st, prior, noise, 1.7, rng, n_prior=8)


@pytest.mark.parametrize("n_jobs", [None, 1])
def test_blocks_factorised_on_threads_give_the_dense_solution(monkeypatch, n_jobs):
    # every block large enough for a thread: the threaded factorisations
    # must still give the dense weight-space solution (reference as above)
    from concurrent import futures

    started = []
    real = futures.ThreadPoolExecutor

    class Counting(real):
        def __init__(self, *a, **k):
            started.append(k.get("max_workers"))
            super().__init__(*a, **k)

    monkeypatch.setattr(_linmodel, "_THREAD_MIN_SIZE", 1)
    monkeypatch.setattr(_linmodel, "ThreadPoolExecutor", Counting)
    monkeypatch.setattr(_linmodel, "available_cores", lambda: 2)
    rng = np.random.default_rng(4)
    n = 200
    xy = rng.uniform([0, 0], [12, 8], size=(n, 2))
    b = rng.normal(size=(n, 3)) + [5, -3, 20]
    model = PerComponentGP(n_basis=30, optimize=False, between_walk=False, tiles="never", magnitude_ut=2.0,
                           length_scale_m=2.0, noise_h_ut=0.5, noise_up_ut=0.7, constant_ut=30.0, n_jobs=n_jobs)
    with _linmodel.thread_limit(n_jobs):
        st = _linmodel.accumulate_separable(model.fit(xy, b).basis_, model._kinds, model.idx_, xy, b,
                                            blocks=model._blocks(model.basis_.n))
        started.clear()
        prior = model._prior_var(model.hyper_)
        post = _linmodel.posterior(st, prior, np.array([0.25, 0.49]))
    # x and y share one factor, up has its own: two factorisations (and
    # two inverses for the covariance), on two threads unless the model
    # asks for one
    assert started == ([2, 2] if n_jobs is None else [])
    mu_f, _, lml, cov_f = _dense(model, xy, b, None, None, prior, np.array([0.25, 0.49]), 1.0)
    np.testing.assert_allclose(post.mean_f, mu_f, rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(post.cov_f, cov_f, rtol=1e-6, atol=1e-10)
    assert post.log_ml == pytest.approx(lml, rel=1e-9)
