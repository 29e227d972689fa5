"""Reduced-rank (Hilbert-space) basis for Gaussian processes on a box.

Solin & Särkkä (2020), "Hilbert space methods for reduced-rank Gaussian
process regression", Statistics and Computing 30: a stationary kernel on a
box ``[-L, L]`` is approximated by the Dirichlet eigenfunctions of the
Laplacian,

    k(x, x') ~= sum_j S(sqrt(lambda_j)) phi_j(x) phi_j(x'),

    phi_j(x) = prod_d L_d^{-1/2} sin(pi j_d (x_d + L_d) / (2 L_d)),
    lambda_j = sum_d (pi j_d / (2 L_d))^2,

with ``S`` the kernel's spectral density. The basis does not depend on the
kernel's hyperparameters, only the prior weights ``S(sqrt(lambda_j))`` do,
so ``Phi^T Phi`` is accumulated once and the marginal likelihood is then an
``m x m`` problem.

Here the domain is 2-D (plan x, y). The eigenfunctions are separable, so on
a raster every sum over them is a product of 1-D factors
(:meth:`BoxBasis.eval_trig_grid`, :meth:`BoxBasis.eval_cos_grid`).

Separable algebra. With ``t = pi (x - x0 + L_x) / (2 L_x)`` (and ``u`` along
y) every basis function and gradient is a constant times
``X(j_x t) Y(j_y u)`` with ``X, Y`` sine or cosine, so by the
product-to-sum identities (``sin a sin b = (cos(a-b) - cos(a+b)) / 2``,
``cos a cos b = (cos(a-b) + cos(a+b)) / 2``) the product of two of them is a
sum of four terms ``cos(p t) cos(q u)`` with ``p = |j_x - j_x'|`` or
``j_x + j_x'``. Hence:

- ``sum_i f_j(x_i) f_k(x_i)`` over many samples needs only the table
  ``sum_i cos(p t_i) cos(q u_i)`` for ``p <= 2 J_x, q <= 2 J_y``
  (:meth:`BoxBasis.cos_table`, ``O(N J_x J_y)``), then gathers
  (:meth:`BoxBasis.gram`, ``O(m^2)``), instead of ``O(N m^2)``;
- weighted sums ``sum_i w_i f_j(x_i)`` need ``sum_i w_i X(a t_i) Y(b u_i)``
  (:meth:`BoxBasis.trig_tables`);
- a quadratic form ``f(x)^T C f(x)`` at many points is a 2-D cosine
  polynomial whose coefficients are the entries of ``C`` summed by
  ``(p, q)`` (:meth:`BoxBasis.collapse_quadratic`), evaluated in
  ``O(J_x J_y)`` per point instead of ``O(m^2)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import NamedTuple

import numpy as np

from fingerprint.errors import ConfigError

__all__ = ["BoxBasis", "Harmonics", "KINDS", "se_spectral_density_2d"]

#: Basis-function kinds of the separable algebra, as (x factor, y factor):
#: ``phi_j`` = sin * sin, ``d phi_j / dx`` = cos * sin, ``d phi_j / dy`` =
#: sin * cos (times constants, :meth:`BoxBasis.coef`).
KINDS = {"phi": ("s", "s"), "dx": ("c", "s"), "dy": ("s", "c")}


def se_spectral_density_2d(omega, variance, length_scale_m):
    """Spectral density of the 2-D squared-exponential kernel
    ``variance * exp(-r^2 / (2 l^2))``: ``variance * 2 pi l^2 exp(-omega^2 l^2 / 2)``
    (Rasmussen & Williams 2006, eq. 4.21 with D = 2).

    Parameters
    ----------
    omega : (m,) float, rad/m, angular frequency magnitude
    variance : float, µT² (or the potential's units squared)
    length_scale_m : float

    Returns
    -------
    (m,) float
    """
    ell2 = length_scale_m**2
    return variance * 2.0 * np.pi * ell2 * np.exp(-0.5 * np.asarray(omega) ** 2 * ell2)


class Harmonics(NamedTuple):
    """``cos(k t), sin(k t)`` (N, 2 J_x + 1) and ``cos(k u), sin(k u)``
    (N, 2 J_y + 1) at N points, ``k = 0, 1, ...`` (:meth:`BoxBasis.harmonics_at`)."""

    cx: np.ndarray
    sx: np.ndarray
    cy: np.ndarray
    sy: np.ndarray

    def factor(self, axis, which, kmax):
        """(N, kmax + 1) cosines (``which`` "c") or sines ("s") along axis 0 (x) or 1 (y)."""
        h = (self.cx, self.sx, self.cy, self.sy)[2 * axis + (which == "s")]
        return h[:, : kmax + 1]


@dataclass(frozen=True, eq=False)
class BoxBasis:
    """Laplacian eigenfunctions on the box ``centre ± half_width_m``.

    Attributes
    ----------
    centre_xy : (2,) float, metres
    half_width_m : (2,) float, metres (``L_x, L_y``)
    jx, jy : (m,) int, 1-based mode numbers of each basis function
    omega_x, omega_y : (m,) float, rad/m, ``pi j / (2 L)``
    """

    centre_xy: np.ndarray
    half_width_m: np.ndarray
    jx: np.ndarray
    jy: np.ndarray

    @classmethod
    def covering(cls, lo_xy, hi_xy, *, margin_m, n_basis):
        """The ``n_basis`` lowest-frequency eigenfunctions of the box that
        holds ``[lo_xy, hi_xy]`` plus ``margin_m`` on every side."""
        lo = np.asarray(lo_xy, float) - margin_m
        hi = np.asarray(hi_xy, float) + margin_m
        if not np.all(hi > lo):
            raise ConfigError(f"basis domain must have positive size, got {lo} .. {hi}")
        n_basis = int(n_basis)
        if n_basis < 1:
            raise ConfigError(f"n_basis must be >= 1, got {n_basis}")
        centre = 0.5 * (lo + hi)
        half = 0.5 * (hi - lo)
        # Candidates j_x <= kx, j_y <= ky, starting from twice the count of
        # the quarter ellipse that holds n points; the n lowest are exact
        # once the n-th lies below every eigenvalue outside the rectangle
        # (at least (kx + 1, 1) or (1, ky + 1)); else the rectangle grows.
        est = np.sqrt(4.0 * n_basis / np.pi * half / half[::-1])
        kx, ky = (int(v) for v in np.minimum(np.ceil(2 * est) + 2, n_basis))
        while True:
            gx, gy = np.meshgrid(np.arange(1, kx + 1), np.arange(1, ky + 1), indexing="ij")
            gx = gx.ravel()
            gy = gy.ravel()
            lam = (np.pi * gx / (2 * half[0])) ** 2 + (np.pi * gy / (2 * half[1])) ** 2
            order = np.lexsort((gy, gx, lam))[:n_basis]
            outside = min((np.pi * (kx + 1) / (2 * half[0])) ** 2 + (np.pi / (2 * half[1])) ** 2,
                          (np.pi / (2 * half[0])) ** 2 + (np.pi * (ky + 1) / (2 * half[1])) ** 2)
            if order.size == n_basis and lam[order[-1]] < outside:
                break
            kx, ky = 2 * kx, 2 * ky
        return cls(centre, half, gx[order].astype(np.int64), gy[order].astype(np.int64))

    # -- properties --------------------------------------------------------
    @property
    def n(self) -> int:
        return int(self.jx.shape[0])

    @property
    def omega_x(self):
        return np.pi * self.jx / (2 * self.half_width_m[0])

    @property
    def omega_y(self):
        return np.pi * self.jy / (2 * self.half_width_m[1])

    @property
    def omega(self):
        """(m,) float, rad/m, ``sqrt(lambda_j)``."""
        return np.hypot(self.omega_x, self.omega_y)

    @property
    def omega_max(self) -> float:
        return float(self.omega.max())

    @property
    def lo_xy(self):
        return self.centre_xy - self.half_width_m

    @property
    def hi_xy(self):
        return self.centre_xy + self.half_width_m

    def to_dict(self):
        """JSON-able description (enough to rebuild the basis)."""
        return {
            "centre_xy": [float(v) for v in self.centre_xy],
            "half_width_m": [float(v) for v in self.half_width_m],
            "n_basis": self.n,
        }

    # -- evaluation --------------------------------------------------------
    def _modes(self):
        """Distinct mode numbers along x and y, and each basis function's
        position among them."""
        ux, ix = np.unique(self.jx, return_inverse=True)
        uy, iy = np.unique(self.jy, return_inverse=True)
        return ux, ix, uy, iy

    def evaluate(self, xy, *, values=True, gradients=False, gradient_sign=1.0, ones=0):
        """Basis values and/or gradients at points (N, 2), each as an
        (N, m + ones) array whose last ``ones`` columns are 1 (room for
        constant terms, so that callers need not copy to append them).

        The sines and cosines are evaluated once per distinct mode number
        along each axis (a few dozen) and gathered per basis function, with
        the constant factors applied before the gather; each output is then
        a single product written in place.

        Parameters
        ----------
        xy : (N, 2) float, metres
        values : bool, return ``phi_j``
        gradients : bool, return ``d phi_j / dx`` and ``d phi_j / dy`` (1/m)
        gradient_sign : float, multiplies the gradients (-1 for ``-grad``)
        ones : int, trailing columns of ones

        Returns
        -------
        list of arrays: ``[phi]``, ``[dx, dy]`` or ``[phi, dx, dy]``
        """
        xy = np.asarray(xy, float).reshape(-1, 2)
        n, m = xy.shape[0], self.n
        ux, ix, uy, iy = self._modes()
        wx = np.pi * ux / (2 * self.half_width_m[0])
        wy = np.pi * uy / (2 * self.half_width_m[1])
        px = (xy[:, 0:1] - self.centre_xy[0] + self.half_width_m[0]) * wx[None, :]
        py = (xy[:, 1:2] - self.centre_xy[1] + self.half_width_m[1]) * wy[None, :]
        scale = 1.0 / np.sqrt(self.half_width_m.prod())
        sx = np.take(np.sin(px), ix, axis=1)
        sy = np.take(scale * np.sin(py), iy, axis=1)  # carries the normalisation

        def product(a, b):
            out = np.empty((n, m + ones))
            np.multiply(a, b, out=out[:, :m])
            out[:, m:] = 1.0
            return out

        res = []
        if values:
            res.append(product(sx, sy))
        if gradients:
            gs = float(gradient_sign)
            cx = np.take((gs * wx) * np.cos(px), ix, axis=1)
            res.append(product(cx, sy))
            del cx
            cy = np.take((gs * scale * wy) * np.cos(py), iy, axis=1)
            res.append(product(sx, cy))
        return res

    def values(self, xy):
        """``phi_j(x)`` at points (N, 2) -> (N, m)."""
        return self.evaluate(xy)[0]

    def gradients(self, xy):
        """``(d phi_j / dx, d phi_j / dy)`` at points (N, 2) -> two (N, m)
        arrays, 1/m."""
        return tuple(self.evaluate(xy, values=False, gradients=True))

    # -- separable algebra (see module docstring) ---------------------------
    @property
    def n_modes(self):
        """(J_x, J_y), highest mode number along each axis."""
        return int(self.jx.max()), int(self.jy.max())

    def angles(self, xy):
        """``t, u`` (N,) each: the phases of mode number 1 along x and y."""
        xy = np.asarray(xy, float).reshape(-1, 2)
        t = (xy[:, 0] - self.centre_xy[0] + self.half_width_m[0]) * (np.pi / (2 * self.half_width_m[0]))
        u = (xy[:, 1] - self.centre_xy[1] + self.half_width_m[1]) * (np.pi / (2 * self.half_width_m[1]))
        return t, u

    @staticmethod
    def harmonics(t, kmax):
        """``cos(k t), sin(k t)`` for ``k = 0 .. kmax``: two (N, kmax + 1).

        ``exp(i k t)`` as the product of ``exp(i q b t)`` and ``exp(i r t)``
        (``k = q b + r``, ``b ~ sqrt(kmax)``): about ``2 sqrt(kmax)``
        complex exponentials per point instead of ``2 kmax`` sines and
        cosines, each result within a few ulp."""
        t = np.asarray(t, float)
        k = int(kmax) + 1
        nb = int(np.ceil(np.sqrt(k)))
        e_lo = np.exp(1j * (t[:, None] * np.arange(nb)))
        e_hi = np.exp(1j * (t[:, None] * np.arange(0, k, nb)))
        e = (e_hi[:, :, None] * e_lo[:, None, :]).reshape(t.size, -1)[:, :k]
        return np.ascontiguousarray(e.real), np.ascontiguousarray(e.imag)

    def coef(self, kind, sign=1.0):
        """(m,) constant of each basis function of ``kind`` (see
        :data:`KINDS`): ``L^-1/2`` times ``omega_x`` or ``omega_y`` for the
        gradients, times ``sign``."""
        s = float(sign) / np.sqrt(self.half_width_m.prod())
        if kind == "phi":
            return np.full(self.n, s)
        if kind == "dx":
            return s * self.omega_x
        if kind == "dy":
            return s * self.omega_y
        raise ConfigError(f"unknown basis kind {kind!r}; valid: {', '.join(KINDS)}")

    @cached_property
    def _pair_index(self):
        """Flat indices into a (2 J_x + 1, 2 J_y + 1) table of the four
        terms of every product ``j, k``: (dd, ds, sd, ss), ``d`` the
        difference and ``s`` the sum of mode numbers (x first). Built on
        first use by :meth:`collapse_quadratic` (map variance); the Gram
        does without it."""
        q = 2 * self.n_modes[1] + 1
        # int32 (the table is small), and the row factor q applied to the two
        # x terms once rather than to each of the four indices
        x, y = self.jx.astype(np.int32), self.jy.astype(np.int32)
        da = np.abs(np.subtract.outer(x, x))
        da *= q
        sa = np.add.outer(x, x)
        sa *= q
        db = np.abs(np.subtract.outer(y, y))
        sb = np.add.outer(y, y)
        return tuple(np.add(a, b).ravel() for a, b in ((da, db), (da, sb), (sa, db), (sa, sb)))

    @staticmethod
    def _signs(kind):
        """Sign of the sum term along x and y (sin sin: -, cos cos: +), and
        the four product terms' signs in the order of ``_pair_index``."""
        ex, ey = (-1.0 if k == "s" else 1.0 for k in KINDS[kind])
        return (1.0, ey, ex, ex * ey)

    def harmonics_at(self, xy):
        """:class:`Harmonics` at points (N, 2) up to ``2 J`` per axis; the
        methods below take them in place of ``xy`` to share the sines and
        cosines between calls."""
        if isinstance(xy, Harmonics):
            return xy
        jx, jy = self.n_modes
        t, u = self.angles(xy)
        cx, sx = self.harmonics(t, 2 * jx)
        cy, sy = self.harmonics(u, 2 * jy)
        return Harmonics(cx, sx, cy, sy)

    def cos_table(self, xy, chunk=8192):
        """``sum_i cos(p t_i) cos(q u_i)``, (2 J_x + 1, 2 J_y + 1); ``xy``
        points (N, 2) or their :class:`Harmonics`."""
        jx, jy = self.n_modes
        if isinstance(xy, Harmonics):
            return xy.cx.T @ xy.cy
        out = np.zeros((2 * jx + 1, 2 * jy + 1))
        for s in range(0, np.shape(xy)[0], chunk):
            h = self.harmonics_at(xy[s : s + chunk])
            out += h.cx.T @ h.cy
        return out

    @cached_property
    def _x_groups(self):
        """Basis functions grouped by x mode number: for each ``a = 1 ..
        J_x`` the indices of the functions with ``j_x = a`` (possibly none),
        and each function's flat position ``(j_x - 1) J_y + j_y - 1`` in
        the full (J_x, J_y) grid of modes."""
        jx, jy = self.n_modes
        order = np.argsort(self.jx, kind="stable")
        cut = np.searchsorted(self.jx[order], np.arange(1, jx + 2))
        rows = [order[cut[a]:cut[a + 1]] for a in range(jx)]
        return rows, (self.jx - 1) * jy + (self.jy - 1)

    def gram(self, table, kind, sign=1.0):
        """``sum_i f_j(x_i) f_k(x_i)`` (m, m) for basis functions of
        ``kind`` from :meth:`cos_table` of the samples.

        Product to sum along y first: ``H[p, b, b'] = T[p, |b - b'|] +- T[p,
        b + b']`` for every row ``p`` of the table (small: (2 J_x + 1, J_y,
        J_y)); then along x, one block of rows per x mode ``a``:
        ``G[j, k] = H[|a - a_k|, b_j, b_k] +- H[a + a_k, b_j, b_k]``, each
        block gathered from whole (J_y)-rows of ``H`` and its columns picked
        once. No (m, m) index array is built."""
        t = np.asarray(table, float)
        _, ey, ex, _ = self._signs(kind)
        jx, jy = self.n_modes
        b = np.arange(jy)
        h = t[:, np.abs(b[:, None] - b[None, :])]
        (np.add if ey > 0 else np.subtract)(h, t[:, b[:, None] + b[None, :] + 2], out=h)
        a = np.arange(jx)
        groups, colpos = self._x_groups
        g = np.empty((self.n, self.n))
        for i, rows in enumerate(groups):
            if rows.size == 0:
                continue
            bj = (self.jy[rows] - 1)[None, :]
            d = h[np.abs(i - a)[:, None], bj]  # (J_x, rows, J_y): a_k, b_j, b_k
            (np.add if ex > 0 else np.subtract)(d, h[(i + a + 2)[:, None], bj], out=d)
            g[rows] = d.transpose(1, 0, 2).reshape(rows.size, jx * jy)[:, colpos]
        c = self.coef(kind, sign)
        g *= c[:, None]
        g *= 0.25 * c[None, :]
        return g

    def trig_tables(self, xy, weights, kinds):
        """Weighted sums ``sum_i w_ik X(a t_i) Y(b u_i)`` for the factor
        pairs of ``kinds``, ``a <= J_x, b <= J_y``.

        Parameters
        ----------
        xy : (N, 2) float
        weights : (N, K) float
        kinds : iterable of :data:`KINDS` keys

        Returns
        -------
        dict kind -> (K, J_x + 1, J_y + 1) float
        """
        jx, jy = self.n_modes
        h = self.harmonics_at(xy)
        n = h.cx.shape[0]
        w = np.asarray(weights, float).reshape(n, -1)
        out = {}
        for kind in kinds:
            kx, ky = KINDS[kind]
            a, b = h.factor(0, kx, jx), h.factor(1, ky, jy)
            wa = (w[:, :, None] * a[:, None, :]).reshape(n, -1)
            out[kind] = (wa.T @ b).reshape(w.shape[1], jx + 1, jy + 1)
        return out

    def project(self, tables, kind, sign=1.0):
        """(K, m): ``sum_i w_ik f_j(x_i)`` from :meth:`trig_tables`."""
        return np.asarray(tables)[:, self.jx, self.jy] * self.coef(kind, sign)[None, :]

    def collapse_quadratic(self, cov, kind, sign=1.0):
        """Coefficients (2 J_x + 1, 2 J_y + 1) of the cosine polynomial
        ``f(x)^T cov f(x)`` (f: the basis functions of ``kind``); evaluate
        with :meth:`eval_cos`."""
        jx, jy = self.n_modes
        c = self.coef(kind, sign)
        a = (0.25 * (c[:, None] * c[None, :]) * np.asarray(cov, float)).ravel()
        size = (2 * jx + 1) * (2 * jy + 1)
        w = sum(e * np.bincount(ix, weights=a, minlength=size) for e, ix in zip(self._signs(kind), self._pair_index))
        return w.reshape(2 * jx + 1, 2 * jy + 1)

    def collapse_linear(self, v, kind, sign=1.0):
        """Coefficients (J_x + 1, J_y + 1) of ``f(x) . v`` as a sum of
        ``X(a t) Y(b u)``; evaluate with :meth:`eval_trig`."""
        jx, jy = self.n_modes
        out = np.zeros((jx + 1, jy + 1))
        np.add.at(out, (self.jx, self.jy), self.coef(kind, sign) * np.asarray(v, float))
        return out

    def eval_cos(self, coeffs, xy):
        """``sum_pq coeffs[p, q] cos(p t) cos(q u)`` at points (N,) (``xy``
        or its :class:`Harmonics`)."""
        h = self.harmonics_at(xy)
        cx = h.factor(0, "c", coeffs.shape[0] - 1)
        cy = h.factor(1, "c", coeffs.shape[1] - 1)
        return np.einsum("ij,ij->i", cx @ coeffs, cy)

    def eval_trig(self, coeffs, kind, xy):
        """``sum_ab coeffs[a, b] X(a t) Y(b u)`` (factors of ``kind``) at
        points (N,) (``xy`` or its :class:`Harmonics`)."""
        h = self.harmonics_at(xy)
        kx, ky = KINDS[kind]
        hx = h.factor(0, kx, coeffs.shape[0] - 1)
        hy = h.factor(1, ky, coeffs.shape[1] - 1)
        return np.einsum("ij,ij->i", hx @ coeffs, hy)

    def _axis_harmonics(self, v, axis, kmax, which):
        a = (np.asarray(v, float) - self.centre_xy[axis] + self.half_width_m[axis]) * (np.pi / (2 * self.half_width_m[axis]))
        return self.harmonics(a, kmax)[0 if which == "c" else 1]

    def eval_cos_grid(self, coeffs, xs, ys):
        """:meth:`eval_cos` on the raster ``xs`` (nx,) x ``ys`` (ny,):
        (ny, nx), two small matrix products."""
        hx = self._axis_harmonics(xs, 0, coeffs.shape[0] - 1, "c")
        hy = self._axis_harmonics(ys, 1, coeffs.shape[1] - 1, "c")
        return hy @ (hx @ coeffs).T

    def eval_trig_grid(self, coeffs, kind, xs, ys):
        """:meth:`eval_trig` on the raster ``xs`` x ``ys``: (ny, nx)."""
        kx, ky = KINDS[kind]
        hx = self._axis_harmonics(xs, 0, coeffs.shape[0] - 1, kx)
        hy = self._axis_harmonics(ys, 1, coeffs.shape[1] - 1, ky)
        return hy @ (hx @ coeffs).T
