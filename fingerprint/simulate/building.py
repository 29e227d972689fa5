"""A building's steel as magnetic dipoles.

The steel description (``steel.json``, see ``demo_building/README.md``)
lists per floor:

- ``chains``: vertical members (columns, rack uprights) at plan positions
  ``xy``, each cut into dipoles every ``spacing_m`` between heights
  ``z_m = [z0, z1]``;
- ``meshes``: reinforcement mesh in a slab, a square grid of weak dipoles at
  height ``z_m`` over ``bounds = [xmin, ymin, xmax, ymax]``;
- ``sources``: strong single sources (lift machinery, a transformer) with a
  fixed moment ``moment_am2`` (plan frame x, y, up) at ``xyz``.

Every chain or mesh dipole carries an induced moment that follows the
background field, ``m = chi_volume_m3 * B_background / mu0`` (apparent
susceptibility times the steel volume the dipole stands for), plus a random
remanent part: one moment shared by all dipoles of a member, normal with
``remanent_element_rms_am2`` per component (a column is magnetised as a
whole when it is rolled and handled, so its field falls off like that of a
line of dipoles, ~1/r²), and a per-dipole part, normal with
``remanent_rms_am2`` per component. Both are drawn from a
generator seeded by the description (``remanence_seed``), so a building's
magnetisation is fixed whatever seed the walks use.

Where the numbers come from: near structural steel indoor anomalies reach
tens of µT and fade within a few metres (from memory: published indoor
surveys report |B| between about 20 and 90 µT against a 50 µT background).
The apparent susceptibilities and remanent moments of the demo are tuned so
that the simulated field at sensor height shows anomalies of about 5-30 µT
with length scales of 1-4 m (``tests/test_simulate.py`` checks the range).
"""

from __future__ import annotations

import json
import math
import zlib
from pathlib import Path

import numpy as np

from ..errors import ConfigError, FormatError

__all__ = ["MU0", "load_steel", "steel_dipoles", "floor_seed"]

#: vacuum permeability, T·m/A
MU0 = 4e-7 * math.pi


def load_steel(path):
    """Read and check a steel description (JSON, see module docstring).

    Returns
    -------
    dict with ``floors: {floor: {...}}`` and ``remanence_seed: int``
    """
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as err:
        raise FormatError(f"not valid JSON: {err.msg}", path=path, line=err.lineno, column=err.colno) from err
    if not isinstance(doc, dict) or not isinstance(doc.get("floors"), dict):
        raise FormatError("a steel description needs an object 'floors' {floor: {...}}", path=path)
    seed = doc.get("remanence_seed", 0)
    if not isinstance(seed, int) or seed < 0:
        raise FormatError(f"'remanence_seed' must be a non-negative integer, got {seed!r}", path=path)
    for floor, spec in doc["floors"].items():
        _check_floor(spec, f"floor {floor!r}", path)
    return doc


def _need(obj, key, where, path, kind):
    if key not in obj:
        raise FormatError(f"{where}: missing {key!r}", path=path)
    val = obj[key]
    try:
        arr = np.asarray(val, dtype=float)
    except (TypeError, ValueError) as err:
        raise FormatError(f"{where}: {key!r} must be {kind}, got {val!r}", path=path) from err
    if not np.all(np.isfinite(arr)):
        raise FormatError(f"{where}: {key!r} must be finite, got {val!r}", path=path)
    return arr


def _check_floor(spec, where, path):
    if not isinstance(spec, dict):
        raise FormatError(f"{where}: expected an object, got {type(spec).__name__}", path=path)
    for i, ch in enumerate(spec.get("chains", [])):
        w = f"{where} chain {i}"
        xy = _need(ch, "xy", w, path, "a list of [x, y]")
        if xy.size and (xy.ndim != 2 or xy.shape[1] != 2):
            raise FormatError(f"{w}: 'xy' must be a list of [x, y] pairs, got shape {xy.shape}", path=path)
        z = _need(ch, "z_m", w, path, "[z0, z1]")
        if z.shape != (2,) or not z[1] > z[0]:
            raise FormatError(f"{w}: 'z_m' must be [z0, z1] with z1 > z0, got {ch['z_m']!r}", path=path)
        if not _need(ch, "spacing_m", w, path, "a number") > 0:
            raise FormatError(f"{w}: 'spacing_m' must be > 0, got {ch['spacing_m']!r}", path=path)
        _need(ch, "chi_volume_m3", w, path, "a number")
        if _need(ch, "remanent_rms_am2", w, path, "a number") < 0:
            raise FormatError(f"{w}: 'remanent_rms_am2' must be >= 0", path=path)
        if "remanent_element_rms_am2" in ch and _need(ch, "remanent_element_rms_am2", w, path, "a number") < 0:
            raise FormatError(f"{w}: 'remanent_element_rms_am2' must be >= 0", path=path)
    for i, me in enumerate(spec.get("meshes", [])):
        w = f"{where} mesh {i}"
        b = _need(me, "bounds", w, path, "[xmin, ymin, xmax, ymax]")
        if b.shape != (4,) or not (b[2] > b[0] and b[3] > b[1]):
            raise FormatError(f"{w}: 'bounds' must be [xmin, ymin, xmax, ymax], got {me['bounds']!r}", path=path)
        _need(me, "z_m", w, path, "a number")
        if not _need(me, "spacing_m", w, path, "a number") > 0:
            raise FormatError(f"{w}: 'spacing_m' must be > 0", path=path)
        _need(me, "chi_volume_m3", w, path, "a number")
        _need(me, "remanent_rms_am2", w, path, "a number")
    for i, so in enumerate(spec.get("sources", [])):
        w = f"{where} source {i}"
        if _need(so, "xyz", w, path, "[x, y, z]").shape != (3,):
            raise FormatError(f"{w}: 'xyz' must be [x, y, z]", path=path)
        if _need(so, "moment_am2", w, path, "[mx, my, mz]").shape != (3,):
            raise FormatError(f"{w}: 'moment_am2' must be [mx, my, mz]", path=path)


def floor_seed(doc, floor):
    """The remanence generator of one floor: seeded by the description's
    ``remanence_seed`` and the floor label (stable across runs)."""
    return np.random.default_rng(np.random.SeedSequence([int(doc.get("remanence_seed", 0)), zlib.crc32(floor.encode())]))


def steel_dipoles(spec, background_plan_ut, *, rng):
    """Dipoles of one floor's steel.

    Parameters
    ----------
    spec : dict, one entry of ``load_steel(...)["floors"]``
    background_plan_ut : (3,) float, µT, background field in the plan frame
        (b_x, b_y, b_up); the induced moments follow it
    rng : numpy.random.Generator, for the remanent parts

    Returns
    -------
    positions_m : (M, 3) float, plan frame (x, y, height above the floor)
    moments_am2 : (M, 3) float, A·m²
    kinds : (M,) str, the ``kind`` of the element each dipole belongs to
    """
    h_am = np.asarray(background_plan_ut, dtype=float) * 1e-6 / MU0  # H = B / mu0, A/m
    pos, mom, kinds = [], [], []

    def add(p, chi_v, rem_rms, kind, *, member=None, member_rms=0.0):
        induced = chi_v * h_am[None, :] * np.ones((p.shape[0], 1))
        remanent = rng.normal(0.0, rem_rms, size=p.shape) if rem_rms > 0 else np.zeros_like(p)
        if member is not None and member_rms > 0:
            shared = rng.normal(0.0, member_rms, size=(int(member.max()) + 1, 3))
            remanent = remanent + shared[member]
        pos.append(p)
        mom.append(induced + remanent)
        kinds.extend([kind] * p.shape[0])

    for ch in spec.get("chains", []):
        xy = np.asarray(ch["xy"], dtype=float).reshape(-1, 2)
        z0, z1 = (float(v) for v in ch["z_m"])
        n = max(1, int(round((z1 - z0) / float(ch["spacing_m"]))))
        zs = z0 + (np.arange(n) + 0.5) * (z1 - z0) / n  # segment centres
        p = np.column_stack([np.repeat(xy, n, axis=0), np.tile(zs, xy.shape[0])])
        add(p, float(ch["chi_volume_m3"]), float(ch["remanent_rms_am2"]), ch.get("kind", "chain"),
            member=np.repeat(np.arange(xy.shape[0]), n), member_rms=float(ch.get("remanent_element_rms_am2", 0.0)))
    for me in spec.get("meshes", []):
        x0, y0, x1, y1 = (float(v) for v in me["bounds"])
        s = float(me["spacing_m"])
        xs = np.arange(x0 + s / 2, x1, s)
        ys = np.arange(y0 + s / 2, y1, s)
        gx, gy = np.meshgrid(xs, ys)
        p = np.column_stack([gx.ravel(), gy.ravel(), np.full(gx.size, float(me["z_m"]))])
        add(p, float(me["chi_volume_m3"]), float(me["remanent_rms_am2"]), me.get("kind", "mesh"))
    for so in spec.get("sources", []):
        pos.append(np.asarray(so["xyz"], dtype=float).reshape(1, 3))
        mom.append(np.asarray(so["moment_am2"], dtype=float).reshape(1, 3))
        kinds.append(so.get("kind", "source"))
    if not pos:
        raise ConfigError("the floor's steel description has no chains, meshes or sources")
    return np.vstack(pos), np.vstack(mom), np.array(kinds)
