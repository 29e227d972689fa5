"""The picture of a simulated floor: plan, true field magnitude as a heat
map over the free space, and the simulated walks drawn over it."""

from __future__ import annotations

import numpy as np

__all__ = ["plot_simulated_floor"]


def _patches(geom, **style):
    """matplotlib patches of (Multi)Polygons, holes kept open."""
    import shapely
    from matplotlib.patches import PathPatch
    from matplotlib.path import Path
    from shapely.geometry.polygon import orient

    out = []
    for poly in shapely.get_parts(geom):
        if poly.geom_type != "Polygon" or poly.is_empty:
            continue
        poly = orient(poly, 1.0)  # exterior counter-clockwise, holes clockwise
        rings = [np.asarray(poly.exterior.coords)] + [np.asarray(h.coords) for h in poly.interiors]
        path = Path.make_compound_path(*[Path(r, closed=True) for r in rings])
        out.append(PathPatch(path, **style))
    return out


def _rings(geom):
    import shapely

    for poly in shapely.get_parts(geom):
        if poly.geom_type != "Polygon":
            continue
        yield np.asarray(poly.exterior.coords)
        for hole in poly.interiors:
            yield np.asarray(hole.coords)


def plot_simulated_floor(path, *, plan, field_model, walks, height_m=1.1, resolution_m=0.25, title=None):
    """Write a PNG of one simulated floor.

    Parameters
    ----------
    path : output file (.png), written atomically
    plan : mapping.floorplan.FloorPlan
    field_model : fingerprint.simulate.FieldModel
    walks : list of (name, session, platform, xy (N, 2)) tuples
    height_m : float, height of the heat map above the floor
    resolution_m : float, heat-map cell size
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D

    from fingerprint._atomic import atomic_write

    xmin, ymin, xmax, ymax = plan.bounds
    xs = np.arange(xmin, xmax + resolution_m / 2, resolution_m)
    ys = np.arange(ymin, ymax + resolution_m / 2, resolution_m)
    gx, gy = np.meshgrid(xs, ys)
    pts = np.column_stack([gx.ravel(), gy.ravel()])
    inside = plan.contains(pts).reshape(gx.shape)
    mag = np.full(gx.shape, np.nan)
    b = field_model.field(np.column_stack([pts[inside.ravel()], np.full(int(inside.sum()), height_m)]))
    mag[inside] = np.linalg.norm(b, axis=1)
    # colour range from where the walkers' sensors go (the field right at a
    # column's face is far stronger and would wash the picture out)
    on_walks = [xy for *_, xy in walks if len(xy)]
    if on_walks:
        pts_w = np.vstack(on_walks)[:: 10]
        bw = field_model.field(np.column_stack([pts_w, np.full(len(pts_w), height_m)]))
        lo, hi = np.percentile(np.linalg.norm(bw, axis=1), [1, 99])
    else:
        lo, hi = np.nanpercentile(mag, [1, 99]) if np.isfinite(mag).any() else (0, 1)

    width = 11.0
    aspect = (ymax - ymin) / max(xmax - xmin, 1e-9)
    fig, ax = plt.subplots(figsize=(width, max(4.0, 0.85 * width * aspect + 1.6)), dpi=120)
    ax.set_facecolor("#d9d9d9")
    im = ax.pcolormesh(gx, gy, np.ma.masked_invalid(mag), cmap="viridis", vmin=lo, vmax=hi, shading="nearest", zorder=1)
    for ring in _rings(plan.walkable):
        ax.plot(ring[:, 0], ring[:, 1], color="black", lw=1.2)
    for patch in _patches(plan.obstacles, facecolor="#8c8c8c", edgecolor="#404040", lw=0.5, zorder=0.5):
        ax.add_patch(patch)
    styles = {
        ("survey", "handheld"): dict(color="white", lw=0.8, ls="-", alpha=0.9),
        ("survey", "robot"): dict(color="#ffd92f", lw=0.8, ls="-", alpha=0.9),
        ("test", "handheld"): dict(color="#e41a1c", lw=1.2, ls="--", alpha=0.95),
        ("test", "robot"): dict(color="#ff7f00", lw=1.2, ls=":", alpha=0.95),
    }
    used = []
    for name, session, platform, xy in walks:
        key = ("survey" if session.startswith("survey") else "test", platform)
        ax.plot(xy[:, 0], xy[:, 1], **styles[key])
        if key not in used:
            used.append(key)
    handles = [Line2D([], [], **styles[k]) for k in used]
    labels = [f"{s} walks ({p})" for s, p in used]
    if handles:
        ax.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, -0.09), ncol=len(handles), fontsize=9,
                  frameon=True, facecolor="#bdbdbd")
    cb = fig.colorbar(im, ax=ax, fraction=0.035, pad=0.02, extend="both")
    cb.set_label(f"|B| at {height_m:.1f} m (µT)")
    ax.set_aspect("equal")
    ax.set_xlim(xmin - 1, xmax + 1)
    ax.set_ylim(ymin - 1, ymax + 1)
    ax.set_xlabel("plan x (m)")
    ax.set_ylabel("plan y (m)")
    ax.set_title(title or f"floor {plan.floor}: simulated field magnitude and walks")
    fig.tight_layout()
    with atomic_write(path, "wb") as fh:
        fig.savefig(fh, format="png")
    plt.close(fig)
    return path
