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
a raster the basis is an outer product of 1-D factors; :meth:`BoxBasis.factors`
returns them for fast raster evaluation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fingerprint.errors import ConfigError

__all__ = ["BoxBasis", "se_spectral_density_2d"]


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
        # Enough candidates along each axis for the n lowest eigenvalues.
        jmax = n_basis + 1
        wx = np.pi * np.arange(1, jmax + 1) / (2 * half[0])
        wy = np.pi * np.arange(1, jmax + 1) / (2 * half[1])
        # Bound the candidate set: frequencies above the n-th lowest of one
        # axis alone can never be among the n lowest overall.
        lim = min(wx[min(n_basis, jmax) - 1], wy[min(n_basis, jmax) - 1])
        kx = np.arange(1, int(np.searchsorted(wx, lim, side="right")) + 1)
        ky = np.arange(1, int(np.searchsorted(wy, lim, side="right")) + 1)
        gx, gy = np.meshgrid(kx, ky, indexing="ij")
        gx = gx.ravel()
        gy = gy.ravel()
        lam = (np.pi * gx / (2 * half[0])) ** 2 + (np.pi * gy / (2 * half[1])) ** 2
        order = np.lexsort((gy, gx, lam))[:n_basis]
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
    def _trig(self, xy):
        """sin and cos of the phases along x and y for the mode numbers in
        use, gathered per basis function: four (N, m) arrays. Evaluated per
        distinct mode number (a few dozen) and gathered, which is much
        cheaper than one sin per basis function."""
        xy = np.asarray(xy, float).reshape(-1, 2)
        ux_modes, ix = np.unique(self.jx, return_inverse=True)
        uy_modes, iy = np.unique(self.jy, return_inverse=True)
        wx = np.pi * ux_modes / (2 * self.half_width_m[0])
        wy = np.pi * uy_modes / (2 * self.half_width_m[1])
        px = (xy[:, 0:1] - self.centre_xy[0] + self.half_width_m[0]) * wx[None, :]
        py = (xy[:, 1:2] - self.centre_xy[1] + self.half_width_m[1]) * wy[None, :]
        return np.sin(px)[:, ix], np.cos(px)[:, ix], np.sin(py)[:, iy], np.cos(py)[:, iy]

    def values(self, xy):
        """``phi_j(x)`` at points (N, 2) -> (N, m)."""
        sx, _, sy, _ = self._trig(xy)
        return sx * sy / np.sqrt(self.half_width_m.prod())

    def gradients(self, xy):
        """``(d phi_j / dx, d phi_j / dy)`` at points (N, 2) -> two (N, m)
        arrays, 1/m."""
        sx, cx, sy, cy = self._trig(xy)
        s = 1.0 / np.sqrt(self.half_width_m.prod())
        dx = (s * self.omega_x)[None, :] * cx * sy
        dy = (s * self.omega_y)[None, :] * sx * cy
        return dx, dy

    def factors(self, xs, ys):
        """Separable 1-D factors for a raster ``xs`` (nx,) x ``ys`` (ny,).

        Returns
        -------
        fx, dfx : (nx, Jx) float, ``L_x^{-1/2} sin`` and its x-derivative for
            mode numbers ``1..Jx``
        fy, dfy : (ny, Jy) float, same along y
        so that ``phi_j(x_a, y_b) = fx[a, jx_j - 1] * fy[b, jy_j - 1]``.
        """
        jx_all = np.arange(1, int(self.jx.max()) + 1)
        jy_all = np.arange(1, int(self.jy.max()) + 1)
        wx = np.pi * jx_all / (2 * self.half_width_m[0])
        wy = np.pi * jy_all / (2 * self.half_width_m[1])
        ux = (np.asarray(xs, float)[:, None] - self.centre_xy[0] + self.half_width_m[0]) * wx[None, :]
        uy = (np.asarray(ys, float)[:, None] - self.centre_xy[1] + self.half_width_m[1]) * wy[None, :]
        ax = 1.0 / np.sqrt(self.half_width_m[0])
        ay = 1.0 / np.sqrt(self.half_width_m[1])
        return ax * np.sin(ux), ax * wx * np.cos(ux), ay * np.sin(uy), ay * wy * np.cos(uy)
