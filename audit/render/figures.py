"""Figures for the report folder: one PNG per question, readable without the text.

Only draws; every coordinate comes from :func:`audit.diagnostics.plotdata.figure_data`,
computed by the API and carried in ``Findings.figure_data``.
matplotlib is imported lazily and used through its object interface with the
Agg canvas, so the global pyplot state of a caller is never touched.  Each file
is written to a temporary name in the target folder and moved into place with
``os.replace`` (a reader never sees a half-written figure).  Colour is never the
only carrier: traces differ by marker and line style as well.

User strings (column and level names) are drawn literally: math markup is off
(``text.parse_math = False``, so ``$x$`` is not a symbol) and control characters
are shown escaped.  A glyph missing from the font is drawn as a box without a
warning on stderr.
"""

from __future__ import annotations

import math
import os
import warnings

from .._io import atomic_write_with
from ..errors import OptionError

__all__ = ["write_figures", "FIGURE_FILES"]

FIGURE_FILES = {
    "cell_means": "cell-means.png",
    "residual_qq": "residual-normal-quantiles.png",
    "spread": "spread-vs-fitted.png",
    "sd_n": "cell-sd-vs-n.png",
    "loo": "leave-one-out-p.png",
    "boxcox": "box-cox-profile.png",
}
_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*", "h", "<", ">", "p")
_STYLES = ("-", "--", ":", "-.")
_DPI = 110


def _nan(xs):
    return [math.nan if x is None else float(x) for x in xs]


def _new_figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig, outdir: str, name: str) -> str:
    final = os.path.join(outdir, name)
    atomic_write_with(final, lambda tmp: fig.savefig(tmp, format="png", dpi=_DPI), suffix=".png")
    return final


def _cell_means(fd: dict, outdir: str) -> str:
    d = fd["cell_means"]
    resp = d["response"]
    o1, o2 = d["orientations"]
    fig = _new_figure(12.0, 5.2)
    axes = fig.subplots(1, 2)
    for ax, o in zip(axes, (o1, o2)):
        L = len(o["x_levels"])
        T = len(o["traces"])
        width = min(0.3, 0.6 / max(T, 1))
        for t, tr in enumerate(o["traces"]):
            dx = (t - (T - 1) / 2.0) * width / max(T - 1, 1) if T > 1 else 0.0
            xs = [i + dx for i in range(L)]
            m, lo, hi = _nan(tr["mean"]), _nan(tr["lower"]), _nan(tr["upper"])
            err = [[mm - ll if not (math.isnan(mm) or math.isnan(ll)) else 0.0 for mm, ll in zip(m, lo)],
                   [hh - mm if not (math.isnan(mm) or math.isnan(hh)) else 0.0 for mm, hh in zip(m, hi)]]
            ax.errorbar(xs, m, yerr=err, marker=_MARKERS[t % len(_MARKERS)], linestyle=_STYLES[t % len(_STYLES)],
                        capsize=4, linewidth=1.6, markersize=7, label=f"{o['trace_factor']} = {tr['level']}")
        ax.set_xticks(range(L), o["x_levels"])
        ax.set_xlabel(o["x_factor"])
        ax.set_ylabel(f"mean {resp}")
        ax.set_title(f"{o['x_factor']} on the x axis, one line per level of {o['trace_factor']}", fontsize=10)
        ax.legend(title=o["trace_factor"], fontsize=8, title_fontsize=9)
        ax.grid(True, alpha=0.3)
    a, b = o1["x_factor"], o1["trace_factor"]
    fig.suptitle(f"Does the effect of {a} on {resp} depend on {b}? Cell means with 95% intervals\n"
                 "(non-parallel lines suggest an interaction; bars: 95% t interval from each cell's own SD)",
                 fontsize=11)
    return _save(fig, outdir, FIGURE_FILES["cell_means"])


def _residual_qq(fd: dict, outdir: str) -> str | None:
    d = fd["qq"]
    if d is None:
        return None
    theo, samp = _nan(d["theoretical"]), _nan(d["sample"])
    finite = [abs(x) for x in theo + samp if not math.isnan(x)]
    lim = (max(finite) if finite else 3.0) + 0.5
    lo = [max(-lim, x) if not math.isnan(x) else -lim for x in _nan(d["band_lower"])]
    hi = [min(lim, x) if not math.isnan(x) else lim for x in _nan(d["band_upper"])]
    fig = _new_figure(7.0, 6.4)
    ax = fig.subplots()
    ax.fill_between(theo, lo, hi, color="0.85", label=f"{d['level']:.0%} simultaneous band (Kolmogorov)")
    ax.plot(theo, lo, color="0.45", linestyle="--", linewidth=1)
    ax.plot(theo, hi, color="0.45", linestyle="--", linewidth=1)
    ax.plot([-lim, lim], [-lim, lim], color="black", linewidth=1, label="normal reference (y = x)")
    inside = [(x, y, a, b) for x, y, a, b in zip(theo, samp, lo, hi) if a <= y <= b]
    outside = [(x, y) for x, y, a, b in zip(theo, samp, lo, hi) if not (a <= y <= b)]
    ax.scatter([p[0] for p in inside], [p[1] for p in inside], s=12, marker="o", label="residual inside band")
    if outside:
        ax.scatter([p[0] for p in outside], [p[1] for p in outside], s=40, marker="x", color="firebrick",
                   label=f"residual outside band ({d['outside']})")
    ax.set_xlim(-lim, lim)
    ax.set_ylim(-lim, lim)
    ax.set_xlabel("expected normal quantile (Blom plotting positions)")
    ax.set_ylabel(f"studentized residual of {fd['response']} (full model)")
    note = f"n = {d['n']}" + (", points thinned for drawing" if d["thinned"] else "")
    ax.set_title(f"Are the residuals close to normal?\nNormal-quantile plot with a simultaneous band\n({note})",
                 fontsize=11)
    ax.legend(fontsize=8, loc="upper left")
    ax.grid(True, alpha=0.3)
    return _save(fig, outdir, FIGURE_FILES["residual_qq"])


def _spread(fd: dict, outdir: str) -> str:
    d = fd["spread"]
    resp = d["response"]
    has_pts = d["points"] is not None
    fig = _new_figure(12.0 if has_pts else 6.5, 5.2)
    axes = fig.subplots(1, 2 if has_pts else 1)
    if not has_pts:
        axes = [None, axes]
    else:
        ax = axes[0]
        ax.scatter(d["points"]["fitted"], d["points"]["resid"], s=10, alpha=0.5, marker="o",
                   label="observation" + (" (random subset)" if d["thinned"] else ""))
        ax.axhline(0.0, color="black", linewidth=1, label="zero residual")
        ax.set_xlabel(f"fitted cell mean of {resp}")
        ax.set_ylabel(f"residual ({resp} minus cell mean)")
        ax.set_title("Residuals by fitted mean: does the vertical spread fan out?", fontsize=10)
        ax.legend(fontsize=8)
        ax.grid(True, alpha=0.3)
    ax = axes[1]
    cells = [c for c in d["cells"] if c["sd"] is not None]
    ax.scatter([c["mean"] for c in cells], [c["sd"] for c in cells], marker="s", s=36, label="one cell")
    if len(cells) <= 30:
        for c in cells:
            ax.annotate(c["label"], (c["mean"], c["sd"]), fontsize=7, xytext=(3, 3), textcoords="offset points")
    if d["pooled_sd"] is not None:
        ax.axhline(d["pooled_sd"], color="black", linestyle="--", linewidth=1,
                   label=f"pooled SD = {d['pooled_sd']:.3g}")
    ax.set_xlabel(f"cell mean of {resp}")
    ax.set_ylabel(f"cell SD of {resp}")
    ax.set_ylim(bottom=0)
    ax.set_title("Cell SD against cell mean (a rising trend suggests a log or power scale)", fontsize=10)
    ax.legend(fontsize=8)
    ax.grid(True, alpha=0.3)
    fig.suptitle(f"Does the spread of {resp} change with its level?", fontsize=11)
    return _save(fig, outdir, FIGURE_FILES["spread"])


def _sd_n(fd: dict, outdir: str) -> str | None:
    d = fd["sd_n"]
    if len(d["n"]) < 2:
        return None
    fig = _new_figure(7.0, 5.6)
    ax = fig.subplots()
    rho = d["spearman"]
    lab = "one cell" + (f" (Spearman rho of size with SD = {rho:.2f})" if rho is not None else "")
    ax.scatter(d["n"], d["sd"], marker="D", s=36, label=lab)
    if len(d["n"]) <= 30:
        for x, y, t in zip(d["n"], d["sd"], d["labels"]):
            if y is not None:
                ax.annotate(t, (x, y), fontsize=7, xytext=(3, 3), textcoords="offset points")
    if d["pooled_sd"] is not None:
        ax.axhline(d["pooled_sd"], color="black", linestyle="--", linewidth=1,
                   label=f"pooled SD = {d['pooled_sd']:.3g}")
    ax.set_xlabel("cell size n (observations in the cell)")
    ax.set_ylabel(f"cell SD of {d['response']}")
    ax.set_ylim(bottom=0)
    ax.set_title("Are large variances paired with small or with large cells?\n"
                 "Falling trend: classical F liberal; rising trend: conservative (Box 1954)", fontsize=11)
    ax.legend(fontsize=8)
    ax.grid(True, alpha=0.3)
    return _save(fig, outdir, FIGURE_FILES["sd_n"])


def _loo(fd: dict, outdir: str) -> str | None:
    d = fd["loo"]
    if d is None:
        return None
    alpha = d["alpha"] if d["alpha"] is not None else fd["alpha"]
    floor = 1e-16  # p-values below this are drawn at it (double precision cannot tell them apart from 0)
    clipped = any(p < floor for p in d["p"])
    rows, ps = d["rows"], [max(p, floor) for p in d["p"]]
    below = [(r, p) for r, p in zip(rows, ps) if p < alpha]
    above = [(r, p) for r, p in zip(rows, ps) if p >= alpha]
    fig = _new_figure(9.0, 5.2)
    ax = fig.subplots()
    n_below, n_all = d["n_below_alpha"], d["n"]
    if above:
        ax.scatter([r for r, _ in above], [p for _, p in above], s=12, marker="o",
                   label=f"p >= alpha ({n_all - n_below} of {n_all} rows)")
    if below:
        ax.scatter([r for r, _ in below], [p for _, p in below], s=22, marker="v", color="firebrick",
                   label=f"p < alpha ({n_below} of {n_all} rows)")
    ax.axhline(alpha, color="black", linestyle="--", linewidth=1.2, label=f"alpha = {alpha:g}")
    if d.get("p_full") is not None:
        ax.axhline(max(d["p_full"], floor), color="0.4", linestyle=":", linewidth=1.2,
                   label=(f"p with all rows = {d['p_full']:.3g}" if d["p_full"] >= floor
                          else "p with all rows < 1e-16"))
    if clipped:
        ax.text(0.01, 0.93, "p-values below 1e-16 are drawn at 1e-16", transform=ax.transAxes, fontsize=8)
    ax.set_yscale("log")
    row_kind = d.get("row_kind") or fd["row_kind"]
    kind = {"line": "line number in the input file", "index": "index label in the data frame"}.get(
        row_kind, "0-based row position in the data frame")
    ax.set_xlabel(f"row left out ({kind})")
    ax.set_ylabel("interaction p-value without that row (log scale)")
    ax.set_title("Does any single observation decide the interaction test?\n"
                 "Interaction p-value with each row left out in turn"
                 + (" (drawing thinned; counts are of all rows)" if d["thinned"] else ""), fontsize=11)
    ax.legend(fontsize=8)
    ax.grid(True, alpha=0.3, which="both")
    return _save(fig, outdir, FIGURE_FILES["loo"])


def _boxcox(fd: dict, outdir: str) -> str | None:
    d = fd["boxcox"]
    if d is None:
        return None
    fig = _new_figure(8.0, 5.4)
    ax = fig.subplots()
    ax.plot(d["lambda"], d["loglik"], color="black", linewidth=1.6, label="profile log-likelihood")
    if d["lambda_ci"] is not None:
        lo, hi = d["lambda_ci"]
        ax.axvspan(lo, hi, color="0.88", label=f"95% interval for lambda [{lo:.2f}, {hi:.2f}]")
    ax.axhline(d["cutoff"], color="0.4", linestyle=":", linewidth=1,
               label="cut-off: max - chi2(1, 0.95)/2")
    if d["lambda_hat"] is not None:
        ax.axvline(d["lambda_hat"], color="black", linestyle="-.", linewidth=1.2,
                   label=f"best lambda = {d['lambda_hat']:.2f}")
    ax.axvline(1.0, color="tab:blue", linestyle="--", linewidth=1.2, label="lambda = 1 (no transformation)")
    ax.axvline(0.0, color="tab:orange", linestyle=(0, (1, 1)), linewidth=1.4, label="lambda = 0 (log)")
    ax.set_xlabel("Box-Cox power lambda")
    ax.set_ylabel("profile log-likelihood of the full model")
    ax.set_title(f"Which power transformation of {fd['response']} fits best?\n"
                 "Box-Cox profile likelihood (is lambda = 1 inside the interval?)", fontsize=11)
    ax.legend(fontsize=8)
    ax.grid(True, alpha=0.3)
    return _save(fig, outdir, FIGURE_FILES["boxcox"])


def write_figures(figure_data: dict, outdir) -> list[str]:
    """Write the report figures into ``outdir`` (created if needed).

    Parameters
    ----------
    figure_data : dict
        Plot coordinates from :func:`audit.diagnostics.plotdata.figure_data`
        (``Findings.figure_data``).  The leave-one-out and Box-Cox figures are
        skipped when their entries are None; in summary mode so are the figures
        that need raw data.
    outdir : path

    Returns
    -------
    list of str
        Paths of the PNG files written, in a fixed order.
    """
    outdir = os.fspath(outdir)
    try:
        os.makedirs(outdir, exist_ok=True)
    except OSError as exc:
        raise OptionError(f"report folder {outdir!r} cannot be created ({exc.strerror}); "
                          "choose a writable folder") from None
    if not os.access(outdir, os.W_OK):
        raise OptionError(f"report folder {outdir!r} is not writable; choose a writable folder")
    import matplotlib

    fd = _clean_strings(figure_data)
    with matplotlib.rc_context({"text.parse_math": False}), warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from", category=UserWarning)
        warnings.filterwarnings("ignore", message=r"Matplotlib currently does not support", category=UserWarning)
        written = [_cell_means(fd, outdir)]
        for draw in (_residual_qq, _spread, _sd_n, _loo, _boxcox):
            p = draw(fd, outdir)
            if p is not None:
                written.append(p)
    return written


def _clean_strings(obj):
    """A copy of the figure data with every string's control characters escaped."""
    from .text import sanitize

    if isinstance(obj, str):
        return sanitize(obj)
    if isinstance(obj, dict):
        return {k: _clean_strings(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return type(obj)(_clean_strings(v) for v in obj)
    return obj
