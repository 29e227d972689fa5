"""Field-map models: fit the plan-frame field vector ``(b_x, b_y, b_up)``
(µT) as a function of plan position, with predictive variance.

Registry :data:`MAP_KERNELS` (name -> class):

``"curl-free"`` (default)
    The curl-free Gaussian process of Solin, Kok, Wahlström, Schön and
    Särkkä (2018), "Modeling and interpolation of the ambient magnetic field
    by Gaussian processes", IEEE Trans. Robotics 34(4): the field is
    ``B = -grad(phi)`` of a scalar potential ``phi ~ GP(0, k_SE)`` plus a
    constant field, in the reduced-rank Hilbert-space form of Solin &
    Särkkä (2020) (:mod:`mapping.gp_hilbert`).

    Height: all samples are at one sensor height. For a 3-D SE potential
    restricted to one plane, ``cov(b_up, b_x)`` and ``cov(b_up, b_y)`` are
    ``-d^2 k / (dz dx)`` at ``dz = 0``, which vanish, while
    ``cov(b_up, b_up) = -d^2 k / dz^2 = (s^2 / l^2) exp(-r^2 / (2 l^2))``.
    So on the plane the 3-D model is exactly: ``(b_x, b_y) = -grad_2D phi``
    with ``phi ~ GP(0, s^2 k_SE_2D(l))``, and ``b_up`` an independent 2-D SE
    process with variance ``s^2 / l^2``, the same variance as each
    horizontal component. We therefore use a 2-D box basis (no thin 3-D
    extent to resolve) and parametrise by the field magnitude
    ``sigma_f = s / l``.

``"per-component"``
    Independent reduced-rank SE processes for ``b_x, b_y, b_up`` (shared
    magnitude and length scale), plus a constant.

``"nearest"``
    k-nearest-neighbour average (``scipy.spatial.cKDTree``); variance is the
    spread of the neighbours' values.

``"constant"``
    Per-component mean; variance is the sample variance.

Large floors (the reduced-rank GPs): one box of ``n_basis`` eigenfunctions
resolves length scales down to about ``3 / omega_max``, which grows with the
box. With ``tiles="auto"`` (default) a floor whose single box could not
resolve what tiles of ``tile_m`` metres (plus ``tile_overlap_m`` each side,
``tile_basis`` functions each) can is split into overlapping tiles: each
tile is its own reduced-rank GP with its own constant and walk offsets, the
hyperparameters are shared and fitted on the sum of the tiles' log
marginal likelihoods, and predictions are blended with smooth weights over
the overlaps (mixture mean and variance). Inside a tile the field stays
exactly curl-free; in an overlap it is a weighted sum of two curl-free
fields, curl-free only up to the blend's gradient.

Refinement (``refine=True``, with ``tiles="auto"``): when the fitted length
scale ends on the lower bound that the basis can resolve (about
``3 / omega_max``), the data ask for finer detail than the basis holds; the
fit is then done once more on tiles of ``fine_tile_basis`` functions,
starting from the coarse optimum (``optim_info_["refined_from"]`` records
the coarse fit), unless its statistics would need more than
``refine_max_gb`` of memory (a floor of hundreds of metres is hundreds of
fine tiles). Near steel the field changes by tens of µT within a metre,
which one 1024-function box over a 60 m floor cannot follow. The tiles'
factorisations, and within one box those of its distinct diagonal blocks,
run on ``n_jobs`` threads (default: one per available core).

Estimator contract (scikit-learn style): ``__init__`` only stores
parameters; ``fit(xy (N, 2), b (N, 3), *, groups=None, rotations=None)``
validates, sets attributes ending in ``_`` and returns ``self``;
``predict(xy (M, 2), return_var=True) -> (mean (M, 3), var (M, 3))``
checks it was fitted.

Walk offsets: with ``groups`` (one integer or string per sample naming its
walk) the GP models estimate, and integrate out, one constant offset per
walk in the device frame (``rotations`` (N, 3, 3), device-to-plan; identity
when omitted), because the residual calibration error of a phone differs
per walk and turns with the device. ``predict``'s variance then also
carries a between-walk term ``tau_c^2`` per component, fitted on held-out
walks (group k-fold) so that about 68 % of held-out residuals fall within
``±sqrt(var + noise_var_)``. Without groups the term is zero. Ten folds by
default: a fold's map, fitted without its walks, is less certain than the
full map a new walk meets, so with few folds the term comes out too small
(with 4 folds 59.5-63 % of the real test walks' horizontal residuals fell
within one sd; with 10, 63.5-67 %; ``lodemap bench map --site``), for a
longer build (the real F1 map 26 s instead of 19 s).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import scipy.optimize
from scipy.spatial import cKDTree
from threadpoolctl import threadpool_limits

from fingerprint.errors import ConfigError, DataError

from . import _linmodel
from .gp_hilbert import BoxBasis, se_spectral_density_2d

__all__ = [
    "MAP_KERNELS",
    "make_model",
    "CurlFreeGP",
    "PerComponentGP",
    "NearestMap",
    "ConstantMap",
    "NotFittedError",
]

#: Share of a Gaussian within ±1 sd.
ONE_SIGMA = 0.6826894921370859


class NotFittedError(ConfigError):
    """``predict`` was called before ``fit``."""


def _check_xy_b(xy, b):
    xy = np.asarray(xy, dtype=float)
    b = np.asarray(b, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise DataError(f"positions must have shape (N, 2), got {xy.shape}")
    if b.ndim != 2 or b.shape[1] != 3 or b.shape[0] != xy.shape[0]:
        raise DataError(f"field samples must have shape ({xy.shape[0]}, 3), got {b.shape}")
    if xy.shape[0] < 2:
        raise DataError(f"need at least 2 survey samples to fit a map, got {xy.shape[0]}")
    bad = ~(np.all(np.isfinite(xy), axis=1) & np.all(np.isfinite(b), axis=1))
    if bad.any():
        raise DataError(f"{int(bad.sum())} survey samples have non-finite position or field (first at index {int(np.argmax(bad))})")
    return xy, b


def _check_query(xy):
    xy = np.asarray(xy, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise DataError(f"query positions must have shape (M, 2), got {xy.shape}")
    return xy


def _encode_groups(groups, n):
    if groups is None:
        return None, []
    groups = np.asarray(groups)
    if groups.shape != (n,):
        raise DataError(f"groups must have shape ({n},), got {groups.shape}")
    names, codes = np.unique(groups, return_inverse=True)
    return codes.astype(np.int64), [str(v) for v in names]


class _Fitted:
    def _check_fitted(self):
        if not hasattr(self, "n_samples_"):
            raise NotFittedError(f"{type(self).__name__} is not fitted yet; call fit() first")

    def get_params(self):
        return {k: getattr(self, k) for k in self._param_names}

    def __repr__(self):
        args = ", ".join(f"{k}={getattr(self, k)!r}" for k in self._param_names)
        return f"{type(self).__name__}({args})"


class _ReducedRankGP(_Fitted):
    """Shared machinery of the two reduced-rank GP models."""

    _param_names = (
        "n_basis",
        "margin_m",
        "length_scale_m",
        "magnitude_ut",
        "noise_h_ut",
        "noise_up_ut",
        "constant_ut",
        "offset_ut",
        "optimize",
        "between_walk",
        "n_folds",
        "domain",
        "seed",
        "chunk",
        "tiles",
        "tile_m",
        "tile_overlap_m",
        "tile_basis",
        "refine",
        "fine_tile_basis",
        "refine_max_gb",
        "n_jobs",
    )

    #: optimised hyperparameters, in the order of the log-parameter vector
    _hyper_names = ("magnitude_ut", "length_scale_m", "noise_h_ut", "noise_up_ut", "constant_ut", "offset_ut")

    def __init__(
        self,
        n_basis=1024,
        *,
        margin_m=3.0,
        length_scale_m=None,
        magnitude_ut=None,
        noise_h_ut=None,
        noise_up_ut=None,
        constant_ut=None,
        offset_ut=None,
        optimize=True,
        between_walk=True,
        n_folds=10,
        domain=None,
        seed=0,
        chunk=2048,
        tiles="auto",
        tile_m=16.0,
        tile_overlap_m=3.0,
        tile_basis=256,
        refine=True,
        fine_tile_basis=1024,
        refine_max_gb=6.0,
        n_jobs=None,
    ):
        self.n_basis = n_basis
        self.margin_m = margin_m
        self.length_scale_m = length_scale_m
        self.magnitude_ut = magnitude_ut
        self.noise_h_ut = noise_h_ut
        self.noise_up_ut = noise_up_ut
        self.constant_ut = constant_ut
        self.offset_ut = offset_ut
        self.optimize = optimize
        self.between_walk = between_walk
        self.n_folds = n_folds
        self.domain = domain
        self.seed = seed
        self.chunk = chunk
        self.tiles = tiles
        self.tile_m = tile_m
        self.tile_overlap_m = tile_overlap_m
        self.tile_basis = tile_basis
        self.refine = refine
        self.fine_tile_basis = fine_tile_basis
        self.refine_max_gb = refine_max_gb
        self.n_jobs = n_jobs

    # -- to be provided by subclasses ----------------------------------------
    def _layout(self, m):
        """-> (n_field, idx list of 3 arrays)"""
        raise NotImplementedError

    def _design(self, basis, xy):
        """-> [F_0, F_1, F_2] for the components"""
        raise NotImplementedError

    def _prior_var(self, hyper):
        """(m_f,) prior variances from the hyperparameter dict."""
        raise NotImplementedError

    #: lower bound of the length scale, in units of 1 / omega_max of the basis
    _kappa = 3.0

    # -- fitting -------------------------------------------------------------
    def fit(self, xy, b, *, groups=None, rotations=None):
        """Fit the map.

        Parameters
        ----------
        xy : (N, 2) float, metres, plan frame
        b : (N, 3) float, µT, plan-frame field ``b_x, b_y, b_up``
        groups : (N,) walk label of each sample, or None
        rotations : (N, 3, 3) float or None, device-to-plan rotation of each
            sample (for device-frame walk offsets); identity when None

        Returns
        -------
        self
        """
        # Only small matrix products and factorisations (the statistics come
        # from the separable algebra): one BLAS thread is much faster than
        # two on a shared, busy machine (thread spin-waits).
        with threadpool_limits(limits=1, user_api="blas"), _linmodel.thread_limit(self.n_jobs):
            return self._fit(xy, b, groups, rotations)

    def _fit(self, xy, b, groups, rotations):
        xy, b = _check_xy_b(xy, b)
        n = xy.shape[0]
        codes, names = _encode_groups(groups, n)
        if rotations is not None:
            rotations = np.asarray(rotations, dtype=float)
            if rotations.shape != (n, 3, 3):
                raise DataError(f"rotations must have shape ({n}, 3, 3), got {rotations.shape}")
        if self.domain is not None:
            lo, hi = np.asarray(self.domain[0], float), np.asarray(self.domain[1], float)
            lo = np.minimum(lo, xy.min(axis=0))
            hi = np.maximum(hi, xy.max(axis=0))
        else:
            lo, hi = xy.min(axis=0), xy.max(axis=0)
        if self.tiles not in ("auto", "never", "always"):
            raise ConfigError(f"tiles must be auto, never or always, got {self.tiles!r}")
        basis = BoxBasis.covering(lo, hi, margin_m=float(self.margin_m), n_basis=int(self.n_basis))
        boxes = self._tile_boxes(lo, hi, basis)
        n_walks = len(names)
        use_offsets = codes is not None
        self.fallback_mean_ = b.mean(axis=0)
        fold = None
        if use_offsets and self.between_walk and n_walks >= 2:
            rng = np.random.default_rng(self.seed)
            k = int(min(max(int(self.n_folds), 2), n_walks))
            fold_of_walk = np.empty(n_walks, dtype=np.int64)
            fold_of_walk[rng.permutation(n_walks)] = np.arange(n_walks) % k
            fold = fold_of_walk[codes]
        parts = self._make_parts(basis, boxes, int(self.tile_basis), xy, b, codes, rotations, n_walks, fold)
        self.parts_ = parts
        hyper = self._initial_hyper(b, parts, use_offsets=use_offsets)
        with threadpool_limits(limits=1, user_api="blas"):
            if self.optimize:
                hyper, info = self._optimise(parts, hyper)
                fine = self._refined_boxes(lo, hi, parts, hyper, info)
                if fine is not None:
                    fine = self._within_budget(fine, xy, b, codes, rotations, n_walks, fold, info)
                if fine is not None:
                    # the data ask for finer detail than the basis resolves:
                    # again with finer tiles, from the coarse optimum
                    coarse = {"tiles": len(parts), "length_scale_m": hyper["length_scale_m"],
                              "length_scale_bounds_m": info["length_scale_bounds_m"]}
                    if parts[0] is self:  # the coarse box's statistics are no longer needed
                        self.stats_ = self.fold_stats_ = None
                    parts = self._make_parts(basis, fine, int(self.fine_tile_basis), xy, b, codes, rotations,
                                             n_walks, fold)
                    self.parts_ = parts
                    hyper, info = self._optimise(parts, hyper)
                    info["refined_from"] = coarse
            else:
                info = {"optimised": False}
            log_ml = 0.0
            noise = self._noise(hyper)
            posts = self._map_parts(
                lambda p: _linmodel.posterior(p.stats_, p._prior_var(hyper), noise, hyper["offset_ut"] ** 2, cov=False),
                parts)
            for p, post in zip(parts, posts):
                p.mean_f_, p.hyper_ = post.mean_f, hyper
                p._set_cov_factor(post.factor)
                p.walk_offsets_ut_ = post.mean_o
                log_ml += post.log_ml
        self.hyper_ = hyper
        self.optim_info_ = info
        self.log_marginal_likelihood_ = log_ml
        self.walk_names_ = names
        self.walk_codes_all_ = codes
        self.noise_var_ = np.array([hyper["noise_h_ut"] ** 2, hyper["noise_h_ut"] ** 2, hyper["noise_up_ut"] ** 2])
        self.between_walk_var_ = np.zeros(3)
        for p in parts:
            p.between_walk_var_ = np.zeros(3)
            p.noise_var_ = self.noise_var_
        self.calibration_ = {}
        if use_offsets and self.between_walk and n_walks >= 2:
            with threadpool_limits(limits=1, user_api="blas"):
                self._fit_between_walk(parts, xy, b, fold, hyper)
        for p in parts:
            p.n_samples_ = int(p.sel_.sum())
        self.n_samples_ = n
        return self

    def _make_parts(self, basis, boxes, tile_basis, xy, b, codes, rotations, n_walks, fold):
        """The model's parts: ``[self]`` on one box (``boxes`` None), else
        one sub-model per tile box holding at least 20 samples."""
        if boxes is None:
            self._setup_part(basis, xy, b, codes, rotations, n_walks, np.ones(xy.shape[0], dtype=bool), None, fold)
            return [self]
        parts = []
        for elo, ehi in boxes:
            sel = np.all((xy >= elo) & (xy <= ehi), axis=1)
            if sel.sum() < 20:
                continue
            sub = type(self)(**{k: getattr(self, k) for k in self._param_names})
            sub.tiles = "never"
            sub.tile_basis = tile_basis
            tb = BoxBasis.covering(elo, ehi, margin_m=float(self.margin_m), n_basis=tile_basis)
            sub._setup_part(tb, xy, b, codes, rotations, n_walks, sel, (elo, ehi), fold)
            parts.append(sub)
        if not parts:
            raise DataError("no map tile holds enough survey samples (need 20 in at least one)")
        return parts

    def _map_parts(self, fn, parts):
        """``[fn(p) for p in parts]``, the parts on ``n_jobs`` threads (the
        factorisations release the GIL; default: one per core)."""
        n = int(self.n_jobs) if self.n_jobs is not None else _linmodel.available_cores()
        n = max(1, min(n, len(parts)))
        if n == 1:
            return [fn(p) for p in parts]
        with ThreadPoolExecutor(max_workers=n) as ex:
            return list(ex.map(fn, parts))

    def _refined_boxes(self, lo, hi, parts, hyper, info):
        """Tile boxes of ``fine_tile_basis`` functions when ``refine`` (with
        ``tiles="auto"``) and the fitted length scale sits on the lower bound
        that the current basis resolves while the finer tiles resolve at
        least 1.2 times shorter ones; else None."""
        if not (self.refine and self.tiles == "auto" and info.get("optimised")):
            return None
        lo_l = info["length_scale_bounds_m"][0]
        if "length_scale_m" not in info.get("at_bound", ()) or hyper["length_scale_m"] > 1.01 * lo_l:
            return None
        boxes = self._grid_boxes(lo, hi)
        tb = BoxBasis.covering(*boxes[0], margin_m=float(self.margin_m), n_basis=int(self.fine_tile_basis))
        if self._length_bounds(tb)[0] * 1.2 > lo_l:
            return None
        return boxes

    def _within_budget(self, boxes, xy, b, codes, rotations, n_walks, fold, info):
        """``boxes``, or None when the refined fit would need more than
        ``refine_max_gb`` of memory (then ``info["refine_skipped"]`` says
        why). The estimate: the statistics of the fullest fine tile, built
        and measured, times the number of tiles holding samples, times 1.5
        for the factors kept beside them. A large floor would otherwise need
        tens of GB: a 320 x 230 m shopping-centre level is 300 tiles of
        16 m, 88 of them holding survey samples, about 23 GB at 1024
        functions."""
        counts = [int(np.all((xy >= elo) & (xy <= ehi), axis=1).sum()) for elo, ehi in boxes]
        used = [i for i, c in enumerate(counts) if c >= 20]
        if not used:
            return boxes
        i = max(used, key=lambda i: counts[i])
        probe = type(self)(**{k: getattr(self, k) for k in self._param_names})
        probe.tiles = "never"
        elo, ehi = boxes[i]
        sel = np.all((xy >= elo) & (xy <= ehi), axis=1)
        tb = BoxBasis.covering(elo, ehi, margin_m=float(self.margin_m), n_basis=int(self.fine_tile_basis))
        probe._setup_part(tb, xy, b, codes, rotations, n_walks, sel, (elo, ehi), fold)
        per_tile = sum(_stats_nbytes(st) for st in [probe.stats_] + list(probe.fold_stats_ or []))
        del probe
        need_gb = 1.5 * per_tile * len(used) / 1e9
        if need_gb <= float(self.refine_max_gb):
            return boxes
        info["refine_skipped"] = {
            "reason": "memory", "estimated_gb": float(f"{need_gb:.4g}"), "budget_gb": float(self.refine_max_gb),
            "tiles": len(used), "fine_tile_basis": int(self.fine_tile_basis)}
        return None

    # Posterior covariance of the weights: formed from the Cholesky factor
    # on first use (a fit followed only by mean predictions never needs it).
    def _set_cov_factor(self, factor):
        self.__dict__.pop("_cov_f", None)
        self._cov_factor = factor

    @property
    def cov_f_(self):
        """(m_f, m_f) posterior covariance of the field parameters."""
        cov = self.__dict__.get("_cov_f")
        if cov is None:
            fac = self.__dict__.get("_cov_factor")
            if fac is None:
                raise AttributeError("cov_f_")
            with threadpool_limits(limits=1, user_api="blas"):
                cov = fac.inverse()
            self._cov_f, self._cov_factor = cov, None
        return cov

    @cov_f_.setter
    def cov_f_(self, value):
        self._cov_f, self._cov_factor = value, None

    def _setup_part(self, basis, xy, b, codes, rotations, n_walks, sel, box, fold=None):
        """Basis, layout and sufficient statistics of one box (the whole
        domain, or one tile: samples ``sel``, box ``(lo, hi)``); with
        ``fold`` (N,) the statistics of each fold, summed for the total."""
        self.basis_ = basis
        self.n_field_, self.idx_ = self._layout(basis.n)
        self.sel_ = sel
        self.box_ = box
        g = None if codes is None else codes[sel]
        self.walk_codes_ = None if g is None else np.unique(g)
        local_all = None if codes is None else np.searchsorted(self.walk_codes_, np.where(sel, codes, codes[sel][0]))

        def stats_of(mask):
            # the separable algebra of the basis: the same statistics as
            # _linmodel.accumulate over self._design, without the O(N m^2)
            return _linmodel.accumulate_separable(
                basis, self._kinds, self.idx_, xy[mask], b[mask],
                groups=None if codes is None else local_all[mask],
                rotations=None if rotations is None else rotations[mask],
                n_walks=0 if codes is None else self.walk_codes_.size, chunk=4 * int(self.chunk),
                blocks=self._blocks(basis.n),
            )

        if fold is None:
            self.fold_stats_ = None
            self.stats_ = stats_of(sel)
        else:
            self.fold_stats_ = [stats_of(sel & (fold == f)) for f in range(int(fold.max()) + 1)]
            total = self.fold_stats_[0]
            for st in self.fold_stats_[1:]:
                total = total + st
            self.stats_ = total

    def _tile_boxes(self, lo, hi, basis):
        """Extended tile boxes [(lo, hi), ...], or None for one box. "auto"
        tiles when one box with ``n_basis`` functions cannot resolve length
        scales the tiles can (with a given ``length_scale_m``: when it cannot
        resolve that one)."""
        if self.tiles == "never":
            return None
        boxes = self._grid_boxes(lo, hi)
        if self.tiles == "auto":
            if len(boxes) <= 1:
                return None
            if self.length_scale_m is not None and self._length_bounds(basis)[0] <= float(self.length_scale_m):
                return None  # a given length scale the one box resolves
            tb = BoxBasis.covering(*boxes[0], margin_m=float(self.margin_m), n_basis=int(self.tile_basis))
            if self._length_bounds(basis)[0] <= 1.2 * self._length_bounds(tb)[0]:
                return None
        return boxes

    def _grid_boxes(self, lo, hi):
        """Overlapping tile boxes of about ``tile_m`` metres (plus
        ``tile_overlap_m`` each side) covering ``[lo, hi]``."""
        core = float(self.tile_m)
        ov = float(self.tile_overlap_m)
        if not (core > 0 and ov >= 0):
            raise ConfigError(f"tile_m must be > 0 and tile_overlap_m >= 0, got {core}, {ov}")
        nt = np.maximum(np.ceil((hi - lo) / core).astype(int), 1)
        step = (hi - lo) / nt
        boxes = []
        for i in range(nt[0]):
            for j in range(nt[1]):
                clo = lo + step * np.array([i, j])
                boxes.append((clo - ov, clo + step + ov))
        return boxes

    def _noise(self, hyper):
        return np.array([hyper["noise_h_ut"] ** 2, hyper["noise_up_ut"] ** 2])

    def _length_bounds(self, basis):
        lo = self._kappa / basis.omega_max
        hi = float(2.0 * basis.half_width_m.max())
        return lo, max(hi, 2 * lo)

    def _parts_length_bounds(self, parts):
        b = np.array([p._length_bounds(p.basis_) for p in parts])
        return float(b[:, 0].max()), float(b[:, 1].max())

    def _initial_hyper(self, b, parts, *, use_offsets):
        centred = b - b.mean(axis=0)
        sd = float(np.sqrt(np.mean(centred**2))) or 1.0
        self.data_sd_ut_ = sd
        lo, hi = self._parts_length_bounds(parts)
        given = {
            "magnitude_ut": self.magnitude_ut,
            "length_scale_m": self.length_scale_m,
            "noise_h_ut": self.noise_h_ut,
            "noise_up_ut": self.noise_up_ut,
            "constant_ut": self.constant_ut,
            "offset_ut": self.offset_ut,
        }
        default = {
            "magnitude_ut": sd,
            "length_scale_m": float(np.clip(2.0, lo * 1.05, hi)),
            "noise_h_ut": 0.3 * sd,
            "noise_up_ut": 0.3 * sd,
            "constant_ut": max(float(np.max(np.abs(b.mean(axis=0)))), 1.0),
            "offset_ut": 0.3 * sd if use_offsets else 1.0,
        }
        out = {}
        for k in self._hyper_names:
            v = given[k] if given[k] is not None else default[k]
            if not (np.isfinite(v) and v > 0):
                raise ConfigError(f"{k} must be a positive number, got {v!r}")
            out[k] = float(v)
        fixed = {k for k in self._hyper_names if given[k] is not None}
        if not use_offsets:
            fixed.add("offset_ut")
        elif self.constant_ut is None:
            # With walk offsets the part of them shared by all walks is the
            # constant field; a flat prior on the constant puts it there (a
            # finite one lets the offsets take the mean field, and a new walk,
            # whose offset is unknown, would then miss it).
            out["constant_ut"] = 1e3 * max(out["constant_ut"], 1.0)
            fixed.add("constant_ut")
        self.fixed_hyper_ = sorted(fixed)
        return out

    def _optimise(self, parts, hyper):
        free = [k for k in self._hyper_names if k not in self.fixed_hyper_]
        if not free:
            return hyper, {"optimised": False}
        lo_l, hi_l = self._parts_length_bounds(parts)
        bounds = []
        for k in free:
            if k == "length_scale_m":
                bounds.append((np.log(lo_l), np.log(hi_l)))
            elif k == "magnitude_ut":
                # At most twice the spread of the data: when the basis cannot
                # resolve the length scale the data ask for, the likelihood
                # otherwise buys fit with a huge magnitude, and the truncated
                # kernel then rings far from the data.
                bounds.append((np.log(1e-3), np.log(2.0 * self.data_sd_ut_)))
            elif k == "constant_ut":
                bounds.append((np.log(1e-2), np.log(1e4)))
            else:
                bounds.append((np.log(1e-3), np.log(1e3)))
        bounds = np.array(bounds)

        def unpack(theta):
            h = dict(hyper)
            for k, v in zip(free, theta):
                h[k] = float(np.exp(v))
            return h

        # The objective is per observation: L-BFGS-B's first step is the
        # raw gradient (all variables are bounded), which for the total over
        # 100,000 samples jumps to a corner of the box where the normal
        # equations are not positive definite, and the search then stops at
        # the start. Scaling leaves the optimum and the stopping rules as
        # they were (gtol scaled alike; ftol is relative).
        n_obs = float(sum(int(p.stats_.n.sum()) for p in parts)) or 1.0

        def objective(theta):
            # tiles: the sum of the tiles' log marginal likelihoods (a
            # composite likelihood; one box: the exact one)
            h = unpack(theta)
            total = 0.0
            grad = np.zeros(len(free))
            noise = self._noise(h)
            vals = self._map_parts(
                lambda p: _linmodel.log_marginal_and_grad(p.stats_, p._prior_var(h), noise, h["offset_ut"] ** 2), parts)
            for p, (val, d_prior, d_noise, d_off) in zip(parts, vals):
                if not np.isfinite(val):
                    return 1e300, np.zeros_like(theta)
                total += val
                jac = p._dlog_prior(h)
                for i, k in enumerate(free):
                    if k in jac:
                        grad[i] += float(d_prior @ jac[k])
                    elif k == "noise_h_ut":
                        grad[i] += 2.0 * d_noise[0]
                    elif k == "noise_up_ut":
                        grad[i] += 2.0 * d_noise[1]
                    else:  # offset_ut
                        grad[i] += 2.0 * d_off
            return -total / n_obs, -grad / n_obs

        theta0 = np.clip(np.log([hyper[k] for k in free]), bounds[:, 0], bounds[:, 1])
        # A coarse scan of the length scale first: the likelihood can be
        # multimodal in it.
        if "length_scale_m" in free:
            j = free.index("length_scale_m")
            best = (objective(theta0)[0], theta0)
            for ell in np.geomspace(lo_l * 1.05, min(hi_l, 20 * lo_l), 6):
                t = theta0.copy()
                t[j] = np.log(ell)
                v = objective(t)[0]
                if v < best[0]:
                    best = (v, t)
            theta0 = best[1]
        res = scipy.optimize.minimize(
            objective, theta0, jac=True, method="L-BFGS-B", bounds=bounds,
            options={"maxiter": 80, "ftol": 1e-8, "gtol": 1e-5 / n_obs},
        )
        h = unpack(res.x)
        at_bound = [k for k, v, (a, c) in zip(free, res.x, bounds) if v <= a + 1e-6 or v >= c - 1e-6]
        return h, {
            "optimised": True,
            "success": bool(res.success),
            "n_evaluations": int(res.nfev),
            "neg_log_ml": float(res.fun) * n_obs,
            "at_bound": at_bound,
            "length_scale_bounds_m": [float(lo_l), float(hi_l)],
        }

    def _fit_between_walk(self, parts, xy, b, fold, hyper):
        """Between-walk variance from group k-fold predictions (see module
        docstring)."""
        k = int(fold.max()) + 1
        noise = self._noise(hyper)
        res, var = [], []

        def heldout_posterior(p, f):
            post = _linmodel.posterior(p.stats_ - p.fold_stats_[f], p._prior_var(hyper), noise, hyper["offset_ut"] ** 2)
            return post.mean_f, post.cov_f

        for f in range(k):
            sel = fold == f
            posts = self._map_parts(lambda p: heldout_posterior(p, f), parts)
            mean, latent = self._blend_points(xy[sel], posts)
            res.append(b[sel] - mean)
            var.append(latent)
        res = np.concatenate(res)
        var = np.concatenate(var)
        excess = res**2 - var - self.noise_var_[None, :]
        tau2 = np.maximum(np.quantile(excess, ONE_SIGMA, axis=0), 0.0)
        self.between_walk_var_ = tau2
        sd = np.sqrt(var + self.noise_var_ + tau2)
        self.calibration_ = {
            "n_folds": k,
            "heldout_rmse_ut": [float(v) for v in np.sqrt(np.mean(res**2, axis=0))],
            "heldout_within_1sd_before": [
                float(v) for v in np.mean(np.abs(res) <= np.sqrt(var + self.noise_var_), axis=0)
            ],
            "heldout_within_1sd_after": [float(v) for v in np.mean(np.abs(res) <= sd, axis=0)],
        }

    # -- prediction ------------------------------------------------------------
    def _poly_terms(self, mean_f, cov_f=None):
        """Per component the coefficients of its mean (``lin``, ``const``)
        and, with ``cov_f``, of its variance (``quad``, ``cross``,
        ``var_const``) as trigonometric polynomials in the position."""
        basis = self.basis_
        m = basis.n
        terms = []
        for c, (kind, sign) in enumerate(self._kinds):
            ixb, ic = self.idx_[c][:m], self.idx_[c][m]
            t = {"lin": basis.collapse_linear(mean_f[ixb], kind, sign), "const": mean_f[ic]}
            if cov_f is not None:
                t["quad"] = basis.collapse_quadratic(cov_f[np.ix_(ixb, ixb)], kind, sign)
                t["cross"] = basis.collapse_linear(cov_f[ixb, ic], kind, sign)
                t["var_const"] = cov_f[ic, ic]
            terms.append(t)
        return terms

    def _predict_with(self, mean_f, cov_f, xy, chunk=8192, return_var=True):
        """Latent mean and variance (None if not ``return_var``) at points
        from the weights ``mean_f`` and their covariance ``cov_f``. Both
        are trigonometric polynomials in the position (separable algebra of
        :mod:`mapping.gp_hilbert`): ``O(m^2)`` once to collapse the
        covariance, then ``O(J_x J_y)`` per point instead of ``O(m^2)``."""
        basis = self.basis_
        out_m = np.empty((xy.shape[0], 3))
        out_v = np.empty((xy.shape[0], 3)) if return_var else None
        terms = self._poly_terms(mean_f, cov_f if return_var else None)
        for s in range(0, xy.shape[0], chunk):
            q = basis.harmonics_at(xy[s : s + chunk])  # shared by the components
            for c, (kind, _) in enumerate(self._kinds):
                t = terms[c]
                out_m[s : s + chunk, c] = basis.eval_trig(t["lin"], kind, q) + t["const"]
                if return_var:
                    out_v[s : s + chunk, c] = (basis.eval_cos(t["quad"], q) + 2.0 * basis.eval_trig(t["cross"], kind, q)
                                               + t["var_const"])
        return out_m, (np.maximum(out_v, 0.0) if return_var else None)

    def _weight(self, xy):
        """(N,) blending weight of this tile at points (smooth ramp over the
        overlap, 1 inside the core); 1 everywhere for a single box."""
        if self.box_ is None:
            return np.ones(xy.shape[0])
        lo, hi = self.box_
        ov = max(float(self.tile_overlap_m), 1e-9)
        d = np.minimum(xy - lo, hi - xy)  # (N, 2), >= 0 inside
        u = np.clip(d / (2 * ov), 0.0, 1.0)
        ramp = u * u * (3 - 2 * u)  # smoothstep
        return np.where(np.all(d >= 0, axis=1), ramp.prod(axis=1), 0.0)

    def _blend_points(self, xy, posts=None, return_var=True):
        """Blend the parts' latent predictions: (mean (N, 3), var (N, 3));
        var is the mixture variance (None if not ``return_var``). Points no
        tile covers get the data mean and the prior variance."""
        posts = posts or [(p.mean_f_, p.cov_f_ if return_var else None) for p in self.parts_]
        if len(self.parts_) == 1 and self.parts_[0].box_ is None:
            p = self.parts_[0]
            return p._predict_with(posts[0][0], posts[0][1], xy, return_var=return_var)
        w_sum = np.zeros(xy.shape[0])
        m_sum = np.zeros((xy.shape[0], 3))
        s_sum = np.zeros((xy.shape[0], 3))
        for p, (mf, cf) in zip(self.parts_, posts):
            w = p._weight(xy)
            inside = w > 0
            if not inside.any():
                continue
            m, v = p._predict_with(mf, cf, xy[inside], return_var=return_var)
            wi = w[inside][:, None]
            w_sum[inside] += w[inside]
            m_sum[inside] += wi * m
            if return_var:
                s_sum[inside] += wi * (v + m**2)
        return self._finish_blend(w_sum, m_sum, s_sum, return_var)

    def _finish_blend(self, w_sum, m_sum, s_sum, return_var=True):
        ok = w_sum > 0
        mean = np.empty_like(m_sum)
        mean[ok] = m_sum[ok] / w_sum[ok][:, None]
        mean[~ok] = self.fallback_mean_
        if not return_var:
            return mean, None
        var = np.empty_like(s_sum)
        var[ok] = np.maximum(s_sum[ok] / w_sum[ok][:, None] - mean[ok] ** 2, 0.0)
        var[~ok] = self.hyper_["magnitude_ut"] ** 2
        return mean, var

    def predict(self, xy, return_var=True):
        """Mapped field at plan positions.

        Parameters
        ----------
        xy : (M, 2) float, metres
        return_var : bool

        Returns
        -------
        mean : (M, 3) float, µT
        var : (M, 3) float, µT², latent variance of the map plus the
            between-walk variance (sensor noise not included; it is
            ``noise_var_``); only if ``return_var``
        """
        self._check_fitted()
        xy = _check_query(xy)
        with threadpool_limits(limits=1, user_api="blas"):  # small products only
            mean, var = self._blend_points(xy, return_var=return_var)
        if not return_var:
            return mean
        return mean, var + self.between_walk_var_[None, :]

    def predict_grid(self, xs, ys, return_var=True):
        """Mapped field on the raster ``xs`` (nx,) x ``ys`` (ny,) using the
        separable basis: ``mean (ny, nx, 3)``, ``var (ny, nx, 3)`` (as
        :meth:`predict`). Cost ``O(m^2 + nx ny J)`` per box (``J`` modes
        per axis) instead of ``O(nx ny m^2)`` for point-wise evaluation."""
        self._check_fitted()
        with threadpool_limits(limits=1, user_api="blas"):  # small products only
            return self._predict_grid(np.asarray(xs, float), np.asarray(ys, float), return_var)

    def _predict_grid(self, xs, ys, return_var):
        if len(self.parts_) == 1 and self.parts_[0] is self:
            return self._grid_single(xs, ys, return_var)
        ny, nx = ys.size, xs.size
        w_sum = np.zeros(ny * nx)
        m_sum = np.zeros((ny * nx, 3))
        s_sum = np.zeros((ny * nx, 3))
        for p in self.parts_:
            lo, hi = p.box_
            ix = np.flatnonzero((xs >= lo[0]) & (xs <= hi[0]))
            iy = np.flatnonzero((ys >= lo[1]) & (ys <= hi[1]))
            if ix.size == 0 or iy.size == 0:
                continue
            out = p._grid_single(xs[ix], ys[iy], return_var)
            m, v = out if return_var else (out, np.zeros(out.shape))
            gx, gy = np.meshgrid(xs[ix], ys[iy])
            w = p._weight(np.column_stack([gx.ravel(), gy.ravel()]))
            cells = (iy[:, None] * nx + ix[None, :]).ravel()
            m = m.reshape(-1, 3)
            v = v.reshape(-1, 3)
            w_sum[cells] += w
            m_sum[cells] += w[:, None] * m
            s_sum[cells] += w[:, None] * (v + m**2)
        mean, var = self._finish_blend(w_sum, m_sum, s_sum)
        mean = mean.reshape(ny, nx, 3)
        if not return_var:
            return mean
        return mean, var.reshape(ny, nx, 3) + self.between_walk_var_[None, None, :]

    def _grid_single(self, xs, ys, return_var=True):
        # mean and variance are trigonometric polynomials in x and y (see
        # _predict_with); on a raster each is two small matrix products
        basis = self.basis_
        mean = np.empty((ys.size, xs.size, 3))
        var = np.empty((ys.size, xs.size, 3))
        terms = self._poly_terms(self.mean_f_, self.cov_f_ if return_var else None)
        for c, ((kind, _), t) in enumerate(zip(self._kinds, terms)):
            mean[..., c] = basis.eval_trig_grid(t["lin"], kind, xs, ys) + t["const"]
            if return_var:
                var[..., c] = (basis.eval_cos_grid(t["quad"], xs, ys) + 2.0 * basis.eval_trig_grid(t["cross"], kind, xs, ys)
                               + t["var_const"])
        if not return_var:
            return mean
        var = np.maximum(var, 0.0) + self.between_walk_var_[None, None, :]
        return mean, var

    def walk_offsets(self):
        """Posterior mean device-frame offset of every survey walk.

        Returns
        -------
        (W, 3) float, µT, in the order of ``walk_names_``, along the axes of
        the samples' ``rotations`` (forward, left, up for heading-only
        rotations); on a tiled map each tile's estimate weighted by the
        walk's samples in it. Only the offsets relative to each other are
        identified (their common part trades off against the constant
        field). Empty (0, 3) when the fit had no walk labels.
        """
        self._check_fitted()
        codes = self.walk_codes_all_
        if codes is None:
            return np.zeros((0, 3))
        w = len(self.walk_names_)
        total = np.zeros((w, 3))
        weight = np.zeros(w)
        for p in self.parts_:
            est = getattr(p, "walk_offsets_ut_", None)
            if est is None or p.walk_codes_ is None or est.shape[0] != p.walk_codes_.size:
                continue
            cnt = np.bincount(codes[p.sel_], minlength=w)[p.walk_codes_].astype(float)
            total[p.walk_codes_] += cnt[:, None] * est
            weight[p.walk_codes_] += cnt
        out = np.zeros((w, 3))
        ok = weight > 0
        out[ok] = total[ok] / weight[ok, None]
        return out

    def summary(self):
        """JSON-able hyperparameters and fit diagnostics."""
        self._check_fitted()
        return {
            "kernel": self.name,
            "hyperparameters": {k: float(v) for k, v in self.hyper_.items()},
            "fixed_hyperparameters": list(self.fixed_hyper_),
            "noise_sd_ut": [float(v) for v in np.sqrt(self.noise_var_)],
            "between_walk_sd_ut": [float(v) for v in np.sqrt(self.between_walk_var_)],
            "log_marginal_likelihood": float(self.log_marginal_likelihood_),
            "basis": self.parts_[0].basis_.to_dict() if len(self.parts_) == 1 else {
                "tiles": len(self.parts_), "tile_m": float(self.tile_m), "tile_overlap_m": float(self.tile_overlap_m),
                "n_basis_per_tile": int(self.parts_[0].tile_basis)},
            "optimisation": self.optim_info_,
            "calibration": self.calibration_,
            "n_samples": int(self.n_samples_),
            "n_walks": len(self.walk_names_),
        }


def _stats_nbytes(st):
    """Bytes held by the arrays of one SufficientStats."""
    arrays = [st.gff, st.bf, st.gfo, st.goo, st.bo, st.yy, st.n] + list(st.gff_blocks or [])
    return int(sum(a.nbytes for a in arrays if a is not None))


class CurlFreeGP(_ReducedRankGP):
    """Reduced-rank curl-free GP (see module docstring).

    Parameters
    ----------
    n_basis : int, basis functions per block (potential, vertical)
    margin_m : float, box margin around the data (and ``domain``)
    length_scale_m, magnitude_ut, noise_h_ut, noise_up_ut, constant_ut,
    offset_ut : float or None
        Hyperparameters; None = estimated by marginal likelihood (given
        values are held fixed). ``magnitude_ut`` is the prior sd of each
        field component, ``constant_ut`` the prior sd of the constant field,
        ``offset_ut`` the prior sd of each device-frame walk-offset axis.
    optimize : bool, maximise the marginal likelihood over the free ones
    between_walk : bool, fit the between-walk variance (needs groups)
    n_folds : int, group folds for it
    domain : ((2,), (2,)) or None, plan box the map must cover
    seed : int, for the fold assignment
    tiles : {"auto", "never", "always"}, split a large floor into tiles
    tile_m, tile_overlap_m : float, tile core size and overlap each side
    tile_basis : int, basis functions per block in each tile
    refine : bool, refit on finer tiles when the length scale ends on the
        bound the basis resolves (module docstring)
    fine_tile_basis : int, basis functions per block of those finer tiles
    refine_max_gb : float, no refinement when its statistics would need
        more memory than this (estimated from the fullest fine tile;
        ``optim_info_["refine_skipped"]`` then records it)
    n_jobs : int or None, threads for the tiles (None: one per core)
    """

    name = "curl-free"

    #: basis-function kind and sign of each component's design (b = -grad phi)
    _kinds = (("dx", -1.0), ("dy", -1.0), ("phi", 1.0))

    # Parameter order: potential weights, the two horizontal constants, the
    # b_up weights, its constant; so each block of the normal equations is
    # one run of consecutive indices (a view, not a gather).
    def _layout(self, m):
        pot = np.arange(m)
        return 2 * m + 3, [np.append(pot, m), np.append(pot, m + 1), np.arange(m + 2, 2 * m + 3)]

    def _blocks(self, m):
        # horizontal (potential + two constants) and vertical (b_up basis +
        # constant): independent unless a walk offset or tilt couples them
        return [np.arange(m + 2), np.arange(m + 2, 2 * m + 3)]

    def _design(self, basis, xy):
        # B = -grad(phi): the potential weights enter with a minus sign.
        phi, dx, dy = basis.evaluate(xy, values=True, gradients=True, gradient_sign=-1.0, ones=1)
        return [dx, dy, phi]

    def _prior_var(self, h):
        w = self.basis_.omega
        ell = h["length_scale_m"]
        s2 = h["magnitude_ut"] ** 2
        pot = se_spectral_density_2d(w, s2 * ell**2, ell)  # potential variance s^2 l^2
        up = se_spectral_density_2d(w, s2, ell)
        c2 = h["constant_ut"] ** 2
        return np.concatenate([pot, [c2, c2], up, [c2]])

    def _dlog_prior(self, h):
        """d log(prior_var) / d log(hyperparameter), (m_f,) each."""
        w2l2 = (self.basis_.omega * h["length_scale_m"]) ** 2
        m = self.basis_.n
        two, zero = np.full(m, 2.0), np.zeros(m)
        return {
            "magnitude_ut": np.concatenate([two, [0.0, 0.0], two, [0.0]]),
            "length_scale_m": np.concatenate([4.0 - w2l2, [0.0, 0.0], 2.0 - w2l2, [0.0]]),
            "constant_ut": np.concatenate([zero, [2.0, 2.0], zero, [2.0]]),
        }


class PerComponentGP(_ReducedRankGP):
    """Independent reduced-rank SE GPs for ``b_x, b_y, b_up`` with a shared
    magnitude and length scale, plus a constant; same parameters as
    :class:`CurlFreeGP` (``n_basis`` per component)."""

    name = "per-component"

    _kinds = (("phi", 1.0),) * 3

    # Parameter order: per component its m weights then its constant (each
    # block one run of consecutive indices).
    def _layout(self, m):
        return 3 * m + 3, [np.arange(k * (m + 1), (k + 1) * (m + 1)) for k in range(3)]

    def _blocks(self, m):
        # one per component; b_x and b_y are merged when heading-frame walk
        # offsets couple them (_linmodel._structure)
        return self._layout(m)[1]

    def _design(self, basis, xy):
        f = basis.evaluate(xy, ones=1)[0]
        return [f, f, f]

    def _prior_var(self, h):
        s = se_spectral_density_2d(self.basis_.omega, h["magnitude_ut"] ** 2, h["length_scale_m"])
        c2 = h["constant_ut"] ** 2
        return np.tile(np.append(s, c2), 3)

    _kappa = 3.0

    def _dlog_prior(self, h):
        w2l2 = (self.basis_.omega * h["length_scale_m"]) ** 2
        m = self.basis_.n
        return {
            "magnitude_ut": np.tile(np.append(np.full(m, 2.0), 0.0), 3),
            "length_scale_m": np.tile(np.append(2.0 - w2l2, 0.0), 3),
            "constant_ut": np.tile(np.append(np.zeros(m), 2.0), 3),
        }


class NearestMap(_Fitted):
    """k-nearest-neighbour map.

    Parameters
    ----------
    k : int, neighbours averaged (1 = plain nearest neighbour)
    """

    name = "nearest"
    _param_names = ("k",)

    def __init__(self, k=5):
        self.k = k

    def fit(self, xy, b, *, groups=None, rotations=None):
        """Store the samples (``groups``/``rotations`` accepted and unused).

        Returns self."""
        xy, b = _check_xy_b(xy, b)
        k = int(self.k)
        if k < 1:
            raise ConfigError(f"k must be >= 1, got {self.k}")
        self.tree_ = cKDTree(xy)
        self.b_ = b.copy()
        self.k_ = min(k, xy.shape[0])
        # Floor for the spread: the global variance of neighbour differences
        # would be overkill; a single neighbour has no spread, so use the
        # median squared nearest-pair difference / 2.
        d, j = self.tree_.query(xy, k=2)
        self.floor_var_ = np.median((b - b[j[:, 1]]) ** 2, axis=0) / 2.0
        self.noise_var_ = np.zeros(3)
        self.n_samples_ = xy.shape[0]
        return self

    def predict(self, xy, return_var=True):
        """Mean of the k nearest samples; var = their spread (at least
        ``floor_var_``). Shapes as the GP models."""
        self._check_fitted()
        xy = _check_query(xy)
        _, j = self.tree_.query(xy, k=self.k_)
        j = j.reshape(xy.shape[0], -1)
        vals = self.b_[j]  # (M, k, 3)
        mean = vals.mean(axis=1)
        if not return_var:
            return mean
        if self.k_ > 1:
            var = vals.var(axis=1, ddof=1)
        else:
            var = np.zeros_like(mean)
        return mean, np.maximum(var, self.floor_var_[None, :])

    def summary(self):
        self._check_fitted()
        return {"kernel": self.name, "hyperparameters": {"k": self.k_}, "n_samples": int(self.n_samples_)}


class ConstantMap(_Fitted):
    """Per-component mean field; variance = sample variance."""

    name = "constant"
    _param_names = ()

    def fit(self, xy, b, *, groups=None, rotations=None):
        """Returns self."""
        xy, b = _check_xy_b(xy, b)
        self.mean_ = b.mean(axis=0)
        self.var_ = b.var(axis=0, ddof=1)
        self.noise_var_ = np.zeros(3)
        self.n_samples_ = xy.shape[0]
        return self

    def predict(self, xy, return_var=True):
        self._check_fitted()
        xy = _check_query(xy)
        mean = np.broadcast_to(self.mean_, (xy.shape[0], 3)).copy()
        if not return_var:
            return mean
        return mean, np.broadcast_to(self.var_, (xy.shape[0], 3)).copy()

    def summary(self):
        self._check_fitted()
        return {"kernel": self.name, "hyperparameters": {}, "n_samples": int(self.n_samples_)}


#: kernel name -> model class
MAP_KERNELS = {
    "curl-free": CurlFreeGP,
    "per-component": PerComponentGP,
    "nearest": NearestMap,
    "constant": ConstantMap,
}


def make_model(kernel="curl-free", **params):
    """Instantiate the map model registered as ``kernel``.

    Raises
    ------
    ConfigError
        Unknown kernel name (the message lists the valid ones) or a
        parameter the model does not take.
    """
    try:
        cls = MAP_KERNELS[kernel]
    except KeyError:
        raise ConfigError(f"unknown map kernel {kernel!r}; valid: {', '.join(MAP_KERNELS)}") from None
    try:
        return cls(**params)
    except TypeError as err:
        raise ConfigError(f"map kernel {kernel!r}: {err}") from err
