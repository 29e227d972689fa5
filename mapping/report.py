"""Self-contained HTML reports and their plots.

A report is one HTML file with inline CSS and every image embedded as a
base64 PNG (``data:image/png;base64,...``): it opens offline, can be mailed
as one file and never refers to anything outside itself. Plots are drawn
with matplotlib's Agg backend (no display needed).
"""

from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass, field

import numpy as np

from fingerprint._atomic import write_text_atomic

__all__ = [
    "Section",
    "html_table",
    "figure_to_base64",
    "img_tag",
    "build_html",
    "write_report",
    "plot_error_cdf",
    "plot_tracks",
    "plot_error_vs_distance",
    "save_figure",
    "save_png",
]

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2em auto;max-width:1100px;
color:#222;line-height:1.45;padding:0 1em}
h1{font-size:1.6em;border-bottom:2px solid #446;padding-bottom:.2em}
h2{font-size:1.25em;margin-top:1.8em;color:#334}
div.tw{overflow-x:auto}
table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
th,td{border:1px solid #ccd;padding:.25em .6em;text-align:right}
th{background:#eef;text-align:center}
td.l,th.l{text-align:left}
img{max-width:100%;border:1px solid #ddd;margin:.4em 0}
.note{color:#555;font-size:.9em}
ul.cautions li{margin:.3em 0}
code{background:#f4f4f8;padding:0 .2em}
"""


@dataclass
class Section:
    """One titled part of a report; ``body`` is trusted HTML made by the
    helpers here (text from users goes through :func:`html.escape`)."""

    title: str
    body: str
    anchor: str = field(default="")

    def __post_init__(self):
        if not self.anchor:
            self.anchor = "".join(c if c.isalnum() else "-" for c in self.title.lower()).strip("-")


def _cell(v):
    if v is None:
        return "–"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(float(v)):
            return "–"
        a = abs(float(v))
        return f"{float(v):.3g}" if (a >= 1e4 or (0 < a < 1e-2)) else f"{float(v):.2f}"
    return html.escape(str(v))


def html_table(columns, rows, *, left=1):
    """An HTML table.

    Parameters
    ----------
    columns : list of str, header cells
    rows : list of sequences, one per row (numbers formatted, text escaped;
        None and NaN shown as a dash)
    left : int, how many leading columns are left-aligned (labels)
    """
    head = "".join(f'<th class="{"l" if i < left else ""}">{html.escape(str(c))}</th>' for i, c in enumerate(columns))
    body = []
    for r in rows:
        cells = "".join(
            f'<td class="{"l" if (i < left or isinstance(v, str)) else ""}">{_cell(v)}</td>' for i, v in enumerate(r)
        )
        body.append(f"<tr>{cells}</tr>")
    return (f'<div class="tw"><table><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>')


def figure_to_base64(fig, *, dpi=100):
    """PNG bytes of a matplotlib figure, base64-encoded (str); closes it."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def img_tag(b64_png, alt):
    """An ``<img>`` element holding the PNG inline."""
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{b64_png}">'


def build_html(title, sections, *, subtitle=None):
    """The whole report as one HTML string (contents list + sections)."""
    toc = "".join(f'<li><a href="#{s.anchor}">{html.escape(s.title)}</a></li>' for s in sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
    ]
    if subtitle:
        parts.append(f'<p class="note">{html.escape(subtitle)}</p>')
    parts.append(f"<nav><ul>{toc}</ul></nav>")
    for s in sections:
        parts.append(f'<section id="{s.anchor}"><h2>{html.escape(s.title)}</h2>{s.body}</section>')
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def write_report(path, title, sections, *, subtitle=None):
    """Build the report and write it atomically to ``path``."""
    write_text_atomic(path, build_html(title, sections, subtitle=subtitle))


def save_png(path, b64_png):
    """Write a base64 PNG (as made by :func:`figure_to_base64`) atomically."""
    from fingerprint._atomic import atomic_write

    with atomic_write(path, "wb") as fh:
        fh.write(base64.b64decode(b64_png))


def save_figure(fig, path, *, dpi=100):
    """Write a figure as PNG atomically and return its base64 text (for
    embedding the same image in the report)."""
    b64 = figure_to_base64(fig, dpi=dpi)
    save_png(path, b64)
    return b64


def _new_figure(figsize):
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return Figure(figsize=figsize)


def plot_error_cdf(errors_by_method, *, title="Error at checkpoints", xmax_m=None):
    """Empirical CDF of the checkpoint errors of each method.

    Parameters
    ----------
    errors_by_method : dict of str -> (C,) float, metres
    xmax_m : float, optional right edge of the plot (default: the largest
        95th percentile, times 1.5)

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig = _new_figure((7.0, 4.2))
    ax = fig.add_subplot(1, 1, 1)
    p95 = []
    for name, err in errors_by_method.items():
        e = np.sort(np.asarray(err, dtype=float)[np.isfinite(err)])
        if e.size == 0:
            continue
        y = np.arange(1, e.size + 1) / e.size
        ax.step(np.concatenate([[0.0], e]), np.concatenate([[0.0], y]), where="post",
                label=f"{name} (median {np.median(e):.2f} m, n={e.size})")
        p95.append(np.percentile(e, 95))
    if xmax_m is None:
        # one far-off method must not squash the others: scale to the
        # second-largest 95th percentile (curves then leave the plot)
        ref = sorted(p95)[-2] if len(p95) > 1 else (p95[0] if p95 else 1.0)
        xmax_m = 1.5 * ref
    ax.set_xlim(0, max(xmax_m, 1e-3))
    ax.set_ylim(0, 1.0)
    for q in (0.5, 0.95):
        ax.axhline(q, color="0.7", lw=0.7, ls="--")
    ax.set_xlabel("error at checkpoint (m)")
    ax.set_ylabel("fraction of checkpoints")
    ax.set_title(title)
    ax.grid(alpha=0.3)
    ax.legend(loc="lower right", fontsize=8)
    fig.tight_layout()
    return fig


def plot_error_vs_distance(series, *, title="Error along the walks", threshold_m=3.0):
    """Error at each scored checkpoint against the distance walked, one line
    per walk (shows how fast a global start converges, and where a tracked
    walk is lost).

    Parameters
    ----------
    series : list of (label, distance_m (C,), errors_m (C,))
    threshold_m : float, the convergence threshold drawn as a line

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig = _new_figure((7.0, 4.2))
    ax = fig.add_subplot(1, 1, 1)
    top = 1.0
    for label, d, e in series:
        d = np.asarray(d, dtype=float)
        e = np.asarray(e, dtype=float)
        if e.size == 0:
            continue
        ax.plot(d, np.maximum(e, 0.01), marker=".", ms=3, lw=0.8, alpha=0.8, label=label)
        top = max(top, float(np.nanmax(e)))
    ax.axhline(threshold_m, color="k", lw=0.8, ls="--")
    ax.set_yscale("log")
    ax.set_ylim(0.05, top * 1.5)
    ax.set_xlabel("distance walked (m)")
    ax.set_ylabel("error at checkpoint (m, log scale)")
    ax.set_title(title)
    ax.grid(alpha=0.3, which="both")
    if 0 < len(series) <= 12:
        ax.legend(fontsize=6, ncol=2, loc="upper right")
    fig.tight_layout()
    return fig


def _draw_plan(ax, fmap, box=None):
    """Free space (raster) and graph edges, cropped to ``box`` =
    (xmin, xmax, ymin, ymax) when given (drawing only what is seen)."""
    from matplotlib.collections import LineCollection

    r = fmap.resolution_m
    ny, nx = fmap.free.shape
    x0, y0 = fmap.origin_xy
    if box is None:
        i0, i1, j0, j1 = 0, nx, 0, ny
    else:
        i0 = int(np.clip(np.floor((box[0] - x0) / r), 0, nx))
        i1 = int(np.clip(np.ceil((box[1] - x0) / r) + 1, 0, nx))
        j0 = int(np.clip(np.floor((box[2] - y0) / r), 0, ny))
        j1 = int(np.clip(np.ceil((box[3] - y0) / r) + 1, 0, ny))
    if i1 > i0 and j1 > j0:
        ax.imshow(
            np.where(fmap.free[j0:j1, i0:i1], 1.0, 0.0),
            origin="lower",
            extent=(x0 + (i0 - 0.5) * r, x0 + (i1 - 0.5) * r, y0 + (j0 - 0.5) * r, y0 + (j1 - 0.5) * r),
            cmap="Greys_r",
            vmin=-0.4,
            vmax=1.0,
            interpolation="nearest",
        )
    g = fmap.graph
    if g.n_edges:
        seg = np.stack([g.nodes_xy[g.edges[:, 0]], g.nodes_xy[g.edges[:, 1]]], axis=1)
        if box is not None:
            mid = seg.mean(axis=1)
            keep = (mid[:, 0] >= box[0] - 2) & (mid[:, 0] <= box[1] + 2) & (mid[:, 1] >= box[2] - 2) & (
                mid[:, 1] <= box[3] + 2)
            seg = seg[keep]
        ax.add_collection(LineCollection(seg, colors="#9ab", linewidths=0.3))


def plot_tracks(fmap, walks, *, ncols=3, max_panels=12, title=None):
    """Estimated tracks against their checkpoints over the plan, one panel
    per walk, zoomed on the walk.

    Parameters
    ----------
    fmap : fingerprint.FieldMap, for the free-space raster and the graph
    walks : list of dict with keys ``name``, ``track`` (Track),
        ``checkpoints`` (Checkpoints), optional ``baseline`` (Track, drawn
        dashed, e.g. dead reckoning), optional ``truth`` (Track) and
        ``errors_m`` ((C,) float)
    max_panels : int, panels per figure

    Returns
    -------
    list of matplotlib.figure.Figure (one per ``max_panels`` walks)
    """
    figs = []
    for start in range(0, len(walks), max_panels):
        chunk = walks[start : start + max_panels]
        ncols = max(1, min(ncols, len(chunk)))
        nrows = int(math.ceil(len(chunk) / ncols))
        fig = _new_figure((4.0 * ncols, 3.6 * nrows))
        for i, w in enumerate(chunk):
            ax = fig.add_subplot(nrows, ncols, i + 1)
            cps = w["checkpoints"]
            pts = [cps.xy, w["track"].xy] + ([w["truth"].xy] if w.get("truth") is not None else [])
            allp = np.vstack(pts)
            lo = np.nanmin(allp, axis=0) - 4.0
            hi = np.nanmax(allp, axis=0) + 4.0
            span = max(hi[0] - lo[0], hi[1] - lo[1])
            mid = (lo + hi) / 2
            box = (mid[0] - span / 2, mid[0] + span / 2, mid[1] - span / 2, mid[1] + span / 2)
            _draw_plan(ax, fmap, box)
            if w.get("truth") is not None:
                ax.plot(w["truth"].xy[:, 0], w["truth"].xy[:, 1], color="#2a2", lw=1.0, label="true path")
            if w.get("baseline") is not None:
                b = w["baseline"]
                ax.plot(b.xy[:, 0], b.xy[:, 1], color="#c80", lw=0.9, ls="--",
                        label=w.get("baseline_label", "dead reckoning"))
            ax.plot(w["track"].xy[:, 0], w["track"].xy[:, 1], color="#16c", lw=1.2, label="estimate")
            ax.plot(cps.xy[:, 0], cps.xy[:, 1], "o", ms=4, mfc="none", mec="#d11", label="checkpoints")
            est = w["track"].at(cps.t)
            from matplotlib.collections import LineCollection

            ax.add_collection(LineCollection(np.stack([cps.xy, est], axis=1), colors="#d11", linewidths=0.6))
            ax.set_xlim(box[0], box[1])
            ax.set_ylim(box[2], box[3])
            ax.set_aspect("equal")
            label = w["name"]
            if w.get("errors_m") is not None and np.size(w["errors_m"]):
                label += f"  (median {np.nanmedian(w['errors_m']):.2f} m)"
            ax.set_title(label, fontsize=9)
            ax.tick_params(labelsize=7)
            if i == 0:
                ax.legend(fontsize=6, loc="best")
        if title:
            fig.suptitle(title)
        fig.tight_layout()
        figs.append(fig)
    return figs
