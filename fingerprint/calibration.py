"""Magnetometer calibration: hard-iron offset and soft-iron matrix.

Model: a reading ``m`` (device frame, µT) relates to the true field ``b`` by
``m = S b + o``; the correction is ``b = W (m - o)`` with ``W`` ~ ``S⁻¹``.

Fit: the least-squares ellipsoid-specific fit of Li & Griffiths (2004),
"Least squares ellipsoid specific fitting", Proc. Geometric Modeling and
Processing, pp. 335-340: the algebraic conic ``v·[x², y², z², 2yz, 2xz, 2xy,
2x, 2y, 2z, 1] = 0`` under the constraint ``4J - I² = 1`` (k = 4), solved as
a generalised eigenproblem. From the quadric, the centre is the offset and
the symmetric square root of the shape matrix is ``W`` (the fit fixes ``W``
only up to a rotation; the symmetric choice is the usual one). Its scale is
set so that corrected readings have magnitude ``field_ut`` when given (e.g.
from a geomagnetic model), otherwise so that ``det W = 1`` (volume kept).

Coverage: a 3-D ellipsoid is only identifiable when the readings span
rotations about more than one axis. When they do not (a phone carried flat,
a robot on a floor), the readings lie near a plane; the fit falls back to a
circle fit in that plane (the algebraic circle fit of Kåsa 1976, "A circle
fitting procedure and its error analysis", IEEE Trans. Instrum. Meas. 25(1)),
which gives the offset within the plane; the offset along the plane's normal
and the soft-iron matrix are not identifiable and are left at 0 and identity,
and the report says so.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import linalg

from ._atomic import write_json_atomic
from .errors import ConvergenceError, DataError, FormatError

__all__ = ["Calibration", "fit_calibration", "turning_stretch", "ellipsoid_fit", "circle_fit", "rotation_coverage"]

FORMAT = "lodemap-calibration"
VERSION = 1


@dataclass(frozen=True, eq=False)
class Calibration:
    """Hard- and soft-iron correction ``b = matrix @ (m - offset_ut)``.

    Attributes
    ----------
    offset_ut : (3,) float, µT
    matrix : (3, 3) float
    source : {"mag", "mag_raw"}, the log columns it applies to
    meta : dict, JSON-able fit report
    """

    offset_ut: np.ndarray
    matrix: np.ndarray = field(default_factory=lambda: np.eye(3))
    source: str = "mag"
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        o = np.asarray(self.offset_ut, dtype=float).reshape(3)
        m = np.asarray(self.matrix, dtype=float).reshape(3, 3)
        if not (np.isfinite(o).all() and np.isfinite(m).all()):
            raise DataError("calibration offset and matrix must be finite")
        object.__setattr__(self, "offset_ut", o)
        object.__setattr__(self, "matrix", m)

    @classmethod
    def identity(cls, source="mag"):
        return cls(np.zeros(3), np.eye(3), source=source)

    def apply(self, mag_ut):
        """Correct readings: (N, 3) µT -> (N, 3) µT."""
        mag_ut = np.asarray(mag_ut, dtype=float)
        return (mag_ut - self.offset_ut) @ self.matrix.T

    def to_json(self):
        """JSON-able dict."""
        return {
            "format": FORMAT,
            "version": VERSION,
            "source": self.source,
            "offset_ut": [float(v) for v in self.offset_ut],
            "matrix": [[float(v) for v in row] for row in self.matrix],
            "report": _jsonable(self.meta),
        }

    @classmethod
    def from_json(cls, obj, *, path=None):
        """From a dict made by :meth:`to_json` (or a path to such a file)."""
        from .logio import read_text

        if isinstance(obj, (str, Path)):
            path = str(obj)
            try:
                obj = json.loads(read_text(obj))
            except json.JSONDecodeError as err:
                raise FormatError(f"not valid JSON: {err.msg}", path=path, line=err.lineno, column=err.colno) from err
        if not isinstance(obj, dict) or obj.get("format") != FORMAT:
            raise FormatError(f"expected a calibration file with format {FORMAT!r}", path=path)
        if obj.get("version") != VERSION:
            raise FormatError(f"calibration version {obj.get('version')!r}, expected {VERSION}", path=path)
        def numbers(value):  # JSON numbers only: "1.5" or true is not a number here
            if isinstance(value, list):
                return all(numbers(v) for v in value)
            return isinstance(value, (int, float)) and not isinstance(value, bool)

        try:
            off_raw, mat_raw = obj["offset_ut"], obj["matrix"]
            if not (numbers(off_raw) and numbers(mat_raw)):
                raise TypeError("expected JSON numbers, not text or true/false")
            off = np.asarray(off_raw, dtype=float)
            mat = np.asarray(mat_raw, dtype=float)
        except (KeyError, TypeError, ValueError) as err:
            raise FormatError(f"calibration needs offset_ut (3 numbers) and matrix (3x3): {err}", path=path) from err
        if off.shape != (3,) or mat.shape != (3, 3):
            raise FormatError(
                f"calibration offset_ut must be 3 numbers and matrix 3x3, got {off.shape} and {mat.shape}", path=path
            )
        if not (np.isfinite(off).all() and np.isfinite(mat).all()):
            raise FormatError("calibration offset_ut and matrix must be finite numbers", path=path)
        # a correction keeps the sensor's axes right-handed and loses no
        # direction: det > 0 and a condition number far from singular
        # (common practice, no source)
        det = float(np.linalg.det(mat))
        cond = float(np.linalg.cond(mat))
        if not det > 0 or not cond < 1e6:
            why = "mirrors the axes (determinant < 0)" if det < 0 else "is singular or nearly so"
            raise FormatError(f"calibration matrix {why}: determinant {det:.3g}, condition number {cond:.3g}; "
                              "expected a well-conditioned matrix with a positive determinant", path=path)
        src = obj.get("source", "mag")
        if src not in ("mag", "mag_raw"):
            raise FormatError(f"calibration source must be 'mag' or 'mag_raw', got {src!r}", path=path)
        return cls(off, mat, source=src, meta=obj.get("report", {}))

    def save(self, path):
        """Write as JSON, atomically."""
        write_json_atomic(path, self.to_json())


def _jsonable(x):
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, (np.floating, float)):
        return float(x) if np.isfinite(x) else None
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    return x


def ellipsoid_fit(m):
    """Li & Griffiths (2004) ellipsoid-specific least-squares fit.

    Parameters
    ----------
    m : (N, 3) float, N >= 10

    Returns
    -------
    centre : (3,), shape : (3, 3) symmetric positive definite ``A`` with
    ``(m - centre)ᵀ A (m - centre) = 1`` on the fitted surface, and
    ``cond`` : float, condition number of the (scaled) scatter matrix.
    """
    m = np.asarray(m, dtype=float)
    # centre and scale first, for conditioning; undone below
    mu = m.mean(axis=0)
    sc = np.sqrt(((m - mu) ** 2).sum(axis=1).mean())
    if not sc > 0:
        raise ConvergenceError("ellipsoid fit: all readings are identical")
    x, y, z = ((m - mu) / sc).T
    D = np.column_stack([x * x, y * y, z * z, 2 * y * z, 2 * x * z, 2 * x * y, 2 * x, 2 * y, 2 * z, np.ones_like(x)])
    S = D.T @ D
    cond = float(np.linalg.cond(S))
    S11, S12, S22 = S[:6, :6], S[:6, 6:], S[6:, 6:]
    k = 4.0
    C1 = np.array(
        [
            [-1, k / 2 - 1, k / 2 - 1, 0, 0, 0],
            [k / 2 - 1, -1, k / 2 - 1, 0, 0, 0],
            [k / 2 - 1, k / 2 - 1, -1, 0, 0, 0],
            [0, 0, 0, -k, 0, 0],
            [0, 0, 0, 0, -k, 0],
            [0, 0, 0, 0, 0, -k],
        ]
    )
    try:
        T = np.linalg.solve(S22, S12.T)
        Mred = S11 - S12 @ T
        w, V = linalg.eig(np.linalg.solve(C1, Mred))
    except np.linalg.LinAlgError as err:
        raise ConvergenceError(f"ellipsoid fit: singular scatter matrix ({err})") from err
    w = np.real(w)
    V = np.real(V)
    pos = np.flatnonzero(w > 0)
    if pos.size == 0:
        raise ConvergenceError("ellipsoid fit: no ellipsoid solution (no positive eigenvalue)")
    v1 = V[:, pos[np.argmax(w[pos])]]
    v2 = -T @ v1
    a, b, c, f, g, h = v1
    p, q, r = v2[:3]
    d = v2[3]
    M = np.array([[a, h, g], [h, b, f], [g, f, c]])
    u = np.array([p, q, r])
    try:
        ctr = -np.linalg.solve(M, u)
    except np.linalg.LinAlgError as err:
        raise ConvergenceError("ellipsoid fit: degenerate quadric") from err
    s = ctr @ M @ ctr - d
    A = M / s
    ev = np.linalg.eigvalsh(A)
    if ev.min() <= 0:
        raise ConvergenceError("ellipsoid fit: the quadric is not an ellipsoid")
    return ctr * sc + mu, A / sc**2, cond


def circle_fit(p):
    """Algebraic (Kåsa 1976) least-squares circle fit.

    Parameters
    ----------
    p : (N, 2) float

    Returns
    -------
    centre : (2,), radius : float
    """
    p = np.asarray(p, dtype=float)
    mu = p.mean(axis=0)
    q = p - mu
    A = np.column_stack([2 * q, np.ones(len(q))])
    rhs = (q**2).sum(axis=1)
    sol, *_ = np.linalg.lstsq(A, rhs, rcond=None)
    c = sol[:2]
    r = float(np.sqrt(max(sol[2] + c @ c, 0.0)))
    return c + mu, r


def _fibonacci_sphere(n):
    i = np.arange(n) + 0.5
    phi = np.arccos(1 - 2 * i / n)
    th = np.pi * (1 + 5**0.5) * i
    return np.column_stack([np.cos(th) * np.sin(phi), np.sin(th) * np.sin(phi), np.cos(phi)])


def rotation_coverage(directions, *, n_cells=100):
    """How well unit field directions (N, 3) cover the sphere.

    Returns dict: ``sphere_fraction`` (share of ``n_cells`` equal-area cells
    holding a direction) and ``spread`` (eigenvalues of the directions'
    second-moment matrix, descending, summing to 1: 1/3 each for full
    coverage, one near 0 for rotations about one axis only).
    """
    d = np.asarray(directions, float)
    d = d / np.linalg.norm(d, axis=1, keepdims=True)
    cells = _fibonacci_sphere(n_cells)
    hit = np.unique(np.argmax(d @ cells.T, axis=1)) if len(d) <= 200000 else np.unique(
        np.argmax(d[:: len(d) // 200000 + 1] @ cells.T, axis=1)
    )
    ev = np.sort(np.linalg.eigvalsh(d.T @ d / len(d)))[::-1]
    return {"sphere_fraction": float(hit.size / n_cells), "spread": [float(v) for v in ev]}


def _offset_from_total(h2, z, total_ut, up_sign):
    """Offset ``o`` along the vertical such that the median of
    ``sqrt(h2 + (z - o)²)`` equals ``total_ut``, on the branch where the
    corrected vertical ``z - o`` has the sign ``up_sign``; None when no
    offset can reach it (the horizontal field alone is already larger).

    h2 : (N,) squared in-plane field after the in-plane offset, µT²;
    z : (N,) reading along the up direction, µT.
    """
    from scipy.optimize import brentq

    zc = float(np.median(z))
    dz = z - zc

    def f(v):  # v = up_sign * (median vertical after correction) >= 0
        return float(np.median(np.sqrt(h2 + (dz + up_sign * v) ** 2))) - total_ut

    hi = total_ut + float(np.max(np.abs(dz))) + 1.0
    if f(0.0) > 0 or f(hi) < 0:
        return None
    v = brentq(f, 0.0, hi, xtol=1e-6)
    return zc - up_sign * v


def turning_stretch(up_device, *, tilt_deg=20.0, min_samples=50, max_gap=150, pad=50, max_share=0.6):
    """The stretch of a log where the device turned through many
    orientations (a calibration motion such as a figure-of-eight), when the
    rest of the log is carried level.

    Samples whose up direction departs from the log's median up direction
    by more than ``tilt_deg`` are "turning"; runs of them less than
    ``max_gap`` samples apart are joined, and the run holding the most of
    them, padded by ``pad`` samples on each side, is the stretch. A field
    measured at one spot while the device turns lies on one ellipsoid; the
    same fit over a whole walk mixes the field of every place walked.

    Parameters
    ----------
    up_device : (N, 3) float, up direction in the device frame per sample

    Returns
    -------
    (start, stop) sample indices, or None when there is no such stretch
    (too few turning samples, or turning over more than ``max_share`` of
    the log: then the whole log is one tumbling data set)
    """
    u = np.asarray(up_device, dtype=float).reshape(-1, 3)
    n = u.shape[0]
    u = u / np.linalg.norm(u, axis=1, keepdims=True)
    med = np.median(u, axis=0)
    if not np.linalg.norm(med) > 0:
        return None
    med /= np.linalg.norm(med)
    turning = np.degrees(np.arccos(np.clip(u @ med, -1, 1))) > tilt_deg
    idx = np.flatnonzero(turning)
    if idx.size < min_samples:
        return None
    runs = np.split(idx, np.flatnonzero(np.diff(idx) > max_gap) + 1)
    best = max(runs, key=len)
    if best.size < min_samples:
        return None
    start, stop = max(0, int(best[0]) - pad), min(n, int(best[-1]) + 1 + pad)
    if stop - start > max_share * n:
        return None
    return start, stop


#: largest ratio of the fitted ellipsoid's longest to shortest axis taken
#: as soft iron (real devices: a few per cent; common practice, no source)
_MAX_AXIS_RATIO = 2.0


#: shortest arc of the circle fallback (fraction of 36 bins of 10°) that
#: still gives an offset; below it the fit refuses (common practice, no source)
_MIN_ARC_FRACTION = 1.0 / 6.0


def fit_calibration(mag_ut, *, field_ut=None, source="mag", planar_ratio=0.12, min_samples=50, up_device=None,
                    field_up_ut=None, planar_tilt_deg=20.0, field_total_ut=None, field_up_sign=-1.0,
                    use_turning_stretch=True):
    """Fit hard- and soft-iron calibration to magnetometer readings.

    Parameters
    ----------
    mag_ut : (N, 3) float, µT, device frame; rows with NaN are ignored
    field_ut : float, optional
        True field magnitude at the site (sets the scale of the matrix).
    source : {"mag", "mag_raw"}
        Which log columns the readings came from (stored in the result).
    planar_ratio : float
        If the smallest standard deviation of the readings along a principal
        axis is below this share of the largest, the data are called planar
        and the circle fallback is used.
    min_samples : int
    up_device : (N, 3) float, optional
        Up direction in the device frame for each reading (e.g. the
        low-passed accelerometer). When given, planarity is judged from it:
        if 95 % of the up directions lie within ``planar_tilt_deg`` of their
        mean, the device only turned about the vertical, whatever the
        field's spatial variation did to the readings, and the plane normal
        is the mean up direction.
    field_up_ut : float, optional
        Expected vertical (up) component of the true field (µT, negative in
        the northern hemisphere), e.g. from a geomagnetic model. With planar
        data it fixes the offset along the normal, which the readings alone
        cannot.
    field_total_ut : float, optional
        Expected magnitude of the true field (µT), e.g. the total of
        :func:`fingerprint.geomag.background_field` at the site. With planar
        data and no ``field_up_ut``, the offset along the vertical is set so
        that the median corrected |B| equals it (a robot turning only about
        z cannot show that offset otherwise). ``field_up_ut`` wins when both
        are given.
    field_up_sign : {-1, +1}
        Sign of the true vertical field used with ``field_total_ut``: -1
        (default) where the field dips downwards (northern magnetic
        hemisphere), +1 south of the magnetic equator.
    use_turning_stretch : bool
        With ``up_device``: when the device turned through many
        orientations in one stretch of an otherwise level log (a
        calibration motion at the start of a survey walk), fit on that
        stretch only (:func:`turning_stretch`; reported as ``stretch``).

    Returns
    -------
    (Calibration, report dict)
        The report holds ``method`` ("ellipsoid" or "circle-fallback"),
        ``message``, ``coverage``, ``condition_number``, ``residual_ut``,
        ``b_spread_before_ut`` / ``b_spread_after_ut`` (standard deviation of
        |B|), ``b_mean_before_ut`` / ``b_mean_after_ut``, ``n_samples``.
    """
    m = np.asarray(mag_ut, dtype=float).reshape(-1, 3)
    keep = np.isfinite(m).all(axis=1)
    m = m[keep]
    up_n = None
    stretch = None
    if up_device is not None:
        u = np.asarray(up_device, dtype=float).reshape(-1, 3)[keep]
        u = u / np.linalg.norm(u, axis=1, keepdims=True)
        if use_turning_stretch:
            stretch = turning_stretch(u, tilt_deg=planar_tilt_deg, min_samples=min_samples)
            if stretch is not None:
                n_all = m.shape[0]
                m, u = m[stretch[0] : stretch[1]], u[stretch[0] : stretch[1]]
        mean_u = u.mean(axis=0)
        mean_u /= np.linalg.norm(mean_u)
        tilt = np.degrees(np.arccos(np.clip(u @ mean_u, -1, 1)))
        if np.percentile(tilt, 95) < planar_tilt_deg:
            up_n = mean_u
    if m.shape[0] < min_samples:
        raise DataError(f"calibration needs at least {min_samples} magnetometer samples, got {m.shape[0]}")
    mu = m.mean(axis=0)
    cov = np.cov((m - mu).T)
    evals, evecs = np.linalg.eigh(cov)  # ascending
    sd = np.sqrt(np.clip(evals, 0, None))
    ratio = float(sd[0] / sd[2]) if sd[2] > 0 else 0.0
    before = np.linalg.norm(m, axis=1)
    report = {"n_samples": int(m.shape[0]), "principal_sd_ut": sd[::-1].tolist(), "planarity": ratio}
    method = "ellipsoid"
    message = ""
    if stretch is not None:
        report["stretch"] = {"start": int(stretch[0]), "stop": int(stretch[1]), "of": int(n_all)}
        message = (f"fitted on samples {stretch[0]}-{stretch[1]} of {n_all}, where the device turned through "
                   "many orientations (a calibration motion); ")
    if up_n is not None:
        method = "circle-fallback"
        message += (
            f"the device turned about the vertical only (95 % of up directions within {planar_tilt_deg:g}° "
            "of their mean); "
        )
    elif ratio >= planar_ratio:
        try:
            ctr, A, cond = ellipsoid_fit(m)
            report["condition_number"] = cond
            ev = np.linalg.eigvalsh((A + A.T) / 2)
            axis_ratio = float(np.sqrt(ev[-1] / ev[0])) if ev[0] > 0 else np.inf
            if not axis_ratio <= _MAX_AXIS_RATIO:
                # a phone's or robot's soft iron stretches the sphere by a few
                # per cent; a strongly elongated fit is fitted noise on a patch
                raise DataError(
                    f"the ellipsoid fitted to the magnetometer readings is implausible (axis ratio "
                    f"{axis_ratio:.1f}): the device did not turn enough to calibrate (turn it through at least "
                    "one full circle, ideally in several orientations)"
                )
            Wsym = linalg.sqrtm(A).real
            Wsym = (Wsym + Wsym.T) / 2
            if field_ut is not None:
                W = Wsym * float(field_ut)
            else:
                W = Wsym / np.cbrt(np.linalg.det(Wsym))
            offset = ctr
            message += "ellipsoid fit (Li & Griffiths 2004): hard- and soft-iron identified"
        except ConvergenceError as err:
            method = "circle-fallback"
            message += f"ellipsoid fit failed ({err}); "
    else:
        method = "circle-fallback"
        message += (
            f"readings span rotations about one axis only (planarity {ratio:.3f} < {planar_ratio}); "
        )
    if method == "circle-fallback":
        n = evecs[:, 0] if up_n is None else up_n
        if up_n is not None:
            e1 = np.cross(n, [1.0, 0, 0] if abs(n[0]) < 0.9 else [0, 1.0, 0])
            e1 /= np.linalg.norm(e1)
            e2 = np.cross(n, e1)
        else:
            e1, e2 = evecs[:, 2], evecs[:, 1]
        q = (m - mu) @ np.column_stack([e1, e2])
        c2, r = circle_fit(q)
        offset = mu + c2[0] * e1 + c2[1] * e2
        offset = offset - n * (n @ offset)  # not identifiable along the normal
        vertical = "none"
        if field_up_ut is not None and up_n is not None:
            offset = offset + n * (float(np.mean(m @ n)) - float(field_up_ut))
            vertical = "field_up"
        elif field_total_ut is not None and up_n is not None:
            if not (np.isfinite(field_total_ut) and field_total_ut > 0):
                raise DataError(f"expected total field must be a positive number of µT, got {field_total_ut!r}")
            if field_up_sign not in (-1, 1, -1.0, 1.0):
                raise DataError(f"field_up_sign must be -1 or +1, got {field_up_sign!r}")
            mc = m - offset
            z = mc @ n
            h2 = np.einsum("ij,ij->i", mc, mc) - z * z
            o_n = _offset_from_total(h2, z, float(field_total_ut), float(field_up_sign))
            if o_n is None:
                vertical = "total-unreachable"
            else:
                offset = offset + n * o_n
                vertical = "total"
        W = np.eye(3)
        report["condition_number"] = float(np.linalg.cond(q.T @ q))
        report["circle_radius_ut"] = r
        ang = np.arctan2(q[:, 1] - c2[1], q[:, 0] - c2[0])
        arc = np.unique(np.floor((ang + np.pi) / (2 * np.pi) * 36).astype(int) % 36).size / 36
        report["arc_fraction"] = float(arc)
        report["plane_normal"] = n.tolist()
        message += "circle fit (Kåsa 1976) in the plane of the readings: offset within the plane only; "
        if vertical == "field_up":
            message += "offset along the normal set from the expected vertical field; soft-iron left at identity"
        elif vertical == "total":
            message += (f"offset along the vertical set so that the median |B| matches the expected total field "
                        f"{float(field_total_ut):.1f} µT (vertical field taken as "
                        f"{'downwards' if field_up_sign < 0 else 'upwards'}); soft-iron left at identity")
        elif vertical == "total-unreachable":
            message += (f"the expected total field {float(field_total_ut):.1f} µT is below the median "
                        "horizontal field, so it cannot fix the vertical offset: left at 0; "
                        "soft-iron left at identity")
        else:
            message += "offset along the normal left at 0 and soft-iron left at identity (not identifiable)"
        report["vertical_offset_from"] = vertical
        if report["arc_fraction"] < _MIN_ARC_FRACTION or not np.isfinite(report["condition_number"]):
            # a circle through a short arc: its centre (the offset) is not determined
            raise DataError(
                f"the magnetometer readings cover only {report['arc_fraction']:.0%} of a circle: the device did "
                "not turn enough to calibrate (turn it through at least one full circle, ideally in several "
                "orientations)"
            )
        if report["arc_fraction"] < 0.5:
            message += f"; the readings cover only {report['arc_fraction']:.0%} of the circle, so the offset is weakly determined"

    cal = Calibration(offset, W, source=source)
    after_v = cal.apply(m)
    after = np.linalg.norm(after_v, axis=1)
    if method == "ellipsoid":
        report["residual_ut"] = float(np.sqrt(np.mean((after - after.mean()) ** 2)))
    else:
        rad = np.linalg.norm(((m - offset) @ np.column_stack([e1, e2])), axis=1)
        report["residual_ut"] = float(np.std(rad))
    report.update(
        method=method,
        message=message,
        coverage=rotation_coverage(m - offset),
        b_mean_before_ut=float(before.mean()),
        b_spread_before_ut=float(before.std()),
        b_mean_after_ut=float(after.mean()),
        b_spread_after_ut=float(after.std()),
        offset_ut=offset.tolist(),
        source=source,
    )
    report = _jsonable(report)
    return Calibration(offset, W, source=source, meta=report), report
