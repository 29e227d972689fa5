"""Hilbert-space basis: the separable (product-to-sum) algebra against
explicit sums over the basis functions.

Reference: the Dirichlet eigenfunctions of the Laplacian on a box, Solin &
Särkkä (2020), "Hilbert space methods for reduced-rank Gaussian process
regression", Statistics and Computing 30 (the box eigenfunctions, from memory), in 2-D:
``phi_j(x) = prod_d L_d^{-1/2} sin(pi j_d (x_d + L_d) / (2 L_d))``, written
out here with numpy (not through mapping.gp_hilbert) together with its
analytic gradient; sums over samples are then plain matrix products.
"""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from mapping import _linmodel
from mapping.gp_hilbert import BoxBasis
from mapping.mapfit import CurlFreeGP, PerComponentGP


def _explicit(basis, xy):
    """phi, d phi/dx, d phi/dy (N, m) from the published eigenfunctions."""
    lx, ly = basis.half_width_m
    wx = np.pi * basis.jx / (2 * lx)
    wy = np.pi * basis.jy / (2 * ly)
    ax = (xy[:, 0:1] - basis.centre_xy[0] + lx) * wx
    ay = (xy[:, 1:2] - basis.centre_xy[1] + ly) * wy
    s = 1.0 / np.sqrt(lx * ly)
    return {
        "phi": s * np.sin(ax) * np.sin(ay),
        "dx": s * wx * np.cos(ax) * np.sin(ay),
        "dy": s * wy * np.sin(ax) * np.cos(ay),
    }


@pytest.fixture(scope="module")
def setup():
    rng = np.random.default_rng(11)
    basis = BoxBasis.covering((0.0, 0.0), (25.0, 14.0), margin_m=2.0, n_basis=150)
    xy = rng.uniform([0, 0], [25, 14], size=(1500, 2))
    return basis, xy, _explicit(basis, xy), rng


def test_values_and_gradients_are_the_eigenfunctions(setup):
    basis, xy, f, _ = setup
    np.testing.assert_allclose(basis.values(xy), f["phi"], rtol=1e-12, atol=1e-14)
    dx, dy = basis.gradients(xy)
    np.testing.assert_allclose(dx, f["dx"], rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(dy, f["dy"], rtol=1e-12, atol=1e-14)
    phi, mdx, mdy = basis.evaluate(xy, gradients=True, gradient_sign=-1.0, ones=1)
    np.testing.assert_array_equal(phi[:, -1], 1.0)
    np.testing.assert_allclose(mdx[:, :-1], -f["dx"], rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(mdy[:, :-1], -f["dy"], rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("kind", ["phi", "dx", "dy"])
def test_gram_of_a_tall_box_and_a_single_function(kind):
    """The Gram, computed block by x mode, on a box taller than wide (more
    modes along y than x) and on a basis of one function, against the
    explicit product F^T F (definition of the Gram matrix)."""
    rng = np.random.default_rng(3)
    for hi, n in (((6.0, 30.0), 90), ((5.0, 5.0), 1)):
        basis = BoxBasis.covering((0.0, 0.0), hi, margin_m=1.0, n_basis=n)
        xy = rng.uniform([0, 0], hi, size=(700, 2))
        f = _explicit(basis, xy)[kind]
        np.testing.assert_allclose(basis.gram(basis.cos_table(xy), kind), f.T @ f, rtol=0,
                                   atol=1e-12 * np.abs(f).max() ** 2 * xy.shape[0])


@pytest.mark.parametrize("kind", ["phi", "dx", "dy"])
@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_separable_sums_equal_explicit_products(setup, kind, sign):
    basis, xy, f, rng = setup
    fs = sign * f[kind]
    tol = 1e-12 * np.abs(fs).max() ** 2 * xy.shape[0]
    # Gram matrix sum_i f_j f_k from the cosine table
    np.testing.assert_allclose(basis.gram(basis.cos_table(xy, chunk=400), kind, sign), fs.T @ fs, rtol=0, atol=tol)
    # weighted sums sum_i w_ik f_j
    w = rng.normal(size=(xy.shape[0], 3))
    tab = basis.trig_tables(xy, w, [kind])[kind]
    np.testing.assert_allclose(basis.project(tab, kind, sign), w.T @ fs, rtol=0, atol=tol)
    # quadratic and linear forms at points
    a = rng.normal(size=(basis.n, basis.n))
    cov = a @ a.T / basis.n
    v = rng.normal(size=basis.n)
    quad = basis.eval_cos(basis.collapse_quadratic(cov, kind, sign), xy)
    np.testing.assert_allclose(quad, np.einsum("ij,jk,ik->i", fs, cov, fs), rtol=1e-10, atol=1e-12)
    lin = basis.eval_trig(basis.collapse_linear(v, kind, sign), kind, xy)
    np.testing.assert_allclose(lin, fs @ v, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("cls", [CurlFreeGP, PerComponentGP])
@pytest.mark.parametrize("walks", ["none", "identity", "rotated"])
def test_separable_statistics_equal_design_statistics(cls, walks):
    """accumulate_separable against accumulate over the explicit design
    matrices of the model (sums of products, by BLAS)."""
    rng = np.random.default_rng(5)
    n = 3000
    xy = rng.uniform([0, 0], [30, 20], size=(n, 2))
    b = rng.normal(size=(n, 3)) * 5 + [10, -20, 40]
    model = cls(n_basis=120, optimize=False, between_walk=False, tiles="never").fit(xy, b)
    groups = None if walks == "none" else np.sort(rng.integers(0, 6, n))
    rot = Rotation.random(n, random_state=4).as_matrix() if walks == "rotated" else None
    kw = dict(groups=groups, rotations=rot, n_walks=0 if groups is None else 6)
    ref = _linmodel.accumulate(lambda q: model._design(model.basis_, q), model.idx_, xy, b, **kw)
    sep = _linmodel.accumulate_separable(model.basis_, model._kinds, model.idx_, xy, b, chunk=700, **kw)
    for name in ("gff", "bf", "gfo", "goo", "bo", "yy"):
        r, s = getattr(ref, name), getattr(sep, name)
        np.testing.assert_allclose(s, r, rtol=0, atol=1e-10 * max(np.abs(r).max(initial=0.0), 1.0), err_msg=name)
    np.testing.assert_array_equal(sep.n, ref.n)


@pytest.mark.parametrize("cls", [CurlFreeGP, PerComponentGP])
def test_block_statistics_equal_dense_statistics(cls):
    """With the model's blocks given, F^T F is kept block by block; it is
    the dense matrix of the design statistics (``accumulate``, BLAS) and
    sums of folds are sums of the blocks."""
    rng = np.random.default_rng(6)
    n = 2000
    xy = rng.uniform([0, 0], [30, 20], size=(n, 2))
    b = rng.normal(size=(n, 3)) * 5 + [10, -20, 40]
    model = cls(n_basis=100, optimize=False, between_walk=False, tiles="never").fit(xy, b)
    groups = np.sort(rng.integers(0, 4, n))
    kw = dict(groups=groups, rotations=None, n_walks=4)
    ref = _linmodel.accumulate(lambda q: model._design(model.basis_, q), model.idx_, xy, b, **kw)
    blocks = model._blocks(model.basis_.n)
    half = np.arange(n) < n // 2
    parts = [_linmodel.accumulate_separable(model.basis_, model._kinds, model.idx_, xy[s], b[s], chunk=700,
                                            blocks=blocks, groups=groups[s], n_walks=4) for s in (half, ~half)]
    total = parts[0] + parts[1]
    assert total.gff is None and len(total.gff_blocks) == len(blocks)
    r = ref.gff
    np.testing.assert_allclose(total.dense_gff(), r, rtol=0, atol=1e-10 * np.abs(r).max())
    for name in ("bf", "gfo", "goo", "bo", "yy"):
        np.testing.assert_allclose(getattr(total, name), getattr(ref, name), rtol=0,
                                   atol=1e-10 * max(np.abs(getattr(ref, name)).max(), 1.0), err_msg=name)
    # the likelihood does not depend on how F^T F is stored
    ref.blocks, ref.support = total.blocks, total.support
    pv = np.full(model.n_field_, 2.0)
    np.testing.assert_allclose(_linmodel.log_marginal(total, pv, [0.5, 0.4], 1.0),
                               _linmodel.log_marginal(ref, pv, [0.5, 0.4], 1.0), rtol=1e-10)
