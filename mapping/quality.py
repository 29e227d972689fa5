"""Map quality: coverage, uncertainty and localisability, on the raster and
along the floor graph, with the graph stretches that need another survey
walk; a JSON-able summary and a PNG.

Definitions (per graph edge, evaluated at both ends and the middle):

- coverage_m: distance to the nearest survey sample (from the map raster);
- latent sd: map sd without the between-walk term (``var_ut2`` minus
  ``meta.model.between_walk_sd_ut²``), the part another survey walk can
  reduce; the largest of the three components;
- gradient_ut_per_m: Frobenius norm of the spatial gradient of the mapped
  field (3 components x 2 directions, finite differences on the raster);
- localisability: gradient over measurement sd (``sqrt(var + noise²)``,
  mean over components), i.e. how many sd the field changes per metre
  walked: near 0 the field cannot tell places apart.

An edge needs another walk when its coverage exceeds ``coverage_limit_m``
or its latent sd exceeds ``sd_limit_ut``; connected flagged edges are merged
into stretches (networkx connected components) reported with their length
and end points (nodes of degree 1 inside the stretch, or its two farthest
nodes when it has none).
"""

from __future__ import annotations

import numpy as np

__all__ = ["map_quality", "edge_quality", "quality_image", "field_image"]


def _between_var(fmap):
    sd = (fmap.meta.get("model") or {}).get("between_walk_sd_ut") or [0.0, 0.0, 0.0]
    return np.asarray(sd, float) ** 2


def _noise_var(fmap):
    sd = fmap.meta.get("noise_sd_ut") or [0.0, 0.0, 0.0]
    return np.asarray(sd, float) ** 2


def _gradient_norm(fmap):
    """(ny, nx) µT/m, Frobenius norm of the mean field's gradient."""
    res = fmap.resolution_m
    total = np.zeros(fmap.shape)
    for c in range(3):
        gy, gx = np.gradient(fmap.mean_ut[..., c], res)
        total += gx**2 + gy**2
    return np.sqrt(total)


def edge_quality(fmap):
    """Per-edge quality arrays (see module docstring).

    Returns
    -------
    dict of (E,) float arrays: coverage_m, latent_sd_ut, sd_ut, gradient_ut_per_m,
    localisability_per_m
    """
    g = fmap.graph
    a = g.nodes_xy[g.edges[:, 0]]
    b = g.nodes_xy[g.edges[:, 1]]
    pts = np.stack([a, 0.5 * (a + b), b], axis=1)  # (E, 3, 2)
    mean, var, cov = fmap.lookup(pts)
    bw = _between_var(fmap)
    latent = np.sqrt(np.maximum(var - bw, 0.0)).max(axis=-1)
    sd = np.sqrt(var).max(axis=-1)
    meas_sd = np.sqrt(np.mean(var + _noise_var(fmap), axis=-1))
    grad = _gradient_norm(fmap)
    gradient = fmap._mix(grad, *fmap._bilinear(pts)[:6])
    return {
        "coverage_m": cov.max(axis=1),
        "latent_sd_ut": latent.max(axis=1),
        "sd_ut": sd.max(axis=1),
        "gradient_ut_per_m": gradient.mean(axis=1),
        "localisability_per_m": (gradient / np.maximum(meas_sd, 1e-9)).mean(axis=1),
    }


def _stretches(fmap, flagged, eq):
    import networkx as nx

    g = fmap.graph
    sub = nx.Graph()
    for e in np.flatnonzero(flagged):
        u, v = (int(x) for x in g.edges[e])
        sub.add_edge(u, v, edge=int(e))
    out = []
    for comp in nx.connected_components(sub):
        h = sub.subgraph(comp)
        edges = np.array([d["edge"] for _, _, d in h.edges(data=True)], dtype=np.int64)
        ends = [n for n in h.nodes if h.degree(n) == 1]
        nodes = np.array(sorted(comp))
        if len(ends) >= 2:
            ends_xy = g.nodes_xy[ends]
            d = np.linalg.norm(ends_xy[:, None] - ends_xy[None], axis=-1)
            i, j = np.unravel_index(np.argmax(d), d.shape)
            pair = [ends[i], ends[j]]
        else:
            xy = g.nodes_xy[nodes]
            d = np.linalg.norm(xy[:, None] - xy[None], axis=-1) if nodes.size <= 2000 else None
            if d is None:
                pair = [int(nodes[0]), int(nodes[-1])]
            else:
                i, j = np.unravel_index(np.argmax(d), d.shape)
                pair = [int(nodes[i]), int(nodes[j])]
        reasons = []
        if np.any(eq["coverage_m"][edges] > eq["_cov_limit"]):
            reasons.append("coverage")
        if np.any(eq["latent_sd_ut"][edges] > eq["_sd_limit"]):
            reasons.append("uncertainty")
        out.append(
            {
                "length_m": round(float(g.length_m[edges].sum()), 3),
                "n_edges": int(edges.size),
                "from_xy": [round(float(v), 3) for v in g.nodes_xy[pair[0]]],
                "to_xy": [round(float(v), 3) for v in g.nodes_xy[pair[1]]],
                "max_coverage_m": _num(eq["coverage_m"][edges].max()),
                "max_latent_sd_ut": _num(eq["latent_sd_ut"][edges].max()),
                "reasons": reasons,
                "edges": edges.tolist(),
            }
        )
    out.sort(key=lambda s: -s["length_m"])
    return out


def _num(v, nd=4):
    v = float(v)
    return round(v, nd) if np.isfinite(v) else None


def map_quality(fmap, *, coverage_limit_m=2.0, sd_limit_ut=None, min_stretch_m=1.0):
    """Quality summary of a field map.

    Parameters
    ----------
    fmap : FieldMap
    coverage_limit_m : float, edges farther than this from any survey
        sample need another walk
    sd_limit_ut : float or None, edges whose latent map sd exceeds this need
        another walk; None = half the model's prior field sd
        (``meta.model.hyperparameters.magnitude_ut``: the map knows less than
        half of the field's variation there), 2 µT when the map has none
    min_stretch_m : float, shorter flagged stretches are not listed

    Returns
    -------
    dict (JSON-able): raster, graph and stretches sections
    """
    if sd_limit_ut is None:
        mag = ((fmap.meta.get("model") or {}).get("hyperparameters") or {}).get("magnitude_ut")
        sd_limit_ut = 0.5 * float(mag) if mag else 2.0
    free = fmap.free
    cov = fmap.coverage_m[free]
    bw = _between_var(fmap)
    latent = np.sqrt(np.maximum(fmap.var_ut2[free] - bw, 0.0))
    grad = _gradient_norm(fmap)[free]
    eq = edge_quality(fmap)
    flagged = (eq["coverage_m"] > coverage_limit_m) | (eq["latent_sd_ut"] > sd_limit_ut)
    eq["_cov_limit"] = coverage_limit_m
    eq["_sd_limit"] = sd_limit_ut
    stretches = [s for s in _stretches(fmap, flagged, eq) if s["length_m"] >= min_stretch_m]
    length = fmap.graph.length_m
    total = float(length.sum())
    fin = np.isfinite(cov)
    return {
        "floor": fmap.floor,
        "limits": {"coverage_m": coverage_limit_m, "latent_sd_ut": round(float(sd_limit_ut), 4), "min_stretch_m": min_stretch_m},
        "raster": {
            "free_cells": int(free.sum()),
            "free_area_m2": round(float(free.sum()) * fmap.resolution_m**2, 2),
            "covered_within_1m": _num(np.mean(cov[fin] <= 1.0)) if fin.any() else 0.0,
            "covered_within_2m": _num(np.mean(cov[fin] <= 2.0)) if fin.any() else 0.0,
            "coverage_median_m": _num(np.median(cov)) if cov.size else None,
            "coverage_p90_m": _num(np.quantile(cov, 0.9)) if cov.size else None,
            "latent_sd_median_ut": [_num(v) for v in np.median(latent, axis=0)] if cov.size else None,
            "sd_median_ut": [_num(v) for v in np.median(np.sqrt(fmap.var_ut2[free]), axis=0)] if cov.size else None,
            "gradient_median_ut_per_m": _num(np.median(grad)) if cov.size else None,
        },
        "graph": {
            "edges": fmap.graph.n_edges,
            "length_m": round(total, 3),
            "length_within_coverage_m": round(float(length[eq["coverage_m"] <= coverage_limit_m].sum()), 3),
            "fraction_covered": _num(length[eq["coverage_m"] <= coverage_limit_m].sum() / total) if total else None,
            "fraction_needing_walk": _num(length[flagged].sum() / total) if total else None,
            "localisability_median_per_m": _num(np.median(eq["localisability_per_m"])),
            "localisability_p10_per_m": _num(np.quantile(eq["localisability_per_m"], 0.1)),
        },
        "stretches": stretches,
    }


def _masked(fmap, arr):
    return np.ma.masked_where(~fmap.free, arr)


def _draw_graph(ax, fmap, flagged_edges=(), color="0.35"):
    from matplotlib.collections import LineCollection

    g = fmap.graph
    seg = np.stack([g.nodes_xy[g.edges[:, 0]], g.nodes_xy[g.edges[:, 1]]], axis=1)
    ax.add_collection(LineCollection(seg, colors=color, linewidths=0.3, alpha=0.6))
    fl = np.asarray(list(flagged_edges), dtype=np.int64)
    if fl.size:
        ax.add_collection(LineCollection(seg[fl], colors="red", linewidths=1.2))


def _panel(fig, ax, fmap, arr, title, cmap, label, vmin=None, vmax=None, flagged=(), graph=True):
    x0, x1, y0, y1 = fmap.extent
    h = fmap.resolution_m / 2
    im = ax.imshow(_masked(fmap, arr), origin="lower", extent=(x0 - h, x1 + h, y0 - h, y1 + h), cmap=cmap,
                   vmin=vmin, vmax=vmax, interpolation="nearest")
    if graph:
        _draw_graph(ax, fmap, flagged)
    ax.set_title(title, fontsize=9)
    ax.set_aspect("equal")
    ax.tick_params(labelsize=7)
    cb = fig.colorbar(im, ax=ax, shrink=0.8)
    cb.set_label(label, fontsize=8)
    cb.ax.tick_params(labelsize=7)


def _figure(nrows, ncols, fmap):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    x0, x1, y0, y1 = fmap.extent
    aspect = (y1 - y0 + 1) / max(x1 - x0 + 1, 1)
    w = 5.2 * ncols
    fig, axes = plt.subplots(nrows, ncols, figsize=(w, max(3.0, 4.6 * aspect * nrows * ncols / ncols + 0.8)), squeeze=False)
    return plt, fig, axes


def quality_image(fmap, path, *, quality=None, dpi=130):
    """PNG of coverage, latent sd, localisability and the stretches that need
    another walk (red)."""
    from fingerprint._atomic import atomic_write

    q = quality or map_quality(fmap)
    flagged = [e for s in q["stretches"] for e in s["edges"]]
    bw = _between_var(fmap)
    latent = np.sqrt(np.maximum(fmap.var_ut2 - bw, 0.0)).max(axis=-1)
    meas = np.sqrt(np.mean(fmap.var_ut2 + _noise_var(fmap), axis=-1))
    loc = _gradient_norm(fmap) / np.maximum(meas, 1e-9)
    plt, fig, axes = _figure(2, 2, fmap)
    _panel(fig, axes[0, 0], fmap, np.minimum(fmap.coverage_m, 5.0), "coverage (distance to survey), m", "viridis_r", "m", 0, 5)
    _panel(fig, axes[0, 1], fmap, latent, "latent map sd (max component)", "magma", "µT", 0)
    _panel(fig, axes[1, 0], fmap, loc, "localisability |grad B| / sd", "cividis", "1/m", 0, float(np.nanquantile(loc[fmap.free], 0.98)) if fmap.free.any() else None)
    ax = axes[1, 1]
    _panel(fig, ax, fmap, fmap.free.astype(float) * 0.15, f"graph; red: {len(q['stretches'])} stretches to re-survey", "Greys", "", 0, 1, flagged=flagged)
    fig.suptitle(f"map quality, floor {fmap.floor}", fontsize=11)
    fig.tight_layout()
    with atomic_write(path, "wb") as fh:
        fig.savefig(fh, format="png", dpi=dpi)
    plt.close(fig)


def field_image(fmap, path, *, dpi=130):
    """PNG of the mapped field: b_x, b_y, b_up, |B|, map sd and coverage,
    with the floor graph."""
    from fingerprint._atomic import atomic_write

    mean = fmap.mean_ut
    plt, fig, axes = _figure(2, 3, fmap)
    names = ("b_x", "b_y", "b_up")
    for c in range(3):
        v = mean[..., c][fmap.free] if fmap.free.any() else mean[..., c].ravel()
        lo, hi = np.quantile(v, [0.01, 0.99])
        _panel(fig, axes[0, c], fmap, mean[..., c], f"{names[c]} (plan frame)", "RdBu_r", "µT", lo, hi, graph=False)
    tot = np.linalg.norm(mean, axis=-1)
    v = tot[fmap.free] if fmap.free.any() else tot.ravel()
    lo, hi = np.quantile(v, [0.01, 0.99])
    _panel(fig, axes[1, 0], fmap, tot, "|B|", "viridis", "µT", lo, hi, graph=False)
    sd = np.sqrt(np.mean(fmap.var_ut2, axis=-1))
    _panel(fig, axes[1, 1], fmap, sd, "map sd (rms over components)", "magma", "µT", 0)
    _panel(fig, axes[1, 2], fmap, np.minimum(fmap.coverage_m, 5.0), "coverage, m (graph in grey)", "viridis_r", "m", 0, 5)
    fig.suptitle(f"field map, floor {fmap.floor} ({fmap.meta.get('kernel', '?')})", fontsize=11)
    fig.tight_layout()
    with atomic_write(path, "wb") as fh:
        fig.savefig(fh, format="png", dpi=dpi)
    plt.close(fig)
