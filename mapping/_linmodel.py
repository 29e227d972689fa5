"""Bayesian linear regression behind the reduced-rank field maps.

The three field components of sample ``i`` (plan frame, µT) are modelled as

    y_ic = F_c(x_i) . theta_f[idx_c] + R_i[c, :] . o_{g_i} + eps_ic,

    theta_f ~ N(0, diag(prior_var_f)),  o_g ~ N(0, offset_var I_3),
    eps_ic ~ N(0, noise_var[noise_group[c]]),

where ``F_c`` are the basis functions of component ``c`` (for a
reduced-rank GP: weighted Hilbert-space eigenfunctions or their gradients,
plus a constant), ``o_g`` is a per-walk offset in the device frame and
``R_i`` the sample's device-to-plan rotation (so the offset turns with the
device's heading). Marginalising ``theta`` and ``o`` gives a Gaussian
process with covariance ``F Lambda F^T + sigma_o^2 R R^T [same walk] +
noise``; because the walk offsets touch disjoint samples their block of the
normal equations is block-diagonal (3 x 3 per walk), and it is removed with
a Schur complement. Everything the hyperparameters need is in the
sufficient statistics (``F^T F``, ``F^T y``, ...), accumulated once in
chunks, so the cost is linear in the number of samples and each
marginal-likelihood evaluation is one ``m x m`` Cholesky factorisation.

Reference for the algebra: Rasmussen & Williams (2006), "Gaussian Processes
for Machine Learning", sec. 2.1 (weight-space view) and A.3 (matrix
inversion and determinant lemmas); Solin & Särkkä (2020) sec. 4 for the
reduced-rank marginal likelihood.
"""

from __future__ import annotations

import contextlib
import contextvars
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.linalg.blas
import scipy.linalg.lapack

from fingerprint.errors import ConvergenceError

__all__ = ["SufficientStats", "accumulate", "accumulate_separable", "log_marginal", "log_marginal_and_grad", "posterior", "Posterior"]

_LOG2PI = float(np.log(2 * np.pi))


@dataclass(eq=False)
class SufficientStats:
    """Sufficient statistics of the linear model (see module docstring).

    Attributes
    ----------
    n_field : int, number of field parameters ``m_f``
    n_walks : int, ``W``
    noise_group : (3,) int, noise group of each component (0 .. G-1)
    gff : (G, m_f, m_f) float, ``sum F^T F`` per noise group; None when
        ``gff_blocks`` holds it (see :meth:`dense_gff`)
    bf : (G, m_f) float, ``sum F^T y``
    gfo : (G, m_f, W, 3) float, cross terms with the walk offsets
    goo : (G, W, 3, 3) float
    bo : (G, W, 3) float
    yy : (3,) float, ``sum y_c^2``
    n : (3,) int, samples per component
    """

    n_field: int
    n_walks: int
    noise_group: np.ndarray
    gff: np.ndarray
    bf: np.ndarray
    gfo: np.ndarray
    goo: np.ndarray
    bo: np.ndarray
    yy: np.ndarray
    n: np.ndarray
    blocks: list = None
    #: index sets of the components' designs (F^T F is zero outside their
    #: squares); None: unknown
    support: list = None
    #: ``F^T F`` block by block of ``blocks``, (G, k, k) each, when every
    #: component's design lies inside one block (then ``gff`` is None: the
    #: dense (G, m_f, m_f) would be mostly zeros, and on a large map tile
    #: hundreds of MB)
    gff_blocks: list = None

    @classmethod
    def zeros(cls, n_field, n_walks, noise_group, *, dense_gff=True):
        noise_group = np.asarray(noise_group, dtype=np.int64)
        g = int(noise_group.max()) + 1
        return cls(
            n_field,
            n_walks,
            noise_group,
            np.zeros((g, n_field, n_field)) if dense_gff else None,
            np.zeros((g, n_field)),
            np.zeros((g, n_field, n_walks, 3)),
            np.zeros((g, n_walks, 3, 3)),
            np.zeros((g, n_walks, 3)),
            np.zeros(3),
            np.zeros(3, dtype=np.int64),
        )

    def _combine(self, other, op):
        if (self.gff_blocks is None) != (other.gff_blocks is None):
            a, b = self.dense_gff(), other.dense_gff()
            gff, gffb = op(a, b), None
        elif self.gff_blocks is not None:
            gffb = []
            for a, b, groups in zip(self.gff_blocks, other.gff_blocks, _groups_on(self, self.blocks)):
                out = np.zeros_like(a)  # untouched groups stay unmapped zero pages
                for g in groups:
                    out[g] = op(a[g], b[g])
                gffb.append(out)
            gff = None
        else:
            gff, gffb = op(self.gff, other.gff), None
        return SufficientStats(
            self.n_field, self.n_walks, self.noise_group, gff, op(self.bf, other.bf), op(self.gfo, other.gfo),
            op(self.goo, other.goo), op(self.bo, other.bo), op(self.yy, other.yy), op(self.n, other.n),
            self.blocks, self.support, gffb,
        )

    def __add__(self, other):
        return self._combine(other, np.add)

    def __sub__(self, other):
        return self._combine(other, np.subtract)

    def dense_gff(self):
        """``gff`` as one (G, m_f, m_f) array (built from ``gff_blocks``)."""
        if self.gff_blocks is None:
            return self.gff
        out = np.zeros((self.n_groups, self.n_field, self.n_field))
        for b, g in zip(self.blocks, self.gff_blocks):
            out[:, b[:, None], b[None, :]] = g
        return out

    @property
    def n_groups(self) -> int:
        return int(self.bf.shape[0])


def accumulate(design, idx, xy, b, *, groups=None, rotations=None, n_walks=0, noise_group=(0, 0, 1), chunk=2048,
               blocks=None):
    """Accumulate :class:`SufficientStats` over samples, in chunks.

    Parameters
    ----------
    design : callable, ``design(xy (n, 2)) -> [F_0, F_1, F_2]``, ``F_c`` (n, len(idx[c]))
    idx : list of three (m_c,) int arrays, field parameters of each component
    xy : (N, 2) float, metres
    b : (N, 3) float, µT
    groups : (N,) int in ``0 .. n_walks - 1`` or None (no walk offsets)
    rotations : (N, 3, 3) float or None (identity), device-to-plan rotation
    n_walks : int
    noise_group : (3,) int
    chunk : int, samples per chunk
    blocks : list of index arrays or None, a partition of the field
        parameters; when the normal equations turn out block-diagonal for
        it (no sample or walk offset couples two blocks; coupled ones are
        merged) each block is
        factorised on its own, which is exact and much cheaper

    Returns
    -------
    SufficientStats
    """
    n_field = int(max(int(np.max(ix)) for ix in idx) + 1)
    w = int(n_walks) if groups is not None else 0
    st = SufficientStats.zeros(n_field, w, noise_group)
    st.blocks = blocks
    st.support = [np.asarray(ix, dtype=np.int64) for ix in idx]
    n = xy.shape[0]
    local = [np.zeros((len(ix), len(ix)), order="F") for ix in idx]
    eye3 = np.eye(3)
    for s in range(0, n, chunk):
        sl = slice(s, min(s + chunk, n))
        feats = design(xy[sl])
        m = sl.stop - sl.start
        if w:
            # Dense one-hot of the walks present in this chunk (usually one
            # or two: samples come walk by walk), so the offset cross terms
            # are plain matrix products.
            present, member = np.unique(groups[sl], return_inverse=True)
            onehot = np.zeros((m, present.size))
            onehot[np.arange(m), member] = 1.0
        for c in range(3):
            f = feats[c]
            ix = np.asarray(idx[c])
            g = int(st.noise_group[c])
            y = b[sl, c]
            # upper triangle only (BLAS syrk, half the work of f.T @ f),
            # accumulated per component and embedded once at the end
            local[c] = scipy.linalg.blas.dsyrk(1.0, f.T, trans=0, lower=0, c=local[c], beta=1.0, overwrite_c=1)
            st.yy[c] += float(y @ y)
            st.n[c] += m
            if not w:
                st.bf[g, ix] += f.T @ y
                continue
            r = np.broadcast_to(eye3[c], (m, 3)) if rotations is None else rotations[sl, c, :]
            # columns: y, then r[:, k] on the rows of walk a at 1 + 3 a + k
            rhs = np.empty((m, 1 + 3 * present.size))
            rhs[:, 0] = y
            rhs[:, 1:] = (onehot[:, :, None] * r[:, None, :]).reshape(m, -1)
            fr = f.T @ rhs
            st.bf[g, ix] += fr[:, 0]
            st.gfo[g][ix[:, None], present[None, :], :] += fr[:, 1:].reshape(ix.size, present.size, 3)
            st.goo[g][present] += (onehot.T @ (r[:, :, None] * r[:, None, :]).reshape(m, 9)).reshape(-1, 3, 3)
            st.bo[g][present] += onehot.T @ (r * y[:, None])
    for c in range(3):
        # ``idx[c]`` is increasing, so the local upper triangle is global upper
        st.gff[int(st.noise_group[c])][np.ix_(idx[c], idx[c])] += np.triu(local[c])
    for g in range(st.n_groups):
        st.gff[g] = np.triu(st.gff[g]) + np.triu(st.gff[g], 1).T
    return st


def accumulate_separable(basis, kinds, idx, xy, b, *, groups=None, rotations=None, n_walks=0, noise_group=(0, 0, 1),
                         chunk=8192, blocks=None):
    """:func:`accumulate` for designs whose component ``c`` is
    ``[sign_c * f_kind_c(x), 1]``, ``f`` a kind of basis function of
    ``basis`` (:class:`mapping.gp_hilbert.BoxBasis`): the same statistics
    from the separable algebra of the basis (module docstring of
    :mod:`mapping.gp_hilbert`), ``O(N J_x J_y)`` instead of ``O(N m^2)``,
    without forming the design.

    Parameters
    ----------
    basis : BoxBasis
    kinds : three (kind, sign) pairs, one per component
    idx : three (m + 1,) int arrays: the field parameters of each
        component's basis functions, then of its constant
    other parameters : as :func:`accumulate`

    Returns
    -------
    SufficientStats
    """
    m = basis.n
    idx = [np.asarray(ix, dtype=np.int64) for ix in idx]
    if any(ix.shape != (m + 1,) for ix in idx):
        raise ValueError(f"each component needs {m} basis and one constant parameter")
    n_field = int(max(int(ix.max()) for ix in idx) + 1)
    w = int(n_walks) if groups is not None else 0
    home = _home_blocks(idx, blocks, n_field)
    st = SufficientStats.zeros(n_field, w, noise_group, dense_gff=home is None)
    st.blocks = None if blocks is None else [np.sort(np.asarray(bl, dtype=np.int64)) for bl in blocks]
    st.support = idx
    if home is not None:
        st.gff_blocks = [np.zeros((st.n_groups, bl.size, bl.size)) for bl in st.blocks]
    n = xy.shape[0]
    jx, jy = basis.n_modes
    cos_tab = np.zeros((2 * jx + 1, 2 * jy + 1))
    ones_tab = [np.zeros((jx + 1, jy + 1)) for _ in kinds]
    eye3 = np.eye(3)
    for s in range(0, n, chunk):
        sl = slice(s, min(s + chunk, n))
        q = basis.harmonics_at(xy[sl])  # sines and cosines shared by all tables
        k_n = sl.stop - sl.start
        cos_tab += basis.cos_table(q)
        if w:
            present, member = np.unique(groups[sl], return_inverse=True)
            onehot = np.zeros((k_n, present.size))
            onehot[np.arange(k_n), member] = 1.0
        for c, (kind, sign) in enumerate(kinds):
            g = int(st.noise_group[c])
            y = b[sl, c]
            ixb, ic = idx[c][:m], idx[c][m]
            # weights: 1, y, then r[:, k] on the rows of each present walk
            cols = [np.ones(k_n), y]
            if w:
                r = np.broadcast_to(eye3[c], (k_n, 3)) if rotations is None else rotations[sl, c, :]
                wr = (onehot[:, :, None] * r[:, None, :]).reshape(k_n, -1)
                cols.append(wr)
            wts = np.column_stack(cols)
            tab = basis.trig_tables(q, wts, [kind])[kind]
            ones_tab[c] += tab[0]
            proj = basis.project(tab[1:], kind, sign)
            st.bf[g, ixb] += proj[0]
            st.bf[g, ic] += float(y.sum())
            st.yy[c] += float(y @ y)
            st.n[c] += k_n
            if w:
                st.gfo[g][ixb[:, None], present[None, :], :] += proj[1:].T.reshape(m, present.size, 3)
                st.gfo[g][ic, present, :] += (onehot.T @ r)
                st.goo[g][present] += (onehot.T @ (r[:, :, None] * r[:, None, :]).reshape(k_n, 9)).reshape(-1, 3, 3)
                st.bo[g][present] += onehot.T @ (r * y[:, None])
    grams = {}
    for c, (kind, sign) in enumerate(kinds):
        g = int(st.noise_group[c])
        if home is None:
            target, loc = st.gff[g], idx[c]
        else:
            target = st.gff_blocks[home[c]][g]
            loc = np.searchsorted(st.blocks[home[c]], idx[c])
        ixb, ic = loc[:m], loc[m]
        cnt = float(st.n[c])
        if (kind, sign) not in grams:  # components of one kind share it
            grams[kind, sign] = basis.gram(cos_tab, kind, sign)
        if ixb[-1] - ixb[0] + 1 == m and np.all(np.diff(ixb) == 1):
            target[ixb[0] : ixb[0] + m, ixb[0] : ixb[0] + m] += grams[kind, sign]
        else:
            target[np.ix_(ixb, ixb)] += grams[kind, sign]
        lin = basis.project(ones_tab[c][None], kind, sign)[0]
        target[ixb, ic] += lin
        target[ic, ixb] += lin
        target[ic, ic] += cnt
    return st


def _membership(blocks, n_field):
    """(n_field,) index of the block of ``blocks`` holding each field
    parameter, or None when ``blocks`` is not a partition of them."""
    if not blocks:
        return None
    bl = [np.asarray(b, dtype=np.int64) for b in blocks]
    if sum(b.size for b in bl) != n_field or np.unique(np.concatenate(bl)).size != n_field:
        return None
    member = np.empty(n_field, dtype=np.int64)
    for i, b in enumerate(bl):
        member[b] = i
    return member


def _home_blocks(idx, blocks, n_field):
    """The block of ``blocks`` holding each component's parameters
    ``idx[c]``, or None when ``blocks`` is not a partition of the field
    parameters or some component spans two blocks."""
    member = _membership(blocks, n_field)
    if member is None:
        return None
    home = []
    for ix in idx:
        m = np.unique(member[ix])
        if m.size != 1:
            return None
        home.append(int(m[0]))
    return home


@dataclass(eq=False)
class Posterior:
    """Posterior of the field parameters with the walk offsets integrated out.

    Attributes
    ----------
    mean_f : (m_f,) float
    cov_f : (m_f, m_f) float, posterior covariance of the field parameters
    mean_o : (W, 3) float, µT, posterior mean walk offsets (device frame)
    log_ml : float, log marginal likelihood
    """

    mean_f: np.ndarray
    cov_f: np.ndarray
    mean_o: np.ndarray
    log_ml: float
    factor: "_Factor" = None


def _chol_inverse(chol):
    """Inverse of a symmetric positive-definite matrix from its lower
    Cholesky factor (LAPACK ``dpotri``, about a third of the cost of
    solving against the identity)."""
    inv, info = scipy.linalg.lapack.dpotri(chol[0], lower=1)
    if info != 0:
        raise np.linalg.LinAlgError(f"dpotri failed with info={info}")
    inv = np.tril(inv)
    return inv + np.tril(inv, -1).T


def _chol_inverse_diagonal(chol):
    """Diagonal of the inverse from the lower Cholesky factor: column sums
    of squares of ``L^-1`` (LAPACK ``dtrtri``)."""
    li, info = scipy.linalg.lapack.dtrtri(chol[0], lower=1)
    if info != 0:
        raise np.linalg.LinAlgError(f"dtrtri failed with info={info}")
    li = np.tril(li)
    return np.einsum("ij,ij->j", li, li)


#: Factorisations smaller than this are not worth a thread.
_THREAD_MIN_SIZE = 384

_MAX_THREADS = contextvars.ContextVar("lodemap_linmodel_threads", default=None)


def available_cores():
    """Cores this process may run on (its CPU affinity where the system
    tells, else the machine's count)."""
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except (AttributeError, OSError):
        return os.cpu_count() or 1


@contextlib.contextmanager
def thread_limit(n):
    """Within the block, :func:`_on_threads` uses at most ``n`` threads
    (None: one per available core), as a model's ``n_jobs`` asks."""
    token = _MAX_THREADS.set(None if n is None else max(int(n), 1))
    try:
        yield
    finally:
        _MAX_THREADS.reset(token)


def _on_threads(fn, items, sizes):
    """``[fn(x) for x in items]``, on up to one thread per core (or
    :func:`thread_limit`) when two or more items are large (LAPACK releases
    the GIL, and each call keeps its one BLAS thread: no spin-waits).
    Called from a worker thread (map tiles already run on threads), it
    stays sequential."""
    big = sum(int(s) >= _THREAD_MIN_SIZE for s in sizes)
    limit = _MAX_THREADS.get()
    n = min(available_cores() if limit is None else limit, len(items))
    if big < 2 or n < 2 or threading.current_thread() is not threading.main_thread():
        return [fn(x) for x in items]
    with ThreadPoolExecutor(max_workers=n) as ex:
        return list(ex.map(fn, items))


class _Factor:
    """Cholesky factorisation of a symmetric positive-definite S given as
    its diagonal blocks ``blocks`` (list of square arrays, overwritten) on
    the index sets ``parts`` (S is zero outside them)."""

    def __init__(self, n, parts, blocks):
        self.n = n
        self.parts = parts
        # identical blocks (b_x and b_y of a per-component model share
        # kernel, noise and samples) are factorised once; blocks are keyed
        # by their diagonal, so telling different ones apart costs O(size)
        twin = list(range(len(blocks)))
        first = {}  # diagonal -> indices of the distinct blocks with it
        for i, a in enumerate(blocks):
            same = first.setdefault((a.shape, np.diagonal(a).tobytes()), [])
            j = next((j for j in same if a is blocks[j] or np.array_equal(a, blocks[j])), None)
            if j is None:
                same.append(i)
            else:
                twin[i] = j
        own = [i for i in range(len(blocks)) if twin[i] == i]
        done = dict(zip(own, _on_threads(
            lambda i: scipy.linalg.cho_factor(blocks[i], lower=True, overwrite_a=True, check_finite=False),
            own, [blocks[i].shape[0] for i in own])))
        self.chols = [done[twin[i]] for i in range(len(blocks))]

    def solve(self, rhs):
        out = np.empty_like(rhs, dtype=float)
        for b, c in zip(self.parts, self.chols):
            out[b] = scipy.linalg.cho_solve(c, rhs[b], check_finite=False)
        return out

    def logdet(self):
        return float(sum(2.0 * np.sum(np.log(np.diag(c[0]))) for c in self.chols))

    def _per_factor(self, fn, only):
        """``[fn(factor of block i)]``, each shared factor done once (callers
        only read the results); None for the blocks ``only`` (one bool per
        block, default all) leaves out."""
        want = [i for i, c in enumerate(self.chols) if only is None or only[i]]
        distinct = list({id(self.chols[i]): self.chols[i] for i in want}.values())
        res = dict(zip(map(id, distinct), _on_threads(fn, distinct, [c[0].shape[0] for c in distinct])))
        return [res[id(c)] if only is None or only[i] else None for i, c in enumerate(self.chols)]

    def inverse_blocks(self, only=None):
        """The diagonal blocks of S^-1 (S^-1 is zero outside them)."""
        return self._per_factor(_chol_inverse, only)

    def inverse_diagonals(self, only=None):
        """The diagonals of the blocks of S^-1, from the inverse of each
        Cholesky factor alone (``diag(S^-1)_j = sum_i (L^-1)_ij^2``; LAPACK
        ``dtrtri``, half the work of the full inverse)."""
        return self._per_factor(_chol_inverse_diagonal, only)

    def solve_block(self, i, rhs):
        """S_i^-1 rhs for block ``i`` alone."""
        return scipy.linalg.cho_solve(self.chols[i], rhs, check_finite=False)

    def inverse(self):
        if len(self.parts) == 1:
            return _chol_inverse(self.chols[0])
        out = np.zeros((self.n, self.n))
        for b, inv in zip(self.parts, self.inverse_blocks()):
            out[np.ix_(b, b)] = inv
        return out


def _groups_on(st, parts):
    """The noise groups whose ``F^T F`` can be non-zero on each index set
    of ``parts``: those of the components whose design (``st.support``)
    touches it; all groups when the support is unknown."""
    if st.support is None:
        return [list(range(st.n_groups)) for _ in parts]
    out = []
    for part in parts:
        gs = {int(st.noise_group[c]) for c, ix in enumerate(st.support) if np.isin(ix, part).any()}
        out.append(sorted(gs))
    return out


def _gather_blocks(st, part):
    """``F^T F`` on ``part`` (a union of ``st.blocks``) from the per-block
    Grams: the block itself when ``part`` is one, else block-diagonal."""
    for b, g in zip(st.blocks, st.gff_blocks):
        if b.size == part.size and np.array_equal(b, part):
            return g
    out = np.zeros((st.n_groups, part.size, part.size))
    for b, g in zip(st.blocks, st.gff_blocks):
        if np.isin(b, part).all():
            loc = np.searchsorted(part, b)
            out[:, loc[:, None], loc[None, :]] = g
    return out


def _block(g, b):
    """``g[:, b][:, :, b]`` for (G, n, n) ``g``: a view when ``b`` is a run of
    consecutive indices (read-only use), else a copy."""
    if b.size and b[-1] - b[0] + 1 == b.size and np.all(np.diff(b) == 1):
        return g[:, b[0] : b[-1] + 1, b[0] : b[-1] + 1]
    return g[:, b][:, :, b]  # two 1-D gathers: several times faster than one 2-D fancy index


def _structure(st):
    """The partition the normal equations are block-diagonal for at every
    hyperparameter value: the blocks of ``st.blocks``, merged where a
    sample (``F^T F``) or a walk offset (``F^T R``, through the offset's
    3 x 3 block) couples two of them. A property of the zero pattern only,
    so it is found once per statistics; the blocks of ``F^T F`` are cached
    with it. Returns (parts, per part ``{noise group: F^T F block (k, k)}``
    for the groups whose samples touch it)."""
    cache = st.__dict__.get("_structure_cache")
    if cache is not None:
        return cache
    n = st.n_field
    parts = [np.arange(n)]
    bl = [np.asarray(b, dtype=np.int64) for b in (st.blocks or [])]
    member = _membership(bl, n) if len(bl) > 1 else None
    if member is not None:
        pairs = [(i, j) for i in range(len(bl)) for j in range(i + 1, len(bl))]
        if st.support is not None:  # a component's design spanning two blocks couples them
            spans = [set(np.unique(member[ix]).tolist()) for ix in st.support]
            coupled = {(i, j) for i, j in pairs if any(i in sp and j in sp for sp in spans)}
        else:
            gabs = np.abs(st.dense_gff()).sum(axis=0)
            coupled = {(i, j) for i, j in pairs if np.any(gabs[np.ix_(bl[i], bl[j])])}
        if st.n_walks:
            used = np.abs(st.gfo).sum(axis=0) > 0  # (n, W, 3): parameter touches offset axis
            link = (np.abs(st.goo).sum(axis=0) > 0) | np.eye(3, dtype=bool)[None]
            for _ in range(2):  # closure: the pattern of the 3 x 3 inverse
                link = np.einsum("wij,wjk->wik", link.astype(float), link.astype(float)) > 0
            reach = [np.einsum("iwk,wkl->wl", used[b].astype(float), link.astype(float)) > 0 for b in bl]
            touch = [used[b].any(axis=0) for b in bl]
            coupled |= {(i, j) for i, j in pairs if np.any(reach[i] & touch[j])}
        root = list(range(len(bl)))  # union-find over the coupled pairs

        def find(i):
            while root[i] != i:
                root[i] = root[root[i]]
                i = root[i]
            return i

        for i, j in coupled:
            root[find(i)] = find(j)
        groups = {}
        for i in range(len(bl)):
            groups.setdefault(find(i), []).append(bl[i])
        parts = [np.sort(np.concatenate(g)) for g in groups.values()]
    if st.gff_blocks is None:
        full = [_block(st.gff, b) for b in parts]
    else:
        full = [_gather_blocks(st, b) for b in parts]
    # per part only the noise groups that touch it: {group: (k, k)}
    gffb = [{g: f[g] for g in groups} for f, groups in zip(full, _groups_on(st, parts))]
    st._structure_cache = (parts, gffb)
    return st._structure_cache


def _twin_parts(st):
    """For each part of :func:`_structure`, the first part with the same
    ``F^T F`` (same noise groups, equal blocks), else its own index: b_x and
    b_y of a per-component model share kernel, noise and samples, so with
    equal priors and no walk offsets their normal equations are one matrix.
    Cached with the statistics."""
    cache = st.__dict__.get("_twin_cache")
    if cache is not None:
        return cache
    parts, gffb = _structure(st)
    twin = list(range(len(parts)))
    for i in range(len(parts)):
        for j in range(i):
            if (twin[j] == j and parts[j].size == parts[i].size and gffb[j].keys() == gffb[i].keys()
                    and all(np.array_equal(gffb[i][g], gffb[j][g]) for g in gffb[i])):
                twin[i] = j
                break
    st._twin_cache = twin
    return twin


def _floor_prior(prior_var_f):
    # Spectral densities underflow to 0 for high frequencies; a tiny floor
    # keeps 1 / prior finite without changing the model measurably.
    prior_var_f = np.asarray(prior_var_f, float)
    return np.maximum(prior_var_f, 1e-12 * float(prior_var_f.max()))


def _assemble(st, prior_var_f, noise_var, offset_var):
    """The normal equations with the walk offsets eliminated: the factor
    of S (block by block, see :func:`_structure`), the right-hand side and
    the scalar terms of the marginal likelihood."""
    inv_nv = 1.0 / np.asarray(noise_var, float)  # per noise group
    bf = inv_nv @ st.bf
    yy = float(np.sum(st.yy * inv_nv[st.noise_group]))
    ndet = float(np.sum(st.n * np.log(np.asarray(noise_var, float)[st.noise_group])))
    extra = {"quad": 0.0, "logdet": 0.0, "prior": 0.0}
    parts = None
    blocks, gffb = _structure(st)
    twin = _twin_parts(st) if not st.n_walks else range(len(blocks))
    sb = []
    for i, (b, gb) in enumerate(zip(blocks, gffb)):
        j = twin[i]
        if j != i and np.array_equal(prior_var_f[b], prior_var_f[blocks[j]]):
            sb.append(sb[j])  # the same matrix: built and factorised once
            continue
        terms = iter(gb.items())
        first = next(terms, None)
        sub = np.zeros((b.size, b.size)) if first is None else np.multiply(first[1], inv_nv[first[0]])
        for g, a in terms:
            sub += inv_nv[g] * a
        sub[np.diag_indices_from(sub)] += 1.0 / prior_var_f[b]
        sb.append(sub)
    if st.n_walks:
        w = st.n_walks
        gfo = np.tensordot(inv_nv, st.gfo, axes=1).reshape(st.n_field, 3 * w)
        d = np.tensordot(inv_nv, st.goo, axes=1) + np.eye(3)[None] / offset_var
        bo = np.tensordot(inv_nv, st.bo, axes=1)
        dc = np.linalg.cholesky(d)
        dinv = np.linalg.inv(d)
        gd = np.einsum("mwi,wij->mwj", gfo.reshape(st.n_field, w, 3), dinv).reshape(st.n_field, 3 * w)
        for b, sub in zip(blocks, sb):
            sub -= gd[b] @ gfo[b].T
        bf = bf - gd @ bo.ravel()
        dib = np.einsum("wij,wj->wi", dinv, bo)
        extra["quad"] = float(np.sum(bo * dib))
        extra["logdet"] = 2.0 * float(np.sum(np.log(np.diagonal(dc, axis1=1, axis2=2))))
        extra["prior"] = 3 * w * float(np.log(offset_var))
        parts = (gfo, dinv, dib, gd)
    fac = _Factor(st.n_field, blocks, sb)
    return fac, bf, yy, ndet, extra, parts


def _log_ml(st, fac, bf, solved, yy, ndet, extra, prior_var_f):
    """The log marginal likelihood from the assembled system: ``solved`` is
    ``fac.solve(bf)`` (passed in because every caller needs it anyway)."""
    quad = extra["quad"] + float(bf @ solved)
    return float(
        -0.5 * (yy - quad)
        - 0.5 * (extra["logdet"] + fac.logdet())
        - 0.5 * float(np.sum(np.log(prior_var_f)))
        - 0.5 * extra["prior"]
        - 0.5 * ndet
        - 0.5 * int(st.n.sum()) * _LOG2PI
    )


def log_marginal(st, prior_var_f, noise_var, offset_var=1.0):
    """Log marginal likelihood of the data summarised by ``st``.

    Parameters
    ----------
    st : SufficientStats
    prior_var_f : (m_f,) float, prior variance of each field parameter
    noise_var : (G,) float, µT², white-noise variance per noise group
    offset_var : float, µT², prior variance of each walk-offset axis

    Returns
    -------
    float (``-inf`` if the system is not positive definite)
    """
    prior_var_f = _floor_prior(prior_var_f)
    try:
        fac, bf, yy, ndet, extra, _ = _assemble(st, prior_var_f, noise_var, offset_var)
    except (np.linalg.LinAlgError, scipy.linalg.LinAlgError):
        return -np.inf
    return _log_ml(st, fac, bf, fac.solve(bf), yy, ndet, extra, prior_var_f)


def posterior(st, prior_var_f, noise_var, offset_var=1.0, *, cov=True):
    """Posterior mean and covariance of the field parameters, and the
    posterior mean walk offsets. See :func:`log_marginal` for arguments;
    ``cov=False``: ``cov_f`` is None and ``factor`` (the Cholesky factor of
    the posterior precision, ``factor.inverse()`` is ``cov_f``) is kept,
    for callers that may never need the covariance.

    Returns
    -------
    Posterior
    """
    prior_var_f = _floor_prior(prior_var_f)
    try:
        fac, bf, yy, ndet, extra, parts = _assemble(st, prior_var_f, noise_var, offset_var)
    except (np.linalg.LinAlgError, scipy.linalg.LinAlgError) as err:
        raise ConvergenceError(f"field-map normal equations are not positive definite: {err}") from err
    mean_f = fac.solve(bf)
    cov_f = fac.inverse() if cov else None
    if parts is not None:
        gfo, dinv, dib, _ = parts
        w = st.n_walks
        mean_o = dib - np.einsum("wij,wj->wi", dinv, (gfo.T @ mean_f).reshape(w, 3))
    else:
        mean_o = np.zeros((0, 3))
    log_ml = _log_ml(st, fac, bf, mean_f, yy, ndet, extra, prior_var_f)
    return Posterior(mean_f, cov_f, mean_o, log_ml, fac)


def log_marginal_and_grad(st, prior_var_f, noise_var, offset_var=1.0):
    """Log marginal likelihood and its gradient.

    The gradient uses the expectation identities of the linear-Gaussian
    model (Fisher's identity; e.g. Bishop 2006, "Pattern Recognition and
    Machine Learning", sec. 3.5 and 7.2): with posterior mean ``mu`` and
    covariance ``C`` of all weights,

    - ``d log p / d log lambda_k = ((mu_k^2 + C_kk) / lambda_k - 1) / 2``,
    - ``d log p / d log sigma_g^2 = ((|y_g - A_g mu|^2 + tr(A_g C A_g^T)) / sigma_g^2 - n_g) / 2``.

    Returns
    -------
    value : float
    d_log_prior : (m_f,) float, derivative w.r.t. ``log prior_var_f``
        (zero where the prior is floored)
    d_log_noise : (G,) float, derivative w.r.t. ``log noise_var``
    d_log_offset : float, derivative w.r.t. ``log offset_var``
    """
    raw = np.asarray(prior_var_f, float)
    prior = _floor_prior(raw)
    noise_var = np.asarray(noise_var, float)
    try:
        fac, bf, yy, ndet, extra, parts = _assemble(st, prior, noise_var, offset_var)
    except (np.linalg.LinAlgError, scipy.linalg.LinAlgError):
        return -np.inf, None, None, None
    mu_f = fac.solve(bf)
    value = _log_ml(st, fac, bf, mu_f, yy, ndet, extra, prior)
    # S^-1 is block-diagonal (see _structure): work block by block. A block
    # whose F^T F has one noise group g needs only the diagonal of its
    # inverse: S_b = A_g / s_g + diag(1 / prior_b) - U_b (U_b the eliminated
    # walk offsets, gd_b gfo_b^T), so tr(S_b^-1 A_g) = s_g (k - sum_j
    # (S_b^-1)_jj / prior_j + sum(S_b^-1 gd_b * gfo_b)); other blocks use
    # the full inverse.
    blocks, gffb = _structure(st)
    single = [len(gb) == 1 for gb in gffb]
    full = fac.inverse_blocks(only=[not x for x in single])
    diags = fac.inverse_diagonals(only=single)
    diag_f = np.empty(st.n_field)
    for i, b in enumerate(blocks):
        diag_f[b] = diags[i] if single[i] else np.diag(full[i])
    d_prior = 0.5 * ((mu_f**2 + diag_f) / prior - 1.0)
    d_prior = np.where(raw >= prior, d_prior, 0.0)
    w = st.n_walks
    ng = st.n_groups
    d_noise = np.empty(ng)
    d_off = 0.0
    tr = np.zeros(ng)
    if w:
        gfo, dinv, dib, bd = parts  # gfo noise-weighted (m_f, 3 W); bd = B D^-1
        mu_o = dib - np.einsum("wij,wj->wi", dinv, (gfo.T @ mu_f).reshape(w, 3))
        e = np.empty((st.n_field, 3 * w))  # S^-1 B D^-1
        for i, b in enumerate(blocks):
            e[b] = fac.solve_block(i, bd[b]) if single[i] else full[i] @ bd[b]
    for i, (b, gb) in enumerate(zip(blocks, gffb)):
        if single[i]:
            (g,) = gb
            t = b.size - float(np.sum(diag_f[b] / prior[b]))
            if w:
                t += float(np.sum(e[b] * gfo[b]))
            tr[g] += noise_var[g] * t
        else:
            for g, a in gb.items():
                tr[g] += float(np.vdot(full[i], a))
    if w:
        bd = bd.reshape(st.n_field, w, 3)
        e3 = e.reshape(st.n_field, w, 3)
        coo = dinv + np.einsum("mwi,mwj->wij", bd, e3)  # diagonal blocks of C_oo
        d_off = float(0.5 * (np.sum(mu_o**2 + np.diagonal(coo, axis1=1, axis2=2)) / offset_var - 3 * w))
    for g in range(ng):
        rows = st.noise_group == g
        n_g = int(st.n[rows].sum())
        yy_g = float(st.yy[rows].sum())
        quad = sum(float(mu_f[b] @ gb[g] @ mu_f[b]) for b, gb in zip(blocks, gffb) if g in gb)
        resid = yy_g - 2 * float(mu_f @ st.bf[g]) + quad
        trg = tr[g]
        if w:
            gfo_g = st.gfo[g]  # (m_f, W, 3)
            resid += -2 * float(np.sum(mu_o * st.bo[g])) + 2 * float(mu_f @ np.einsum("mwj,wj->m", gfo_g, mu_o))
            resid += float(np.einsum("wi,wij,wj->", mu_o, st.goo[g], mu_o))
            trg += -2 * float(np.sum(e3 * gfo_g)) + float(np.sum(coo * st.goo[g]))
        d_noise[g] = 0.5 * ((resid + trg) / noise_var[g] - n_g)
    return value, d_prior, d_noise, d_off
