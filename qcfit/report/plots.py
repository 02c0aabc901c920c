"""Charts of the shift report, drawn with matplotlib (Agg, no pyplot) as inline SVG text.

Each public function takes a :class:`~qcfit.report.data.ReportData` (and the lines to draw)
and returns one ``<svg>`` element as a string, ready to sit inside the HTML page: no XML
header, no fixed size (the page sets the width, the viewBox keeps the shape), ids made unique
per chart so several charts can share one page, and text left as text (escaped by matplotlib's
SVG writer; names from config or data are also kept out of mathtext).

Colours are our own colour-blind-safe set: a blue / brick-orange pair for direction (fewer /
more than expected) and status hues that differ in lightness as well as hue; every colour is
paired with a marker shape or a word, so a grey-scale print still reads.
"""

from __future__ import annotations

import contextlib
import gc
import io
import math
import re
from collections.abc import Iterator, Sequence

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import FuncFormatter, MaxNLocator  # noqa: E402

from qcfit.report.data import (  # noqa: E402
    ALARM,
    IN_CONTROL,
    KIND_MIX,
    TOO_LITTLE,
    WATCH,
    ReportData,
)

# --- palette (ours) -------------------------------------------------------------------------
INK = "#1c2430"
MUTED = "#5f6b7a"
FAINT = "#c9cfd6"
GRID = "#e6e9ed"
PAPER = "#ffffff"
BAND = "#fff4d6"  # the report's shift, highlighted in the over-time charts
MORE = "#b5472b"  # more than expected (brick)
FEWER = "#2f67a0"  # fewer than expected (blue)
NEUTRAL = "#aab4bf"
STATUS = {ALARM: "#b5472b", WATCH: "#c98a0c", IN_CONTROL: "#2f67a0", TOO_LITTLE: "#8d96a0"}
MARKER = {ALARM: "D", WATCH: "^", IN_CONTROL: "o", TOO_LITTLE: "o"}
RESIDUAL_MAP = LinearSegmentedColormap.from_list(
    "qcfit_residual", [(0.0, "#1f4f82"), (0.33, "#8fb3d9"), (0.5, "#f6f6f4"),
                       (0.67, "#e8a487"), (1.0, "#8e2f17")])

RESIDUAL_NOTE = 2.0  # |adjusted residual| worth marking (common practice, no source)
MAP_ALL_NUMBERS = 12  # up to this many lines every cell of the map carries its number
RESIDUAL_CLIP = 6.0  # colour scale of the residual map ends here
P_FLOOR = 1e-8  # p-values below this are drawn at it ("off scale")
WIDTH = 7.2  # inches: the A4 text width with 12 mm margins, less a little
FONT = 7.0

RC = {
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Liberation Sans", "Arial", "Helvetica"],
    "font.size": FONT,
    "axes.titlesize": FONT + 0.5,
    "axes.titleweight": "bold",
    "axes.labelsize": FONT,
    "axes.edgecolor": FAINT,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.6,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.major.width": 0.5,
    "ytick.major.width": 0.5,
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "xtick.labelsize": FONT - 0.5,
    "ytick.labelsize": FONT - 0.5,
    "svg.fonttype": "none",
    "axes.spines.top": False,
    "axes.spines.right": False,
    "figure.facecolor": PAPER,
    "axes.facecolor": PAPER,
}


# --- helpers --------------------------------------------------------------------------------


def safe(text: object, limit: int = 28) -> str:
    """A name as matplotlib text: ``$`` escaped (no mathtext), control characters dropped,
    shortened to ``limit`` characters with an ellipsis."""
    s = "".join(ch if ch.isprintable() else " " for ch in str(text))
    if len(s) > limit:
        s = s[: limit - 1].rstrip() + "\u2026"
    return s.replace("$", r"\$")


@contextlib.contextmanager
def paused_gc() -> Iterator[None]:
    """Pause the cyclic garbage collector while charts are drawn, then restore it.

    Matplotlib builds many short-lived reference cycles; with a large heap (numpy, scipy,
    SQLAlchemy loaded) the collections they trigger cost about a third of the drawing time.
    The cycles are collected as usual once the collector runs again.
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def wrap(text: object, width: int, lines: int) -> str:
    """A name on at most ``lines`` lines of about ``width`` characters (for narrow labels)."""
    words = str(text).split()
    out: list[str] = []
    for w in words:
        if out and len(out[-1]) + 1 + len(w) <= width:
            out[-1] += " " + w
        else:
            out.append(w)
    if len(out) > lines:
        out = out[: lines - 1] + [" ".join(out[lines - 1:])]
    return "\n".join(safe(part, width) for part in out)


_HEADER = re.compile(r"^.*?(?=<svg)", re.S)
_PLAIN_ID = re.compile(r'\sid="(?:figure|axes|patch|line2d|text|legend|matplotlib\.axis|xtick|'
                       r'ytick|PathCollection|PolyCollection|QuadMesh|image|LineCollection|'
                       r'FillBetweenPolyCollection|BarContainer|collection)_\d+"')
_SVG_OPEN = re.compile(r"<svg\b")
_COMMENT = re.compile(r"<!--.*?-->", re.S)


def to_svg(fig: Figure, key: str, label: str) -> str:
    """The figure as one inline ``<svg>`` element (see the module docstring)."""
    buf = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": f"qcfit-{key}"}):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None},
                    facecolor=PAPER)
    text = _HEADER.sub("", buf.getvalue(), count=1)
    text = _COMMENT.sub("", text)
    text = _PLAIN_ID.sub("", text)
    aria = label.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;")
    text = _SVG_OPEN.sub(f'<svg class="chart chart-{key}" role="img" aria-label="{aria}"', text,
                         count=1)
    if "<script" in text.lower():  # matplotlib escapes text; this guards a regression
        raise ValueError("chart SVG contains a script element")
    return text.strip()


def panels(rows: int, cols: int, *, row_h: float, top: float = 0.22, bottom: float = 0.42,
           left: float = 0.55, right: float = 0.1, hgap: float = 0.32, wgap: float = 0.28,
           width: float = WIDTH, ratios: Sequence[float] | None = None,
           **kw) -> tuple[Figure, np.ndarray]:
    """A figure of rows x cols panels with margins and gaps in inches (a fixed layout: the
    automatic layout engines cost more than the drawing)."""
    ratios = list(ratios) if ratios is not None else [1.0] * rows
    mean = sum(ratios) / len(ratios)
    height = top + bottom + row_h * rows + hgap * (rows - 1)
    fig = Figure(figsize=(width, height))
    axes = fig.subplots(rows, cols, squeeze=False, gridspec_kw={
        "left": left / width, "right": 1 - right / width, "top": 1 - top / height,
        "bottom": bottom / height, "hspace": hgap / (row_h * mean),
        "wspace": wgap / ((width - left - right - wgap * (cols - 1)) / cols),
        "height_ratios": ratios}, **kw)
    return fig, axes


def _grid_shape(n: int, max_cols: int) -> tuple[int, int]:
    cols = max(1, min(n, max_cols))
    return math.ceil(n / cols), cols


def _style(ax, *, ygrid: bool = True, xgrid: bool = False) -> None:
    ax.grid(False)
    if ygrid:
        ax.yaxis.grid(True, color=GRID, linewidth=0.6)
    if xgrid:
        ax.xaxis.grid(True, color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)


def _shift_ticks(ax, data: ReportData) -> None:
    """Shift ticks: a few plant dates + shift names, the report's shift highlighted."""
    n = len(data.history)
    ax.set_xlim(-0.6, n - 0.4)
    ax.axvspan(n - 1.5, n - 0.5, color=BAND, zorder=0, linewidth=0)
    ticks = sorted({0, (n - 1) // 2, n - 1}) if n > 2 else list(range(n))
    ax.set_xticks(ticks)
    ax.set_xticklabels([f"{data.history[i].date:%d %b}\n{safe(data.history[i].name, 6)}"
                        for i in ticks])


def _status_points(ax, x: np.ndarray, y: np.ndarray, verdicts: Sequence[str]) -> None:
    ok = np.isfinite(y)
    ax.plot(x[ok], y[ok], color=FAINT, linewidth=0.7, zorder=1)
    for verdict, colour in STATUS.items():
        sel = ok & np.array([v == verdict for v in verdicts], dtype=bool)
        if not sel.any():
            continue
        hollow = verdict == TOO_LITTLE
        ax.plot(x[sel], y[sel], linestyle="none", marker=MARKER[verdict],
                markersize=3.6 if verdict in (ALARM, WATCH) else 2.9,
                markerfacecolor="none" if hollow else colour, markeredgecolor=colour,
                markeredgewidth=0.7, zorder=3)


def _hline(ax, y: float, colour: str, style: str, text: str = "") -> None:
    ax.axhline(y, color=colour, linestyle=style, linewidth=0.8, zorder=2)
    if text:
        ax.annotate(text, xy=(0.0, y), xycoords=("axes fraction", "data"), xytext=(2, 1.5),
                    textcoords="offset points", fontsize=FONT - 1.5, color=colour, va="bottom")


# --- per line: observed vs expected --------------------------------------------------------


def mix_bars(data: ReportData, lines: Sequence[str], *, max_cols: int = 5) -> str:
    """Per line, observed defects per category (bars) against the baseline's expected count
    (tick); bars with |adjusted residual| >= 2 are coloured and carry the residual as text."""
    codes = [c for c, _ in data.categories]
    names = [safe(n, 16) for _, n in data.categories]
    rows, cols = _grid_shape(len(lines), max_cols)
    k = len(codes)
    with matplotlib.rc_context(RC):
        fig, axes = panels(rows, cols, row_h=0.11 * k + 0.05, top=0.34, bottom=0.32,
                           left=0.95, right=0.15, hgap=0.62, wgap=0.2, sharey=True)
        y = np.arange(k)
        index = {ln: i for i, (ln, _) in enumerate(data.lines)}
        for a, line in enumerate(lines):
            ax = axes[a // cols][a % cols]
            f = data.finding(KIND_MIX, line)
            obs = np.array(data.counts[index[line]], dtype=float)
            exp = np.full(k, np.nan)
            res = np.full(k, np.nan)
            if f is not None and len(f.expected) == k and f.categories == tuple(codes):
                exp = np.array(f.expected, dtype=float)
                res = np.array(f.residuals if len(f.residuals) == k else [np.nan] * k)
            colours = [MORE if r >= RESIDUAL_NOTE else FEWER if r <= -RESIDUAL_NOTE else NEUTRAL
                       for r in np.nan_to_num(res)]
            ax.barh(y, obs, height=0.62, color=colours, zorder=2)
            if np.isfinite(exp).any():
                ax.scatter(exp, y, marker="|", s=70, color=INK, linewidths=1.1, zorder=3)
            top = max(float(np.nanmax(np.r_[obs, exp, 1.0])), 1.0)
            ax.set_xlim(0, top * 1.32)
            for j in range(k):
                if np.isfinite(res[j]) and abs(res[j]) >= RESIDUAL_NOTE:
                    end = max(obs[j], exp[j] if np.isfinite(exp[j]) else 0)
                    ax.text(end + top * 0.03, j, f"{res[j]:+.1f}", va="center",
                            fontsize=FONT - 1, color=MORE if res[j] > 0 else FEWER,
                            fontweight="bold")
            ax.set_title(_bar_title(data, line, f), loc="left", fontsize=FONT, pad=3)
            ax.set_yticks(y)
            ax.set_yticklabels(names)
            ax.invert_yaxis()
            ax.xaxis.set_major_locator(MaxNLocator(3, integer=True))
            _style(ax, ygrid=False, xgrid=True)
            if a + cols >= len(lines):
                ax.set_xlabel("defects (count)", labelpad=1)
        for a in range(len(lines), rows * cols):
            axes[a // cols][a % cols].set_visible(False)
        return to_svg(fig, "mix", "Observed defects per category against the baseline, "
                      "one panel per line")


def _bar_title(data: ReportData, line: str, f) -> str:
    if f is None:
        return f"{safe(line, 12)}: no mix test"
    word = {ALARM: "ALARM", WATCH: "WATCH", IN_CONTROL: "in control",
            TOO_LITTLE: "too little data"}.get(f.verdict, f.verdict.replace("-", " "))
    n = f.n
    return f"{safe(line, 12)}: {word}\n{n:,} defect{'' if n == 1 else 's'}" + (
        f", w {f.effect_size:.2f}" if math.isfinite(f.effect_size)
        and f.verdict in (ALARM, WATCH, IN_CONTROL) else "")


# --- lines x categories: adjusted residuals ------------------------------------------------


def residual_map(data: ReportData, lines: Sequence[str]) -> str:
    """Adjusted residuals of each line's mix against its baseline, lines x categories, with
    the number written in every cell (the colour repeats the number)."""
    codes = [c for c, _ in data.categories]
    k = len(codes)
    mat = np.full((len(lines), k), np.nan)
    for i, line in enumerate(lines):
        f = data.finding(KIND_MIX, line)
        if f is not None and len(f.residuals) == k and f.categories == tuple(codes):
            mat[i] = np.array(f.residuals, dtype=float)
    names = dict(data.lines)
    with matplotlib.rc_context(RC):
        labels = [wrap(n, 13, 2) for _, n in data.categories]
        deep = max((lb.count("\n") + 1 for lb in labels), default=1)
        fig, axes = panels(1, 1, row_h=0.18 * len(lines), top=0.06, bottom=0.06 + 0.11 * deep,
                           left=1.75, right=0.75)
        ax = axes[0][0]
        shown = np.ma.masked_invalid(np.clip(mat, -RESIDUAL_CLIP, RESIDUAL_CLIP))
        ax.pcolormesh(np.arange(k + 1) - 0.5, np.arange(len(lines) + 1) - 0.5, shown,
                              cmap=RESIDUAL_MAP, vmin=-RESIDUAL_CLIP, vmax=RESIDUAL_CLIP,
                              edgecolors=PAPER, linewidth=0.8)
        ax.set_xlim(-0.5, k - 0.5)
        ax.set_ylim(len(lines) - 0.5, -0.5)
        ax.set_facecolor("#eef0f2")
        every = len(lines) <= MAP_ALL_NUMBERS
        for i in range(len(lines)):
            for j in range(k):
                r = mat[i, j]
                if np.isfinite(r) and not every and abs(r) < RESIDUAL_NOTE:
                    continue  # a large plant: only the cells worth a look carry their number
                if not np.isfinite(r):
                    ax.text(j, i, "\u2013", ha="center", va="center", color=MUTED,
                            fontsize=FONT - 1)
                    continue
                strong = abs(r) >= RESIDUAL_NOTE
                ax.text(j, i, f"{r:+.1f}", ha="center", va="center", fontsize=FONT - 0.5,
                        color=PAPER if abs(r) >= 4 else INK,
                        fontweight="bold" if strong else "normal")
        ax.set_xticks(range(k))
        ax.set_xticklabels(labels)
        ax.set_yticks(range(len(lines)))
        ax.set_yticklabels([f"{safe(ln, 10)}  {safe(names.get(ln, ''), 22)}" for ln in lines])
        ax.tick_params(length=0)
        for side in ax.spines.values():
            side.set_visible(False)
        box = ax.get_position()
        cax = fig.add_axes((box.x1 + 0.15 / WIDTH, box.y0, 0.1 / WIDTH, box.height))
        _residual_key(cax)
        return to_svg(fig, "residuals", "Map of adjusted residuals, lines by categories")


def _residual_key(cax) -> None:
    """The residual colour scale as vector swatches (a colorbar would embed a bitmap)."""
    edges = np.linspace(-RESIDUAL_CLIP, RESIDUAL_CLIP, 25)
    mids = (edges[:-1] + edges[1:]) / 2
    colours = RESIDUAL_MAP((mids + RESIDUAL_CLIP) / (2 * RESIDUAL_CLIP))
    cax.bar(np.zeros(len(mids)), np.diff(edges), bottom=edges[:-1], width=1.0, color=colours,
            linewidth=0, align="center")
    cax.set_xlim(-0.5, 0.5)
    cax.set_ylim(-RESIDUAL_CLIP, RESIDUAL_CLIP)
    cax.set_xticks([])
    cax.yaxis.tick_right()
    cax.yaxis.set_label_position("right")
    cax.set_yticks([-6, -4, -2, 0, 2, 4, 6])
    cax.set_yticklabels(["\u2264\u22126", "\u22124", "\u22122", "0", "+2", "+4", "\u2265+6"])
    cax.tick_params(labelsize=FONT - 1.5, length=2)
    cax.set_ylabel("adjusted residual", fontsize=FONT - 1, labelpad=2)
    for side in cax.spines.values():
        side.set_visible(False)


# --- over time: mix test p-value and effect size --------------------------------------------


def _p_label(v: float, _pos: object = None) -> str:
    if v <= 0:
        return "1"
    return f"{10.0 ** -v:g}" if v < 4 else f"1e-{round(v)}"


def _p_axis(ax, top: float) -> None:
    ax.set_ylim(-0.15, top + 0.25)
    step = 1 if top <= 4 else 2
    ax.set_yticks(list(range(0, int(top) + 1, step)))
    ax.yaxis.set_major_formatter(FuncFormatter(_p_label))


def mix_history(data: ReportData, lines: Sequence[str], *, max_cols: int = 5) -> str:
    """Per line over the history shifts: the mix test's adjusted p-value (log scale, smaller is
    higher) with the watch and alarm levels, and its effect size w with the floor."""
    rows, cols = _grid_shape(len(lines), max_cols)
    hist = {h.line: h for h in data.line_history}
    x = np.arange(len(data.history))
    with matplotlib.rc_context(RC):
        fig, axes = panels(rows * 2, cols, row_h=0.56, top=0.2, bottom=0.34, left=0.62,
                           right=0.2, hgap=0.1, wgap=0.32, ratios=[1.2, 0.8] * rows,
                           sharex=True)
        for a, line in enumerate(lines):
            r, c = divmod(a, cols)
            ax_p, ax_w = axes[2 * r][c], axes[2 * r + 1][c]
            h = hist[line]
            lv = data.levels_for(line)
            p = np.array(h.mix_adjusted_p, dtype=float)
            yp = -np.log10(np.clip(p, P_FLOOR, 1.0))
            _p_axis(ax_p, math.ceil(max([3.0, *yp[np.isfinite(yp)]])))
            _hline(ax_p, -math.log10(lv.watch_level), STATUS[WATCH], (0, (3, 2)))
            _hline(ax_p, -math.log10(lv.alarm_level), STATUS[ALARM], "-")
            _status_points(ax_p, x, yp, h.mix_verdict)
            ax_p.set_title(safe(line, 14), loc="left", pad=2)
            _shift_ticks(ax_p, data)
            _style(ax_p)
            w = np.array(h.mix_effect, dtype=float)
            w_top = _w_top(w, h.mix_verdict, lv.min_effect_w)
            ax_w.set_ylim(0, w_top * 1.08)
            _hline(ax_w, lv.min_effect_w, INK, (0, (1, 1.5)))
            _status_points(ax_w, x, np.minimum(w, w_top), h.mix_verdict)
            _shift_ticks(ax_w, data)
            _style(ax_w)
            if c == 0:
                ax_p.set_ylabel("adjusted p\n(log scale)")
                ax_w.set_ylabel("effect size w")
            if a + cols < len(lines):
                ax_w.tick_params(labelbottom=False)
            ax_p.tick_params(labelbottom=False)
        for a in range(len(lines), rows * cols):
            r, c = divmod(a, cols)
            axes[2 * r][c].set_visible(False)
            axes[2 * r + 1][c].set_visible(False)
        return to_svg(fig, "tests", "Mix test p-value and effect size over the last shifts")


def _w_top(w: np.ndarray, verdicts: Sequence[str], floor: float) -> float:
    """Top of the effect-size axis: room for the floor and the tested shifts' values (a
    shift with too little data can show a huge w from a handful of defects: drawn at the top)."""
    tested = [v for v, d in zip(w, verdicts, strict=True)
              if math.isfinite(v) and d in (ALARM, WATCH, IN_CONTROL)]
    return max([2.0 * floor if floor > 0 else 0.5, *tested])


# --- over time: defect rate -----------------------------------------------------------------


def rate_history(data: ReportData, lines: Sequence[str], *, max_cols: int = 5) -> str:
    """Per line: defects per 100 inspected units per shift, with the baseline rate, the rate
    floor (baseline x min_rate_ratio) and the exact Poisson limit at the alarm level."""
    rows, cols = _grid_shape(len(lines), max_cols)
    hist = {h.line: h for h in data.line_history}
    x = np.arange(len(data.history))
    with matplotlib.rc_context(RC):
        fig, axes = panels(rows, cols, row_h=0.75, top=0.2, bottom=0.34, left=0.62, right=0.2,
                           hgap=0.3, wgap=0.32, sharex=True)
        for a, line in enumerate(lines):
            ax = axes[a // cols][a % cols]
            h = hist[line]
            lv = data.levels_for(line)
            rate = 100 * np.array(h.rate, dtype=float)
            base = 100 * np.array(h.rate_baseline, dtype=float)
            limit = 100 * np.array(h.rate_limit, dtype=float)
            if np.isfinite(base).any():
                ax.step(x, base, where="mid", color=INK, linewidth=0.9, zorder=2)
                ax.step(x, base * lv.min_rate_ratio, where="mid", color=INK, linewidth=0.8,
                        linestyle=(0, (1, 1.5)), zorder=2)
            if np.isfinite(limit).any():
                ax.step(x, limit, where="mid", color=STATUS[ALARM], linewidth=0.8,
                        linestyle=(0, (4, 2)), zorder=2)
            _status_points(ax, x, rate, h.rate_verdict)
            if not np.isfinite(rate).any():
                ax.text(0.5, 0.5, "no units inspected recorded", transform=ax.transAxes,
                        ha="center", va="center", color=MUTED, fontsize=FONT - 0.5)
            values = np.r_[rate, base, limit]
            values = values[np.isfinite(values)]
            if values.size:
                ax.set_ylim(max(0.0, values.min() * 0.8), values.max() * 1.1)
            ax.set_title(safe(line, 14), loc="left", pad=2)
            _shift_ticks(ax, data)
            _style(ax)
            if a % cols == 0:
                ax.set_ylabel("defects per\n100 units (%)")
            if a + cols < len(lines):
                ax.tick_params(labelbottom=False)
        for a in range(len(lines), rows * cols):
            axes[a // cols][a % cols].set_visible(False)
        return to_svg(fig, "rate", "Defect rate per 100 units over the last shifts")


# --- over time: sequential charts -----------------------------------------------------------

SEQ_SHOWN = 4  # charts named and coloured (the same on every panel); the rest thin grey
SEQ_COLOURS = ("#2f67a0", "#b5472b", "#3d8a5a", "#7a4f9a")
SEQ_STYLES = ("-", (0, (4, 1.5)), (0, (1, 1)), (0, (6, 2, 1, 2)))
SEQ_WORDS = ("solid", "dashed", "dotted", "dash-dot")
SEQ_CAP = 4.0  # the y axis ends at 400 % of the threshold; higher values are drawn there


def sequential_key(data: ReportData, lines: Sequence[str]) -> list[tuple[str, str, str]]:
    """The charts named in :func:`sequential`: (chart name, colour, line style word), the
    charts that came nearest their threshold on any drawn line first."""
    best: dict[str, float] = {}
    for s in data.charts:
        if s.line in lines:
            r = _ratio(s)
            peak = float(np.nanmax(r)) if np.isfinite(r).any() else -1.0
            best[s.chart] = max(best.get(s.chart, -1.0), peak)
    names = sorted(best, key=lambda c: (-best[c], c))[:SEQ_SHOWN]
    return [(n, SEQ_COLOURS[i], SEQ_WORDS[i]) for i, n in enumerate(names)]


def sequential(data: ReportData, lines: Sequence[str], *, max_cols: int = 5) -> str:
    """Per line: each sequential chart's statistic as a share of its threshold (100 % = the
    chart signals). The charts of :func:`sequential_key` keep one colour and line style on
    every panel; any others are thin grey lines."""
    rows, cols = _grid_shape(len(lines), max_cols)
    x = np.arange(len(data.history))
    style = {name: i for i, (name, _, _) in enumerate(sequential_key(data, lines))}
    by_line: dict[str, list] = {}
    for s in data.charts:
        by_line.setdefault(s.line, []).append(s)
    with matplotlib.rc_context(RC):
        fig, axes = panels(rows, cols, row_h=0.75, top=0.2, bottom=0.34, left=0.62, right=0.2,
                           hgap=0.3, wgap=0.32, sharex=True)
        for a, line in enumerate(lines):
            ax = axes[a // cols][a % cols]
            mine = by_line.get(line, [])
            peaks = [float(np.nanmax(r)) for r in (_ratio(s) for s in mine) if np.isfinite(r).any()]
            top = min(max([1.2, *peaks]), SEQ_CAP)
            for s in mine:
                ratio = 100 * np.minimum(_ratio(s), top)  # beyond the cap: drawn at the top
                i = style.get(s.chart)
                if i is None:
                    ax.plot(x, ratio, color=FAINT, linewidth=0.5, zorder=1)
                else:
                    ax.plot(x, ratio, color=SEQ_COLOURS[i], linestyle=SEQ_STYLES[i],
                            linewidth=1.0, zorder=3 - i * 0.1)
            ax.set_ylim(0, 100 * top * 1.08)
            _hline(ax, 100.0, STATUS[ALARM], "-")
            if not mine:
                ax.text(0.5, 0.5, "no chart values", transform=ax.transAxes, ha="center",
                        va="center", color=MUTED)
            ax.set_title(safe(line, 14), loc="left", pad=2)
            _shift_ticks(ax, data)
            _style(ax)
            if a % cols == 0:
                ax.set_ylabel("statistic /\nthreshold (%)")
            if a + cols < len(lines):
                ax.tick_params(labelbottom=False)
        for a in range(len(lines), rows * cols):
            axes[a // cols][a % cols].set_visible(False)
        return to_svg(fig, "sequential", "Sequential chart statistics over the last shifts")


def _ratio(s) -> np.ndarray:
    stat = np.array(s.statistic, dtype=float)
    thr = np.array(s.threshold, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(thr > 0, stat / thr, np.nan)


def _last_ratio(s) -> float:
    r = _ratio(s)
    ok = r[np.isfinite(r)]
    return float(ok[-1]) if ok.size else -1.0


# --- the shift's Pareto ---------------------------------------------------------------------


def pareto(data: ReportData) -> str:
    """Defects per category in this shift over all lines, largest first, with the cumulative
    share; the count is written on each bar."""
    totals = np.array(data.counts, dtype=float).sum(axis=0) if data.counts else np.zeros(0)
    order = np.argsort(-totals, kind="stable")
    values = totals[order]
    names = [safe(data.categories[j][1], 18) for j in order]
    total = float(values.sum())
    with matplotlib.rc_context(RC):
        longest = max((len(n) for n in names), default=4)
        fig, axes = panels(1, 1, row_h=0.95, top=0.12, bottom=0.1 + 0.038 * longest, left=0.5,
                           right=0.5, width=WIDTH * 0.55)
        ax = axes[0][0]
        x = np.arange(len(values))
        ax.bar(x, values, color=NEUTRAL, width=0.7, zorder=2)
        for i, v in enumerate(values):
            ax.text(i, v, f"{int(v):,}", ha="center", va="bottom", fontsize=FONT - 1.5, color=INK)
        ax.set_xticks(x)
        ax.set_xticklabels(names, rotation=30, ha="right", rotation_mode="anchor")
        ax.set_ylabel("defects (count, all lines)")
        ax.set_ylim(0, max(values.max() if values.size else 1.0, 1.0) * 1.18)
        _style(ax)
        cum = ax.twinx()
        share = 100 * np.cumsum(values) / total if total > 0 else np.zeros(len(values))
        cum.plot(x, share, color=INK, marker="o", markersize=2.5, linewidth=0.9, zorder=3)
        cum.set_ylim(0, 105)
        cum.set_ylabel("cumulative share (%)")
        cum.spines["right"].set_visible(True)
        cum.spines["top"].set_visible(False)
        return to_svg(fig, "pareto", "Defects per category in this shift, largest first")
