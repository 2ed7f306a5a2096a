"""Figures for the report folder: one PNG per question, readable without the text.

Only draws; every coordinate comes from :func:`audit.diagnostics.plotdata.figure_data`,
computed by the API and carried in ``Findings.figure_data``.
matplotlib is imported lazily and used through its object interface with the
Agg canvas, so the global pyplot state of a caller is never touched.  Each file
is written to a temporary name in the target folder and moved into place with
``os.replace`` (a reader never sees a half-written figure).

Conventions
-----------
* Colour is never the only carrier: traces differ by marker and line style,
  trusted and untrusted methods by marker and label, flagged points by marker,
  size and a label.
* A factor keeps one colour set in every figure: the levels of the first
  factor are drawn in warm colours, those of the second in cool colours, each
  with its own markers.
* Cell and row labels never overlap: :func:`place_labels` puts each label at
  the first free spot around its point (a leader line joins a label set further
  off); labels that find no room are listed under the plot.
* The layout is fixed (margins in inches) rather than computed by a layout
  engine, so each figure is drawn once; p-value axes use plain tick labels.

User strings (column and level names) are drawn literally: math markup is off
(``text.parse_math = False``, so ``$x$`` is not a symbol) and control characters
are shown escaped.  A glyph missing from the font is drawn as a box without a
warning on stderr.
"""

from __future__ import annotations

import math
import os
import warnings

from .._io import atomic_write_bytes
from ..errors import OptionError

__all__ = ["write_figures", "draw_figure", "figure_file", "figure_keys", "FIGURE_FILES", "FIGURE_FORMATS",
           "place_labels"]

#: the figure file formats: SVG (vector, the default: sharp on a phone and in print, and
#: about twice as fast to draw as a raster) and PNG (for pasting into word processors)
FIGURE_FORMATS = ("svg", "png")
DEFAULT_FIGURE_FORMAT = "svg"
FIGURE_STEMS = {
    "methods_p": "method-p-values",
    "cell_means": "cell-means",
    "residual_qq": "residual-normal-quantiles",
    "spread": "spread-vs-fitted",
    "sd_n": "cell-sd-vs-n",
    "loo": "leave-one-out-p",
    "boxcox": "box-cox-profile",
}
#: {figure key: file name} in the default format, in drawing order
FIGURE_FILES = {k: f"{v}.{DEFAULT_FIGURE_FORMAT}" for k, v in FIGURE_STEMS.items()}
#: every file name a figure can have, whatever the format (a report folder's known names)
ALL_FIGURE_FILES = frozenset(f"{v}.{fmt}" for v in FIGURE_STEMS.values() for fmt in FIGURE_FORMATS)
_MIME = {"svg": "image/svg+xml", "png": "image/png"}


def figure_file(key: str, fmt: str = DEFAULT_FIGURE_FORMAT) -> str:
    """The file name of figure ``key`` in format ``fmt``."""
    return f"{FIGURE_STEMS[key]}.{fmt}"


def figure_mime(name: str) -> str:
    """The media type of a figure file, from its extension."""
    return _MIME[name.rsplit(".", 1)[-1].lower()]
_DPI = 100
_STYLES = ("-", "--", ":", "-.")
# one colour set and one marker set per factor (first factor warm, second cool)
_COLOURS = (
    ("#c0392b", "#e67e22", "#8e5a2b", "#d35ea8", "#b7950b", "#7b241c", "#f1948a", "#6e2c00"),
    ("#1f5fa8", "#1e8449", "#7d3c98", "#17a2b8", "#283747", "#52be80", "#5dade2", "#0b5345"),
)
_MARKERS = (("v", "P", "X", "*", "h", "<", ">", "p"), ("o", "s", "^", "D", "d", "H", "8", "o"))
_PLAIN = "#4a6f8a"     # ordinary points
_FLAG = "#b00020"      # points that need attention (always with their own marker and a label)
_OK = "#1f4e79"
_GREY = "0.45"


# --------------------------------------------------------------------------- helpers

def _nan(xs):
    return [math.nan if x is None else float(x) for x in xs]


def _new_figure(width: float, height: float, *, nrows: int = 1, ncols: int = 1, top: float = 0.85,
                bottom: float = 0.65, left: float = 0.85, right: float = 0.25, wspace: float = 0.25,
                hspace: float = 0.2, **kw):
    """A figure with a fixed layout (margins in inches): drawn once, no layout engine."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    fig.subplots_adjust(left=left / width, right=1 - right / width, top=1 - top / height,
                        bottom=bottom / height, wspace=wspace, hspace=hspace)
    return fig, axes


def _render(fig, name: str) -> bytes:
    """The figure's file content; the format is the extension of ``name``."""
    import io

    buf = io.BytesIO()
    if name.endswith(".svg"):
        # no date in the metadata (same input, same bytes); ids are salted by a fixed string (see _RC)
        fig.savefig(buf, format="svg", dpi=_DPI, metadata={"Date": None})
    else:
        fig.savefig(buf, format="png", dpi=_DPI, pil_kwargs={"compress_level": 1})
    return buf.getvalue()


def _fmt_tick_p(x: float, _pos=None) -> str:
    """Plain tick labels for a p-value axis (math text is off, so no 10^k markup)."""
    if x <= 0:
        return ""
    if x >= 0.001:
        return f"{x:.3f}".rstrip("0").rstrip(".") if x < 1 else f"{x:g}"
    return f"{x:.0e}".replace("e-0", "e-")


def _p_axis(axis, lo: float | None = None, hi: float | None = None) -> None:
    """Log p-value axis with plain tick labels; a range under two decades also labels 2x and 5x."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter, NullLocator

    axis.set_major_locator(LogLocator(base=10.0, numticks=8))
    axis.set_major_formatter(FuncFormatter(_fmt_tick_p))
    if lo is not None and hi is not None and 0 < lo < hi and hi / lo < 100:
        axis.set_minor_locator(LogLocator(base=10.0, subs=(2.0, 5.0), numticks=8))
        axis.set_minor_formatter(FuncFormatter(_fmt_tick_p))
    else:  # no minor ticks: each would be one more tick object to lay out
        axis.set_minor_locator(NullLocator())
        axis.set_minor_formatter(NullFormatter())


def _fmt_p(p, resamples=None) -> str:
    """A p-value for a label, in the report's one style ('p = .030', 'p < .001', a resampled
    minimum as its bound 'p < .0057 (B = 173)'); see :mod:`audit.report.format`."""
    if p is None:
        return "no p"
    from ..report.format import p_text

    return p_text(p, resamples)


def _short(text: str, width: int) -> str:
    return text if len(text) <= width else text[: width - 3].rstrip() + "..."


def _listing(names: list[str], what: str, limit: int = 8) -> str:
    shown = ", ".join(names[:limit])
    more = f" and {len(names) - limit} more" if len(names) > limit else ""
    return f"{what}: {shown}{more}"


def _boxes_overlap(a, b, pad: float = 0.0) -> bool:
    return not (a[2] + pad <= b[0] or b[2] + pad <= a[0] or a[3] + pad <= b[1] or b[3] + pad <= a[1])


def _box_distance(box, x: float, y: float) -> float:
    dx = max(box[0] - x, 0.0, x - box[2])
    dy = max(box[1] - y, 0.0, y - box[3])
    return math.hypot(dx, dy)


def place_labels(anchors, sizes, bounds, *, avoid=(), pad: float = 2.0,
                 radii=(4.0, 12.0, 24.0, 40.0, 60.0, 85.0), leader_from: float = 10.0):
    """Deterministic label placement that never overlaps.

    Parameters
    ----------
    anchors : sequence of (x, y)
        Points to label, in pixels (y up), in order of priority (the first
        gets the best spot).
    sizes : sequence of (width, height)
        Each label's text box in pixels.
    bounds : (x0, y0, x1, y1)
        The box every label must stay inside (the axes).
    avoid : sequence of (x0, y0, x1, y1)
        Boxes labels must not cover (e.g. the markers).
    pad : float
        Minimum gap between two labels, in pixels.
    radii : sequence of float
        Distances tried from the point, nearest first; at each, eight
        directions (up-right, down-right, up-left, down-left, right, left,
        up, down; above and below also shifted to either side).
    leader_from : float
        Labels set at this distance or further get a leader line to their
        point (drawn by the caller); nearer ones must be unambiguous.

    Returns
    -------
    list of (x0, y0, x1, y1) or None
        Each label's box, or None where no free spot was found.  No two boxes
        returned overlap (with ``pad``), none covers an ``avoid`` box, all lie
        inside ``bounds``, and each label set nearer than ``leader_from`` is
        nearer to its own point than to any other point labelled by at least
        10 pixels (so it is not read as another point's).
    """
    dirs = ((1, 1), (1, -1), (-1, 1), (-1, -1), (1, 0), (-1, 0), (0, 1), (0, -1))
    placed: list = []
    out = []
    bx0, by0, bx1, by1 = bounds
    anchors = [tuple(a) for a in anchors]
    for i, ((ax, ay), (w, h)) in enumerate(zip(anchors, sizes)):
        found = None
        for r in radii:
            cands = []
            for dx, dy in dirs:
                y0 = ay + r if dy > 0 else (ay - r - h if dy < 0 else ay - h / 2.0)
                if dx == 0:  # straight above or below: centred, or shifted to end / start near the point
                    cands.extend((x0, y0) for x0 in (ax - w / 2.0, ax - w + 8.0, ax - 8.0))
                else:
                    cands.append((ax + r if dx > 0 else ax - r - w, y0))
            for x0, y0 in cands:
                box = (x0, y0, x0 + w, y0 + h)
                if box[0] < bx0 or box[1] < by0 or box[2] > bx1 or box[3] > by1:
                    continue
                if any(_boxes_overlap(box, p, pad) for p in placed):
                    continue
                if any(_boxes_overlap(box, a) for a in avoid):
                    continue
                own = _box_distance(box, ax, ay)
                if r < leader_from and any(_box_distance(box, qx, qy) < own + 10.0 for k, (qx, qy) in enumerate(anchors)
                       if k != i and (qx, qy) != (ax, ay)):
                    continue  # nearer to another point than to its own: it would be read as that point's
                found = box
                break
            if found is not None:
                break
        out.append(found)
        if found is not None:
            placed.append(found)
    return out


def _label_points(ax, xs, ys, labels, *, fontsize: float = 8.0, priority=None, marker_px: float = 7.0,
                  max_labels: int = 40, colour: str = "black") -> list[str]:
    """Label points of ``ax`` without overlaps (axis limits must be final).

    Returns the labels that found no room (to be listed under the plot)."""
    from matplotlib.font_manager import FontProperties

    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    prop = FontProperties(size=fontsize)
    pts = [(x, y, t) for x, y, t in zip(xs, ys, labels)
           if x is not None and y is not None and math.isfinite(x) and math.isfinite(y)]
    if not pts:
        return []
    disp = ax.transData.transform([(x, y) for x, y, _ in pts])
    order = list(range(len(pts))) if priority is None else sorted(range(len(pts)), key=lambda i: priority[i])
    order_try, rest = order[:max_labels], order[max_labels:]
    half = marker_px / 2.0
    avoid = [(px - half, py - half, px + half, py + half) for px, py in disp]
    sizes = []
    for i in order_try:
        w, h, _d = renderer.get_text_width_height_descent(pts[i][2], prop, ismath=False)
        sizes.append((w + 2.0, h + 2.0))
    bb = ax.bbox
    boxes = place_labels([tuple(disp[i]) for i in order_try], sizes, (bb.x0 + 2, bb.y0 + 2, bb.x1 - 2, bb.y1 - 2),
                         avoid=avoid)
    inv = ax.transData.inverted()
    missed = []
    for i, box in zip(order_try, boxes):
        if box is None:
            missed.append(pts[i][2])
            continue
        px, py = disp[i]
        tx, ty = inv.transform((box[0] + 1.0, box[1] + 1.0))
        far = _box_distance(box, px, py) >= 8.0  # set at radius 12 or more: joined by a leader line
        cx = min(max(px, box[0]), box[2])
        cy = min(max(py, box[1]), box[3])
        ax.text(tx, ty, pts[i][2], fontsize=fontsize, ha="left", va="bottom", color=colour, zorder=5)
        if far:
            ax.plot(*zip(inv.transform((px, py)), inv.transform((cx, cy))), color="0.5", linewidth=0.6, zorder=4)
    missed.extend(pts[i][2] for i in rest)
    return missed


def _footnote(fig, text: str, y: float = 0.012) -> None:
    fig.text(0.01, y, text, fontsize=8, ha="left", va="bottom", color="0.2")


def _finish_limits(ax) -> None:
    """Freeze the current automatic limits (labels are placed against them)."""
    ax.set_xlim(ax.get_xlim())
    ax.set_ylim(ax.get_ylim())


# --------------------------------------------------------------------------- figures

def _methods_p(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes | None:
    d = fd.get("methods_p")
    if not d or not d["rows"]:
        return None
    rows = d["rows"]
    alpha = d["alpha"] if d["alpha"] is not None else fd["alpha"]
    o1 = fd["cell_means"]["orientations"][0]
    a, b = o1["x_factor"], o1["trace_factor"]
    n = len(rows)
    fig, axes = _new_figure(10.2, 2.1 + 0.36 * n, top=0.7, bottom=1.3, left=3.3, right=2.0)
    ax = axes[0][0]
    floor = 1e-16
    vals = [max(r["p"], floor) for r in rows if r["p"] is not None]
    lo = max(min(vals + [alpha]) / 10.0, floor)
    ax.set_xscale("log")
    ax.set_xlim(lo, 1.0)
    ax.set_ylim(n - 0.4, -0.6)
    ax.axvspan(lo, alpha, color="#fbe9e7", zorder=0, label=f"significant at alpha (p < {alpha:g})")
    ax.axvline(alpha, color="black", linestyle="--", linewidth=1.2, label=f"alpha = {alpha:g}")
    ticks = []
    bs = sorted({r["resamples"] for r in rows if r["p_interval"] and r["resamples"]})
    b_txt = f", B = {', '.join(f'{b:,}' for b in bs)}" if bs else ""
    # artists are batched (one error-bar set, one marker set per kind): drawing time grows with
    # the number of artists, not of points
    bars, cut_at, kinds = [], [], {}
    for y, r in enumerate(rows):
        t = r["trusted"]
        word = {True: "trusted", False: "NOT trusted", None: "not judged"}[t]
        ticks.append(f"{r['method']}  ({word if r['p'] is not None else 'no p-value'})")
        if r["p"] is None:
            ax.text(lo * 1.3, y, _short("no p-value: " + (r["note"] or ""), 90), va="center", fontsize=8,
                    style="italic", color="0.25")
            continue
        p = max(r["p"], floor)
        if r["p_interval"] and None not in r["p_interval"]:
            il, ih = r["p_interval"]
            if il < lo * 1.05:  # the interval reaches below the axis: drawn to the edge with an arrow head
                cut_at.append((lo * 1.05, y))
            il = max(il, lo * 1.05)
            bars.append((p, y, max(p - il, 0.0), max(ih - p, 0.0)))
        kinds.setdefault(t, []).append((p, y))
        ax.text(1.06, y, _fmt_p(r["p"], r["resamples"]), transform=ax.get_yaxis_transform(), va="center",
                fontsize=8, color="black" if t is not False else _FLAG)
    if bars:
        ax.errorbar([b[0] for b in bars], [b[1] for b in bars], xerr=[[b[2] for b in bars], [b[3] for b in bars]],
                    fmt="none", ecolor="0.35", capsize=4, linewidth=1.2,
                    label=f"99% Monte Carlo interval (resampled p{b_txt})")
    if cut_at:
        ax.plot([c[0] for c in cut_at], [c[1] for c in cut_at], marker="<", color="0.35", markersize=6,
                linestyle="none")
    for t in (True, None, False):  # legend entries in a fixed order
        pts = kinds.get(t)
        if not pts:
            continue
        xs, ys = [q[0] for q in pts], [q[1] for q in pts]
        if t is False:
            ax.scatter(xs, ys, marker="^", s=70, facecolors="white", edgecolors=_FLAG, linewidths=1.6, zorder=3,
                       label="not trusted here (open triangle)")
        else:
            ax.scatter(xs, ys, marker="o", s=60, color=_OK if t else _GREY, zorder=3,
                       label="trusted here (filled circle)" if t else "no verdict (grey circle)")
    ax.set_yticks(range(n), ticks)
    for lab, r in zip(ax.get_yticklabels(), rows):
        if r["trusted"] is False:
            lab.set_color(_FLAG)
    _p_axis(ax.xaxis)
    ax.set_xlabel("interaction p-value (log scale; left of the dashed line: significant)")
    ax.grid(True, axis="x", alpha=0.3)
    ax.set_title(f"Do the methods agree on the {a} x {b} interaction?\n"
                 f"Each method's interaction p-value with alpha = {alpha:g} marked", fontsize=11)
    fig.legend(*ax.get_legend_handles_labels(), loc="lower left", bbox_to_anchor=(0.01, 0.01), ncol=2,
               fontsize=8, frameon=False)
    return _render(fig, figure_file("methods_p", fmt))


def _cell_means(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes:
    d = fd["cell_means"]
    resp = d["response"]
    o1, o2 = d["orientations"]
    fig, axes = _new_figure(12.0, 5.6, ncols=2, top=0.95, bottom=0.75, left=0.85, right=0.25, wspace=0.22)
    # palette of the factor drawn as lines: panel 1 draws the second factor's levels, panel 2 the first's
    for ax, o, fac in zip(axes[0], (o1, o2), (1, 0)):
        L = len(o["x_levels"])
        T = len(o["traces"])
        width = min(0.3, 0.6 / max(T, 1))
        cols, marks = _COLOURS[fac], _MARKERS[fac]
        for t, tr in enumerate(o["traces"]):
            dx = (t - (T - 1) / 2.0) * width / max(T - 1, 1) if T > 1 else 0.0
            xs = [i + dx for i in range(L)]
            m, lo, hi = _nan(tr["mean"]), _nan(tr["lower"]), _nan(tr["upper"])
            err = [[mm - ll if not (math.isnan(mm) or math.isnan(ll)) else 0.0 for mm, ll in zip(m, lo)],
                   [hh - mm if not (math.isnan(mm) or math.isnan(hh)) else 0.0 for mm, hh in zip(m, hi)]]
            ax.errorbar(xs, m, yerr=err, marker=marks[t % len(marks)], linestyle=_STYLES[t % len(_STYLES)],
                        color=cols[t % len(cols)], capsize=4, linewidth=1.6, markersize=7,
                        label=str(tr["level"]))
        long = sum(len(str(x)) for x in o["x_levels"]) > 60
        ax.set_xticks(range(L), o["x_levels"], rotation=30 if long else 0, ha="right" if long else "center")
        ax.set_xlabel(o["x_factor"])
        ax.set_ylabel(f"mean {resp}")
        ax.set_title(f"{o['x_factor']} on the x axis, one line per level of {o['trace_factor']}", fontsize=10)
        ax.legend(title=o["trace_factor"], fontsize=8, title_fontsize=9, loc="best" if T * L <= 60 else "upper right")
        ax.grid(True, alpha=0.3)
    a, b = o1["x_factor"], o1["trace_factor"]
    fig.suptitle(f"Does the effect of {a} on {resp} depend on {b}? Cell means with 95% intervals\n"
                 f"(non-parallel lines suggest an interaction; bars: 95% t interval from each cell's own SD; "
                 f"{b} levels in cool colours, {a} levels in warm colours)", fontsize=11)
    return _render(fig, figure_file("cell_means", fmt))


def _residual_qq(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes | None:
    d = fd["qq"]
    if d is None:
        return None
    theo, samp = _nan(d["theoretical"]), _nan(d["sample"])
    finite = [abs(x) for x in theo + samp if not math.isnan(x)]
    lim = (max(finite) if finite else 3.0) + 0.5
    lo = [max(-lim, x) if not math.isnan(x) else -lim for x in _nan(d["band_lower"])]
    hi = [min(lim, x) if not math.isnan(x) else lim for x in _nan(d["band_upper"])]
    fig, axes = _new_figure(7.4, 7.6, top=1.0, bottom=1.55, left=0.9, right=0.3)
    ax = axes[0][0]
    n, n_out = d["n"], d["outside"]
    ax.fill_between(theo, lo, hi, color="0.88", label=f"{d['level']:.0%} simultaneous band (Kolmogorov)")
    ax.plot(theo, lo, color="0.55", linestyle="--", linewidth=1)
    ax.plot(theo, hi, color="0.55", linestyle="--", linewidth=1)
    ax.plot([-lim, lim], [-lim, lim], color="black", linewidth=1, label="normal reference (y = x)")
    ins = [(x, y) for x, y, a, b in zip(theo, samp, lo, hi) if a <= y <= b]
    outs = [(x, y) for x, y, a, b in zip(theo, samp, lo, hi) if not (a <= y <= b)]
    ax.scatter([p[0] for p in ins], [p[1] for p in ins], s=12, marker="o", color=_PLAIN,
               label=f"residual inside the band ({n - n_out} of {n})")
    if outs:
        ax.scatter([p[0] for p in outs], [p[1] for p in outs], s=46, marker="X", color=_FLAG, zorder=3,
                   label=f"residual OUTSIDE the band ({n_out} of {n})")
    else:
        ax.scatter([], [], s=46, marker="X", color=_FLAG, label=f"residual outside the band: none of {n}")
    ax.set_xlim(-lim, lim)
    ax.set_ylim(-lim, lim)
    ax.set_xlabel("expected normal quantile (Blom plotting positions)")
    ax.set_ylabel(f"studentized residual of {fd['response']} (full model)")
    note = f"n = {n}" + (", points thinned for drawing; counts are of all residuals" if d["thinned"] else "")
    ax.set_title(f"Are the residuals close to normal?\nNormal-quantile plot with a simultaneous band ({note})",
                 fontsize=11)
    ax.legend(fontsize=8, loc="upper left")
    ax.grid(True, alpha=0.3)
    chk = d.get("check")
    lines = []
    if chk and chk.get("grade"):
        sk, ku = chk.get("skewness"), chk.get("excess_kurtosis")
        shape = (f" (skewness {sk:.2f}, excess kurtosis {ku:.2f})" if sk is not None and ku is not None else "")
        lines.append(f"Normality check grade: {chk['grade']}{shape}.")
    lines.append("The band is wide in the tails: points inside it do not prove normality, and the")
    lines.append("grade also weighs skewness and kurtosis. Points bending away from the line at")
    lines.append("both ends: heavy tails; at one end: skew. Single extreme values: see the outlier check.")
    _footnote(fig, "\n".join(lines))
    return _render(fig, figure_file("residual_qq", fmt))


def _cell_priority(xs, ys):
    """Most extreme cells first (distance from the median, each axis scaled by its range)."""
    import statistics

    good = [(x, y) for x, y in zip(xs, ys) if x is not None and y is not None]
    if not good:
        return [0] * len(xs)
    mx = statistics.median(x for x, _ in good)
    my = statistics.median(y for _, y in good)
    rx = (max(x for x, _ in good) - min(x for x, _ in good)) or 1.0
    ry = (max(y for _, y in good) - min(y for _, y in good)) or 1.0
    return [-(((x - mx) / rx) ** 2 + ((y - my) / ry) ** 2) if x is not None and y is not None else 0.0
            for x, y in zip(xs, ys)]


def _spread(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes:
    d = fd["spread"]
    resp = d["response"]
    has_pts = d["points"] is not None
    fig, axes = _new_figure(12.0 if has_pts else 6.8, 5.8, ncols=2 if has_pts else 1, top=0.75, bottom=0.95,
                            wspace=0.22)
    if has_pts:
        ax = axes[0][0]
        ax.scatter(d["points"]["fitted"], d["points"]["resid"], s=9, alpha=0.5, marker="o", color=_PLAIN,
                   label="observation" + (" (random subset)" if d["thinned"] else ""))
        ax.axhline(0.0, color="black", linewidth=1, label="zero residual")
        ax.set_xlabel(f"fitted cell mean of {resp}")
        ax.set_ylabel(f"residual ({resp} minus cell mean)")
        ax.set_title("Residuals by fitted mean: does the vertical spread fan out?", fontsize=10)
        ax.legend(fontsize=8, loc="upper right")
        ax.grid(True, alpha=0.3)
    ax = axes[0][-1]
    cells = [c for c in d["cells"] if c["sd"] is not None]
    xs, ys = [c["mean"] for c in cells], [c["sd"] for c in cells]
    ax.scatter(xs, ys, marker="s", s=36, color=_OK, label="one cell (labelled 'A level x B level')", zorder=3)
    if d["pooled_sd"] is not None:
        ax.axhline(d["pooled_sd"], color="black", linestyle="--", linewidth=1,
                   label=f"pooled SD = {d['pooled_sd']:.3g}")
    ax.set_xlabel(f"cell mean of {resp}")
    ax.set_ylabel(f"cell SD of {resp}")
    ax.set_ylim(bottom=0)
    ax.margins(x=0.18, y=0.15)
    ax.set_title("Cell SD against cell mean (a rising trend suggests a log or power scale)", fontsize=10)
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(True, alpha=0.3)
    _finish_limits(ax)
    missed = _label_points(ax, xs, ys, [c["label"] for c in cells], priority=_cell_priority(xs, ys))
    if missed:
        _footnote(fig, _listing(missed, "Cells not labelled for lack of room"))
    fig.suptitle(f"Does the spread of {resp} change with its level?", fontsize=11)
    return _render(fig, figure_file("spread", fmt))


def _sd_n(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes | None:
    d = fd["sd_n"]
    if len(d["n"]) < 2:
        return None
    fig, axes = _new_figure(7.6, 6.0, top=0.85, bottom=0.95)
    ax = axes[0][0]
    rho = d["spearman"]
    lab = "one cell" + (f" (Spearman rho of size with SD = {rho:.2f})" if rho is not None else "")
    ax.scatter(d["n"], d["sd"], marker="D", s=36, color=_OK, label=lab, zorder=3)
    if d["pooled_sd"] is not None:
        ax.axhline(d["pooled_sd"], color="black", linestyle="--", linewidth=1,
                   label=f"pooled SD = {d['pooled_sd']:.3g}")
    ax.set_xlabel("cell size n (observations in the cell)")
    ax.set_ylabel(f"cell SD of {d['response']}")
    ax.set_ylim(bottom=0)
    ax.margins(x=0.18, y=0.15)
    ax.set_title("Are large variances paired with small or with large cells?\n"
                 "Falling trend: classical F liberal; rising trend: conservative (Box 1954)", fontsize=11)
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(True, alpha=0.3)
    _finish_limits(ax)
    xs = [float(x) for x in d["n"]]
    missed = _label_points(ax, xs, d["sd"], d["labels"], priority=_cell_priority(xs, d["sd"]))
    if missed:
        _footnote(fig, _listing(missed, "Cells not labelled for lack of room"))
    return _render(fig, figure_file("sd_n", fmt))


def _loo(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes | None:
    d = fd["loo"]
    if d is None:
        return None
    alpha = d["alpha"] if d["alpha"] is not None else fd["alpha"]
    floor = 1e-16  # p-values below this are drawn at it (double precision cannot tell them apart from 0)
    clipped = any(p < floor for p in d["p"])
    rows, ps = d["rows"], [max(p, floor) for p in d["p"]]
    flip = set(d.get("flipping_rows") or ())
    n_flip = d.get("n_flipping", len(flip))
    plain = [(r, p) for r, p in zip(rows, ps) if r not in flip]
    flagged = [(r, p) for r, p in zip(rows, ps) if r in flip]
    fig, axes = _new_figure(10.0, 6.0, top=0.85, bottom=1.0)
    ax = axes[0][0]
    n_below, n_all = d["n_below_alpha"], d["n"]
    ax.scatter([r for r, _ in plain], [p for _, p in plain], s=10, marker="o", color="0.55",
               label=f"row whose deletion leaves the decision unchanged ({n_all - n_flip} of {n_all})")
    if flagged:
        ax.scatter([r for r, _ in flagged], [p for _, p in flagged], s=60, marker="D", color=_FLAG,
                   edgecolors="black", linewidths=0.6, zorder=4,
                   label=f"row whose deletion FLIPS the decision ({n_flip} of {n_all}), labelled")
    ax.axhline(alpha, color="black", linestyle="--", linewidth=1.2, label=f"alpha = {alpha:g}")
    if d.get("p_full") is not None:
        ax.axhline(max(d["p_full"], floor), color=_OK, linestyle=":", linewidth=1.4,
                   label=(f"p with all rows = {d['p_full']:.3g}" if d["p_full"] >= floor
                          else "p with all rows < 1e-16"))
    ax.set_yscale("log")
    lo_p, hi_p = min(ps + [alpha]), max(ps + [alpha])
    ax.set_ylim(lo_p / 2.5, min(1.0, hi_p * 2.5) if hi_p < 0.4 else 1.05)
    _p_axis(ax.yaxis, *ax.get_ylim())
    ax.margins(x=0.03)
    row_kind = d.get("row_kind") or fd["row_kind"]
    kind = {"line": "line number in the input file", "index": "index label in the data frame"}.get(
        row_kind, "0-based row position in the data frame")
    ax.set_xlabel(f"row left out ({kind})")
    ax.set_ylabel("interaction p-value without that row (log scale)")
    ax.set_title("Does any single observation decide the interaction test?\n"
                 "Interaction p-value with each row left out in turn"
                 + (" (drawing thinned; counts are of all rows)" if d["thinned"] else ""), fontsize=11)
    fig.legend(*ax.get_legend_handles_labels(), loc="lower left", bbox_to_anchor=(0.01, 0.01), ncol=2, fontsize=8,
               frameon=False)
    ax.grid(True, alpha=0.3, which="major")
    _finish_limits(ax)
    notes = []
    if flagged:
        import math as _m

        pri = [-abs(_m.log(p) - _m.log(alpha)) for _, p in flagged]
        missed = _label_points(ax, [float(r) for r, _ in flagged], [p for _, p in flagged],
                               [str(r) for r, _ in flagged], priority=pri, max_labels=25, colour=_FLAG,
                               marker_px=9.0)
        if missed:
            notes.append(_listing(missed, "Also flipping, not labelled for lack of room", limit=15))
        if n_flip > len(flagged):
            notes.append(f"{n_flip - len(flagged)} further flipping rows are listed in findings.json only.")
    if clipped:
        notes.append("p-values below 1e-16 are drawn at 1e-16.")
    if notes:
        _footnote(fig, "\n".join(notes))
    return _render(fig, figure_file("loo", fmt))


def _boxcox(fd: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes | None:
    d = fd["boxcox"]
    if d is None:
        return None
    alpha = fd["alpha"]
    win = d.get("window") or [min(d["lambda"]), max(d["lambda"])]
    pc = d.get("p_curve")
    two = pc is not None
    fig, axes = _new_figure(10.0, 8.2 if two else 5.6, nrows=2 if two else 1, top=0.85, bottom=0.6, left=0.95,
                            right=3.2, hspace=0.12, sharex=True)
    ax = axes[0][0]
    lam = [x for x in d["lambda"]]
    keep = [(x, y) for x, y in zip(lam, d["loglik"]) if win[0] <= x <= win[1]]
    ax.plot([x for x, _ in keep], [y for _, y in keep], color="black", linewidth=1.8, label="profile log-likelihood")
    panels = [axes[0][0]] + ([axes[1][0]] if two else [])
    for k, a in enumerate(panels):
        first = k == 0
        if d["lambda_ci"] is not None:
            lo, hi = d["lambda_ci"]
            a.axvspan(lo, hi, color="0.9", label=f"95% interval for lambda [{lo:.2f}, {hi:.2f}]" if first else None)
        if d["lambda_hat"] is not None:
            a.axvline(d["lambda_hat"], color="black", linestyle="-.", linewidth=1.2,
                      label=f"best lambda = {d['lambda_hat']:.2f}" if first else None)
        a.axvline(1.0, color="#1f5fa8", linestyle="--", linewidth=1.3,
                  label="lambda = 1 (no transformation)" if first else None)
        a.axvline(0.0, color="#b7950b", linestyle=(0, (1, 1)), linewidth=1.6, label="lambda = 0 (log)" if first else None)
        a.grid(True, alpha=0.3)
    ax.axhline(d["cutoff"], color="0.4", linestyle=":", linewidth=1, label="cut-off: max - chi2(1, 0.95)/2")
    ys = [y for _, y in keep] + [d["cutoff"]]
    span = (max(ys) - min(ys)) or 1.0
    ax.set_ylim(min(ys) - 0.05 * span, max(ys) + 0.08 * span)
    ax.set_xlim(*win)
    ax.set_ylabel("profile log-likelihood\nof the full model")
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False)
    if not two:
        ax.set_xlabel("Box-Cox power lambda")
    else:
        bx = axes[1][0]
        lp, pp = pc["lambda"], pc["p"]
        pts = [(x, p) for x, p in zip(lp, pp) if p is not None and p > 0]
        bx.plot([x for x, _ in pts], [p for _, p in pts], color=_OK, linewidth=1.8,
                label="interaction p on the transformed scale")
        bx.axhline(alpha, color="black", linestyle="--", linewidth=1.2, label=f"alpha = {alpha:g}")
        bx.set_yscale("log")
        allp = [p for _, p in pts] + [alpha]
        lo_p = max(min(allp) / 2.5, 1e-16)
        bx.set_ylim(lo_p, min(1.05, max(allp) * 2.5))
        _p_axis(bx.yaxis, *bx.get_ylim())
        bx.axhspan(lo_p, alpha, color="#fbe9e7", zorder=0, label="significant at alpha")
        for i, c in enumerate(pc["crossings"]):
            bx.plot([c], [alpha], marker="o", markersize=9, markerfacecolor="white", markeredgecolor=_FLAG,
                    markeredgewidth=2, linestyle="none", zorder=4,
                    label="p crosses alpha (lambda marked)" if i == 0 else None)
            bx.annotate(f"lambda = {c:.2f}", (c, alpha), xytext=(4, 8 if i % 2 == 0 else -16),
                        textcoords="offset points",
                        fontsize=9, color=_FLAG, fontweight="bold")
        if not pc["crossings"]:
            side = "below" if all(p < alpha for _, p in pts) else "above"
            bx.text(0.02, 0.04, f"p stays {side} alpha over the whole range shown", transform=bx.transAxes,
                    fontsize=9, color="0.2")
        bx.set_ylabel("interaction p-value\n(log scale)")
        bx.set_xlabel("Box-Cox power lambda (1: raw scale, 0: log, 0.5: square root, -1: reciprocal)")
        bx.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False)
    ax.set_title(f"Which power transformation of {fd['response']} fits best, and does the interaction survive it?\n"
                 "Top: Box-Cox profile likelihood (is lambda = 1 inside the interval?)"
                 + ("; bottom: the interaction p at each lambda" if two else ""), fontsize=11, loc="left")
    return _render(fig, figure_file("boxcox", fmt))


#: figure key -> name of its drawing function in this module (looked up at call time)
_DRAWERS = {"methods_p": "_methods_p", "cell_means": "_cell_means", "residual_qq": "_residual_qq",
            "spread": "_spread", "sd_n": "_sd_n", "loo": "_loo", "boxcox": "_boxcox"}
# math markup off (user strings are literal); a fixed title height (no search for overlapping
# tick labels: there are none at the top); SVG text as text elements (a third faster to draw
# than glyph outlines, searchable, and smaller; the font list ends in the generic sans-serif,
# and matplotlib escapes every string as XML character data); fixed SVG ids
_RC = {"text.parse_math": False, "axes.titley": 1.0, "svg.fonttype": "none", "svg.hashsalt": "twoway-audit"}


def check_figure_format(fmt) -> str:
    """Validate a figure format name (one of :data:`FIGURE_FORMATS`)."""
    if not isinstance(fmt, str) or fmt.lower() not in FIGURE_FORMATS:
        raise OptionError(f"figure format: expected one of {', '.join(FIGURE_FORMATS)}, found {fmt!r}; "
                          f"use {DEFAULT_FIGURE_FORMAT} (vector) or png (raster)")
    return fmt.lower()


def prepare_folder(outdir) -> str:
    """Create ``outdir`` if needed and check that it is writable."""
    outdir = os.fspath(outdir)
    try:
        os.makedirs(outdir, exist_ok=True)
    except OSError as exc:
        raise OptionError(f"report folder {outdir!r} cannot be created ({exc.strerror}); "
                          "choose a writable folder") from None
    if not os.access(outdir, os.W_OK):
        raise OptionError(f"report folder {outdir!r} is not writable; choose a writable folder")
    return outdir


def draw_figure(key: str, clean_data: dict, fmt: str = DEFAULT_FIGURE_FORMAT) -> bytes | None:
    """Draw one figure from figure data already passed through :func:`clean_figure_data`
    (only the entries the figure reads need be present); returns the file's bytes, or
    None when the figure has no data."""
    import gc

    import matplotlib

    draw = globals()[_DRAWERS[key]]
    # matplotlib builds many short-lived objects; the cyclic collector's passes over them
    # cost about a fifth of the drawing time and free nothing that matters here
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        with matplotlib.rc_context(_RC), warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from", category=UserWarning)
            warnings.filterwarnings("ignore", message=r"Matplotlib currently does not support", category=UserWarning)
            return draw(clean_data, fmt)
    finally:
        if was_enabled:
            gc.enable()


#: the figure-data entries each figure reads besides its own (``response``, ``alpha`` and
#: ``row_kind`` are always sent)
FIGURE_NEEDS = {"methods_p": ("methods_p", "cell_means"), "residual_qq": ("qq",)}
_COMMON = ("response", "alpha", "row_kind")


def figure_inputs(key: str, clean_data: dict) -> dict | None:
    """The part of the figure data that figure ``key`` reads, or None when some of it is
    not there (yet) or the figure's own entry is None (nothing to draw)."""
    needs = FIGURE_NEEDS.get(key, (key,))
    if any(n not in clean_data for n in (*_COMMON, *needs)) or clean_data[needs[0]] is None:
        return None
    return {n: clean_data[n] for n in (*_COMMON, *needs)}


def figure_keys(figure_data: dict) -> list[str]:
    """The keys of the figures :func:`write_figures` draws for this figure data, in order."""
    return [k for k in FIGURE_STEMS if figure_inputs(k, figure_data) is not None]


def write_figures(figure_data: dict, outdir, *, fmt: str = DEFAULT_FIGURE_FORMAT, workers=None,
                  shown: str | None = None) -> list[str]:
    """Write the report figures into ``outdir`` (created if needed).

    Parameters
    ----------
    figure_data : dict
        Plot coordinates from :func:`audit.diagnostics.plotdata.figure_data`
        (``Findings.figure_data``).  The method p-value, leave-one-out and
        Box-Cox figures are skipped when their entries are None; in summary
        mode so are the figures that need raw data.
    outdir : path
    fmt : {"svg", "png"}
        File format (default SVG).
    workers : FigureWorkers, optional
        Worker processes that draw the figures in parallel
        (:class:`audit.render.workers.FigureWorkers`; figures they already drew
        from early figure data are not drawn again); drawn here, one after
        another, when None.  The files are the same bytes either way.
    shown : str, optional
        The name error messages give instead of each file's path (the command
        line passes the report folder as typed, never its temporary folder).

    Returns
    -------
    list of str
        Paths of the files written, in the order of :data:`FIGURE_FILES`.
    """
    fmt = check_figure_format(fmt)
    outdir = prepare_folder(outdir)
    fd = clean_figure_data(figure_data)
    keys = figure_keys(fd)
    if workers is not None:
        blobs = workers.collect(keys, fd, fmt)
    else:
        blobs = {k: draw_figure(k, fd, fmt) for k in keys}
    written = []
    for k in keys:
        if blobs.get(k) is not None:
            final = os.path.join(outdir, figure_file(k, fmt))
            atomic_write_bytes(final, blobs[k], suffix="." + fmt, shown=final if shown is None else shown)
            written.append(final)
    return written


def clean_figure_data(obj):
    """A copy of the figure data with every string's control characters escaped."""
    from .text import sanitize

    if isinstance(obj, str):
        return sanitize(obj)
    if isinstance(obj, dict):
        return {k: clean_figure_data(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        if obj and all(isinstance(v, (int, float)) or v is None for v in obj[:1]) and \
                all(isinstance(v, (int, float)) or v is None for v in obj):
            return obj  # a list of numbers: nothing to clean
        return type(obj)(clean_figure_data(v) for v in obj)
    return obj
